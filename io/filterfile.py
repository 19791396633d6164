"""Filter settings TOML (`--filter FILTER.toml`): versioned, every key documented in docs/config_files.md."""

from __future__ import annotations

import math
from pathlib import Path

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.io.errors import InputError
from fieldvane.io.sensorfile import read_toml

FILTER_VERSION = 1


def read_filter_settings(path: str | Path) -> FilterSettings:
    """Return the FilterSettings of a filter TOML (version = 1, a [filter] table); InputError otherwise."""
    doc = read_toml(path)
    if doc.get("version") != FILTER_VERSION:
        raise InputError(f"'version' must be {FILTER_VERSION}", str(path), column="version")
    table = doc.get("filter", {})
    try:
        return FilterSettings.from_dict(table)
    except (TypeError, ValueError) as exc:
        raise InputError(str(exc), str(path), column="filter") from None


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        if math.isnan(v):
            return "nan"
        return repr(v)
    return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"') + '"'


def write_filter_settings(path: str | Path, settings: FilterSettings, comments: list[str] | None = None) -> Path:
    """Write settings as a filter TOML with optional leading comment lines; returns the path."""
    path = Path(path)
    lines = [f"# {c}" for c in (comments or [])]
    lines += [f"version = {FILTER_VERSION}", "", "[filter]"]
    lines += [f"{k} = {_toml_value(v)}" for k, v in settings.to_dict().items()]
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
