"""Progress everywhere it takes long (issue 13 item 6): the final phase of a scan (head profiles,
model-space scores) and `composition heads` show one status line with a rate and an ETA, paced on
their own cost, through the same printer as the pair phase.

Common practice, no source (a status line redrawn in place; the ETA a linear extrapolation of the
pace so far).
"""

from __future__ import annotations

import io
import math

import pytest
from click.testing import CliRunner

from composition.run.progress import ProgressPrinter, ScanProgress, counter, status_line
from composition.run.scan import run_scan
from ..small_checkpoint import model, one_thread  # noqa: F401 (module fixtures)


def test_final_phase_eta_is_paced_on_its_own_cost():
    """2 of 8 M entries of the final phase in 4 s: 0.5 M entries/s and 12 s to go, whatever the
    pairs say (all done: their pace would give 0 s). Common practice, no source"""
    p = ScanProgress("unit", 10, 12, 0, 48, 0, 48, 99, 30.0, phase="final", phase_cost_done=2e6,
                     phase_cost_left=6e6, phase_elapsed=4.0)
    assert p.rate == pytest.approx(5e5) and p.eta == pytest.approx(12.0)
    assert status_line(p) == ("units 10/12 (83%)  head profiles and model-space scores  500.00 k entries/s  "
                              "elapsed 30s  ETA 12s")
    done = ScanProgress("unit", 12, 12, 0, 48, 0, 48, 99, 31.0, phase="final", phase_cost_done=8e6,
                        phase_cost_left=0.0, phase_elapsed=5.0)
    assert done.eta == 0.0


def test_scan_final_phase_shows_one_status_line_with_a_finite_eta(model, tmp_path):
    """During a scan's final phase every status event before the last unit has a finite ETA above
    zero and a rate, and the printer shows them on the one status line it redraws for the pairs.
    Common practice, no source"""
    events = []
    term = io.StringIO()
    printer = ProgressPrinter(term, tty=True, redraw=0.0, delay=0.0)

    def progress(p):
        events.append(p)
        printer(p)

    scan = run_scan(model, tmp_path / "s.h5", progress=progress)
    printer.close()
    total = int(scan.attrs["units_total"])
    final = [p for p in events if p.kind == "unit" and p.phase == "final"]
    pairs = [p for p in events if p.kind == "unit" and p.phase == "pairs"]
    assert pairs and final and final[-1].units_done == total
    assert len(final) == total - len(pairs) >= 3  # head units and model-space units
    for p in final[:-1]:
        assert p.eta is not None and math.isfinite(p.eta) and p.eta > 0, p
        assert p.rate is not None and p.rate > 0
    assert final[-1].eta == 0.0
    drawn = term.getvalue().split("\r\x1b[K")
    shown = [d for d in drawn if "head profiles and model-space scores" in d]
    assert len(shown) >= len(final) - 1  # every final-phase event redrawn in place
    assert any(d.startswith("units ") and "entries/s" in d for d in drawn if d not in shown)  # the pair phase
    assert all("ETA ?" not in d for d in shown)


def test_counter_paces_heads_on_a_clock():
    """`counter` turns progress(done, total) of interpret.heads into final-phase events: 1 of 4 heads
    in 3 s at V x V = 100 entries each is 9 s to go. Common practice, no source"""
    now = [0.0]
    seen = []
    progress = counter(seen.append, "heads", 100.0, clock=lambda: now[0])
    now[0] = 3.0
    progress(1, 4)
    (p,) = seen
    assert p.eta == pytest.approx(9.0) and p.rate == pytest.approx(100 / 3)
    assert status_line(p).startswith("heads 1/4 (25%)  33 entries/s")


def test_heads_command_prints_one_status_line(model, tmp_path, monkeypatch):
    """`composition heads` shows its progress on one status line redrawn in place (rate and ETA),
    through the scan's printer, instead of a line per head. Common practice, no source"""
    import composition.present.cli as cli

    class Printer(ProgressPrinter):  # a terminal, drawn at once
        def __init__(self, stream):
            super().__init__(stream, tty=True, redraw=0.0, delay=0.0)

    monkeypatch.setattr(cli, "ProgressPrinter", Printer)
    result = CliRunner().invoke(cli.main, ["heads", str(model), "--out", str(tmp_path / "h.h5")])
    assert result.exit_code == 0, result.output + result.stderr
    err = result.stderr
    drawn = [d for d in err.split("\r\x1b[K") if d.strip()]
    assert drawn and all(d.startswith("heads ") and "entries/s" in d and "ETA " in d for d in drawn)
    done, total = drawn[-1].split()[1].split("/")
    assert done == total  # the last line says every head is done
    assert err.count("\n") == 1  # one line, ended once
