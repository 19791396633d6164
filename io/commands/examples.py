"""`fieldvane examples`: list the example scenarios, or copy them into a folder to edit."""

from __future__ import annotations

DESCRIPTION = """List the example scenarios shipped with fieldvane (simulated sensors, motions and
faults; docs/scenarios.md), or copy them into a folder to read and edit with -o DIR.

Every command that takes a scenario also takes an example's name (and the demo's built-in
scenarios demo_scan and demo_track), so the examples work without copying them:

examples:
  fieldvane examples
  fieldvane examples -o my_scenarios/
  fieldvane simulate calibration_scan -o scan.csv
"""


DESCRIPTION_LINE = r'description\s*=\s*"(.*)"'


def add_arguments(parser) -> None:
    """Register examples's options."""
    from fieldvane.io.options import add_force, add_output_dir

    add_output_dir(parser, "the copies of the example scenarios", required=False)
    add_force(parser)


def run(args) -> int:
    """List or copy the example scenarios; returns the exit code."""
    import shutil
    from pathlib import Path

    from fieldvane.io.errors import JobError
    from fieldvane.io.outputs import atomic_folder, check_folder_outputs, check_output
    from fieldvane.io.resources import example_scenarios, listing_lines, shipped_dir

    scenarios = example_scenarios()
    if not scenarios:
        raise JobError("this installation has no example scenarios (reinstall fieldvane)")
    if args.output is None:
        print(f"example scenarios in {shipped_dir('examples')}/ (use a name wherever a scenario file is asked for):")
        print("\n".join(listing_lines(scenarios, DESCRIPTION_LINE)))
        print("copy them with `fieldvane examples -o DIR`")
        return 0
    check_output(args.output, folder=True, force=True, option="--output")     # a file there: refused
    source = shipped_dir("examples")
    files = [p for p in sorted(source.rglob("*")) if p.is_file() and "__pycache__" not in p.parts]
    with atomic_folder(args.output) as tmp:
        for path in files:              # subfolders too: scenarios may name files beside them
            target = Path(tmp) / path.relative_to(source)
            target.parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(path, target)
        check_folder_outputs(tmp, args.output, inputs=files, force=args.force, option="--output")
    print(f"copied {len(scenarios)} example scenarios ({len(files)} files) to {args.output}/")
    return 0
