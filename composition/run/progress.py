"""Progress of a scan: the events ``run_scan`` reports, and a printer for a terminal or a log.

``run_scan(..., progress=callback)`` calls ``callback(ScanProgress)``: once at the start
(``kind = "start"``), after every committed work unit (``"unit"``), when every unit of a
responder layer is committed (``"layer"``, with a one-line summary) and at the end
(``"finish"``). :class:`ProgressPrinter` turns them into lines on stderr: on a terminal a
status line rewritten in place; elsewhere (a log file, a batch job) a plain line every
``interval`` seconds. Layer summaries and the start line are printed in both cases.

The final phase of a scan (head profiles, model-space scores) has its own rate and ETA: its
units are paced by their cost in token-matrix entries (``phase_cost_*``), not by pairs, so the
line keeps moving after the last pair. ``counter`` feeds the same printer from a plain
``progress(done, total)`` callback (``composition heads``).
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass
from typing import Callable, TextIO


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
    phase: str = "pairs"  # "pairs", or "final": head profiles and model-space scores
    phase_cost_done: float = 0.0  # final phase: cost (token-matrix entries) computed by this run
    phase_cost_left: float = 0.0  # final phase: cost (token-matrix entries) still to compute
    phase_elapsed: float = 0.0  # final phase: seconds this run has spent in it
    items: str = "units"  # what units_done counts, for the status line

    @property
    def rate(self) -> float | None:
        """Entries per second of this run (of its final phase, once there)."""
        if self.phase == "final":
            done, elapsed = self.phase_cost_done, self.phase_elapsed
            return done / elapsed if elapsed > 0 and done else None
        return self.entries / self.elapsed if self.elapsed > 0 and self.entries else None

    @property
    def eta(self) -> float | None:
        """Seconds left, from this run's pace over pairs (over the final phase's cost, once there)."""
        if self.phase == "final":
            if self.phase_cost_left <= 0:
                return 0.0
            if self.phase_cost_done <= 0 or self.phase_elapsed <= 0:
                return None
            return self.phase_elapsed / self.phase_cost_done * self.phase_cost_left
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
    """``units 57/120 (47%)  2.31 M entries/s  elapsed 1m12s  ETA 1m21s``; in the final phase
    ``units 110/120 (92%)  head profiles and model-space scores  41.2 M entries/s  ...``"""
    pct = 100.0 * p.units_done / p.units_total if p.units_total else 100.0
    phase = "  head profiles and model-space scores" if p.phase == "final" and p.items == "units" else ""
    return (f"{p.items} {p.units_done}/{p.units_total} ({pct:.0f}%){phase}  {format_rate(p.rate)}  "
            f"elapsed {format_duration(p.elapsed)}  ETA {format_duration(p.eta)}")


def counter(printer: Callable[[ScanProgress], None], items: str, entries_each: float,
            clock=time.monotonic) -> Callable[[int, int], None]:
    """A ``progress(done, total)`` callback (``composition.interpret.heads``) that feeds ``printer``
    the events of one final phase: ``done`` of ``total`` ``items``, each costing ``entries_each``
    token-matrix entries (a head profile: V x V). Call it with ``(0, total)`` to start the clock."""
    start = clock()

    def progress(done: int, total: int) -> None:
        elapsed = clock() - start
        kind = "start" if done == 0 else "unit"
        printer(ScanProgress(kind, done, total, 0, 0, 0, 0, int(done * entries_each), elapsed, phase="final",
                             phase_cost_done=done * entries_each, phase_cost_left=(total - done) * entries_each,
                             phase_elapsed=elapsed, items=items))

    return progress


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
