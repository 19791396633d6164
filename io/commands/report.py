"""`fieldvane report`: not built yet."""

from __future__ import annotations

DESCRIPTION = "Not built yet."


def add_arguments(parser) -> None:
    """Register this command's options on its argparse sub-parser."""


def run(args) -> int:
    """Run the command; returns the exit code."""
    from fieldvane.io.errors import JobError
    raise JobError("'report' is not built yet")
