"""The live status line of `run`: the latest estimate and the link's health in one line on stderr.

On a terminal the line is rewritten in place (carriage return, no scrolling) a few times a second;
messages (link lost, capture problems) are printed above it. When stderr is a file or a pipe the
same text is written as a plain line every `interval_s` seconds, so logs stay readable.
"""

from __future__ import annotations

import shutil
import sys
import threading
import time
from collections.abc import Callable, Mapping

from fieldvane.estimator.flags import describe

TTY_REFRESH_S = 0.25      # how often a terminal's line is redrawn
PROBES_USED = {0: "no probe used", 1: "probe 1", 2: "probe 2", 3: "probes 1+2"}   # the probes_used bitmask


def _mib(n: int) -> str:
    return f"{n / 2**20:.1f} MiB" if n >= 2**20 else f"{n / 1024:.0f} KiB" if n >= 1024 else f"{n} B"


def link_text(counters: Mapping[str, object]) -> str:
    """Return the link part of the status: frames (or lines), CRC errors, missing frames, capture bytes, losses."""
    dec = counters.get("decoder", {}) or {}
    parts = []
    if "frames_ok" in dec:
        parts.append(f"frames {dec['frames_ok']:,}  crc {dec.get('crc_errors', 0)}  missing {dec.get('seq_gaps', 0)}")
    else:
        parts.append(f"lines {dec.get('lines_ok', 0):,}  bad {dec.get('bad_lines', 0)}")
    cap = counters.get("capture")
    if cap:
        text = f"capture {_mib(int(cap.get('bytes', 0)))}"
        if cap.get("bytes_lost"):
            text += f", LOST {cap['bytes_lost']:,} B"
        parts.append(text)
    else:
        parts.append("no capture")
    dropped = sum(int(v.get("dropped", 0)) for k, v in counters.items()
                  if k.startswith("sink[") and isinstance(v, Mapping))
    if dropped:
        parts.append(f"loggers dropped {dropped:,}")
    link = counters.get("link", {}) or {}
    if link.get("bytes_dropped"):
        parts.append(f"not estimated live {link['bytes_dropped']:,} B")
    if link and not link.get("connected", 1):
        parts.append("LINK DOWN")
    return "  ".join(parts)


def estimate_text(record: Mapping[str, object] | None) -> str:
    """Return the estimate part of the status: t (s), u (sensor frame), |B| (nT), sigma (deg), flags by name."""
    if record is None:
        return "waiting for the first estimate"
    flags = describe(int(record.get("flags", 0)))

    def num(key: str, fmt: str) -> str:
        v = record.get(key)
        try:
            return format(float(v), fmt)
        except (TypeError, ValueError):
            return "-"
    probes = PROBES_USED.get(record.get("probes_used"), "")
    return (f"t {num('t', '.2f')} s  u ({num('ux', '+.3f')} {num('uy', '+.3f')} {num('uz', '+.3f')})  "
            f"|B| {num('b_nT', '.1f')} nT  sigma {num('sigma_deg', '.3f')} deg  {flags}"
            + (f"  {probes}" if probes else ""))


def status_text(record: Mapping[str, object] | None, counters: Mapping[str, object]) -> str:
    """Return the whole status line (no line end): the estimate, then the link and capture counters."""
    return f"{estimate_text(record)}  |  {link_text(counters)}"


class StatusLine:
    """Draws the status on a stream: in place on a terminal, as plain lines every interval_s otherwise.

    update() may be called as often as wanted (it draws only when due); log() prints a message
    without garbling the line. Thread-safe: the live loop and the main thread may both print.
    """

    def __init__(self, stream=None, interval_s: float = 10.0, tty: bool | None = None,
                 clock: Callable[[], float] = time.monotonic, width: int | None = None):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = self.stream.isatty() if tty is None else bool(tty)
        self.interval_s = TTY_REFRESH_S if self.tty else float(interval_s)
        self.clock = clock
        self.width = width
        self._next = clock() + (0.0 if self.tty else self.interval_s)
        self._shown = 0          # characters of the line now on the terminal
        self._text = ""
        self._lock = threading.Lock()

    def _fit(self, text: str) -> str:
        width = self.width or shutil.get_terminal_size((160, 24)).columns
        return text if len(text) < width else text[:max(width - 4, 10)] + "..."

    def update(self, record: Mapping[str, object] | None, counters: Mapping[str, object],
               force: bool = False) -> bool:
        """Draw the status if it is due (or force); returns True when something was written."""
        now = self.clock()
        if not force and now < self._next:
            return False
        self._next = now + self.interval_s
        text = status_text(record, counters)
        with self._lock:
            self._text = text
            if self.tty:
                self._draw()
            else:
                self.stream.write(f"status: {text}\n")
            self.stream.flush()
        return True

    def _draw(self) -> None:
        text = self._fit(self._text)
        pad = max(self._shown - len(text), 0)
        self.stream.write("\r" + text + " " * pad)
        self._shown = len(text)

    def _clear(self) -> None:
        if self._shown:
            self.stream.write("\r" + " " * self._shown + "\r")
            self._shown = 0

    def log(self, line: str) -> None:
        """Print a message line; on a terminal the status line is cleared first and redrawn after it."""
        with self._lock:
            if self.tty:
                self._clear()
                self.stream.write(line + "\n")
                if self._text:
                    self._draw()
            else:
                self.stream.write(line + "\n")
            self.stream.flush()

    def close(self) -> None:
        """End the status line (a terminal keeps its last state on its own line)."""
        with self._lock:
            if self.tty and self._shown:
                self.stream.write("\n")
                self._shown = 0
            self._text = ""
            self.stream.flush()
