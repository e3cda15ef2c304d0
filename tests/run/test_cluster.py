"""Scans on a Dask cluster: the same file as the serial run, with or without a worker dying.

Reference library: dask.distributed (LocalCluster, Client). Skipped when the optional
``cluster`` extra is not installed. The model is the small random GPT-2-layout checkpoint
of tests/small_checkpoint.py (48 pairs in 12 work units); the reference is the serial scan.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from composition.errors import CompositionError
from composition.run.scan import run_scan
from composition.store.scanfile import journal_path
from ..small_checkpoint import assert_same_pairs, build_small_gpt2
from ..small_checkpoint import model, one_thread  # noqa: F401 (module fixtures)

ROOT = Path(__file__).resolve().parents[2]

try:
    import distributed
except ImportError:
    distributed = None
needs_dask = pytest.mark.skipif(distributed is None,
                                reason="the optional cluster extra (dask[distributed]) is not installed")


@pytest.fixture(scope="module")
def reference(model, tmp_path_factory):
    return run_scan(model, tmp_path_factory.mktemp("cluster-reference") / "ref.h5")


def test_core_imports_and_refuses_cluster_options_without_dask(model, tmp_path):
    """Without Dask the package imports, serial scans need nothing of it, and --workers fails with
    one sentence naming the extra to install.

    Common practice, no source (optional dependencies imported only where used).
    """
    code = (
        "import sys; sys.modules['dask'] = None; sys.modules['distributed'] = None\n"
        "import composition, composition.present.cli, composition.run.scan\n"
        "from composition.errors import CompositionError\n"
        "try:\n"
        f"    composition.run_scan({str(model)!r}, {str(tmp_path / 'x.h5')!r}, workers=2)\n"
        "except CompositionError as exc:\n"
        "    print(exc)\n"
    )
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "composition[cluster]" in done.stdout
    assert not (tmp_path / "x.h5").exists()


@needs_dask
def test_local_cluster_of_two_workers_writes_the_serial_file(model, reference, tmp_path):
    """``workers=2`` (a local Dask cluster of two worker processes) writes the same /pairs arrays
    as the serial scan, and leaves no journal behind.

    Reference library: dask.distributed (LocalCluster).
    """
    out = tmp_path / "local.h5"
    scan = run_scan(model, out, workers=2)
    assert scan.complete and not journal_path(out).exists()
    assert_same_pairs(scan, reference)


@pytest.fixture(scope="module")
def cluster():
    c = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                 dashboard_address=None, env={"OMP_NUM_THREADS": "1"})
    try:
        yield c
    finally:
        c.close()


@needs_dask
def test_killing_a_worker_mid_scan_still_gives_the_serial_file(model, reference, cluster, tmp_path):
    """A worker process killed (SIGKILL) while it computes a unit: the scheduler runs that unit
    again elsewhere, and the file equals the serial scan, no unit lost or doubled.

    Reference library: dask.distributed (a running scheduler reached by address).
    """
    with distributed.Client(cluster) as client:
        pids = client.run(os.getpid)  # {worker address: pid}
        killed = []
        lock = threading.Lock()

        def progress(event):
            if event.kind != "unit" or killed:
                return
            with lock:
                busy = {addr: tasks for addr, tasks in client.processing().items() if tasks}
                if busy:
                    addr = sorted(busy)[0]
                    os.kill(pids[addr], signal.SIGKILL)
                    killed.append((addr, tuple(busy[addr])))

        scan = run_scan(model, tmp_path / "killed-worker.h5", cluster=cluster.scheduler_address, progress=progress)
    assert killed, "no worker was busy when the first unit was committed"
    assert scan.complete and int(scan.done.sum()) == 48
    assert_same_pairs(scan, reference)


@needs_dask
def test_a_worker_that_sees_another_checkpoint_is_refused(model, cluster, tmp_path):
    """A worker whose checkpoint path holds other weights stops the scan with a sentence naming the
    fingerprints, instead of mixing two models into one file.

    Common practice, no source.
    """
    other = build_small_gpt2(tmp_path / "other", seed=1)
    out = tmp_path / "mixed.h5"
    with pytest.raises(CompositionError, match="is not the one the scan started from"):
        run_scan(model, out, cluster=cluster.scheduler_address, worker_checkpoint=str(other))


@needs_dask
def test_unreachable_scheduler_is_one_sentence(model, tmp_path):
    """An address where no scheduler listens fails with a sentence naming it.

    Common practice, no source.
    """
    import dask

    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        with pytest.raises(CompositionError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9"):
            run_scan(model, tmp_path / "nowhere.h5", cluster="tcp://127.0.0.1:9")
