"""Build step: compile fieldvane's kernels ahead of time (numba.pycc) into the extension fieldvane._kernels.

pyproject.toml holds the project's metadata; this file only adds the compiled module. The kernels'
source is the modules listed in fieldvane/kernels.py (KERNEL_MODULES). If compiling fails (no C compiler or Python headers, a platform numba.pycc
does not serve), the install still succeeds and fieldvane compiles the same functions with numba's
JIT at first use: slower to start, same results.
"""

import glob
import os
import sys

from setuptools import Extension, setup
from setuptools.command.build_ext import build_ext

ROOT = os.path.dirname(os.path.abspath(__file__))


def compile_kernels(target: str) -> None:
    """Compile every @entry of the kernel modules into the extension file `target` (its full path)."""
    import importlib

    os.environ["FIELDVANE_JIT"] = "1"          # the modules give numba functions to compile, not the old build
    sys.path.insert(0, ROOT)
    import fieldvane
    fieldvane.__path__.append(ROOT)            # fieldvane.estimator -> estimator/, fieldvane.io -> io/
    from fieldvane import kernels
    for name in kernels.KERNEL_MODULES:
        importlib.import_module(name)

    import numba.pycc.compiler as pycc_compiler
    from numba.pycc import CC

    options_of = {}                             # python function -> the numba options its @entry gave
    cc = CC("_kernels")
    for name, (module_name, signature, options) in kernels.ENTRIES.items():
        function = getattr(sys.modules[module_name], name).py_func
        options_of[function] = options
        cc.export(name, signature)(function)
    namespace = {}
    exec(f"def sources_digest():\n    return {kernels.sources_digest()}\n", namespace)
    cc.export("sources_digest", "i8()")(namespace["sources_digest"])

    plain_compile = pycc_compiler.compile_extra
    compiled_with_options = set()

    def compile_with_entry_options(typing, target_context, function, args, return_type, flags, **kw):
        # numba.pycc compiles every export with default flags; keep each entry's own (nogil, error model).
        options = options_of.get(function, {})
        compiled_with_options.add(function)
        flags = flags.copy()
        flags.release_gil = bool(options.get("nogil", False))
        flags.error_model = options.get("error_model", "python")
        return plain_compile(typing, target_context, function, args, return_type, flags, **kw)

    pycc_compiler.compile_extra = compile_with_entry_options
    cc.output_dir = os.path.dirname(target)
    cc.output_file = os.path.basename(target)
    cc.compile()
    if not set(options_of) <= compiled_with_options:
        # A numba.pycc that no longer calls compile_extra would build every entry without nogil and with
        # Python's division errors: not the kernels the JIT gives. Better none (the JIT path) than those.
        os.remove(target)
        raise RuntimeError("numba.pycc did not compile through compile_extra; entry options would be lost")


class BuildKernels(build_ext):
    """build_ext that makes fieldvane._kernels with numba.pycc, and lets the install go on if it cannot."""

    def build_extension(self, ext):
        target = self.get_ext_fullpath(ext.name)
        os.makedirs(os.path.dirname(target), exist_ok=True)
        try:
            compile_kernels(target)
        except Exception as error:                 # noqa: BLE001 - any failure leaves the JIT path, which works
            self.warn(f"fieldvane: compiled kernels not built ({type(error).__name__}: {error}); fieldvane "
                      f"will compile them with numba's JIT at first use (slower start, same results)")
            # An editable checkout may hold a module from an earlier build: it would be refused as older than its
            # sources anyway; removing it makes the reason say what happened.
            for name in glob.glob(os.path.join(ROOT, "fieldvane", "_kernels*")):
                os.remove(name)


# optional: where the module is not built, an editable install must not fail copying it into the checkout.
setup(ext_modules=[Extension("fieldvane._kernels", sources=[], optional=True)], cmdclass={"build_ext": BuildKernels})
