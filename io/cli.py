"""The `fieldvane` command line: one subcommand per module in fieldvane.io.commands."""

from __future__ import annotations

import argparse
import os

# The matrices here are small: a BLAS thread pool only competes with the live loop's own threads on a small
# computer. Set before numpy is first imported (the commands import it lazily); a user's setting wins.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")
import contextlib
import importlib
import sys
import warnings

from fieldvane import __version__
from fieldvane.io.errors import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_INTERRUPTED, InputError, JobError
from fieldvane.io.options import Parser

# name -> (module, one-line help). Modules are imported only when their command runs, so the
# live loop (`run`) never pays for plotting or fitting imports.
COMMANDS = {
    "demo": ("demo", "run the whole job on the built-in simulated sensor, end to end"),
    "simulate": ("simulate", "write a simulated recording CSV from a scenario TOML"),
    "emit": ("emit", "stream a simulated sensor as wire frames or CSV lines to a pty, TCP or a file"),
    "calibrate": ("calibrate", "fit a calibration from a scan recording"),
    "plan-scan": ("plan_scan", "propose the field vectors of a calibration scan for a target axis accuracy"),
    "replay": ("replay", "estimate field directions from a recording CSV or a capture"),
    "map": ("map", "map the Cramer-Rao bound over the sphere for a calibration"),
    "run": ("run", "live: read a serial port, estimate, stream to loggers, capture raw bytes"),
    "tune": ("tune", "fit filter noise settings to a recording by innovation likelihood"),
    "report": ("report", "plots and a summary of an estimates CSV"),
    "export": ("export", "estimates as IAGA-2002 files, or a capture's raw samples as a recording CSV"),
    "examples": ("examples", "list the example scenarios, or copy them into a folder to edit"),
    "docs": ("docs", "show where the documentation is, or print one document"),
}


class _Version(argparse.Action):
    """--version: the version, then whether the kernels are the ones compiled at install or numba's JIT."""

    def __call__(self, parser, namespace, values, option_string=None):
        from fieldvane import kernels

        print(f"fieldvane {__version__}\nkernels: {kernels.mode()}")
        parser.exit()


def build_parser(argv: list[str] | None = None) -> argparse.ArgumentParser:
    """Return the top-level argument parser with every subcommand registered; with argv naming a command, that
    command alone (the others' modules are not loaded: start-up stays short)."""
    wanted = argv[0] if argv and argv[0] in COMMANDS else None      # `fieldvane -h replay` still lists them all
    parser = Parser(
        prog="fieldvane",
        description="Field direction and magnitude from the lock-in outputs of a two-isotope "
                    "all-optical vector atomic magnetometer. Not a safety or navigation "
                    "instrument by itself. `fieldvane docs` shows where the documentation is.",
    )
    parser.add_argument("--version", action=_Version, nargs=0,
                        help="show the version and which compiled kernels this installation uses, and exit")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (module_name, help_text) in COMMANDS.items():
        if wanted is not None and name != wanted:
            continue
        module = _load(module_name)
        p = sub.add_parser(name, help=help_text, description=getattr(module, "DESCRIPTION", help_text),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        module.add_arguments(p)
        p.set_defaults(_module=module_name)
    return parser


def _load(module_name: str):
    return importlib.import_module(f"fieldvane.io.commands.{module_name}")


@contextlib.contextmanager
def _warnings_as_notes(command: str):
    """Show Python/numpy warnings as one-line notes naming the command (each text once), never raw."""
    seen: dict[str, int] = {}

    def show(message, category, filename, lineno, file=None, line=None):
        text = f"{category.__name__}: {str(message).splitlines()[0] if str(message) else ''}"
        seen[text] = seen.get(text, 0) + 1
        if seen[text] == 1:
            print(f"fieldvane {command}: note: {text} (in {filename.rsplit('/', 1)[-1]}:{lineno})",
                  file=sys.stderr)

    with warnings.catch_warnings():
        warnings.simplefilter("always")
        warnings.showwarning = show
        try:
            yield
        finally:
            repeats = sum(n - 1 for n in seen.values())
            if repeats:
                print(f"fieldvane {command}: note: the warnings above came {repeats} more time(s)",
                      file=sys.stderr)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the `fieldvane` console command; returns the process exit code."""
    parser = build_parser(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_BAD_INPUT
    module = _load(args._module)
    with _warnings_as_notes(args.command):
        try:
            return int(module.run(args) or 0)
        except InputError as exc:
            print(f"fieldvane {args.command}: error: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        except JobError as exc:
            print(f"fieldvane {args.command}: failed: {exc}", file=sys.stderr)
            return EXIT_FAILURE
        except KeyboardInterrupt:
            print(f"fieldvane {args.command}: interrupted", file=sys.stderr)
            return EXIT_INTERRUPTED
        except BrokenPipeError:
            return EXIT_FAILURE

if __name__ == "__main__":
    raise SystemExit(main())
