"""Compiled kernels: ahead of time at install when possible, by numba's JIT otherwise; the source is the same.

The filter core (estimator/filter_core.py), the magnitude model's per-sample evaluation
(estimator/magnitude_core.py), the tracker's input preparation (estimator/prepare_core.py), the
CSV float formatter (io/float_text.py), the recording parser (io/csv_numbers.py) and the wire-format stream
decoder (io/frame_core.py) are written
once, in the subset of Python that numba compiles. Their entry points are declared with `@entry(signature)` and their helpers with
`@helper()`. At `pip install`, setup.py compiles the entry points with numba's ahead-of-time
compiler (numba.pycc) into one extension module, `fieldvane._kernels`: a process that finds it (and
finds it built from the sources it sits beside) never imports numba, which saves about 0.5 s of
start-up (numba's import, its type registry and the on-disk cache loads). Without it (no C
compiler at install, a platform numba.pycc does not serve, or sources edited since the build in a
development checkout) the same functions are compiled by numba's JIT and cached on disk as before;
`FIELDVANE_JIT=1` asks for that path explicitly.

The extension's functions do not check their arguments' types (numba.pycc unboxes any array as the
declared one), so each entry point is wrapped in a check of dtype, dimensions and C-contiguity.
"""

from __future__ import annotations

import functools
import hashlib
import importlib.util
import os
import warnings

# The modules whose source is compiled into fieldvane._kernels, in build order.
KERNEL_MODULES = ("fieldvane.estimator.filter_core", "fieldvane.estimator.magnitude_core",
                  "fieldvane.estimator.prepare_core", "fieldvane.io.float_text", "fieldvane.io.csv_numbers",
                  "fieldvane.io.frame_core")
# Their sources and what they import constants from: a compiled module built from other bytes is not used.
DIGEST_MODULES = KERNEL_MODULES + ("fieldvane.estimator.flags",)
ENTRIES: dict[str, tuple[str, str, dict]] = {}     # entry name -> (module, signature, numba options)
_DTYPES = {"f8": "float64", "i8": "int64", "u8": "uint64", "u1": "uint8", "b1": "bool"}
_state: dict[str, object] = {}


def jit_requested() -> bool:
    """True when FIELDVANE_JIT=1 asks for numba's JIT even where the compiled module exists (and while building it)."""
    return os.environ.get("FIELDVANE_JIT", "") == "1"


def always_check() -> bool:
    """True when FIELDVANE_CHECK_KERNELS=1 asks for every argument of every call to be checked, trusted ones too
    (the test suite sets it)."""
    return os.environ.get("FIELDVANE_CHECK_KERNELS", "") == "1"


def sources_digest() -> int:
    """Return a 62-bit digest of the kernel modules' source files and the flags they use (bytes on disk)."""
    h = hashlib.sha256()
    for name in DIGEST_MODULES:
        spec = importlib.util.find_spec(name)
        with open(spec.origin, "rb") as f:
            h.update(f.read())
    return int.from_bytes(h.digest()[:8], "little") >> 2


def compiled_module():
    """Return fieldvane._kernels when usable here (built, from these sources, not overridden), else None."""
    if "module" not in _state:
        _state["module"], _state["reason"] = _load()
    return _state["module"]


def mode() -> str:
    """One line saying which kernels this process uses and why (for `fieldvane --version` and bug reports)."""
    module = compiled_module()
    if module is not None:
        return f"compiled ahead of time ({module.__file__})"
    return f"numba JIT, cached on disk ({_state['reason']})"


def _load():
    if jit_requested():
        return None, "FIELDVANE_JIT=1"
    try:
        from fieldvane import _kernels
    except ImportError as error:
        return None, f"no ahead-of-time module: {error}"
    try:
        digest = sources_digest()
    except (OSError, AttributeError) as error:      # sources not readable as files (a zip or frozen application)
        return None, f"cannot read the kernels' sources to check the compiled module: {error}"
    if _kernels.sources_digest() != digest:
        warnings.warn("fieldvane's compiled kernels are older than their sources (edited since the build): using "
                      "numba's JIT instead; `pip install -e .` rebuilds them", RuntimeWarning, stacklevel=3)
        return None, "compiled module older than its sources"
    return _kernels, ""


def _split_arguments(signature: str) -> list[str]:
    """Return the argument types of a signature such as 'i8(f8[:, ::1], i8)' as text, in order."""
    inner = signature[signature.index("(") + 1:signature.rindex(")")]
    args, depth, start = [], 0, 0
    for k, ch in enumerate(inner):
        depth += ch == "["
        depth -= ch == "]"
        if ch == "," and depth == 0:
            args.append(inner[start:k].strip())
            start = k + 1
    args.append(inner[start:].strip())
    return [a for a in args if a]


def _array_specs(signature: str) -> list[tuple[int, str, int]]:
    """Return (position, dtype name, ndim) of each array argument of a signature such as 'i8(f8[::1], i8)'."""
    specs = []
    for pos, arg in enumerate(_split_arguments(signature)):
        if "[" in arg:
            dims = arg[arg.index("[") + 1:arg.rindex("]")]
            if not dims.endswith("::1"):
                raise ValueError(f"kernel signature {signature!r}: arrays must be declared C-contiguous ('::1')")
            specs.append((pos, _DTYPES[arg[:arg.index("[")]], dims.count(":") - 1))
    return specs


def _check_arrays(name: str, args: tuple, specs, ndarray, offset: int = 0) -> None:
    """Raise TypeError unless each args[pos - offset] of specs (pos, dtype, ndim) is such a C-contiguous array."""
    for pos, dtype, ndim in specs:
        a = args[pos - offset]
        if not isinstance(a, ndarray):
            raise TypeError(f"{name} argument {pos}: expected a C-contiguous {ndim}-D {dtype} array, got "
                            f"{type(a).__name__}")
        # `is` first: numpy's built-in dtypes are single objects, so the usual case skips the slower comparison
        if (a.dtype is not dtype and a.dtype != dtype) or a.ndim != ndim or not a.flags.c_contiguous:
            raise TypeError(f"{name} argument {pos}: expected a C-contiguous {ndim}-D {dtype} array, got "
                            f"{a.ndim}-D {a.dtype} (C-contiguous: {a.flags.c_contiguous})")


def _checked(function, name: str, signature: str):
    """Wrap an ahead-of-time function so that arrays of another dtype, rank or layout raise TypeError."""
    import numpy as np
    specs = [(pos, np.dtype(dtype), ndim) for pos, dtype, ndim in _array_specs(signature)]
    n_args = len(_split_arguments(signature))
    ndarray = np.ndarray

    def call(*args):
        if len(args) != n_args:
            raise TypeError(f"{name} takes {n_args} positional arguments, got {len(args)}")
        _check_arrays(name, args, specs, ndarray)
        return function(*args)

    def bind(*leading, trusted=False):
        # The leading arguments are the caller's own arrays, never reshaped or retyped: checked once, here.
        k = len(leading)
        _check_arrays(name, leading, [s for s in specs if s[0] < k], ndarray)
        rest = [s for s in specs if s[0] >= k]
        if trusted and not always_check():
            return functools.partial(function, *leading)

        def bound(*args):
            if len(args) != n_args - k:
                raise TypeError(f"{name} with {k} bound arguments takes {n_args - k} more, got {len(args)}")
            _check_arrays(name, args, rest, ndarray, k)
            return function(*leading, *args)
        return bound

    call.__name__ = call.__qualname__ = name
    call.__doc__ = getattr(function, "__doc__", None)
    call.bind = bind
    return call


def bind(function, *leading, trusted: bool = False):
    """Return an entry point with its leading arguments fixed (checked once, not at every call: the live path).

    trusted: the caller makes every array it passes per call itself, with the declared dtype, rank and C order
    (np.empty, np.ascontiguousarray with a dtype), so they are not checked either: about 1.5 us a call, a sixth of
    the tracker's live step. FIELDVANE_CHECK_KERNELS=1 checks them all the same (the test suite sets it).
    """
    binder = getattr(function, "bind", None)
    if binder is not None:
        return binder(*leading, trusted=trusted)
    return functools.partial(function, *leading)


def entry(signature: str, **options):
    """Decorator for an entry point: the ahead-of-time function when in use, else numba.njit(**options)(function).

    signature: numba's notation with C-contiguous arrays, e.g. 'i8(f8[::1], i8[:, ::1], i8)'.
    """
    def decorate(function):
        ENTRIES[function.__name__] = (function.__module__, signature, options)
        module = compiled_module()
        if module is not None:
            return _checked(getattr(module, function.__name__), function.__name__, signature)
        from numba import njit
        return njit(**options)(function)
    return decorate


def helper(**options):
    """Decorator for a function called by entry points: numba.njit(**options), compiled only when first needed.

    Where the ahead-of-time module serves the entry points, helpers stay uncompiled (and numba unimported)
    until Python calls one directly (the unit tests do): then every helper of that module is compiled.
    """
    def decorate(function):
        if compiled_module() is None:
            from numba import njit
            return njit(**options)(function)
        return _Deferred(function, options)
    return decorate


class _Deferred:
    """A helper kept as Python until called from Python; then its module's helpers all become numba functions."""

    def __init__(self, function, options):
        self.py_func, self.options, self._compiled = function, options, None
        self.__name__, self.__doc__ = function.__name__, function.__doc__

    def compiled(self):
        if self._compiled is None:
            from numba import njit
            self._compiled = njit(**self.options)(self.py_func)
        return self._compiled

    def __call__(self, *args):
        namespace = self.py_func.__globals__
        for key, value in list(namespace.items()):   # numba resolves a helper's callees from these globals
            if isinstance(value, _Deferred):
                namespace[key] = value.compiled()
        return self.compiled()(*args)
