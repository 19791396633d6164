"""One vocabulary across commands: the argparse tree of `fieldvane` (io/cli.py build_parser) is walked and
every command is held to the same option names, dests, metavars and help wording for the same idea, the
overwrite rule (--force wherever files are written), help on everything, and docs that exist."""

from __future__ import annotations

import argparse
import re
from pathlib import Path

import pytest

from fieldvane.io.cli import COMMANDS, build_parser
from fieldvane.io.options import CALIBRATION_HELP, FORCE_HELP, NO_PLOTS_HELP

ROOT = Path(__file__).resolve().parents[1]

# idea (dest) -> the one spelling every command uses for it
SPELLING = {
    "calibration": ["-c", "--calibration"],
    "output": ["-o", "--output"],
    "force": ["--force"],
    "input_format": ["--input-format"],
    "output_format": ["--output-format"],
    "no_plots": ["--no-plots"],
    "filter": ["--filter"],
    "sensor": ["--sensor"],
    "out": ["--out"],
    "capture": ["--capture"],
    "seed": ["--seed"],
    "duration": ["--duration"],
    "readouts": ["--readouts"],
    "no_progress": ["--no-progress"],
}
OLD_SPELLINGS = {"--input", "--format", "--no-png", "--b-nT"}
# dests that name something a command writes: such a command must offer --force
WRITES = {"output", "capture", "plots", "to", "out"}
# the demo writes only into a new dated folder of its own and never replaces anything
NEVER_REPLACES = {"demo": "nothing is ever replaced"}
FILE_METAVAR = re.compile(r"^[A-Z][A-Z_]*\.(csv|json|toml|npz)$")


def _commands():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return parser, sub, sub.choices


def _visible(sp):
    return [a for a in sp._actions if not isinstance(a, argparse._HelpAction) and a.help != argparse.SUPPRESS]


def _hidden(sp):
    return [a for a in sp._actions if a.help == argparse.SUPPRESS]


def _all_help_text(sp) -> str:
    return "\n".join([sp.description or ""] + [a.help or "" for a in _visible(sp)])


PARSER, SUB, CMDS = _commands()


def test_every_registered_command_is_in_the_tree():
    assert set(CMDS) == set(COMMANDS)


@pytest.mark.parametrize("name", sorted(CMDS))
def test_command_has_a_description_and_every_option_a_help(name):
    sp = CMDS[name]
    assert sp.description and len(sp.description.strip()) > len(COMMANDS[name][1]), name
    for action in _visible(sp):
        assert action.help and action.help.strip(), f"{name}: {action.option_strings or action.dest} has no help"
        assert not action.help.rstrip().endswith("."), f"{name}: help of {action.dest} ends with a full stop"
        assert action.help[0] == action.help[0].lower() or action.help[:3].isupper(), \
            f"{name}: help of {action.dest} starts with a capital"


@pytest.mark.parametrize("name", sorted(CMDS))
def test_same_idea_same_spelling_and_dest(name):
    for action in _visible(CMDS[name]):
        if action.dest in SPELLING and action.option_strings:
            assert action.option_strings == SPELLING[action.dest], (name, action.dest, action.option_strings)
        for dest, spelling in SPELLING.items():
            if set(action.option_strings) & set(spelling):
                assert action.dest == dest, (name, action.option_strings, action.dest)
        assert not set(action.option_strings) & OLD_SPELLINGS, (name, action.option_strings)


@pytest.mark.parametrize("name", sorted(CMDS))
def test_shared_options_share_their_wording(name):
    for a in _visible(CMDS[name]):
        if a.dest == "force":
            assert a.help == FORCE_HELP, name
        elif a.dest == "no_plots":
            assert a.help == NO_PLOTS_HELP, name
        elif a.dest == "calibration":
            assert a.metavar == "CAL.json" and a.help.startswith(CALIBRATION_HELP), name
        elif a.dest in ("input_format", "output_format"):
            assert tuple(a.choices) == ("binary", "csv"), name
            assert a.help.startswith("binary wire frames"), name
        elif a.dest == "filter":
            assert a.metavar == "FILTER.toml" and "filter settings TOML" in a.help, name
        elif a.dest == "sensor":
            assert a.metavar == "SENSOR.toml", name
        elif a.dest == "out":
            assert a.metavar == "SINK" and a.default == [], name        # repeatable logger outputs only
        elif a.dest == "output":
            # -o is a file (metavar names its kind) or, where several files are written, a folder
            if a.metavar == "DIR":
                assert a.help.startswith("folder for"), name
            else:
                assert FILE_METAVAR.match(a.metavar or ""), (name, a.metavar)
                assert a.help.startswith("file to write"), name
        elif a.dest in ("capture", "plots"):
            assert a.metavar == "DIR", name


@pytest.mark.parametrize("name", sorted(CMDS))
def test_commands_that_write_files_refuse_to_replace_them_without_force(name):
    sp = CMDS[name]
    dests = {a.dest for a in _visible(sp)}
    if not dests & WRITES:
        return
    if name in NEVER_REPLACES:
        assert NEVER_REPLACES[name] in sp.description, name
        assert "force" not in dests
        return
    assert "force" in dests, f"{name} writes files but has no --force"


@pytest.mark.parametrize("name", sorted(CMDS))
def test_long_options_match_without_regard_to_case(name):
    sp = CMDS[name]
    for action in sp._actions:
        for option in action.option_strings:
            if not option.startswith("--"):
                continue
            found = sp._parse_optional(option.upper())
            found = found[0] if isinstance(found, list) else found      # Python 3.12 returns a list
            assert found is not None and found[0] is action, (name, option)


@pytest.mark.parametrize("argv, dest, value", [
    (["run", "--port", "p", "-c", "c.json", "--input", "csv"], "input_format", "csv"),
    (["run", "--port", "p", "-c", "c.json", "--input-format", "csv"], "input_format", "csv"),
    (["emit", "static", "--to", "pty", "--format", "csv"], "output_format", "csv"),
    (["map", "-c", "c.json", "--no-png"], "no_plots", True),
    (["report", "e.csv", "-o", "r", "--no-png"], "no_plots", True),
    (["map", "-c", "c.json", "--b-nT", "20000"], "b_nT", 20000.0),
    (["map", "-c", "c.json", "--b-nt", "20000"], "b_nT", 20000.0),
    (["map", "-c", "c.json", "--B-NT=20000"], "b_nT", 20000.0),
    (["run", "--port", "p", "-c", "c.json", "--capture-file-MiB", "8"], "capture_file_mib", 8.0),
    (["demo", "--out", "somewhere"], "output", "somewhere"),
    (["demo", "-o", "somewhere"], "output", "somewhere"),
])
def test_old_spellings_and_unit_cases_still_parse(argv, dest, value, capsys):
    args = PARSER.parse_args(argv)
    assert getattr(args, dest) == value
    err = capsys.readouterr().err
    old = [a for a in argv if a in ("--input", "--format", "--no-png") or a == "--out" and argv[0] == "demo"]
    if old:   # a renamed option says once what it is called now
        assert f"{old[0]} is now" in err


def test_defaults_survive_hidden_aliases():
    args = PARSER.parse_args(["run", "--port", "p", "-c", "c.json"])
    assert args.input_format == "binary" and args.out == []
    args = PARSER.parse_args(["map", "-c", "c.json"])
    assert args.no_plots is False and args.output == "."
    assert PARSER.parse_args(["demo"]).output == "demo_out"


@pytest.mark.parametrize("name", sorted(CMDS))
def test_help_names_only_docs_that_exist(name):
    text = _all_help_text(CMDS[name]) + "\n" + (PARSER.description or "")
    for doc in re.findall(r"docs/[A-Za-z0-9_]+\.md", text):
        assert (ROOT / doc).is_file(), f"{name} --help names {doc}, which does not exist"
    assert "DESIGN.md" not in text


def test_docs_and_readme_name_only_docs_that_exist():
    for path in [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]:
        text = path.read_text(encoding="utf-8")
        for doc in re.findall(r"docs/[A-Za-z0-9_]+\.md", text):
            assert (ROOT / doc).is_file(), f"{path.name} names {doc}, which does not exist"
        assert "DESIGN.md" not in text, f"{path.name} points to a DESIGN.md the repository does not have"
