"""Ctrl-C (SIGINT) and SIGTERM during a scan: stop between commits, never inside one.

While a scan runs, both signals are caught. Outside a commit the handler stops the work in
flight at once (the unit is dropped and recomputed on resume); inside a commit it waits
until the commit is complete. The scan then raises :class:`ScanInterrupted`, whose message
says how to resume; the CLI exits with 128 + the signal number (130 for SIGINT, 143 for
SIGTERM), as shells do for a process ended by a signal.
"""

from __future__ import annotations

import signal
import threading
from contextlib import contextmanager

from ..errors import CompositionError

SIGNALS = (signal.SIGINT, signal.SIGTERM)


class ScanInterrupted(CompositionError):
    """A scan stopped by a signal; the scan file is valid and resumable."""

    def __init__(self, message: str, signum: int):
        super().__init__(message)
        self.signum = signum

    @property
    def exit_code(self) -> int:
        return 128 + int(self.signum)


class Interrupt(BaseException):
    """Raised inside the scan by the signal handler (not an Exception: nothing swallows it)."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def signal_name(signum: int) -> str:
    try:
        return signal.Signals(signum).name
    except ValueError:
        return f"signal {signum}"


class Guard:
    """Catches SIGINT/SIGTERM for its lifetime; ``critical()`` marks a commit in progress."""

    def __init__(self):
        self._depth = 0
        self.pending: int | None = None
        self._previous = {}

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            for s in SIGNALS:
                self._previous[s] = signal.signal(s, self._handle)
        return self

    def __exit__(self, *exc):
        for s, handler in self._previous.items():
            signal.signal(s, handler)
        self._previous.clear()

    def _handle(self, signum, frame):
        if self.pending is None:
            self.pending = signum
        if self._depth == 0:
            raise Interrupt(self.pending)  # a second signal also cuts short the clean-up

    @contextmanager
    def critical(self):
        """Run a commit to its end; a signal that arrives meanwhile takes effect after it."""
        self._depth += 1
        try:
            yield
        finally:
            self._depth -= 1
        if self._depth == 0 and self.pending is not None:
            raise Interrupt(self.pending)

    def check(self) -> None:
        """Raise now if a signal arrived earlier."""
        if self.pending is not None:
            raise Interrupt(self.pending)
