"""What the command-line tests share: running `fieldvane` in-process, the smallest calibrated bench,
a still estimates file written by hand and a minimal sensor file."""

from __future__ import annotations

from pathlib import Path

from fieldvane.io.cli import main

EX = Path(__file__).resolve().parent.parent / "examples"

# The smallest valid sensor file: two pumps and one probe (tests append their own tables).
MINIMAL_SENSOR = """version = 1
[pumps.a]
axis = [1, 0, 0]
[pumps.b]
axis = [0, 1, 0]
[probes.1]
axis = [0, 0, 1]
"""


def run_cli(argv, capsys) -> tuple[int, str, str]:
    """Return (exit code, stdout, stderr) of `fieldvane argv` run in-process (argparse's exits included)."""
    try:
        code = main([str(a) for a in argv])
    except SystemExit as exc:               # argparse's own errors (usage, exit 2)
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def make_small_bench(d: Path, still_s: float) -> None:
    """Write d/scan.csv (the shortest scan that calibrates), d/cal.json and d/rec.csv (a still recording of still_s s)."""
    # One magnitude, enough of the sphere: the cheapest calibration the commands accept.
    assert main(["simulate", str(EX / "calibration_scan_single.toml"), "-o", str(d / "scan.csv"),
                 "--duration", "9"]) == 0
    assert main(["calibrate", str(d / "scan.csv"), "-o", str(d / "cal.json")]) == 0
    assert main(["simulate", str(EX / "static.toml"), "-o", str(d / "rec.csv"), "--duration", f"{still_s:g}"]) == 0


def write_still_estimates(path: Path, b_nT: float, rows: int = 400) -> None:
    """Write an estimates CSV by hand (the columns of docs/estimates_columns.md): a still field along +z, 200 Hz."""
    b = f"{float(b_nT)!r}"
    path.write_text("t,ux,uy,uz,b_nT,bx_nT,by_nT,bz_nT,sigma_deg,flags\n"
                    + "".join(f"{0.005 * i!r},0.0,0.0,1.0,{b},0.0,0.0,{b},0.1,1\n" for i in range(rows)),
                    encoding="utf-8")
