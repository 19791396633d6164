"""Architecture rules that keep the project honest: import boundaries and a light live path."""

import ast
import pathlib
import subprocess
import sys

ROOT = pathlib.Path(__file__).resolve().parents[1]


def _imports(folder: str) -> set[tuple[str, str]]:
    found = set()
    for path in (ROOT / folder).rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module:
                found.add((path.name, node.module))
            elif isinstance(node, ast.Import):
                found.update((path.name, a.name) for a in node.names)
    return found


def test_estimator_never_imports_io():
    bad = {(f, m) for f, m in _imports("estimator") if m.startswith("fieldvane.io")}
    assert not bad, bad


def test_firmware_sim_imports_neither_estimator_nor_io():
    bad = {(f, m) for f, m in _imports("firmware_sim")
           if m.startswith("fieldvane.io") or m.startswith("fieldvane.estimator")}
    assert not bad, bad


def test_io_folder_does_not_shadow_the_standard_library():
    code = ("import io, fieldvane.io; import sys; "
            "assert io.__name__ == 'io' and io is sys.modules['io'] and fieldvane.io is not io; "
            "assert hasattr(io, 'BytesIO')")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT)


def test_live_path_imports_no_plotting():
    # What `fieldvane run` imports before the loop starts: nothing for plots, progress bars, fuzzing
    # or fitting (matplotlib alone would cost ~0.5 s and 30 MB, scipy ~0.3 s of start-up); and
    # `fieldvane --help` (the parser alone) does not even need numpy.
    code = ("import sys\n"
            "from fieldvane.io.cli import build_parser\n"
            "build_parser()\n"
            "assert 'numpy' not in sys.modules, 'the parser imports numpy'\n"
            "import fieldvane.io.commands.run, fieldvane.io.live, fieldvane.io.calfile, fieldvane.io.table_cache\n"
            "import fieldvane.estimator.tracker, fieldvane.estimator.snapshot, fieldvane.io.filterfile\n"
            "import fieldvane.io.geo_output, fieldvane.io.commands.replay\n"
            # (numba itself imports scipy's top level, about 15 ms; the fitting subpackages are what costs)
            "fitting = ('scipy.stats', 'scipy.optimize', 'scipy.interpolate', 'scipy.special', 'scipy.linalg')\n"
            "heavy = [m for m in ('matplotlib', 'hypothesis', 'tqdm', 'pytest') + fitting if m in sys.modules]\n"
            "assert not heavy, heavy\n")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT)


def test_every_filter_setting_is_documented():
    from dataclasses import fields

    from fieldvane.estimator.filter_settings import FilterSettings

    doc = (ROOT / "docs" / "config_files.md").read_text(encoding="utf-8")
    missing = [f.name for f in fields(FilterSettings) if f"`{f.name}`" not in doc]
    assert not missing, f"docs/config_files.md lacks filter keys: {missing}"
