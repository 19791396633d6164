"""The compiled kernels: built ahead of time at install, equal to numba's JIT of the same source, guarded.

fieldvane/kernels.py explains the two paths. These tests hold that the install built the
ahead-of-time module and this process uses it; that numba's JIT of the same functions gives the same
estimates and formats the same bytes; that the JIT's own signatures are the declared ones (the
ahead-of-time build compiles exactly those); that wrong arrays are refused rather than misread; that
a module older than its sources is not used; and that the live and replay paths never import numba.
"""

import functools
import importlib
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from fieldvane import kernels

GOLDEN = Path(__file__).parent / "golden"
JIT_ONLY = kernels.jit_requested()
needs_compiled = pytest.mark.skipif(JIT_ONLY, reason="FIELDVANE_JIT=1: this run tests the JIT path")


@needs_compiled
def test_the_install_built_the_compiled_module_and_this_process_uses_it():
    assert kernels.compiled_module() is not None, (
        f"fieldvane._kernels is not in use: {kernels.mode()}. `pip install -e .` builds it (it needs a C "
        "compiler and Python's headers; pip -v shows why it was not built); FIELDVANE_JIT=1 runs the tests on "
        "the JIT path instead")
    assert "ahead of time" in kernels.mode()


# A magnitude model fitted to an invented scan (levels 2-60 uT, a small direction-dependent shift) and its
# corrected |B| on other directions: runs magnitude_core.estimate_rows in both processes.
MAGNITUDE_CASE = textwrap.dedent("""
    def magnitude_case():
        import numpy as np
        from fieldvane.estimator.magnitude_model import fit_magnitude_model
        rng = np.random.default_rng(5)
        gammas = np.array([7.0, 4.667])
        u = rng.normal(size=(600, 3))
        u /= np.linalg.norm(u, axis=1)[:, None]
        b = np.repeat([2000.0, 8000.0, 20000.0, 60000.0], 150)
        shift = np.column_stack([0.2 * u[:, 2] ** 2, -0.1 * u[:, 0]]) * (b[:, None] / 20000.0)
        f = (b[:, None] + shift + rng.normal(0, 0.01, (600, 2))) * gammas
        model = fit_magnitude_model(u, b, f, gammas)
        est = model.estimate(f[::7], u[::7], np.full(len(f[::7]), 0.01))
        out = [est.b_nT, est.sigma_b_nT, est.sigma_difference_nT]
        # The tracker's rows corrected in place: a live batch (each sample evaluated: correct_rows) and a block
        # interpolated between knots (apply_corrections).
        from fieldvane.estimator.magnitude_knots import MagnitudeKnots
        per = f[:100] / gammas
        for n in (20, 100):
            knots = MagnitudeKnots(model, gammas, n)
            knots.advance(n, f[:n], u[:n], np.full(n, 0.5))
            b, p, sigma_b, flags = knots.apply(0, f[:n], u[:n], np.full(n, 0.5), per[:n].mean(axis=1), per[:n],
                                               np.zeros(n, np.int64), 1e-3)
            out += [b, p[:, 0], p[:, 1], sigma_b, flags.astype(float)]
        # The same live batch read from the filter core's outputs (correct_core_rows, the live loggers' rows).
        from fieldvane.estimator import filter_core as fc
        from fieldvane.estimator.flags import EstimateFlag
        from fieldvane.estimator.magnitude import DISAGREE_SIGMAS
        n = 20
        fout, iout = np.zeros((n, fc.N_FOUT)), np.zeros((n, fc.N_IOUT), np.int64)
        fout[:, fc.O_UX:fc.O_UZ + 1], fout[:, fc.O_SIGMA] = u[:n], 0.5
        b, p, sigma_b = per[:n].mean(axis=1), per[:n].copy(), np.empty(n)
        model.row_corrector(of_core=True)(np.ascontiguousarray(f[:n]), fout, iout, 1e-3, DISAGREE_SIGMAS,
                                          int(EstimateFlag.MAGNITUDE_DISAGREE), b, p, sigma_b)
        out += [b, p[:, 0], p[:, 1], sigma_b, iout[:, fc.J_FLAGS].astype(float)]
        return np.concatenate(out)
""")

# Invented frames, one- and two-probe, a sequence reset and a damaged frame, through the compiled stream decoder.
FRAMES_CASE = textwrap.dedent("""
    def frames_case():
        import numpy as np
        from fieldvane.io.wire import Frame, FrameDecoder, encode_frame
        seqs = list(range(30)) + list(range(5, 15))
        frames = [Frame(s, (10**9 if k % 4 else 2**63 + 12345) + 997 * k, k % 5, 1e5 + k / 3, 2e5 - k / 7,
                        tuple(0.25 * k - j / 3 for j in range(8 if k % 3 else 4))) for k, s in enumerate(seqs)]
        data = bytearray(b"".join(encode_frame(f) for f in frames[:20]) + bytes(range(1, 256)) * 2 + bytes(1)
                         + b"".join(encode_frame(f) for f in frames[20:]))
        data[200] ^= 0x10
        decoder = FrameDecoder()
        arrays = [decoder.feed_arrays(bytes(data[i:i + 97])) for i in range(0, len(data), 97)]
        decoder.feed(bytes([7]) * 30)
        decoder.resync()
        arrays.append(decoder.feed_arrays(encode_frame(frames[0])))
        rows = np.vstack([np.column_stack([a.ints.astype(float), a.t, a.f, a.values]) for a in arrays])
        return np.concatenate([rows.ravel(), np.array(list(decoder.counters().values()), float)])
""")

# Runs in a fresh process with FIELDVANE_JIT=1: the golden stream through the tracker, |B| through the
# magnitude model, a block of CSV text, and the signatures numba compiled for each entry point.
JIT_RUN = textwrap.dedent("""
    import json, sys
    import numpy as np
    from fieldvane import kernels
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.recording import read_recording
    from fieldvane.io import float_text
    from numba import types
    assert kernels.compiled_module() is None
    cal = load_calibration(sys.argv[1] + "/golden_cal.json")
    block, _ = read_recording(sys.argv[1] + "/golden_stream.csv")
    rec = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).run_arrays(block)
    text = float_text.format_rows([rec.u[:, 0], rec.flags, None, rec.sigma_deg]).decode()
    rows_f, rows_i = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).step_rows(block[:40])
    exec(sys.argv[3])
    np.save(sys.argv[2] + "/magnitude.npy", magnitude_case())
    np.save(sys.argv[2] + "/frames.npy", frames_case())
    short = {"float64": "f8", "int64": "i8", "uint64": "u8", "uint8": "u1", "bool": "b1"}
    def name(t):
        if isinstance(t, types.Array):
            return short[str(t.dtype)] + "[" + ", ".join([":"] * (t.ndim - 1) + ["::1"]) + "]"
        return short[str(t)]
    signatures = {}
    for entry, (module, _, _) in kernels.ENTRIES.items():
        dispatcher = getattr(sys.modules[module], entry)
        for sig in dispatcher.signatures:
            result = dispatcher.overloads[sig].signature.return_type
            signatures.setdefault(entry, []).append(name(result) + "(" + ", ".join(name(a) for a in sig) + ")")
    np.save(sys.argv[2] + "/u.npy", rec.u)
    np.save(sys.argv[2] + "/b.npy", rec.b_nT)
    np.save(sys.argv[2] + "/nis.npy", rec.nis)
    np.save(sys.argv[2] + "/flags.npy", rec.flags)
    np.save(sys.argv[2] + "/rows_f.npy", rows_f)
    np.save(sys.argv[2] + "/rows_i.npy", rows_i)
    json.dump({"text": text, "signatures": signatures}, open(sys.argv[2] + "/out.json", "w"))
""")


@pytest.fixture(scope="module")
def jit_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("jit")
    env = dict(os.environ, FIELDVANE_JIT="1")
    done = subprocess.run([sys.executable, "-c", JIT_RUN, str(GOLDEN), str(out), MAGNITUDE_CASE + FRAMES_CASE], env=env,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    result = json.loads((out / "out.json").read_text())
    result.update({k: np.load(out / f"{k}.npy") for k in ("u", "b", "nis", "flags", "magnitude", "frames",
                                                                "rows_f", "rows_i")})
    return result


@pytest.fixture(scope="module")
def this_process_run():
    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io import float_text
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.recording import read_recording

    cal = load_calibration(GOLDEN / "golden_cal.json")
    block, _ = read_recording(GOLDEN / "golden_stream.csv")
    rec = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).run_arrays(block)
    text = float_text.format_rows([rec.u[:, 0], rec.flags, None, rec.sigma_deg]).decode()
    return rec, text


def test_jit_and_this_process_give_the_same_estimates(jit_run, this_process_run):
    # The ahead-of-time build targets a generic CPU of the platform, the JIT the host's own (fused multiply-add
    # and wider vectors), so sums may round differently in the last bits; 1e-9 is the golden replay's tolerance.
    rec, _ = this_process_run
    assert np.array_equal(rec.flags, jit_run["flags"])
    assert np.allclose(rec.u, jit_run["u"], rtol=0, atol=1e-9, equal_nan=True)
    assert np.allclose(rec.b_nT, jit_run["b"], rtol=1e-12, atol=0, equal_nan=True)
    assert np.allclose(rec.nis, jit_run["nis"], rtol=1e-9, atol=1e-9, equal_nan=True)


def test_jit_and_this_process_make_the_same_live_rows(jit_run):
    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.recording import read_recording

    cal = load_calibration(GOLDEN / "golden_cal.json")
    block, _ = read_recording(GOLDEN / "golden_stream.csv")
    floats, ints = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate).step_rows(block[:40])
    assert np.array_equal(ints, jit_run["rows_i"]) and np.isfinite(floats[1:, :13]).all()     # (row 0: the start)
    assert np.allclose(floats, jit_run["rows_f"], rtol=1e-9, atol=1e-12, equal_nan=True)   # (as the estimates above)


def test_jit_and_this_process_correct_magnitudes_alike(jit_run):
    namespace = {}
    exec(MAGNITUDE_CASE, namespace)
    here = namespace["magnitude_case"]()
    assert np.all(np.isfinite(here))
    assert np.allclose(here, jit_run["magnitude"], rtol=1e-12, atol=0)
    assert here.shape == jit_run["magnitude"].shape
    # the live batch read from the core's outputs equals the same batch corrected from its own arrays
    m = (len(here) - 100 - 500 - 100) // 3
    assert np.array_equal(here[-100:], here[3 * m:3 * m + 100])


def test_jit_and_this_process_decode_the_same_frames(jit_run):
    namespace = {}
    exec(FRAMES_CASE, namespace)
    here = namespace["frames_case"]()
    # integers, float32 values widened and t_ns / 1e9 are exact: the two must agree bit for bit
    assert here.shape == jit_run["frames"].shape and here.size > 39 * 11
    assert np.array_equal(here, jit_run["frames"], equal_nan=True)


def test_jit_and_this_process_format_the_same_text(jit_run, this_process_run):
    _, text = this_process_run
    # repr() is the reference for every float field (io/float_text.py's contract); the JIT must agree byte
    # for byte with the compiled module where both format the same doubles.
    rec, _ = this_process_run
    first = text.splitlines()[0].split(",")
    assert first[0] == repr(float(rec.u[0, 0])) and first[1] == str(int(rec.flags[0])) and first[2] == ""
    jit_lines, lines = jit_run["text"].splitlines(), text.splitlines()
    assert len(jit_lines) == len(lines)
    same_u = np.asarray(jit_run["u"][:, 0] == rec.u[:, 0])
    for k in np.flatnonzero(same_u)[:500]:
        assert jit_lines[k].split(",")[0] == lines[k].split(",")[0]


def test_the_jit_compiles_exactly_the_declared_signatures(jit_run):
    for module in kernels.KERNEL_MODULES:                 # their @entry declarations fill kernels.ENTRIES
        importlib.import_module(module)
    declared = {name: sig.replace(" ", "") for name, (_, sig, _) in kernels.ENTRIES.items()}
    assert set(jit_run["signatures"]) == set(declared), "every entry point ran once in the JIT process"
    for name, compiled in jit_run["signatures"].items():
        assert [s.replace(" ", "") for s in compiled] == [declared[name]], (
            f"{name}: the JIT compiled {compiled}, the ahead-of-time build compiles {declared[name]}: update the "
            f"@entry signature (and rebuild) or pass the arrays as declared")


@needs_compiled
def test_compiled_entry_points_refuse_arrays_they_would_misread():
    from fieldvane.io import float_text

    fbits = np.arange(10.0).view(np.uint64).reshape(5, 2)
    ints, kinds, src, buf = np.zeros((0, 5), np.int64), np.zeros(1, np.int64), np.zeros(1, np.int64), np.zeros(
        200, np.uint8)
    assert float_text._format_rows(5, np.ascontiguousarray(fbits[:, 0].reshape(1, 5)), ints, kinds, src, buf) > 0
    with pytest.raises(TypeError, match="C-contiguous"):
        float_text._format_rows(5, fbits.T[:1], ints, kinds, src, buf)          # a strided view
    with pytest.raises(TypeError, match="uint64"):
        float_text._format_rows(5, np.zeros((1, 5)), ints, kinds, src, buf)     # float64 where bits are declared
    with pytest.raises(TypeError, match="1-D"):
        float_text._format_rows(5, fbits.reshape(1, 10)[:, :5].copy(), ints, kinds.reshape(1, 1), src, buf)
    with pytest.raises(TypeError, match="got list"):
        float_text._format_rows(5, [[0, 1, 2, 3, 4]], ints, kinds, src, buf)
    with pytest.raises(TypeError, match="takes 6 positional arguments"):
        float_text._format_rows(5, np.ascontiguousarray(fbits[:, 0].reshape(1, 5)), ints, kinds, src)


def test_bound_entry_points_check_their_fixed_arrays_once_and_the_rest_at_every_call():
    from fieldvane.io import float_text

    fbits = np.arange(10.0).view(np.uint64).reshape(5, 2)
    rows = np.ascontiguousarray(fbits[:, 0].reshape(1, 5))
    ints, kinds, src = np.zeros((0, 5), np.int64), np.zeros(1, np.int64), np.zeros(1, np.int64)
    bound = kernels.bind(float_text._format_rows, 5, rows, ints, kinds)
    buf, ref = np.zeros(200, np.uint8), np.zeros(200, np.uint8)
    assert bound(src, buf) == float_text._format_rows(5, rows, ints, kinds, src, ref) > 0
    assert np.array_equal(buf, ref)
    if kernels.compiled_module() is not None:         # the JIT checks types itself (numba's dispatcher)
        with pytest.raises(TypeError, match="argument 5: .*C-contiguous"):
            bound(src, np.zeros(400, np.uint8)[::2])          # a per-call array: checked at the call
        with pytest.raises(TypeError, match="argument 1: .*uint64"):
            kernels.bind(float_text._format_rows, 5, np.zeros((1, 5)))     # a fixed one: checked when bound
        with pytest.raises(TypeError, match="2 more, got 1"):
            bound(src)


def test_trusted_binds_skip_the_per_call_checks_only_outside_the_test_suite(monkeypatch):
    # The live path's own arrays are made with the declared types: its binds skip the per-call checks, except
    # under FIELDVANE_CHECK_KERNELS=1, which tests/conftest.py sets so that every test checks them all.
    from fieldvane.io import float_text

    rows = np.arange(5.0).view(np.uint64).reshape(1, 5)
    ints, kinds, src = np.zeros((0, 5), np.int64), np.zeros(1, np.int64), np.zeros(1, np.int64)
    assert kernels.always_check()
    checked = kernels.bind(float_text._format_rows, 5, rows, ints, kinds, trusted=True)
    monkeypatch.setenv("FIELDVANE_CHECK_KERNELS", "")
    fast = kernels.bind(float_text._format_rows, 5, rows, ints, kinds, trusted=True)
    a, b = np.zeros(200, np.uint8), np.zeros(200, np.uint8)
    assert fast(src, a) == checked(src, b) > 0 and np.array_equal(a, b)
    if kernels.compiled_module() is not None:
        with pytest.raises(TypeError, match="argument 5"):
            checked(src, np.zeros(400, np.uint8)[::2])
        assert isinstance(fast, functools.partial)            # no check of its own
        with pytest.raises(TypeError, match="argument 1"):
            kernels.bind(float_text._format_rows, 5, np.zeros((1, 5)), trusted=True)     # fixed ones: still checked


def test_the_tracker_gives_the_same_estimates_with_and_without_the_per_call_checks(monkeypatch):
    from fieldvane.estimator.filter_settings import FilterSettings
    from fieldvane.estimator.snapshot import SnapshotSolver
    from fieldvane.estimator.tracker import Tracker
    from fieldvane.io.calfile import load_calibration
    from fieldvane.io.recording import read_recording

    cal = load_calibration(GOLDEN / "golden_cal.json")
    block, _ = read_recording(GOLDEN / "golden_stream.csv")
    runs = []
    for check in ("1", ""):
        monkeypatch.setenv("FIELDVANE_CHECK_KERNELS", check)
        tracker = Tracker(cal, FilterSettings(), SnapshotSolver.from_calibration(cal).initiate)   # binds afresh
        rec = [tracker.step_record(block[i:i + 3]) for i in range(0, min(len(block), 900), 3)]
        runs.append(np.concatenate([np.column_stack([r.u, r.b_nT, r.sigma_deg, r.flags]) for r in rec]))
    np.testing.assert_array_equal(runs[0], runs[1])


def test_signature_parser_reads_each_array_argument():
    importlib.import_module("fieldvane.estimator.filter_core")      # declares run_filter in kernels.ENTRIES
    specs = kernels._array_specs("f8[:, ::1](f8[:, ::1], i8, u1[::1], f8[:, :, ::1], b1)")
    assert specs == [(0, "float64", 2), (2, "uint8", 1), (3, "float64", 3)]
    assert kernels._split_arguments("i8()") == [] and len(kernels._split_arguments(kernels.ENTRIES["run_filter"][1])) == 43
    with pytest.raises(ValueError, match="C-contiguous"):
        kernels._array_specs("i8(f8[:])")


@needs_compiled
def test_a_compiled_module_older_than_its_sources_is_not_used(monkeypatch):
    monkeypatch.setattr(kernels, "_state", {})
    monkeypatch.setattr(kernels, "sources_digest", lambda: -1)
    with pytest.warns(RuntimeWarning, match="older than their sources"):
        assert kernels.compiled_module() is None
    assert "older than its sources" in kernels.mode()


@needs_compiled
def test_replay_and_live_paths_never_import_numba(tmp_path):
    code = textwrap.dedent(f"""
        import sys, contextlib, io
        from fieldvane.io.cli import main
        import fieldvane.io.commands.run, fieldvane.io.live
        with contextlib.redirect_stdout(io.StringIO()):
            assert main(["replay", {str(GOLDEN / "golden_stream.csv")!r}, "-c", {str(GOLDEN / "golden_cal.json")!r},
                         "-o", {str(tmp_path / "est.csv")!r}, "--no-progress"]) == 0
        assert "numba" not in sys.modules, "numba was imported"
    """)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
