"""Where the shipped documentation and example scenarios are: inside the installed package
(fieldvane/docs, fieldvane/examples) or, for a source checkout or editable install, beside it."""

from __future__ import annotations

import re
from pathlib import Path

KINDS = ("docs", "examples")


def shipped_dir(kind: str) -> Path | None:
    """Return the folder of the shipped 'docs' or 'examples' (package data first, then the checkout), or None."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)}, got {kind!r}")
    import fieldvane

    package = Path(fieldvane.__file__).resolve().parent
    for folder in (package / kind, package.parent / kind):
        if folder.is_dir() and any(folder.iterdir()):
            return folder
    return None


def _shipped_files(kind: str, pattern: str) -> dict[str, Path]:
    """Return the files of a shipped folder matching a glob pattern, name (file stem) -> path, sorted by name."""
    folder = shipped_dir(kind)
    if folder is None:
        return {}
    return {p.stem: p for p in sorted(folder.glob(pattern))}


def example_scenarios() -> dict[str, Path]:
    """Return the shipped example scenarios, name (file stem) -> path, sorted by name."""
    return _shipped_files("examples", "*.toml")


def documents() -> dict[str, Path]:
    """Return the shipped documents, name (file stem) -> path, sorted by name."""
    return _shipped_files("docs", "*.md")


def first_line_matching(path: Path, pattern: str) -> str:
    """Return group 1 of the first line of a text file matching the regular expression, else ''."""
    rx = re.compile(pattern)
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            m = rx.match(line)
            if m:
                return m.group(1).strip()
    return ""


def listing_lines(files: dict[str, Path], pattern: str) -> list[str]:
    """Return one line per file, '  name  text' with the names aligned, the text being first_line_matching's."""
    width = max((len(n) for n in files), default=0)
    return [f"  {name:<{width}}  {first_line_matching(path, pattern)}" for name, path in files.items()]
