"""The shared option vocabulary: one option name, dest, metavar and help wording per idea, for every command.

  -o/--output FILE   a file a command writes (metavar names its kind: REC.csv, CAL.json, EST.csv, ...)
  -o/--output DIR    a folder where a command writes several files
  --out SINK         a live-style logger output (run, replay): docs/sinks.md
  --force            replace existing outputs; an input is never replaced
  -c/--calibration   the calibration JSON
  --input-format     binary wire frames or recording-CSV lines (what a stream or capture holds)
  --no-plots         skip the figures

Old spellings stay accepted as hidden aliases (a one-line note names the new one), and long option
names are matched without regard to case, so a unit may be typed either way (`--b-nT`, `--b-nt`).
"""

from __future__ import annotations

import argparse
import sys

INPUT_FORMATS = ("binary", "csv")
FORCE_HELP = "replace existing output files (never an input)"
NO_PLOTS_HELP = "skip the figures"
CALIBRATION_HELP = "calibration JSON written by `fieldvane calibrate` (its .npz beside it)"


class Parser(argparse.ArgumentParser):
    """ArgumentParser whose long options match without regard to case (`--b-nT` finds `--b-nt`)."""

    def _parse_optional(self, arg_string):
        if arg_string.startswith("--") and arg_string not in self._option_string_actions:
            name, eq, value = arg_string.partition("=")
            folded = {o.lower(): o for o in self._option_string_actions if o.startswith("--")}
            if name.lower() in folded:
                arg_string = folded[name.lower()] + eq + value
        return super()._parse_optional(arg_string)


class _Renamed(argparse.Action):
    """A hidden old spelling: stores like the new option and says once which name to use now."""

    def __init__(self, option_strings, dest, new: str = "", flag: bool = False, **kwargs):
        self.new, self.flag = new, flag
        if flag:
            kwargs["nargs"] = 0
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        setattr(namespace, self.dest, True if self.flag else values)
        print(f"fieldvane: note: {option_string} is now {self.new}", file=sys.stderr)


def add_renamed(parser, old: str, new: str, dest: str, flag: bool = False, **kwargs) -> None:
    """Register `old` as a hidden alias of option `new` (same dest); flag=True for on/off options."""
    parser.add_argument(old, dest=dest, action=_Renamed, new=new, flag=flag, help=argparse.SUPPRESS,
                        default=argparse.SUPPRESS, **kwargs)


def add_force(parser) -> None:
    """Register --force with the shared wording."""
    parser.add_argument("--force", action="store_true", help=FORCE_HELP)


def add_output_file(parser, metavar: str, what: str, required: bool = True) -> None:
    """Register -o/--output for a file the command writes (metavar like EST.csv)."""
    parser.add_argument("-o", "--output", required=required, metavar=metavar, help=f"file to write: {what}")


def add_output_dir(parser, what: str, required: bool = True, default: str | None = None,
                   default_text: str | None = None) -> None:
    """Register -o/--output DIR for a folder where the command writes several files (created if missing)."""
    tail = f"; default {default_text or default}" if default is not None else ""
    parser.add_argument("-o", "--output", required=required and default is None, default=default,
                        metavar="DIR", help=f"folder for {what} (created if missing{tail})")


def add_calibration(parser, required: bool = True) -> None:
    """Register -c/--calibration CAL.json."""
    parser.add_argument("-c", "--calibration", required=required, metavar="CAL.json", help=CALIBRATION_HELP)


def add_input_format(parser, default: str | None, what: str) -> None:
    """Register --input-format binary|csv (old spellings --input and --format stay as hidden aliases)."""
    parser.add_argument("--input-format", choices=INPUT_FORMATS, default=default,
                        help=f"binary wire frames or recording-CSV lines: {what}")
    add_renamed(parser, "--input", "--input-format", "input_format", choices=INPUT_FORMATS)


def add_no_plots(parser) -> None:
    """Register --no-plots (old --no-png a hidden alias)."""
    parser.add_argument("--no-plots", action="store_true", help=NO_PLOTS_HELP)
    add_renamed(parser, "--no-png", "--no-plots", "no_plots", flag=True)


SITE_HELP = ("site TOML (docs/geographic.md): add the field at the site in north-east-down, X_nT Y_nT Z_nT "
             "H_nT F_nT D_deg I_deg, with sigma_D_deg sigma_I_deg sigma_F_nT")
START_UTC_HELP = ("UTC time of t = 0 as ISO 8601, e.g. 2026-12-02T00:00:00Z (utc = start + t); default: the "
                  "file's '# start_utc:' line")


def add_site_option(parser) -> None:
    """Register --site SITE.toml with the shared wording."""
    parser.add_argument("--site", metavar="SITE.toml", help=SITE_HELP)


def add_start_utc_option(parser, default_text: str = "") -> None:
    """Register --start-utc TIME with the shared wording (default_text replaces the default's description)."""
    text = START_UTC_HELP if not default_text else START_UTC_HELP.split("; default")[0] + "; default: " + default_text
    parser.add_argument("--start-utc", metavar="TIME", help=text)
