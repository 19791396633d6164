"""The documents the tool points to exist, ship with the package, and list what the files really hold:
every column a replay writes is in docs/estimates_columns.md, every column and metadata key the simulator
writes is in docs/recording_format.md, and README's command table names every command."""

from __future__ import annotations

import re
import shutil
import sys
from pathlib import Path

import pytest

from fieldvane.io.cli import COMMANDS, main

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = ROOT / "tests" / "golden"

if sys.version_info >= (3, 11):
    import tomllib
else:                                   # pragma: no cover
    import tomli as tomllib


def documented_names(doc: Path) -> set[str]:
    """Return the `names` in the first column of every Markdown table row of a document (placeholders kept)."""
    names = set()
    for line in doc.read_text(encoding="utf-8").splitlines():
        if line.startswith("| `"):
            first = line.split("|")[1]
            names.update(re.findall(r"`([^`]+)`", first))
    return names


def covers(names: set[str], column: str) -> bool:
    """True when a column is documented by name or by a placeholder pattern such as phase_<ch>_deg."""
    for n in names:
        pattern = "^" + re.sub(r"<[a-z0-9]+>", "[A-Za-z0-9]+", re.escape(n).replace(r"\<", "<").replace(r"\>", ">")) + "$"
        if n == column or re.match(pattern, column):
            return True
    return False


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A copy of the golden calibration and the first 400 rows of the golden stream, in a temporary folder."""
    d = tmp_path_factory.mktemp("docs")
    for name in ("golden_cal.json", "golden_cal.npz"):
        shutil.copy(GOLDEN / name, d / name)
    lines = (GOLDEN / "golden_stream.csv").read_text(encoding="utf-8").splitlines()
    head = next(i for i, x in enumerate(lines) if not x.startswith("#"))
    (d / "rec.csv").write_text("\n".join(lines[:head + 401]) + "\n", encoding="utf-8")
    return d


@pytest.mark.parametrize("extra", [["--readouts"], ["--mode", "snapshot", "--gain-free"], ["--mode", "snapshot"]],
                         ids=["track-readouts", "snapshot-gain-free", "snapshot"])
def test_every_column_a_replay_writes_is_documented(small, extra, capsys):
    out = small / f"est_{'_'.join(extra)}.csv"
    assert main(["replay", str(small / "rec.csv"), "-c", str(small / "golden_cal.json"), "-o", str(out),
                 "--no-progress", *extra]) == 0
    capsys.readouterr()
    header = next(x for x in out.read_text(encoding="utf-8").splitlines() if not x.startswith("#")).split(",")
    names = documented_names(ROOT / "docs" / "estimates_columns.md")
    missing = [c for c in header if not covers(names, c)]
    assert not missing, f"columns missing from docs/estimates_columns.md: {missing}"
    assert header[:10] == ["t", "ux", "uy", "uz", "b_nT", "bx_nT", "by_nT", "bz_nT", "sigma_deg", "flags"]


def test_documented_placeholders_match_real_columns():
    names = documented_names(ROOT / "docs" / "estimates_columns.md")
    assert covers(names, "phase_2b_deg") and covers(names, "amp_1a_2a") and covers(names, "gain_2")
    assert not covers(names, "phase_2b") and not covers(names, "crlb_deg")


def test_every_recording_column_and_metadata_key_is_documented(tmp_path, capsys):
    rec = tmp_path / "rec.csv"
    assert main(["simulate", "lockin_filtered_turn", "-o", str(rec), "--duration", "0.2"]) == 0
    capsys.readouterr()
    lines = rec.read_text(encoding="utf-8").splitlines()
    keys = [x[1:].split(":", 1)[0].strip() for x in lines if x.startswith("#") and ":" in x]
    header = next(x for x in lines if not x.startswith("#")).split(",")
    scan = tmp_path / "scan.csv"
    assert main(["simulate", "calibration_scan", "-o", str(scan), "--duration", "0.2"]) == 0
    header += next(x for x in scan.read_text(encoding="utf-8").splitlines() if not x.startswith("#")).split(",")
    names = documented_names(ROOT / "docs" / "recording_format.md")
    doc = (ROOT / "docs" / "recording_format.md").read_text(encoding="utf-8")
    assert not [c for c in header if not covers(names, c)]
    assert not [k for k in keys if f"`{k}`" not in doc], keys
    assert "lockin_time_constant_s" in keys          # the lock-in scenario did write its filter


def test_docs_and_examples_ship_with_the_package():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    assert project["package-dir"]["fieldvane.docs"] == "docs"
    assert project["package-dir"]["fieldvane.examples"] == "examples"
    assert {"fieldvane.docs", "fieldvane.examples"} <= set(project["packages"])
    assert "*.md" in project["package-data"]["fieldvane.docs"]
    # Every file under examples/ (scenarios and the files they name) must match a package-data
    # pattern, or `fieldvane examples -o` from an installed copy would miss it.
    patterns = project["package-data"]["fieldvane.examples"]
    for path in (ROOT / "examples").rglob("*"):
        if path.is_file() and "__pycache__" not in path.parts:
            rel = path.relative_to(ROOT / "examples")
            assert any(rel.match(p) for p in patterns), f"examples/{rel} is not in package-data"


def test_docs_command_lists_and_prints_documents(capsys):
    assert main(["docs"]) == 0
    listing = capsys.readouterr().out
    for name in ("estimates_columns", "recording_format", "scenarios", "sinks", "wire_format"):
        assert name in listing
    assert main(["docs", "estimates_columns.md"]) == 0
    assert capsys.readouterr().out.startswith("# Estimates columns")
    assert main(["docs", "no_such_doc"]) == 2
    assert "no such document" in capsys.readouterr().err


def test_examples_are_listed_copied_once_and_usable_by_name(tmp_path, capsys):
    assert main(["examples"]) == 0
    assert "calibration_scan" in capsys.readouterr().out
    out = tmp_path / "mine"
    assert main(["examples", "-o", str(out)]) == 0
    copied = sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.is_file())
    assert copied == sorted(str(p.relative_to(ROOT / "examples")) for p in (ROOT / "examples").rglob("*")
                            if p.is_file() and "__pycache__" not in p.parts)
    assert main(["examples", "-o", str(out)]) == 2                 # the overwrite rule
    assert "--force" in capsys.readouterr().err
    assert main(["examples", "-o", str(out), "--force"]) == 0
    rec = tmp_path / "static.csv"
    assert main(["simulate", "static", "-o", str(rec), "--duration", "0.1"]) == 0   # a name, not a path
    assert "'static'" in capsys.readouterr().out
    assert main(["simulate", "no_such_example", "-o", str(tmp_path / "x.csv")]) == 2
    assert "known names" in capsys.readouterr().err


def test_readme_command_table_names_every_command():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Commands", 1)[1].split("\n## ", 1)[0]
    for name in COMMANDS:
        assert f"`fieldvane {name}" in section, name
