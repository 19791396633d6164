"""FilterSettings: defaults, validation with clear messages, and the dict/TOML round trip."""

import math
import tomllib

import pytest

from fieldvane.estimator.filter_settings import FilterSettings


def test_defaults_are_valid_and_documented_units():
    s = FilterSettings()
    assert s.gate_probability == 0.9999
    assert s.lost_after_gated == 10
    assert s.gain_drift and not s.phase_drift          # optical power drifts on every bench: gain states on
    assert math.isinf(s.blind_threshold_deg)
    assert s.adaptive_noise and s.adaptive_noise_window_samples <= 2 * s.lost_after_gated - 5


def test_round_trip_through_dict_and_toml_text():
    s = FilterSettings(rate_random_walk_deg_s_rt_s=0.3, phase_drift=True, lost_after_gated=4)
    d = s.to_dict()
    assert FilterSettings.from_dict(d) == s
    # Written by hand the way io would write it (TOML floats include inf; integers may stand for floats).
    text = "\n".join(f"{k} = {str(v).lower() if isinstance(v, bool) else v}" for k, v in d.items())
    assert FilterSettings.from_dict(tomllib.loads(text)) == s
    assert FilterSettings.from_dict({"measurement_noise_scale": 2}).measurement_noise_scale == 2.0


@pytest.mark.parametrize("changes, words", [
    ({"gate_probability": 1.5}, "gate_probability"),
    ({"gate_probability": 0.3}, "between 0.5 and 1"),
    ({"angle_random_walk_deg_rt_s": -1.0}, "angle_random_walk_deg_rt_s must be > 0"),
    ({"rate_random_walk_deg_s_rt_s": math.nan}, "rate_random_walk_deg_s_rt_s must be > 0"),
    ({"measurement_noise_scale": math.inf}, "must be finite"),
    ({"lost_after_gated": 0}, "at least 1"),
    ({"lost_after_gated": 2.5}, "whole number"),
    ({"gain_drift": 1}, "true or false"),
    ({"nis_average_limit": 0.9}, "NIS/dof = 1"),
    ({"low_signal_fraction": 1.0}, "low_signal_fraction"),
    ({"max_gap_s": "1"}, "must be a number"),
    ({"adaptive_noise": "yes"}, "true or false"),
    ({"adaptive_noise_window_samples": 2}, "at least 3"),
    ({"adaptive_noise_window_samples": 9.0}, "whole number"),
    ({"adaptive_noise_max_scale": 0.5}, "adaptive_noise_max_scale must be finite and >= 1"),
    ({"adaptive_noise_max_scale": math.inf}, "adaptive_noise_max_scale"),
    ({"adaptive_noise_threshold": 0.9}, "between 1 and adaptive_noise_max_scale"),
    ({"adaptive_noise_threshold": 2.0, "adaptive_noise_max_scale": 1.2}, "adaptive_noise_threshold"),
    ({"adaptive_noise_threshold": math.nan}, "adaptive_noise_threshold"),
])
def test_invalid_values_name_the_setting(changes, words):
    with pytest.raises(ValueError, match=words):
        FilterSettings(**changes)


def test_unknown_keys_are_named():
    with pytest.raises(ValueError, match="unknown filter setting.*gate_prob\\b.*known:"):
        FilterSettings.from_dict({"gate_prob": 0.99})
    with pytest.raises(ValueError, match="table"):
        FilterSettings.from_dict([("gate_probability", 0.99)])


def test_settings_are_frozen_and_replace_validates():
    s = FilterSettings()
    with pytest.raises(Exception):
        s.gate_probability = 0.5
    assert s.replace(gate_probability=0.999).gate_probability == 0.999
    with pytest.raises(ValueError, match="gate_probability"):
        s.replace(gate_probability=2.0)


# ------------------------------------------------------------------- the filter TOML file (io side)

from fieldvane.io.errors import InputError  # noqa: E402
from fieldvane.io.filterfile import read_filter_settings, write_filter_settings  # noqa: E402


@pytest.mark.parametrize("text, words", [
    ("version = 1\n[filtre]\ngate_probability = 0.99\n",
     r"f.toml:2: key 'filtre': unknown section \(did you mean filter\?\)"),
    ("version = 1\n", r"f.toml: key 'filter': missing: needs a \[filter\] table"),
    ("version = 1\ngate_probability = 0.99\n[filter]\n",
     r"f.toml:2: key 'gate_probability': unknown key \(settings belong inside"),
    ("version = true\n[filter]\n", r"f.toml:1: key 'version': must be the whole number 1, got true"),
    ("version = 1.0\n[filter]\n", r"f.toml:1: key 'version': must be the whole number 1, got 1.0"),
    ("version = 2\n[filter]\n", r"key 'version': must be the whole number 1, got 2 \(a newer"),
    ("[filter]\n", r"key 'version': missing"),
    ("version = 1\n[filter]\n\ngate_prob = 0.99\n",
     r"f.toml:4: key 'filter.gate_prob': unknown key \(did you mean gate_probability\?\)"),
    ("version = 1\n[filter]\nangle_random_walk_deg_rt_s = 1e308\n",
     r"f.toml:3: key 'filter.angle_random_walk_deg_rt_s': must be below 1e6"),
    ("version = 1\n[filter]\nadaptive_noise_window_samples = 1000000000\n",
     r"f.toml:3: key 'filter.adaptive_noise_window_samples': must be at most 100001"),
    ("version = 1\n[filter]\nmax_gap_s = \"1\"\n", r"f.toml:3: key 'filter.max_gap_s': must be a number"),
    ("version = 1\n[filter]\nmax_gap_s = nan\n", r"key 'filter.max_gap_s': must be > 0"),
    ("version = 1\n[filter\n", r"f.toml:2: not valid TOML"),
])
def test_filter_file_refuses_typos_and_bad_values_by_name(tmp_path, text, words):
    path = tmp_path / "f.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=words):
        read_filter_settings(path)


def test_filter_file_not_utf8_names_the_line(tmp_path):
    path = tmp_path / "f.toml"
    path.write_bytes(b"version = 1\n# caf\xe9 au lait\n[filter]\n")
    with pytest.raises(InputError, match=r"f.toml:2: not UTF-8 text \(byte 0xe9"):
        read_filter_settings(path)


def test_filter_file_round_trip_and_atomic_write(tmp_path):
    s = FilterSettings(max_gap_s=2.5, lost_after_gated=7, blind_threshold_deg=math.inf)
    path = write_filter_settings(tmp_path / "sub" / "f.toml", s, ["written by a test"])
    assert read_filter_settings(path) == s
    assert path.read_text().startswith("# written by a test\nversion = 1\n")
    assert [p.name for p in path.parent.iterdir()] == ["f.toml"]      # no partial file left
