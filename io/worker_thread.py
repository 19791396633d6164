"""A daemon thread that tells its own end: the capture's, the loggers' and the replay writer's threads.

Waiting for a thread with Thread.join, and asking Thread.is_alive, can be fooled by a Ctrl-C: on CPython 3.11
(seen here on 3.11.7) a KeyboardInterrupt raised inside join() marks the still-running thread as ended, so a
second Ctrl-C during shutdown made a write still under way look finished (and the bytes in it look safe). This
thread sets an event as the very last thing it does; waits and questions go to that event.
"""

from __future__ import annotations

import threading
from collections.abc import Callable


class WorkerThread:
    """A daemon thread running target(*args) whose end is an event it sets itself (see the module's note)."""

    def __init__(self, target: Callable[..., object], *args, name: str):
        self._target, self._args = target, args
        self.ended = threading.Event()
        self._thread = threading.Thread(target=self._run, name=name, daemon=True)

    def _run(self) -> None:
        try:
            self._target(*self._args)
        finally:
            self.ended.set()

    def start(self) -> None:
        """Start the thread (once)."""
        self._thread.start()

    @property
    def name(self) -> str:
        """Return the thread's name."""
        return self._thread.name

    def join(self, timeout: float | None = None) -> bool:
        """Wait up to timeout s (None: for ever) for the thread to end; return True if it has."""
        return self.ended.wait(timeout)

    def is_alive(self) -> bool:
        """Return True from start until the thread's target has returned or raised."""
        return self._thread.ident is not None and not self.ended.is_set()

    def is_current(self) -> bool:
        """Return True when called from this thread."""
        return self._thread is threading.current_thread()
