"""The fast response model (response.py) against the time-domain Bloch + lock-in model (lockin.py).

Both solve the same equations with the same parameters: the fast model in closed form to first
order in the modulation, the slow one by direct integration and digital demodulation. Each field is
run alone at the time-domain model's default step (bloch.row_steps chooses it per field), so the
agreement shows the default step is good enough at that field, not borrowed from a higher one.
Directions close to a beam axis, where the amplitude vanishes and the phase is undefined, are left out.
"""

from __future__ import annotations

import numpy as np
import pytest

from fieldvane.firmware_sim.lockin import simulate_time_domain
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import default_config

MAX_PHASE_DEG = 0.05
MAX_AMPLITUDE_PCT = 0.05
FIELDS_NT = (1_000.0, 5_000.0, 20_000.0, 50_000.0)
N_DIRECTIONS = 16


def _fibonacci(n):
    k = np.arange(n) + 0.5
    z = 1.0 - 2.0 * k / n
    phi = np.pi * (1.0 + 5.0 ** 0.5) * k
    r = np.sqrt(1.0 - z * z)
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)


def _away_from_beams(cfg, u, n_keep, limit=0.25):
    """Keep directions where every channel's |p x u||q x u| exceeds limit."""
    pumps, probes = cfg.pump_array(), cfg.probe_array()
    amp = np.ones(u.shape[0])
    for ch in cfg.channels:
        p, q = pumps["ab".index(ch[1])], probes[int(ch[0]) - 1]
        amp = np.minimum(amp, np.linalg.norm(np.cross(p, u), axis=1) * np.linalg.norm(np.cross(q, u), axis=1))
    return u[amp > limit][:n_keep]


CASES = {
    # The nominal sensor with a couple of degrees of beam misalignment.
    "nominal": default_config(2, misalignment_deg=2.0),
    # Everything turned up: strong exchange, cross-pumping, heading error, unequal pumps, one probe.
    "stressed": default_config(1, misalignment_deg=4.0, spin_exchange_per_s=2500.0, cross_pumping=0.15,
                               heading_strength=4.0, modulation_depth=0.6, pump_rate_per_s=(300.0, 150.0),
                               relaxation_per_s=(250.0, 350.0), probe_weight=(0.5, -0.3), handedness=(1, -1)),
    # Every realism option on: light shifts (tilted precession axes, modulated fictitious field),
    # locked loops, Breit-Rabi heading, lower hyperfine levels, density-weighted exchange, pump
    # efficiency over the sphere.
    "realistic": default_config(2, misalignment_deg=2.0, spin_exchange_per_s=2250.0,
                                density_fraction=(0.2783, 0.7217), frequency_loop="locked",
                                heading_model="breit_rabi", pump_detuning_GHz=(0.8, -0.6),
                                lower_level_weight=(-0.08, -0.12), pump_angle_efficiency=(0.1, 0.1),
                                pump_power=(1.2, 0.9)),
}


_RESULTS: dict = {}


def _compare(name, b):
    """Return (cfg, u, z_slow, z_fast) for one case and field, each field run alone (cached)."""
    if (name, b) not in _RESULTS:
        cfg = CASES[name]
        u = _away_from_beams(cfg, _fibonacci(60), N_DIRECTIONS)
        z_slow = simulate_time_domain(cfg, u, b, settle_s=0.008, average_s=0.004)
        _, z_fast = response(cfg, u, b)
        _RESULTS[name, b] = cfg, u, z_slow, z_fast
    return _RESULTS[name, b]


@pytest.mark.parametrize("b", FIELDS_NT, ids=lambda b: f"{b / 1000:g}uT")
@pytest.mark.parametrize("name", sorted(CASES))
def test_fast_model_matches_time_domain_field_by_field(name, b):
    cfg, u, z_slow, z_fast = _compare(name, b)
    dphi = np.degrees(np.abs(np.angle(z_fast / z_slow)))
    damp = 100.0 * np.abs(np.abs(z_fast) / np.abs(z_slow) - 1.0)
    msg = (f"{name} at {b / 1000:g} uT alone: max phase difference {dphi.max():.4f} deg, max amplitude "
           f"difference {damp.max():.4f} % over {u.shape[0]} directions")
    print(msg)
    assert dphi.max() < MAX_PHASE_DEG and damp.max() < MAX_AMPLITUDE_PCT, msg


@pytest.mark.parametrize("name", sorted(CASES))
def test_comparison_is_sensitive_to_the_coupling(name):
    # The agreement above means something only if a wrong model would fail it: dropping the exchange
    # coupling from the fast model must put it visibly off the time-domain result at 1 uT.
    b = FIELDS_NT[0]
    cfg, u, z_slow, _ = _compare(name, b)
    f_mod = response(cfg, u, b)[0]
    _, z_wrong = response(cfg.replace(spin_exchange_per_s=0.0), u, b, f_mod_hz=f_mod)
    dphi = np.degrees(np.abs(np.angle(z_wrong / z_slow)))
    assert dphi.max() > 40 * MAX_PHASE_DEG, f"{name}: uncoupled model only {dphi.max():.3f} deg off"


@pytest.mark.parametrize("b", (FIELDS_NT[0], FIELDS_NT[-1]), ids=lambda b: f"{b / 1000:g}uT")
def test_comparison_is_sensitive_to_each_realism_option(b):
    # Likewise for the new effects: switching any one off in the fast model alone (same modulation
    # frequencies) must break the agreement with the time-domain model that has it.
    cfg, u, z_slow, _ = _compare("realistic", b)
    f_locked = response(cfg, u, b)[0]
    changes = {"pump_detuning_GHz": (0.0, 0.0), "lower_level_weight": (0.0, 0.0), "density_fraction": (),
               "pump_angle_efficiency": (0.0, 0.0)}
    if b == FIELDS_NT[-1]:
        changes["heading_model"] = "spacing"
    for key, value in changes.items():
        _, z_wrong = response(cfg.replace(**{key: value}), u, b, f_mod_hz=f_locked)
        dphi = np.degrees(np.abs(np.angle(z_wrong / z_slow)))
        damp = 100.0 * np.abs(np.abs(z_wrong) / np.abs(z_slow) - 1.0)
        assert max(dphi.max() / MAX_PHASE_DEG, damp.max() / MAX_AMPLITUDE_PCT) > 4, \
            f"without {key}: only {dphi.max():.3f} deg / {damp.max():.3f} % off at {b:g} nT"
