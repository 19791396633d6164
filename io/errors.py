"""Errors that end a command with a clear message instead of a traceback."""

from __future__ import annotations

# Exit codes, documented in README.md ("Exit codes").
EXIT_OK = 0
EXIT_FAILURE = 1        # the job ran but could not finish (e.g. calibration fit failed, a logger file failed)
EXIT_BAD_INPUT = 2      # bad command line, file, line or field
EXIT_LINK = 3           # serial link could not be opened and never came up
EXIT_CAPTURE_LOST = 4   # ran, but raw bytes were lost: the capture is incomplete (counts printed)
EXIT_INTERRUPTED = 130  # Ctrl-C / SIGTERM after a clean shutdown

# How the `column` of an InputError is named in its message.
KINDS = ("column", "key", "option")


class InputError(Exception):
    """Bad user input, reported as `file:line: column 'x': message` (or `key 'x'`, `option '--x'`)."""

    def __init__(self, message: str, path: str | None = None, line: int | None = None,
                 column: str | None = None, *, kind: str | None = None):
        self.path, self.line, self.column = path, line, column
        self.reason = message
        if kind is None:
            kind = "option" if column is not None and str(column).startswith("-") else "column"
        if kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, got {kind!r}")
        self.kind = kind
        where = ""
        if path is not None:
            where = str(path)
            if line is not None:
                where += f":{line}"
            where += ": "
        if column is not None:
            where += f"{kind} '{column}': "
        super().__init__(where + message)


class JobError(Exception):
    """The job could not be completed (exit code 1)."""
