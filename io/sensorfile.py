"""Sensor description TOML: names, nominal beam axes and the mounting rotation (spec in docs/config_files.md).

Strict: unknown sections and keys are refused by name, numbers must be finite, the version an exact
integer, the file UTF-8; every error is one line naming file, line and key.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fieldvane.estimator.constants import CELL_PAIRS
from fieldvane.io.errors import InputError
from fieldvane.io.tomlfile import TomlDoc

SENSOR_VERSION = 1
TOP_KEYS = ("version", "name", "cell", "pumps", "probes", "mounting")
BEAM_KEYS = ("axis", "name")


def read_toml(path: str | Path) -> dict:
    """Return a TOML file's table, or raise InputError naming the file and line (not UTF-8, not TOML)."""
    return TomlDoc.read(path).data


def _axis(doc: TomlDoc, section: str, value) -> np.ndarray:
    """Return the unit vector of an axis = [x, y, z] (sensor frame) or raise naming the key."""
    if value is None:
        raise doc.error("missing: give the nominal direction, e.g. axis = [1, 0, 0]", section, "axis")
    if not (isinstance(value, list) and len(value) == 3):
        raise doc.error("expected three numbers [x, y, z]", section, "axis")
    v = np.array([doc.number(section, "axis", x, -1e6, 1e6) for x in value])
    n = float(np.linalg.norm(v))
    if n == 0.0:
        raise doc.error("expected a non-zero vector of three numbers", section, "axis")
    return v / n


def _beams(doc: TomlDoc, name: str, allowed: tuple[str, ...], required: tuple[str, ...]) -> dict:
    """Return the beam tables of [name.X] for X in allowed (required ones must be there)."""
    table = doc.table(name, doc.data.get(name))
    for key in table:
        if key not in allowed:
            raise doc.error(f"unknown {name[:-1]} '{key}' (allowed: {', '.join(allowed)})", name, key)
    for key in required:
        if key not in table:
            raise doc.error(f"missing: needs [{name}.{key}]", name)
    beams = {}
    for key in table:
        section = f"{name}.{key}"
        beam = doc.table(section, table[key])
        doc.refuse_unknown(section, beam, BEAM_KEYS)
        beams[key] = beam
    return beams


def read_sensor_file(path: str | Path) -> dict:
    """Return {'name', 'cell', 'pump_names', 'probe_names', 'nominal_pumps' (2,3), 'nominal_probes' (P,3), 'mounting_rotation' (3,3)}."""
    from fieldvane.io.sitefile import mounting_from_table

    doc = TomlDoc.read(path)
    doc.version(SENSOR_VERSION)
    doc.refuse_unknown("", doc.data, TOP_KEYS)
    pumps = _beams(doc, "pumps", ("a", "b"), ("a", "b"))
    probes = _beams(doc, "probes", ("1", "2"), ("1",))
    cell = doc.text("", "cell", doc.data.get("cell", "Rb"))
    if cell not in CELL_PAIRS:
        raise doc.error(f"unknown cell '{cell}' (known: {', '.join(CELL_PAIRS)})", "", "cell")

    def _name(section, beam, default):
        return doc.text(section, "name", beam.get("name", default))

    order = sorted(probes)
    out = {
        "name": doc.text("", "name", doc.data.get("name", "")),
        "cell": cell,
        "pump_names": [_name(f"pumps.{k}", pumps[k], f"pump {k}") for k in "ab"],
        "probe_names": [_name(f"probes.{k}", probes[k], f"probe {k}") for k in order],
        "nominal_pumps": np.array([_axis(doc, f"pumps.{k}", pumps[k].get("axis")) for k in "ab"]),
        "nominal_probes": np.array([_axis(doc, f"probes.{k}", probes[k].get("axis")) for k in order]),
    }
    mount = doc.data.get("mounting")
    if mount is not None and not isinstance(mount, dict):
        raise doc.error("must be a table [mounting]", "mounting")
    try:
        out["mounting_rotation"] = mounting_from_table(mount, path, doc.lines)
    except InputError:
        raise
    except ValueError as exc:
        raise doc.error(str(exc), "mounting") from None
    return out
