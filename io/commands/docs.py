"""`fieldvane docs`: where the documentation is, or one document printed."""

from __future__ import annotations

DESCRIPTION = """Show where this installation keeps its documentation (the file formats, the logger
sinks, the scenario and configuration files, the estimates columns, the commands) and list the
documents; with a NAME, print that document.

examples:
  fieldvane docs
  fieldvane docs estimates_columns
"""


TITLE_LINE = r"#\s+(.*)"


def add_arguments(parser) -> None:
    """Register docs's options."""
    parser.add_argument("name", nargs="?", metavar="NAME",
                        help="document to print (a name from the list, with or without .md)")


def run(args) -> int:
    """List the documents or print one; returns the exit code."""
    from fieldvane.io.errors import InputError, JobError
    from fieldvane.io.resources import documents, listing_lines, shipped_dir

    docs = documents()
    if not docs:
        raise JobError("this installation has no documentation folder (reinstall fieldvane)")
    if args.name is None:
        print(f"documentation: {shipped_dir('docs')}/")
        print("\n".join(listing_lines(docs, TITLE_LINE)))
        print("print one with `fieldvane docs NAME`")
        return 0
    name = args.name[:-3] if args.name.endswith(".md") else args.name
    name = name.rsplit("/", 1)[-1]
    if name not in docs:
        raise InputError(f"no such document (known: {', '.join(docs)})", args.name)
    print(docs[name].read_text(encoding="utf-8"), end="")
    return 0
