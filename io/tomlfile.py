"""Strict reading of our TOML configuration files: UTF-8 only, the line of every key for messages,
exact integer versions, unknown sections and keys refused by name, numbers finite and in range."""

from __future__ import annotations

import difflib
import math
import re
import sys
from pathlib import Path

from fieldvane.io.errors import InputError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def toml_repr(value) -> str:
    """Return value as TOML would spell it (true/false, numbers, quoted strings), for messages."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value[:40] + '"'
    return repr(value)[:40]


def read_text(path: str | Path) -> str:
    """Return a file's text; InputError for a missing or unreadable file or bytes that are not UTF-8."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except IsADirectoryError:
        raise InputError("is a folder, not a file", str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror or exc}", str(path)) from None
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise InputError(f"not UTF-8 text (byte 0x{data[exc.start]:02x} at offset {exc.start}); "
                         "save the file as UTF-8", str(path), line) from None


def key_lines(text: str) -> dict[tuple[str, str], int]:
    """Return {(section, key): line} for the 'key = value' lines and [section] headers of a TOML text."""
    out: dict[tuple[str, str], int] = {}
    section = ""
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        m = re.match(r"^\[\s*([^\[\]]+?)\s*\]\s*(#.*)?$", line)
        if m:
            section = ".".join(p.strip().strip('"') for p in m.group(1).split("."))
            out.setdefault((section, ""), number)
            continue
        m = re.match(r'^("?)([A-Za-z0-9_\-]+)\1\s*=', line)
        if m:
            out.setdefault((section, m.group(2)), number)
    return out


class TomlDoc:
    """A parsed TOML file with the line of each key, for one-line error messages."""

    def __init__(self, path: str, data: dict, lines: dict[tuple[str, str], int]):
        self.path, self.data, self.lines = path, data, lines

    @classmethod
    def read(cls, path: str | Path) -> "TomlDoc":
        """Return the parsed file, or raise InputError (unreadable, not UTF-8, not TOML) naming the line."""
        text = read_text(path)
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            m = re.search(r"line (\d+)", str(exc))
            raise InputError(f"not valid TOML: {exc}", str(path), int(m.group(1)) if m else None) from None
        return cls(str(path), data, key_lines(text))

    def error(self, message: str, section: str, key: str = "") -> InputError:
        """Return an InputError naming file, line and the key 'section.key'."""
        name = f"{section}.{key}" if section and key else (key or section or None)
        parent, _, last = (name or "").rpartition(".")
        line = (self.lines.get((section, key)) or self.lines.get((name, ""))
                or self.lines.get((parent, last)) or self.lines.get((section, "")))
        return InputError(message, self.path, line, name, kind="key")

    def version(self, expected: int) -> None:
        """Check `version = expected` at the top, an exact integer (true and 1.0 are refused)."""
        if "version" not in self.data:
            raise self.error(f"missing: the file must start with version = {expected}", "", "version")
        v = self.data["version"]
        if type(v) is not int or v != expected:
            raise self.error(f"must be the whole number {expected}, got {toml_repr(v)}"
                             + (" (a newer fieldvane wrote this file?)" if type(v) is int and v > expected
                                else ""), "", "version")

    def refuse_unknown(self, section: str, table: dict, allowed) -> None:
        """Raise naming the first key of table that is not allowed (sections and keys alike)."""
        for key in table:
            if key not in allowed:
                what = "section" if isinstance(table[key], dict) else "key"
                hint = ""
                close = difflib.get_close_matches(str(key), [str(a) for a in allowed], n=1)
                if close:
                    hint = f" (did you mean {close[0]}?)"
                elif not section and isinstance(table[key], (int, float, str, bool, list)):
                    hint = " (settings belong inside their [section])"
                raise self.error(f"unknown {what}{hint}; allowed here: {', '.join(sorted(allowed))}",
                                 section, key)

    def table(self, section: str, value, required: bool = True) -> dict:
        """Return value if it is a table; raise naming the section otherwise (or if required and missing)."""
        if value is None and not required:
            return {}
        if not isinstance(value, dict):
            if value is None:
                raise self.error(f"missing: needs a [{section}] table", section)
            raise self.error(f"must be a table [{section}], got {type(value).__name__}", section)
        return value

    def number(self, section: str, key: str, value, lo: float, hi: float) -> float:
        """Return a finite number within [lo, hi] (bool refused) or raise naming the key."""
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(f"expected a number, got {type(value).__name__}", section, key)
        v = float(value)
        if not math.isfinite(v) or not lo <= v <= hi:
            raise self.error(f"must be a finite number between {lo:g} and {hi:g}, got {value!r}",
                             section, key)
        return v

    def text(self, section: str, key: str, value, max_len: int = 200) -> str:
        """Return a one-line string of at most max_len characters or raise naming the key."""
        if not isinstance(value, str):
            raise self.error(f"expected a string in quotes, got {type(value).__name__}", section, key)
        if len(value) > max_len or "\n" in value or "\r" in value:
            raise self.error(f"expected one line of at most {max_len} characters", section, key)
        return value
