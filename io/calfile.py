"""Calibration files: versioned JSON with the bulky tables in a sidecar .npz (never pickles)."""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from pathlib import Path

import numpy as np

from fieldvane import __version__
from fieldvane.estimator.calibration import Calibration, ChannelReport
from fieldvane.estimator.physics import PhysicsParameters
from fieldvane.estimator.response import ResponseModel
from fieldvane.estimator.sphere import axis_angle_deg
from fieldvane.io.errors import InputError

FORMAT = "fieldvane-calibration"
VERSION = 1
MAGNITUDE_INTERPOLATION = "cubic spline in ln|B| through the knots (not-a-knot ends), clamped outside"
BASIS = "orthonormal real spherical harmonics, degrees 0..degree, index l*l + l + m"


def _tables_path(json_path: Path) -> Path:
    return json_path.with_suffix(".npz")


def save_calibration(cal: Calibration, path: str | Path, source: dict | None = None,
                     sensor: dict | None = None) -> Path:
    """Write CAL.json and its sidecar CAL.npz; returns the JSON path."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    npz_path = _tables_path(path)
    m, ph = cal.model, cal.physics
    with open(npz_path, "wb") as fh:
        np.savez(fh, coef_real=m.coef.real, coef_imag=m.coef.imag,
                 gains_real=ph.gains.real, gains_imag=ph.gains.imag)
    tables_sha = hashlib.sha256(npz_path.read_bytes()).hexdigest()

    def vec(v):
        return [round(float(x), 9) for x in v]

    def beam(bid, axis, nominal, names, index):
        entry = {"id": bid, "direction": vec(axis)}
        if nominal is not None:
            entry["nominal_direction"] = vec(nominal[index])
            entry["angle_to_nominal_deg"] = round(float(axis_angle_deg(axis, nominal[index])), 4)
        if sensor and sensor.get(names):
            entry["name"] = sensor[names][index]
        return entry

    pumps = [dict(beam(pid, ph.pump_axes[j], cal.nominal_pump_axes, "pump_names", j),
                  isotope=cal.pump_isotopes[j], gamma_hz_per_nT=round(float(cal.gammas_hz_per_nt[j]), 9))
             for j, pid in enumerate("ab")]
    probes = [beam(str(i + 1), ph.probe_axes[i], cal.nominal_probe_axes, "probe_names", i)
              for i in range(ph.probe_axes.shape[0])]
    channels = []
    for k, ch in enumerate(m.channels):
        rep = cal.channel_reports[k]
        channels.append({"id": ch, "pump": ch[1], "probe": ch[0], "handedness": int(ph.handedness[k]),
                         "gain_V": vec(np.abs(ph.gains[k])),
                         "phase_deg": vec(np.degrees(np.angle(ph.gains[k]))),
                         "noise_V": float(m.noise_std[k]),
                         "heldout_phase_deg": round(rep.heldout_phase_deg, 5),
                         "heldout_amplitude_pct": round(rep.heldout_amplitude_pct, 5)})
    doc = {
        "format": FORMAT, "version": VERSION,
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "fieldvane_version": __version__,
        "source": source or {},
        "pumps": pumps, "probes": probes, "channels": channels,
        "magnitude_knots_nT": vec(m.basis.knots_nT),
        "model": {"basis": BASIS, "degree": m.degree, "correction_degree": cal.correction_degree,
                  "magnitude_interpolation": MAGNITUDE_INTERPOLATION,
                  "tables": npz_path.name, "tables_sha256": tables_sha},
        "diagnostics": {"rows": cal.n_rows,
                        "heldout_rms_V_by_correction_degree": {str(k): v for k, v in cal.degree_scores.items()},
                        "coverage_fraction": round(cal.coverage_fraction, 4),
                        "sparse_regions_polar_azimuth_deg": [list(map(float, r)) for r in cal.sparse_regions],
                        "warnings": list(cal.warnings)},
    }
    if sensor and sensor.get("mounting_rotation") is not None:
        doc["mounting_rotation"] = [vec(r) for r in np.asarray(sensor["mounting_rotation"])]
    if sensor and sensor.get("name"):
        doc["sensor_name"] = sensor["name"]
    path.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    return path


def load_calibration(path: str | Path) -> Calibration:
    """Read CAL.json and its sidecar tables; raise InputError naming the file and field on anything off."""
    path = Path(path)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cannot read calibration: {exc.strerror}", str(path)) from None
    except json.JSONDecodeError as exc:
        raise InputError(f"not valid JSON ({exc.msg})", str(path), exc.lineno) from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise InputError(f"not a fieldvane calibration (field 'format' must be {FORMAT!r})", str(path))
    if doc.get("version") != VERSION:
        raise InputError(f"calibration version {doc.get('version')!r} is not supported (this "
                         f"fieldvane reads version {VERSION})", str(path))
    try:
        model_doc = doc["model"]
        npz_path = path.parent / model_doc["tables"]
        raw = npz_path.read_bytes()
        if hashlib.sha256(raw).hexdigest() != model_doc["tables_sha256"]:
            raise InputError("tables file does not match the checksum in the calibration "
                             "(was it replaced or damaged?)", str(npz_path))
        with np.load(npz_path, allow_pickle=False) as z:
            coef = z["coef_real"] + 1j * z["coef_imag"]
            gains = z["gains_real"] + 1j * z["gains_imag"]
        channels = tuple(c["id"] for c in doc["channels"])
        noise = [float(c["noise_V"]) for c in doc["channels"]]
        model = ResponseModel(channels, int(model_doc["degree"]), doc["magnitude_knots_nT"], coef, noise)
        pumps = sorted(doc["pumps"], key=lambda p: p["id"])
        probes = sorted(doc["probes"], key=lambda p: p["id"])
        phys = PhysicsParameters(np.array([p["direction"] for p in pumps], float),
                                 np.array([p["direction"] for p in probes], float), gains,
                                 np.array([c["handedness"] for c in doc["channels"]], float), channels)
        reports = [ChannelReport(c["id"], float(c["noise_V"]),
                                 float(c["heldout_phase_deg"]), float(c["heldout_amplitude_pct"]))
                   for c in doc["channels"]]
        diag = doc.get("diagnostics", {})
        nominal_p = [p.get("nominal_direction") for p in pumps]
        nominal_q = [p.get("nominal_direction") for p in probes]
        cal = Calibration(
            model, phys, tuple(p["isotope"] for p in pumps), int(model_doc["correction_degree"]), reports,
            {int(k): float(v) for k, v in diag.get("heldout_rms_V_by_correction_degree", {}).items()},
            float(diag.get("coverage_fraction", float("nan"))),
            [tuple(r) for r in diag.get("sparse_regions_polar_azimuth_deg", [])],
            int(diag.get("rows", 0)), list(diag.get("warnings", [])),
            None if None in nominal_p else np.array(nominal_p, float),
            None if None in nominal_q else np.array(nominal_q, float))
    except InputError:
        raise
    except OSError as exc:
        raise InputError(f"cannot read calibration tables: {exc.strerror}", str(path)) from None
    except KeyError as exc:
        raise InputError("required field missing", str(path), column=str(exc.args[0])) from None
    except (TypeError, ValueError) as exc:
        raise InputError(f"malformed calibration: {exc}", str(path)) from None
    return cal
