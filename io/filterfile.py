"""Filter settings TOML (`--filter FILTER.toml`): versioned, every key documented in docs/config_files.md.

Strict: `version = 1` (an exact integer) and one [filter] table; any other section or top-level
key, and any unknown setting, is refused by name with its line; values are type- and
range-checked by FilterSettings. Not UTF-8 is refused.
"""

from __future__ import annotations

import math
import re
from dataclasses import fields
from pathlib import Path

from fieldvane.estimator.filter_settings import FilterSettings
from fieldvane.io.outputs import atomic_file
from fieldvane.io.tomlfile import TomlDoc

FILTER_VERSION = 1
TOP_KEYS = ("version", "filter")

# Upper limits the io side adds where FilterSettings has none: a value past these describes
# nothing physical and only risks overflow or huge allocations (common practice: generous bounds).
# Upper limits of the settings live in FilterSettings (estimator/filter_settings.py UPPER_LIMITS).


def read_filter_settings(path: str | Path) -> FilterSettings:
    """Return the FilterSettings of a filter TOML (version = 1, a [filter] table); InputError otherwise."""
    doc = TomlDoc.read(path)
    doc.version(FILTER_VERSION)
    doc.refuse_unknown("", doc.data, TOP_KEYS)
    table = doc.table("filter", doc.data.get("filter"))
    known = {f.name for f in fields(FilterSettings)}
    doc.refuse_unknown("filter", table, known)
    try:
        return FilterSettings.from_dict(table)
    except (TypeError, ValueError) as exc:
        message = str(exc)
        m = re.search(r"FilterSettings\.(\w+)", message)
        key = m.group(1) if m and m.group(1) in table else ""
        raise doc.error(message.replace(f"FilterSettings.{key} ", "") if key else message,
                        "filter", key) from None


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
    if isinstance(v, dict):
        return "{" + ", ".join(f'"{k}" = {_toml_value(x)}' for k, x in v.items()) + "}"
    return '"' + str(v).replace("\\", "\\\\").replace('"', '\\"') + '"'


def filter_settings_text(settings: FilterSettings, comments: list[str] | None = None) -> str:
    """Return the text of a filter TOML holding every setting, after optional comment lines."""
    lines = [f"# {c}" for c in (comments or [])]
    lines += [f"version = {FILTER_VERSION}", "", "[filter]"]
    lines += [f"{k} = {_toml_value(v)}" for k, v in settings.to_dict().items()]
    return "\n".join(lines) + "\n"


def write_filter_settings(path: str | Path, settings: FilterSettings, comments: list[str] | None = None) -> Path:
    """Write settings as a filter TOML (temporary name, renamed when complete); returns the path."""
    path = Path(path)
    with atomic_file(path) as tmp:
        tmp.write_text(filter_settings_text(settings, comments), encoding="utf-8")
    return path
