"""Sensor description TOML: names, nominal beam axes and the mounting rotation (spec in docs/config_files.md)."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from fieldvane.estimator.sphere import rotation_matrix
from fieldvane.io.errors import InputError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

SENSOR_VERSION = 1


def read_toml(path: str | Path) -> dict:
    """Return a TOML file's table, or raise InputError naming the file and line."""
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", str(path)) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", str(path)) from None


def _unit(path, key, value) -> np.ndarray:
    try:
        v = np.asarray(value, float)
    except (TypeError, ValueError):
        raise InputError("expected three numbers", str(path), column=key) from None
    if v.shape != (3,) or not np.all(np.isfinite(v)) or np.linalg.norm(v) == 0:
        raise InputError("expected a non-zero vector of three numbers", str(path), column=key)
    return v / np.linalg.norm(v)


def read_sensor_file(path: str | Path) -> dict:
    """Return {'name', 'cell', 'pump_names', 'probe_names', 'nominal_pumps' (2,3), 'nominal_probes' (P,3), 'mounting_rotation' (3,3)}."""
    doc = read_toml(path)
    if doc.get("version") != SENSOR_VERSION:
        raise InputError(f"'version' must be {SENSOR_VERSION}", str(path), column="version")
    pumps, probes = doc.get("pumps", {}), doc.get("probes", {})
    if set(pumps) != {"a", "b"}:
        raise InputError("needs [pumps.a] and [pumps.b]", str(path), column="pumps")
    if set(probes) not in ({"1"}, {"1", "2"}):
        raise InputError("needs [probes.1] and optionally [probes.2]", str(path), column="probes")
    out = {
        "name": str(doc.get("name", "")),
        "cell": str(doc.get("cell", "Rb")),
        "pump_names": [str(pumps[k].get("name", f"pump {k}")) for k in "ab"],
        "probe_names": [str(probes[k].get("name", f"probe {k}")) for k in sorted(probes)],
        "nominal_pumps": np.array([_unit(path, f"pumps.{k}.axis", pumps[k].get("axis")) for k in "ab"]),
        "nominal_probes": np.array([_unit(path, f"probes.{k}.axis", probes[k].get("axis"))
                                    for k in sorted(probes)]),
        "mounting_rotation": np.eye(3),
    }
    mount = doc.get("mounting", {})
    if "rotation_deg" in mount:
        try:
            rx, ry, rz = (float(a) for a in mount["rotation_deg"])
        except (TypeError, ValueError):
            raise InputError("expected three angles in degrees", str(path), column="mounting.rotation_deg") from None
        out["mounting_rotation"] = (rotation_matrix(np.array([0, 0, 1.0]), np.radians(rz))
                                    @ rotation_matrix(np.array([0, 1.0, 0]), np.radians(ry))
                                    @ rotation_matrix(np.array([1.0, 0, 0]), np.radians(rx)))
    return out
