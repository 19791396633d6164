"""Calibration files: versioned JSON with the bulky tables in a sidecar .npz (never pickles); spec in docs/calibration_file.md."""

from __future__ import annotations

import datetime as _dt
import hashlib
import io as _stdio
import json
import math
import zipfile
from pathlib import Path

import numpy as np

from fieldvane import __version__
from fieldvane.estimator.calibration import Calibration, ChannelReport, RejectedRow
from fieldvane.estimator.constants import CELL_PAIRS
from fieldvane.estimator.harmonics import n_harmonics
from fieldvane.estimator.magnitude_error import MagnitudeCheck, check_magnitudes
from fieldvane.estimator.physics import LEAK_POWERS, PhysicsParameters
from fieldvane.estimator.physics_fit import N_LINEAR_TERMS
from fieldvane.estimator.response import ResponseModel
from fieldvane.estimator.samples import CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES
from fieldvane.estimator.sphere import axis_angle_deg
from fieldvane.io.errors import InputError
from fieldvane.io.outputs import atomic_files

FORMAT = "fieldvane-calibration"
VERSION = 2
READABLE_VERSIONS = (1, 2)
MAGNITUDE_INTERPOLATION = "cubic spline in ln|B| through the knots (not-a-knot ends), clamped outside"
BASIS = "orthonormal real spherical harmonics, degrees 0..degree, index l*l + l + m"
MAX_DEGREE = 20            # a table beyond this is not one fieldvane writes
REJECTED_LISTED = 200      # rejected rows listed one by one in the JSON (the rest counted)
KNOWN_ISOTOPES = {name for pair in CELL_PAIRS.values() for name in pair}


def tables_path(json_path: str | Path) -> Path:
    """Return the sidecar tables path (.npz) of a calibration JSON path."""
    return Path(json_path).with_suffix(".npz")


def _vec(v, digits: int = 9) -> list[float]:
    return [round(float(x), digits) for x in np.ravel(v)]


def _table_arrays(cal: Calibration) -> dict[str, np.ndarray]:
    m, ph = cal.model, cal.physics
    out = {"coef_real": m.coef.real, "coef_imag": m.coef.imag}
    for name in ("gains", "quadrature", "leak", "offset", "leak_quadrature"):
        v = np.asarray(getattr(ph, name), complex)
        out[f"{name}_real"], out[f"{name}_imag"] = v.real, v.imag
    eff = np.asarray(ph.efficiency, complex)
    out["efficiency_real"], out["efficiency_imag"] = eff.real, eff.imag
    out["detuning"] = np.asarray(ph.detuning, float)
    out["detuning_law"] = np.asarray(ph.detuning_law, float)
    out["detuning_shape"] = np.asarray(ph.detuning_shape, float)
    return out


def calibration_document(cal: Calibration, tables_name: str, tables_sha: str, source: dict | None = None,
                         sensor: dict | None = None) -> dict:
    """Return the CAL.json document (a dict of plain JSON values) of a Calibration."""
    m, ph = cal.model, cal.physics
    std = cal.direction_std_deg if cal.direction_std_deg is not None else np.full(2 + ph.probe_axes.shape[0], np.nan)

    def beam(bid, axis, nominal, names, index, sigma):
        entry = {"id": bid, "direction": _vec(axis)}
        if math.isfinite(float(sigma)):
            entry["direction_std_deg"] = round(float(sigma), 6)
        if nominal is not None:
            entry["nominal_direction"] = _vec(nominal[index])
            entry["angle_to_nominal_deg"] = round(float(axis_angle_deg(axis, nominal[index])), 4)
        if sensor and sensor.get(names):
            entry["name"] = sensor[names][index]
        return entry

    eff_std = cal.fit_info.get("efficiency_std")
    pumps = []
    for j, pid in enumerate("ab"):
        entry = dict(beam(pid, ph.pump_axes[j], cal.nominal_pump_axes, "pump_names", j, std[j]),
                     isotope=cal.pump_isotopes[j], gamma_hz_per_nT=round(float(cal.gammas_hz_per_nt[j]), 9))
        entry["efficiency"] = {"own": _vec([ph.efficiency[j, j].real, ph.efficiency[j, j].imag], 6),
                               "other": _vec([ph.efficiency[j, 1 - j].real, ph.efficiency[j, 1 - j].imag], 6)}
        if eff_std is not None:
            entry["efficiency"]["own_std"] = _vec(eff_std[j][j], 6)
            entry["efficiency"]["other_std"] = _vec(eff_std[j][1 - j], 6)
        entry["heading_detuning_at_50uT"] = {"own": round(float(ph.detuning_law[j, j, 1]), 6),
                                             "other": round(float(ph.detuning_law[j, 1 - j, 1]), 6)}
        pumps.append(entry)
    probes = [beam(str(i + 1), ph.probe_axes[i], cal.nominal_probe_axes, "probe_names", i, std[2 + i])
              for i in range(ph.probe_axes.shape[0])]
    channels = []
    corr = cal.correction_rms_V if cal.correction_rms_V is not None else np.zeros(m.n_channels)
    for k, ch in enumerate(m.channels):
        rep = cal.channel_reports[k]
        a = ph.gains[k]
        safe = np.where(np.abs(a) > 0, a, 1.0)
        channels.append({
            "id": ch, "pump": ch[1], "probe": ch[0], "handedness": int(ph.handedness[k]),
            "gain_V": _vec(np.abs(a)), "phase_deg": _vec(np.degrees(np.angle(a))),
            "quadrature_ratio_pct": _vec(100 * (np.abs(ph.quadrature[k] / safe) - 1), 5),
            "leak_pct": _vec(100 * np.abs(ph.leak[k] / safe), 5),
            "leak_phase_deg": _vec(np.degrees(np.angle(ph.leak[k] / safe)), 4),
            "quadrature_leak_V": [_vec([m.real, m.imag], 9) for m in ph.leak_quadrature[k]],
            "noise_V": float(m.noise_std[k]),
            "correction_rms_V": float(corr[k]),
            "heldout_phase_deg": round(rep.heldout_phase_deg, 5),
            "heldout_amplitude_pct": round(rep.heldout_amplitude_pct, 5)})
    rejected = cal.rejected_rows
    diagnostics = {
        "rows": cal.n_rows,
        "heldout_rms_V_by_correction_degree": {str(k): v for k, v in cal.degree_scores.items()},
        "coverage_fraction": round(cal.coverage_fraction, 4),
        "sparse_regions_polar_azimuth_deg": [list(map(float, r)) for r in cal.sparse_regions],
        "rejected_rows": len(rejected),
        "rejected": [{"line": r.line, "data_row": r.index + 1, "reason": r.reason, "channel": r.channel,
                      "detail": r.detail} for r in rejected[:REJECTED_LISTED]],
        "physics_fit": _plain(cal.fit_info),
        "warnings": list(cal.warnings),
    }
    doc = {
        "format": FORMAT, "version": VERSION,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "fieldvane_version": __version__,
        "source": source or {},
        "pumps": pumps, "probes": probes, "channels": channels,
        "magnitude_knots_nT": _vec(m.basis.knots_nT),
        "model": {"basis": BASIS, "degree": m.degree, "correction_degree": cal.correction_degree,
                  "magnitude_interpolation": MAGNITUDE_INTERPOLATION,
                  "tables": tables_name, "tables_sha256": tables_sha},
        "diagnostics": diagnostics,
    }
    if cal.magnitude_check is not None:
        doc["magnitude_check"] = _magnitude_check_doc(cal.magnitude_check)
    if getattr(cal, "magnitude_model", None) is not None:
        doc["magnitude_model"] = cal.magnitude_model.to_dict()
    if getattr(cal, "scan_lockin", None) is not None:
        doc["scan_lockin"] = {"time_constant_s": float(cal.scan_lockin[0]), "filter_order": int(cal.scan_lockin[1])}
    if sensor and sensor.get("mounting_rotation") is not None:
        doc["mounting_rotation"] = [_vec(r) for r in np.asarray(sensor["mounting_rotation"])]
    if sensor and sensor.get("name"):
        doc["sensor_name"] = sensor["name"]
    return doc


def _plain(value):
    """Return value with numpy scalars and arrays turned into JSON numbers and lists."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_plain(v) for v in value]
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return round(float(value), 9)
    return value


def _magnitude_check_doc(mc: MagnitudeCheck) -> dict:
    return {"levels_nT": _vec(mc.levels_nT, 6), "level_rows": [int(x) for x in mc.level_rows],
            "stepped": bool(mc.stepped),
            "leave_one_level_out_ratio": [_vec(r, 6) for r in mc.lolo_ratio],
            "envelope_amplitudes": [_vec(r, 9) for r in mc.amplitudes],
            "length_scale_ln_nT": round(float(mc.length_scale), 6),
            "reference_nT": round(float(mc.reference_nT), 6),
            "end_slope_ratio": [_vec(r, 9) for r in mc.end_slope_ratio]}


def save_calibration(cal: Calibration, path: str | Path, source: dict | None = None,
                     sensor: dict | None = None) -> Path:
    """Write CAL.json and its sidecar CAL.npz together (temporary names, renamed on success); returns the JSON path."""
    path = Path(path)
    npz_path = tables_path(path)
    if npz_path == path:
        raise InputError("the calibration JSON would be written over its own tables file; name it *.json",
                         str(path), column="--output")
    buf = _stdio.BytesIO()
    np.savez(buf, **_table_arrays(cal))
    raw = buf.getvalue()
    doc = calibration_document(cal, npz_path.name, hashlib.sha256(raw).hexdigest(), source, sensor)
    text = json.dumps(doc, indent=2, allow_nan=False) + "\n"
    with atomic_files([path, npz_path]) as (tmp_json, tmp_npz):
        tmp_npz.write_bytes(raw)
        tmp_json.write_text(text, encoding="utf-8")
    return path


# ----------------------------------------------------------------------------- reading

class _Reader:
    """Strict accessors over a parsed CAL.json that raise InputError naming the file and key."""

    def __init__(self, path: Path):
        self.path = str(path)

    def fail(self, key: str | None, message: str):
        raise InputError(message, self.path, column=key, kind="key" if key is not None else None)

    def get(self, obj, key: str, where: str):
        if not isinstance(obj, dict):
            self.fail(where or None, "must be a JSON object")
        if key not in obj:
            self.fail(f"{where}.{key}" if where else key, "required field missing")
        return obj[key]

    def number(self, value, key: str, positive: bool = False) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            self.fail(key, f"must be a finite number, got {json.dumps(value)[:40]}")
        if positive and value <= 0:
            self.fail(key, f"must be > 0, got {value}")
        return float(value)

    def numbers(self, value, key: str, n: int | None = None, positive: bool = False) -> np.ndarray:
        if not isinstance(value, list) or (n is not None and len(value) != n):
            self.fail(key, f"must be a list of {n if n is not None else 'some'} numbers")
        return np.array([self.number(v, f"{key}[{i}]", positive) for i, v in enumerate(value)])

    def direction(self, value, key: str) -> np.ndarray:
        v = self.numbers(value, key, 3)
        if np.linalg.norm(v) == 0:
            self.fail(key, "must be a non-zero vector")
        return v / np.linalg.norm(v)

    def integer(self, value, key: str, lo: int, hi: int) -> int:
        if type(value) is not int or not lo <= value <= hi:
            self.fail(key, f"must be a whole number from {lo} to {hi}, got {json.dumps(value)[:40]}")
        return value


def _read_document(path: Path) -> dict:
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read calibration: {exc.strerror}", str(path)) from None
    if raw[:4] == b"PK\x03\x04" or path.suffix.lower() == ".npz":
        raise InputError("this is a calibration's table file (.npz); give the .json beside it", str(path))
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("not a fieldvane calibration: binary or not UTF-8 text", str(path)) from None
    if "\x00" in text:
        raise InputError("not a fieldvane calibration: binary data", str(path))

    def no_constants(name):
        raise ValueError(f"{name} is not allowed")

    try:
        doc = json.loads(text, parse_constant=no_constants)
    except json.JSONDecodeError as exc:
        raise InputError(f"not valid JSON ({exc.msg})", str(path), exc.lineno) from None
    except ValueError as exc:
        raise InputError(f"not valid calibration JSON ({exc}: numbers must be finite)", str(path)) from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise InputError(f"not a fieldvane calibration (field 'format' must be {FORMAT!r})", str(path))
    version = doc.get("version")
    if type(version) is not int or version not in READABLE_VERSIONS:
        raise InputError(f"must be the whole number {' or '.join(map(str, READABLE_VERSIONS))}, got "
                         f"{json.dumps(version)[:40]} (this fieldvane reads calibration versions "
                         f"{', '.join(map(str, READABLE_VERSIONS))})", str(path), column="version", kind="key")
    return doc


def _read_tables(rd: _Reader, path: Path, model_doc: dict) -> dict[str, np.ndarray]:
    name = rd.get(model_doc, "tables", "model")
    sha = rd.get(model_doc, "tables_sha256", "model")
    if not isinstance(name, str) or not name or Path(name).name != name:
        rd.fail("model.tables", "must be a file name beside the calibration")
    if not isinstance(sha, str):
        rd.fail("model.tables_sha256", "must be a hex string")
    npz_path = path.parent / name
    try:
        raw = npz_path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read calibration tables: {exc.strerror}", str(npz_path)) from None
    if hashlib.sha256(raw).hexdigest() != sha:
        raise InputError("tables file does not match the checksum in the calibration "
                         "(was it replaced or damaged?)", str(npz_path))
    try:
        with np.load(_stdio.BytesIO(raw), allow_pickle=False) as z:
            arrays = {k: np.asarray(z[k]) for k in z.files}
    except (ValueError, OSError, zipfile.BadZipFile, KeyError) as exc:
        raise InputError(f"tables file is not a readable .npz ({exc})", str(npz_path)) from None
    for k, v in arrays.items():
        if v.dtype.kind not in "fiu":
            raise InputError(f"array {k!r} is not numeric", str(npz_path))
        if not np.all(np.isfinite(v)):
            raise InputError(f"array {k!r} holds a non-finite value (NaN or infinity)", str(npz_path))
    return arrays


def _complex(arrays, name, shape, npz_path, required=True):
    if f"{name}_real" not in arrays or f"{name}_imag" not in arrays:
        if required:
            raise InputError(f"array {name}_real / {name}_imag missing", str(npz_path))
        return None
    v = arrays[f"{name}_real"].astype(float) + 1j * arrays[f"{name}_imag"].astype(float)
    if v.shape != shape:
        raise InputError(f"array {name} has shape {v.shape}, expected {shape}", str(npz_path))
    return v


def load_calibration(path: str | Path) -> Calibration:
    """Read CAL.json and its sidecar tables; raise InputError naming the file and field on anything off."""
    path = Path(path)
    doc = _read_document(path)
    rd = _Reader(path)
    version = doc["version"]
    try:
        return _build(rd, path, doc, version)
    except InputError:
        raise
    except (KeyError, TypeError, ValueError, IndexError, AttributeError) as exc:
        raise InputError(f"malformed calibration: {exc}", str(path)) from None


def _build(rd: _Reader, path: Path, doc: dict, version: int) -> Calibration:
    ch_docs = rd.get(doc, "channels", "")
    if not isinstance(ch_docs, list) or not ch_docs:
        rd.fail("channels", "must be a non-empty list")
    channels = tuple(rd.get(c, "id", f"channels[{i}]") for i, c in enumerate(ch_docs))
    if channels not in (CHANNELS_ONE_PROBE, CHANNELS_TWO_PROBES):
        bad = next((f"channels[{i}].id" for i, c in enumerate(channels)
                    if c not in CHANNELS_TWO_PROBES), "channels")
        rd.fail(bad, f"channel ids must be {', '.join(CHANNELS_ONE_PROBE)} or {', '.join(CHANNELS_TWO_PROBES)} "
                     f"in that order, got {', '.join(map(str, channels))}")
    c_n = len(channels)
    for i, (c, cd) in enumerate(zip(channels, ch_docs)):
        if cd.get("pump", c[1]) != c[1] or str(cd.get("probe", c[0])) != c[0]:
            rd.fail(f"channels[{i}]", f"pump/probe fields disagree with the id {c!r}")
    noise = np.array([rd.number(rd.get(cd, "noise_V", f"channels[{i}]"), f"channels[{i}].noise_V", positive=True)
                      for i, cd in enumerate(ch_docs)])
    hand = np.array([float(rd.get(cd, "handedness", f"channels[{i}]")) for i, cd in enumerate(ch_docs)])
    for i, h in enumerate(hand):
        if isinstance(ch_docs[i]["handedness"], bool) or h not in (1.0, -1.0):
            rd.fail(f"channels[{i}].handedness", f"must be 1 or -1, got {json.dumps(ch_docs[i]['handedness'])}")

    pump_docs = rd.get(doc, "pumps", "")
    probe_docs = rd.get(doc, "probes", "")
    if not isinstance(pump_docs, list) or [rd.get(p, "id", f"pumps[{i}]") for i, p in enumerate(pump_docs)] != ["a", "b"]:
        rd.fail("pumps", "must list pump 'a' then pump 'b'")
    n_probes = 1 if channels == CHANNELS_ONE_PROBE else 2
    want = [str(i + 1) for i in range(n_probes)]
    if not isinstance(probe_docs, list) or [rd.get(p, "id", f"probes[{i}]") for i, p in enumerate(probe_docs)] != want:
        rd.fail("probes", f"must list probe(s) {', '.join(want)} to match the channels")
    isotopes = []
    for j, p in enumerate(pump_docs):
        iso = rd.get(p, "isotope", f"pumps[{j}]")
        if iso not in KNOWN_ISOTOPES:
            rd.fail(f"pumps[{j}].isotope", f"unknown isotope {json.dumps(iso)[:30]}; known: "
                                           f"{', '.join(sorted(KNOWN_ISOTOPES))}")
        isotopes.append(iso)
    if isotopes[0] == isotopes[1] or not any(set(isotopes) == set(pair) for pair in CELL_PAIRS.values()):
        rd.fail("pumps", f"the two pumps must pump the two isotopes of one cell, got {', '.join(isotopes)}")
    pump_axes = np.array([rd.direction(rd.get(p, "direction", f"pumps[{j}]"), f"pumps[{j}].direction")
                          for j, p in enumerate(pump_docs)])
    probe_axes = np.array([rd.direction(rd.get(p, "direction", f"probes[{i}]"), f"probes[{i}].direction")
                           for i, p in enumerate(probe_docs)])

    knots = rd.numbers(rd.get(doc, "magnitude_knots_nT", ""), "magnitude_knots_nT", positive=True)
    if knots.size == 0 or (knots.size > 1 and np.any(np.diff(knots) <= 0)):
        rd.fail("magnitude_knots_nT", "must be a non-empty list of increasing magnitudes")
    k_n = knots.size
    model_doc = rd.get(doc, "model", "")
    degree = rd.integer(rd.get(model_doc, "degree", "model"), "model.degree", 0, MAX_DEGREE)
    corr_degree = rd.integer(rd.get(model_doc, "correction_degree", "model"), "model.correction_degree",
                             -1, MAX_DEGREE)
    arrays = _read_tables(rd, path, model_doc)
    npz_path = path.parent / model_doc["tables"]
    coef = _complex(arrays, "coef", (c_n, k_n, n_harmonics(degree)), npz_path)
    gains = _complex(arrays, "gains", (c_n, k_n), npz_path)
    extras = {name: _complex(arrays, name, (c_n, k_n), npz_path, required=version >= 2)
              for name in ("quadrature", "leak", "offset")}
    leak_q = _complex(arrays, "leak_quadrature", (c_n, len(LEAK_POWERS)), npz_path, required=version >= 2)
    efficiency = _complex(arrays, "efficiency", (2, 2), npz_path, required=version >= 2)
    shapes = {"detuning": (2, 2, k_n), "detuning_law": (2, 2, 2), "detuning_shape": (2, 2, 2)}
    extra_real = {}
    for name, shape in shapes.items():
        v = arrays.get(name)
        if v is None and version >= 2:
            raise InputError(f"array {name} missing", str(npz_path))
        if v is not None and v.shape != shape:
            raise InputError(f"array {name} has shape {v.shape}, expected {shape}", str(npz_path))
        extra_real[name] = None if v is None else v.astype(float)

    model = ResponseModel(channels, degree, knots, coef, noise)
    phys = PhysicsParameters(pump_axes, probe_axes, gains, hand, channels, extras["quadrature"], extras["leak"],
                             extras["offset"], efficiency, extra_real["detuning"], leak_q, knots,
                             extra_real["detuning_law"], extra_real["detuning_shape"])
    reports = [ChannelReport(c, float(noise[i]),
                             rd.number(cd.get("heldout_phase_deg", 0.0), f"channels[{i}].heldout_phase_deg"),
                             rd.number(cd.get("heldout_amplitude_pct", 0.0), f"channels[{i}].heldout_amplitude_pct"))
               for i, (c, cd) in enumerate(zip(channels, ch_docs))]
    diag = doc.get("diagnostics", {})
    if not isinstance(diag, dict):
        rd.fail("diagnostics", "must be a JSON object")
    nominal_p = [p.get("nominal_direction") for p in pump_docs]
    nominal_q = [p.get("nominal_direction") for p in probe_docs]
    stds = [p.get("direction_std_deg") for p in list(pump_docs) + list(probe_docs)]
    direction_std = None if any(s is None for s in stds) else np.array(
        [rd.number(s, "direction_std_deg") for s in stds])
    corr_rms = np.array([float(cd.get("correction_rms_V", 0.0)) for cd in ch_docs])
    rejected = [RejectedRow(int(r.get("data_row", 1)) - 1, r.get("line"), str(r.get("reason", "")),
                            r.get("channel"), str(r.get("detail", ""))) for r in diag.get("rejected", [])]
    rows = diag.get("rows", 0)
    cal = Calibration(
        model, phys, tuple(isotopes), corr_degree, reports,
        {int(k): float(v) for k, v in diag.get("heldout_rms_V_by_correction_degree", {}).items()},
        float(diag.get("coverage_fraction", float("nan"))),
        [tuple(r) for r in diag.get("sparse_regions_polar_azimuth_deg", [])],
        int(rows) if type(rows) is int else 0, [str(w) for w in diag.get("warnings", [])],
        None if None in nominal_p else np.array([rd.direction(v, "nominal_direction") for v in nominal_p]),
        None if None in nominal_q else np.array([rd.direction(v, "nominal_direction") for v in nominal_q]),
        direction_std_deg=direction_std, rejected_rows=rejected, correction_rms_V=corr_rms,
        fit_info=diag.get("physics_fit", {}) if isinstance(diag.get("physics_fit", {}), dict) else {})
    if "magnitude_check" in doc:
        cal.magnitude_check = _read_magnitude_check(rd, doc["magnitude_check"], knots, c_n)
    else:
        # Version 1 carries no check: rebuild it from the table, assuming the rows were spread evenly.
        per_knot = max(1, cal.n_rows // k_n) if cal.n_rows else 100
        b_rows = np.repeat(knots, per_knot)
        params = N_LINEAR_TERMS + (n_harmonics(corr_degree) if corr_degree >= 0 else 0)
        cal.magnitude_check = check_magnitudes(coef, knots, noise, b_rows, params)
    if "magnitude_model" in doc:
        from fieldvane.estimator.magnitude_model import MagnitudeModel

        try:
            cal.magnitude_model = MagnitudeModel.from_dict(doc["magnitude_model"])
        except (TypeError, ValueError) as exc:
            key, _, message = str(exc).partition(": ")
            rd.fail(key if key.startswith("magnitude_model") else "magnitude_model", message or str(exc))
    if "scan_lockin" in doc:
        lk = doc["scan_lockin"]
        if not isinstance(lk, dict):
            rd.fail("scan_lockin", "must be a JSON object")
        order = rd.get(lk, "filter_order", "scan_lockin")
        if not isinstance(order, int) or isinstance(order, bool) or not 1 <= order <= 16:
            rd.fail("scan_lockin.filter_order", f"must be a whole number of RC stages 1..16, got {json.dumps(order)}")
        tau = rd.number(rd.get(lk, "time_constant_s", "scan_lockin"), "scan_lockin.time_constant_s")
        if tau < 0:
            rd.fail("scan_lockin.time_constant_s", f"must be >= 0 s (0: no lock-in filter), got {tau}")
        cal.scan_lockin = (tau, order)
    return cal


def _read_magnitude_check(rd: _Reader, mc, knots: np.ndarray, c_n: int) -> MagnitudeCheck:
    key = "magnitude_check"
    if not isinstance(mc, dict):
        rd.fail(key, "must be a JSON object")
    levels = rd.numbers(rd.get(mc, "levels_nT", key), f"{key}.levels_nT", positive=True)
    rows = rd.numbers(rd.get(mc, "level_rows", key), f"{key}.level_rows", levels.size)
    stepped = rd.get(mc, "stepped", key)
    if not isinstance(stepped, bool):
        rd.fail(f"{key}.stepped", "must be true or false")
    lolo = np.array([rd.numbers(r, f"{key}.leave_one_level_out_ratio[{i}]", c_n)
                     for i, r in enumerate(rd.get(mc, "leave_one_level_out_ratio", key))]).reshape(-1, c_n)
    amps_doc = rd.get(mc, "envelope_amplitudes", key)
    if not isinstance(amps_doc, list) or len(amps_doc) != 3:
        rd.fail(f"{key}.envelope_amplitudes", "must be 3 lists, one per envelope")
    amps = np.array([rd.numbers(r, f"{key}.envelope_amplitudes[{i}]", c_n) for i, r in enumerate(amps_doc)])
    if np.any(amps < 0):
        rd.fail(f"{key}.envelope_amplitudes", "must not be negative")
    ell = rd.number(rd.get(mc, "length_scale_ln_nT", key), f"{key}.length_scale_ln_nT", positive=True)
    ref = rd.number(rd.get(mc, "reference_nT", key), f"{key}.reference_nT", positive=True)
    slopes_doc = rd.get(mc, "end_slope_ratio", key)
    if not isinstance(slopes_doc, list) or len(slopes_doc) != 2:
        rd.fail(f"{key}.end_slope_ratio", "must be 2 lists (lowest, highest knot)")
    slopes = np.array([rd.numbers(r, f"{key}.end_slope_ratio[{i}]", c_n) for i, r in enumerate(slopes_doc)])
    return MagnitudeCheck(levels, rows.astype(int), stepped, knots, lolo, amps, ell, ref, slopes)
