"""Progress of a scan: the events ``run_scan`` reports, and a printer for a terminal or a log.

``run_scan(..., progress=callback)`` calls ``callback(ScanProgress)``: once at the start
(``kind = "start"``), after every committed work unit (``"unit"``), when every unit of a
responder layer is committed (``"layer"``, with a one-line summary) and at the end
(``"finish"``). :class:`ProgressPrinter` turns them into lines on stderr: on a terminal a
status line rewritten in place; elsewhere (a log file, a batch job) a plain line every
``interval`` seconds. Layer summaries and the start line are printed in both cases.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass
from typing import TextIO


@dataclass(frozen=True)
class ScanProgress:
    kind: str  # "start", "unit", "layer" or "finish"
    units_done: int  # committed units, including those of earlier runs
    units_total: int
    units_before: int  # committed before this run started (resume)
    pairs_done: int
    pairs_before: int
    pairs_total: int
    entries: int  # token-matrix entries ranked by this run
    elapsed: float  # seconds since this run started computing
    message: str = ""  # "start": what is resumed; "layer": the layer's summary

    @property
    def rate(self) -> float | None:
        """Entries per second of this run."""
        return self.entries / self.elapsed if self.elapsed > 0 and self.entries else None

    @property
    def eta(self) -> float | None:
        """Seconds left, from this run's pace over pairs."""
        done = self.pairs_done - self.pairs_before
        if done <= 0 or self.elapsed <= 0:
            return None
        return self.elapsed / done * (self.pairs_total - self.pairs_done)


def format_duration(seconds: float | None) -> str:
    if seconds is None:
        return "?"
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    if h:
        return f"{h}h{m:02d}m"
    if m:
        return f"{m}m{s:02d}s"
    return f"{s}s"


def format_rate(rate: float | None) -> str:
    if rate is None:
        return "? entries/s"
    for unit, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if rate >= size:
            return f"{rate / size:.2f} {unit} entries/s"
    return f"{rate:.0f} entries/s"


def status_line(p: ScanProgress) -> str:
    """``units 57/120 (47%)  2.31 M entries/s  elapsed 1m12s  ETA 1m21s``"""
    pct = 100.0 * p.units_done / p.units_total if p.units_total else 100.0
    return (f"units {p.units_done}/{p.units_total} ({pct:.0f}%)  {format_rate(p.rate)}  "
            f"elapsed {format_duration(p.elapsed)}  ETA {format_duration(p.eta)}")


class ProgressPrinter:
    """Print :class:`ScanProgress` events on a stream (stderr by default).

    On a terminal: a status line redrawn at most ``redraw`` seconds apart, shown once the
    scan has run ``delay`` seconds. Not on a terminal: a plain status line every
    ``interval`` seconds and no control characters.
    """

    def __init__(self, stream: TextIO | None = None, tty: bool | None = None, interval: float = 60.0,
                 redraw: float = 0.25, delay: float = 2.0, clock=time.monotonic):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)()) if tty is None else tty
        self.interval, self.redraw, self.delay, self.clock = interval, redraw, delay, clock
        self._last = None
        self._drawn = False

    def __call__(self, p: ScanProgress) -> None:
        now = self.clock()
        if p.kind == "start":
            self._last = now
            if p.message:
                self._line(p.message)
            return
        if p.kind == "layer":
            self._line(p.message)
            return
        if p.kind == "finish":
            if self._drawn:
                self._line(status_line(p))
            return
        if self._last is None:
            self._last = now
        if self.tty:
            if p.elapsed >= self.delay and (not self._drawn or now - self._last >= self.redraw):
                self.stream.write("\r\x1b[K" + status_line(p))
                self.stream.flush()
                self._drawn, self._last = True, now
        elif now - self._last >= self.interval:
            self._line(status_line(p))
            self._last = now

    def close(self) -> None:
        """End a status line left on the terminal (after an interruption or a failure)."""
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
            self._drawn = False

    def _clear(self) -> None:
        self.stream.write("\r\x1b[K")
        self._drawn = False

    def _line(self, text: str) -> None:
        if self._drawn:
            self._clear()
        self.stream.write(text + "\n")
        self.stream.flush()
