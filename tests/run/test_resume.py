"""Long runs: crash-safe commits, resume, refusal of a different scan, interrupts, full or
read-only disks, progress output.

The scans run on a small random GPT-2-layout checkpoint written in the test
(tests/small_checkpoint.py): 3 layers of 4 heads, 48 pairs in 12 work units. The reference
for every comparison is an uninterrupted serial scan of the same model; "equal" means the
bytes of every ``/pairs`` dataset are equal. Torch runs one thread here and in the scan
subprocesses: on a busy shared machine two threads make these small operations many times
slower, not faster.
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from composition.errors import CompositionError
from composition.run.interrupts import Guard, Interrupt
from composition.run.progress import ProgressPrinter, ScanProgress, status_line
from composition.run.scan import ScanOptions, run_scan, scan_pairs, work_units
from composition.store.scanfile import journal_path, load_scan
from ..small_checkpoint import assert_same_pairs, build_small_gpt2
from ..small_checkpoint import model, one_thread  # noqa: F401 (module fixtures)

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def other_model(tmp_path_factory):
    return build_small_gpt2(tmp_path_factory.mktemp("other-model"), seed=1)


@pytest.fixture(scope="module")
def reference(model, tmp_path_factory):
    """The uninterrupted serial scan, and seconds per work unit."""
    start = time.monotonic()
    scan = run_scan(model, tmp_path_factory.mktemp("reference") / "ref.h5")
    seconds = time.monotonic() - start
    return scan, seconds / int(scan.attrs["units_total"])


def assert_partial_is_consistent(scan, ref, model_units):
    """Units are all-or-nothing, and every committed pair holds the reference values."""
    done = scan.arrays["done"]
    for unit in model_units:
        flags = {bool(done[unit.writer + (unit.responder_layer, h)]) for h in unit.responder_heads}
        assert len(flags) == 1, f"unit {unit} is half committed"
    for name, data in ref.arrays.items():
        if name in ("label", "q_value"):
            continue  # computed at the end, over all pairs
        assert scan.arrays[name][done].tobytes() == data[done].tobytes(), name


def units_of(model):
    from composition.extract import load_weights

    return work_units(scan_pairs(load_weights(model), ScanOptions()))


def launch(model, out, *extra):
    env = dict(os.environ, OMP_NUM_THREADS="1",
               PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "composition", "scan", str(model), "--out", str(out), *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, cwd=ROOT,
                            start_new_session=True, text=True)


def size(path: Path) -> int:
    try:
        return path.stat().st_size
    except FileNotFoundError:
        return 0


def wait_for_a_commit(proc, journal: Path, timeout=120.0) -> bool:
    """Wait until this process has committed a unit (its journal grew); False if it ended."""
    start = size(journal)
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if proc.poll() is not None:
            return False
        if size(journal) > start and start > 0:
            return True
        if start == 0 and size(journal) > 0:
            start = size(journal)  # the header of a fresh journal: wait for the first unit after it
        time.sleep(0.005)
    raise AssertionError("the scan committed nothing in time")


def finish(proc, timeout=120.0):
    try:
        out, err = proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    return proc.returncode, out, err


def digest(*paths) -> str:
    h = hashlib.sha256()
    for p in paths:
        h.update(Path(p).read_bytes() if Path(p).exists() else b"<missing>")
    return h.hexdigest()


def stop_after(n_units: int, exc=RuntimeError):
    """A progress callback that crashes the scan after ``n_units`` committed units."""
    def progress(event: ScanProgress):
        if event.kind == "unit" and event.units_done - event.units_before >= n_units:
            raise exc("simulated crash")
    return progress


def test_kill_9_at_random_moments_then_resume_equals_uninterrupted(model, reference, tmp_path):
    """Kill -9 the scan process at random moments, resume each time: the final file equals the
    uninterrupted scan, and after every kill the file is readable, its units are all-or-nothing
    and its committed pairs hold the reference values.

    Common practice, no source (crash testing of a write-ahead journal by killing the writer).
    """
    ref, unit_seconds = reference
    out = tmp_path / "killed.h5"
    units = units_of(model)
    rng = random.Random(20261201)
    mid_scan = 0
    for round_ in range(4):
        proc = launch(model, out)
        try:
            if round_ == 0:
                time.sleep(rng.uniform(0.0, 1.5))  # during start-up: imports, weights, the first file
            elif not wait_for_a_commit(proc, journal_path(out)):
                break
            else:
                time.sleep(rng.uniform(0.0, 1.5 * unit_seconds))  # anywhere in a unit or its commit
            os.kill(proc.pid, signal.SIGKILL)
        finally:
            finish(proc)
        if not out.exists():
            continue
        scan = load_scan(out)
        if scan.complete:
            break
        assert_partial_is_consistent(scan, ref, units)
        mid_scan += 0 < int(scan.done.sum()) < len(units) * 4
    assert mid_scan >= 2, "too few kills landed in the middle of the scan"
    final = run_scan(model, out)
    assert final.complete and not journal_path(out).exists()
    assert_same_pairs(final, ref)


def test_torn_or_corrupt_last_record_is_dropped(model, reference, tmp_path):
    """A journal whose last record is cut short, or has a flipped byte, loses exactly that unit;
    the resumed scan equals the uninterrupted one.

    Common practice, no source (length-and-CRC framed log records).
    """
    ref, _ = reference
    out = tmp_path / "torn.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(4))
    journal = journal_path(out)
    data = journal.read_bytes()
    assert int(load_scan(out).done.sum()) == 16
    journal.write_bytes(data[:-7])
    assert int(load_scan(out).done.sum()) == 12
    flipped = bytearray(data)
    flipped[-50] ^= 0xFF
    journal.write_bytes(bytes(flipped))
    assert int(load_scan(out).done.sum()) == 12
    assert_partial_is_consistent(load_scan(out), ref, units_of(model))
    assert_same_pairs(run_scan(model, out), ref)


def test_folding_moves_committed_units_into_the_hdf5_file(model, reference, tmp_path, monkeypatch):
    """With folding after every commit, the HDF5 file alone holds every committed unit and the
    journal holds none; a kill between the two steps replays records the file has already,
    which changes nothing; the resume equals the uninterrupted scan.

    Common practice, no source (checkpointing a write-ahead log into the main file).
    """
    from composition.store import scanfile

    ref, _ = reference
    out = tmp_path / "folded.h5"
    monkeypatch.setattr(scanfile, "FOLD_SECONDS", 0.0)
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(3))
    _, arrays = scanfile.read_scan_file(out)
    assert int(arrays["done"].sum()) == 12
    attrs = load_scan(out).attrs
    assert list(scanfile.read_journal(journal_path(out), attrs["scan_id"])) == []
    monkeypatch.setattr(scanfile, "FOLD_SECONDS", 1e9)
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(2))  # these two stay in the journal only
    journal_bytes = journal_path(out).read_bytes()
    monkeypatch.setattr(scanfile, "FOLD_SECONDS", 0.0)
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(1))  # folds all 6 units into the file
    journal_path(out).write_bytes(journal_bytes)  # as if killed before the journal was emptied
    assert int(load_scan(out).done.sum()) == 24
    assert_partial_is_consistent(load_scan(out), ref, units_of(model))
    monkeypatch.setattr(scanfile, "FOLD_SECONDS", 1e9)
    assert_same_pairs(run_scan(model, out), ref)


def test_a_second_scan_of_the_same_file_is_refused(model, tmp_path):
    """While one scan writes a file (holding its journal's lock), another scan of it stops at
    once with a sentence.

    Common practice, no source (advisory file locks, flock(2)).
    """
    import fcntl

    out = tmp_path / "locked.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(1))
    with open(journal_path(out), "rb+") as held:
        fcntl.flock(held, fcntl.LOCK_EX)
        with pytest.raises(CompositionError, match="another scan is writing"):
            run_scan(model, out)
    assert run_scan(model, out).complete


def test_in_progress_file_is_marked_and_complete_file_is_returned_as_is(model, reference, tmp_path):
    """An unfinished file says so (status attribute, Scan.complete) and ``complete_only`` refuses
    it; rerunning a finished scan computes nothing and leaves the file's bytes alone.

    Common practice, no source.
    """
    ref, _ = reference
    out = tmp_path / "status.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(2))
    partial = load_scan(out)
    assert partial.attrs["status"] == "in-progress" and not partial.complete
    assert (partial.label[partial.done] == -128).all()  # labels wait for all pairs
    with pytest.raises(CompositionError, match="unfinished scan"):
        load_scan(out, complete_only=True)
    events = []
    run_scan(model, out, progress=events.append)
    assert events[0].kind == "start" and events[0].units_before == 2
    before = digest(out)
    events.clear()
    again = run_scan(model, out, progress=events.append)
    assert events == [] and digest(out) == before and again.complete
    assert_same_pairs(again, ref)


@pytest.mark.parametrize("change, words", [
    (dict(options=ScanOptions(k=(1, 5))), "--k differs"),
    (dict(options=ScanOptions(table="embed")), "--table differs"),
    (dict(options=ScanOptions(fdr=0.05)), "--fdr differs"),
    (dict(options=ScanOptions(writers="0")), "--writers differs"),
    (dict(other=True), "the checkpoint differs"),
])
def test_resume_with_other_options_or_checkpoint_is_refused_and_file_untouched(
        model, other_model, tmp_path, change, words):
    """A resume whose checkpoint fingerprint or result-changing option differs is refused with a
    sentence naming what differs, and the file and its journal keep their bytes; ``overwrite``
    starts afresh.

    Common practice, no source.
    """
    out = tmp_path / "refuse.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(1))
    before = digest(out, journal_path(out))
    with pytest.raises(CompositionError, match=words) as info:
        run_scan(other_model if change.get("other") else model, out, change.get("options", ScanOptions()))
    assert "--overwrite" in str(info.value) and "\n" not in str(info.value)
    assert digest(out, journal_path(out)) == before
    if change.get("other"):
        fresh = run_scan(other_model, out, overwrite=True)
        assert fresh.complete and int(fresh.done.sum()) == 48


def test_same_selection_spelled_differently_resumes(model, tmp_path):
    """``--writers 0,1`` and ``--writers 0.0,0.1,0.2,0.3,1`` select the same heads: a resume is
    allowed.

    Common practice, no source.
    """
    out = tmp_path / "spelling.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, ScanOptions(writers="0,1"), progress=stop_after(1))
    assert run_scan(model, out, ScanOptions(writers="0.0,0.1,0.2,0.3,1")).complete


def test_cli_refusal_is_one_line_and_exit_2(model, tmp_path):
    """The CLI turns a refused resume into one line on stderr and exit status 2.

    Common practice, no source.
    """
    from click.testing import CliRunner

    from composition.present.cli import main

    out = tmp_path / "cli-refuse.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(1))
    result = CliRunner().invoke(main, ["scan", str(model), "--out", str(out), "--k", "1,5"])
    assert result.exit_code == 2
    assert result.stderr.strip().count("\n") == 0 and "--k differs" in result.stderr
    assert "Traceback" not in result.stderr


@pytest.mark.parametrize("signum, code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_sigint_and_sigterm_exit_130_143_and_leave_a_resumable_file(model, reference, tmp_path, signum, code):
    """SIGINT and SIGTERM in the middle of a scan: exit status 128 + signal number (130, 143), a
    sentence saying how to resume, a valid in-progress file; the resumed file equals the
    uninterrupted scan.

    Common practice, no source (shells report a process ended by signal N as 128 + N).
    """
    ref, _ = reference
    out = tmp_path / "signal.h5"
    proc = launch(model, out)
    try:
        assert wait_for_a_commit(proc, journal_path(out))
        os.kill(proc.pid, signum)
    finally:
        rc, _, err = finish(proc)
    assert rc == code, err
    assert "run the same command again to resume" in err and "to resume: composition scan" in err
    assert "Traceback" not in err
    assert "\r" not in err and "\x1b" not in err  # stderr is a pipe: plain lines only
    partial = load_scan(out)
    assert not partial.complete and 0 < int(partial.done.sum()) < 48
    assert_partial_is_consistent(partial, ref, units_of(model))
    assert_same_pairs(run_scan(model, out), ref)


def test_a_signal_during_a_commit_waits_for_its_end():
    """The signal guard defers SIGINT that arrives inside a commit until the commit is done, and
    raises at once outside one.

    Common practice, no source.
    """
    steps = []
    with Guard() as guard:
        with pytest.raises(Interrupt):
            with guard.critical():
                os.kill(os.getpid(), signal.SIGINT)
                time.sleep(0.05)
                steps.append("commit finished")
        assert steps == ["commit finished"]
    with Guard():
        with pytest.raises(Interrupt):
            os.kill(os.getpid(), signal.SIGTERM)
            time.sleep(1.0)
            steps.append("not reached")
    assert steps == ["commit finished"]


# --- full and read-only file systems ------------------------------------------------------

@pytest.fixture
def small_fs(tmp_path):
    """A 1 MiB tmpfs mounted for the test (needs root and permission to mount)."""
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    try:
        made = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(mnt)],
                              capture_output=True, text=True, timeout=30)
    except (OSError, subprocess.TimeoutExpired) as exc:
        pytest.skip(f"cannot mount a small tmpfs here ({exc})")
    if made.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here ({made.stderr.strip() or made.returncode})")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True, timeout=30)


def fill(directory: Path) -> Path:
    """Write a file until the file system is full."""
    filler = directory / "filler"
    with open(filler, "wb", buffering=0) as f:
        try:
            while True:
                f.write(b"\0" * 4096)
        except OSError as exc:
            assert exc.errno == errno.ENOSPC
    return filler


def test_disk_full_mid_scan_fails_cleanly_and_keeps_committed_units(model, reference, small_fs):
    """A file system that fills up in the middle of a scan: one sentence naming the cause, a valid
    in-progress file holding every unit committed before, and a resume (once space is free)
    that equals the uninterrupted scan.

    Common practice, no source.
    """
    ref, _ = reference
    out = small_fs / "full.h5"
    filled = []

    def progress(event):
        if event.kind == "unit" and event.units_done == 3 and not filled:
            filled.append(fill(small_fs))

    with pytest.raises(CompositionError, match="no space left on the device") as info:
        run_scan(model, out, progress=progress)
    message = str(info.value)
    assert "committed before are kept" in message and "\n" not in message
    partial = load_scan(out)
    assert not partial.complete and int(partial.done.sum()) >= 12
    assert_partial_is_consistent(partial, ref, units_of(model))
    assert not list(small_fs.glob(".*.partial"))  # no temporary file left behind
    filled[0].unlink()
    assert_same_pairs(run_scan(model, out), ref)


def test_read_only_file_system_fails_cleanly_and_keeps_committed_units(model, reference, small_fs):
    """A fresh scan into a read-only file system writes nothing and says why; resuming a partial
    scan whose file system became read-only leaves it as it was; once writable again, the
    resume equals the uninterrupted scan.

    Common practice, no source.
    """
    ref, _ = reference
    out = small_fs / "ro.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(3))
    before = digest(out, journal_path(out))
    subprocess.run(["mount", "-o", "remount,ro", str(small_fs)], check=True, timeout=30)
    try:
        with pytest.raises(CompositionError, match="read-only file system.*left as it was"):
            run_scan(model, out)
        with pytest.raises(CompositionError, match="read-only file system.*nothing was written"):
            run_scan(model, small_fs / "fresh.h5")
    finally:
        subprocess.run(["mount", "-o", "remount,rw", str(small_fs)], check=True, timeout=30)
    assert digest(out, journal_path(out)) == before
    assert not (small_fs / "fresh.h5").exists()
    assert int(load_scan(out).done.sum()) == 12
    assert_same_pairs(run_scan(model, out), ref)


def test_read_only_directory_keeps_committed_units(model, reference, tmp_path):
    """A directory made read-only (chmod) during a scan: the final write fails with one sentence,
    the committed units stay, and a resume after chmod back equals the uninterrupted scan.

    Common practice, no source.
    """
    if os.geteuid() == 0:
        pytest.skip("root ignores directory permissions; the read-only file system test covers this")
    ref, _ = reference
    directory = tmp_path / "ro-dir"
    directory.mkdir()
    out = directory / "scan.h5"
    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=stop_after(3))
    directory.chmod(0o555)
    try:
        with pytest.raises(CompositionError, match="permission denied"):
            run_scan(model, out)
    finally:
        directory.chmod(0o755)
    assert not load_scan(out).complete
    assert_same_pairs(run_scan(model, out), ref)


# --- progress -------------------------------------------------------------------------------

def event(kind, units_done, elapsed, message="", total=12, pairs_per_unit=4):
    return ScanProgress(kind, units_done, total, 0, units_done * pairs_per_unit, 0, total * pairs_per_unit,
                        units_done * pairs_per_unit * 1_000_000, elapsed, message)


def test_progress_line_rates_and_eta():
    """Entries per second, elapsed and ETA from this run's pace: 3 of 12 units (12 of 48 pairs,
    12 M entries) in 6 s is 2 M entries/s and 18 s to go.

    Common practice, no source (linear extrapolation of the pace so far).
    """
    p = event("unit", 3, 6.0)
    assert p.rate == pytest.approx(2e6) and p.eta == pytest.approx(18.0)
    assert status_line(p) == "units 3/12 (25%)  2.00 M entries/s  elapsed 6s  ETA 18s"


def test_progress_printer_plain_lines_off_a_terminal_and_redraws_on_one():
    """Off a terminal: a plain line per interval, layer summaries, no control characters. On a
    terminal: one status line redrawn in place (carriage return), layer lines above it.

    Common practice, no source.
    """
    now = [0.0]
    plain = io.StringIO()
    printer = ProgressPrinter(plain, tty=False, interval=10.0, clock=lambda: now[0])
    printer(event("start", 0, 0.0, "scanning 48 pairs in 12 work units into x.h5"))
    for i in range(1, 13):
        now[0] = 3.0 * i
        printer(event("unit", i, now[0]))
        if i == 4:
            printer(event("layer", i, now[0], "responder layer 1: 16 pairs done"))
    printer(event("finish", 12, 36.0))
    lines = plain.getvalue().splitlines()
    assert "\r" not in plain.getvalue() and "\x1b" not in plain.getvalue()
    assert lines[0].startswith("scanning") and "responder layer 1: 16 pairs done" in lines
    assert [l.split()[1] for l in lines if l.startswith("units")] == ["4/12", "8/12", "12/12"]

    now[0] = 0.0
    term = io.StringIO()
    printer = ProgressPrinter(term, tty=True, redraw=0.0, delay=0.0, clock=lambda: now[0])
    printer(event("start", 0, 0.0))
    for i in range(1, 4):
        now[0] = float(i)
        printer(event("unit", i, now[0]))
    printer(event("layer", 3, 3.0, "responder layer 1: done"))
    printer(event("finish", 12, 4.0))
    text = term.getvalue()
    assert text.count("\r\x1b[K") >= 3 and "\nresponder layer 1: done\n" in text.replace("\r\x1b[K", "\n")
    assert text.endswith("\n")


def test_quiet_prints_no_progress(model, tmp_path):
    """``--quiet`` prints nothing on stderr for a successful scan.

    Common practice, no source.
    """
    from click.testing import CliRunner

    from composition.present.cli import main

    result = CliRunner().invoke(main, ["scan", str(model), "--out", str(tmp_path / "quiet.h5"), "--quiet",
                                       "--writers", "1"])
    assert result.exit_code == 0 and result.stderr == ""
    assert "labelled responders" in result.stdout


# --- one transaction: head profiles and model-space scores ----------------------------------

def assert_same_groups(scan_path, ref_path) -> None:
    """Every dataset of /pairs, /heads and /model_space of two scan files is byte for byte the same."""
    import h5py

    with h5py.File(scan_path, "r") as a, h5py.File(ref_path, "r") as b:
        for group in ("pairs", "heads", "model_space"):
            assert sorted(a[group]) == sorted(b[group]), group
            for name in b[group]:
                assert a[group][name][()].tobytes() == b[group][name][()].tobytes(), f"/{group}/{name} differs"


def wait_for_final_phase(proc, journal: Path, timeout=120.0) -> bool:
    """Wait until the journal holds a head-profile record (the final phase has begun)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if proc.poll() is not None:
            return False
        try:
            if b'"group": "heads"' in journal.read_bytes():
                return True
        except FileNotFoundError:
            pass
        time.sleep(0.002)
    raise AssertionError("the scan never reached its final phase")


def test_kill_9_in_every_phase_then_resume_equals_uninterrupted_in_every_group(model, reference, tmp_path):
    """Kill -9 in the main phase and in the final phase (head profiles, model-space scores); the
    same command then gives a complete file whose /pairs, /heads and /model_space equal an
    uninterrupted run's byte for byte.

    Common practice, no source (crash testing of a write-ahead journal by killing the writer).
    """
    ref, unit_seconds = reference
    out = tmp_path / "final.h5"
    rng = random.Random(7)
    proc = launch(model, out)
    try:
        assert wait_for_a_commit(proc, journal_path(out))
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        finish(proc)
    killed_final = 0
    for _ in range(3):
        proc = launch(model, out)
        try:
            if wait_for_final_phase(proc, journal_path(out)):
                time.sleep(rng.uniform(0.0, 0.3))
                os.kill(proc.pid, signal.SIGKILL)
                killed_final += 1
        finally:
            finish(proc)
        scan = load_scan(out)
        if scan.complete:
            break
        assert "heads" in scan.groups
    assert killed_final >= 1
    final = run_scan(model, out)
    assert final.complete and not journal_path(out).exists()
    assert_same_groups(out, ref.path)


@pytest.mark.parametrize("signum, code", [(signal.SIGINT, 130), (signal.SIGTERM, 143)])
def test_signals_in_the_final_phase_exit_130_143_with_the_resume_hint(model, reference, tmp_path, signum, code):
    """Ctrl-C and SIGTERM while head profiles and model-space scores are computed behave as in the
    main phase: exit 128 + signal, the resume hint, never "Aborted!".

    Common practice, no source.
    """
    ref, _ = reference
    out = tmp_path / "final-signal.h5"
    proc = launch(model, out)
    try:
        reached = wait_for_final_phase(proc, journal_path(out))
        if reached:
            os.kill(proc.pid, signum)
    finally:
        rc, _, err = finish(proc)
    if not reached:
        pytest.skip("the scan finished before the signal could be sent")
    if rc == 0:
        pytest.skip("the signal arrived after the final commit")
    assert rc == code, err
    assert "run the same command again to resume" in err and "Aborted" not in err and "Traceback" not in err
    run_scan(model, out)
    assert_same_groups(out, ref.path)


def test_a_complete_file_without_head_groups_is_completed_by_the_same_command(model, reference, tmp_path):
    """A complete scan file left without /heads and /model_space (an earlier version, or a kill
    between the two writes of an earlier version) is completed by rerunning the scan.

    Common practice, no source.
    """
    import shutil

    import h5py

    ref, _ = reference
    out = tmp_path / "old.h5"
    shutil.copyfile(ref.path, out)
    with h5py.File(out, "a") as f:
        del f["heads"], f["model_space"]
    scan = run_scan(model, out)
    assert scan.complete
    assert_same_groups(out, ref.path)


def test_resume_under_a_changed_activation_is_refused_naming_it(model, tmp_path):
    """The same weights with another activation_function in config.json: the resume is refused with
    a sentence naming the activation (the fingerprint covers the configuration).

    Common practice, no source.
    """
    import json
    import shutil

    copy = tmp_path / "model"
    shutil.copytree(model, copy)
    out = tmp_path / "act.h5"
    with pytest.raises(RuntimeError):
        run_scan(copy, out, progress=stop_after(1))
    config = json.loads((copy / "config.json").read_text())
    config["activation_function"] = "relu"
    (copy / "config.json").write_text(json.dumps(config))
    with pytest.raises(CompositionError, match="activation changed from gelu-tanh to relu since the scan started"):
        run_scan(copy, out)


def test_a_symlink_planted_at_the_journal_is_refused_and_its_target_untouched(model, tmp_path):
    """A symlink at <out>.journal never makes the scan write through it.

    Common practice, no source.
    """
    victim = tmp_path / "victim.txt"
    victim.write_bytes(b"precious")
    out = tmp_path / "sym.h5"
    journal_path(out).symlink_to(victim)
    with pytest.raises(CompositionError, match="symbolic link"):
        run_scan(model, out)
    assert victim.read_bytes() == b"precious" and not out.exists()


def test_disk_full_before_any_progress_leaves_nothing_behind(model, small_fs):
    """A fresh scan on a full file system ends with one sentence and leaves no file, no journal and
    no temporary file.

    Common practice, no source.
    """
    filler = fill(small_fs)
    try:
        with pytest.raises(CompositionError, match="no space left") as info:
            run_scan(model, small_fs / "nothing.h5")
        assert "\n" not in str(info.value)
        assert sorted(p.name for p in small_fs.iterdir()) == ["filler"]
    finally:
        filler.unlink()
