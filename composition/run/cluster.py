"""Running a scan's work units on a Dask distributed cluster.

Reference library: ``dask.distributed`` (the optional extra ``cluster``). The client (the
process that runs ``run_scan``) submits one task per work unit and commits each result as
it arrives; it alone writes the scan file. Each worker process reads the checkpoint itself
from a path it can see, checks that its weights have the fingerprint the scan started from,
builds the token table and factors once, and keeps them for the next units (units are
submitted in the order that lets consecutive units share factors).

A unit whose worker dies is rescheduled by the Dask scheduler on another worker; the client
takes exactly one result per unit (a result is keyed by the unit), so nothing is lost or
counted twice. Results do not depend on which worker computed them: the ranks are exact
(float64 midranks), and a unit's statistics are a function of the weights, the options
and the unit alone.
"""

from __future__ import annotations

import json
import logging
import os
import signal
import threading
import uuid
from contextlib import contextmanager
from typing import Callable

from ..errors import CompositionError
from ..extract import load_weights
from ..options import result_options
from .units import compute_unit, unit_factors

_LOCK = threading.Lock()
_STATE: dict = {}


def available() -> bool:
    """True when ``dask.distributed`` can be imported."""
    try:
        import distributed  # noqa: F401
    except ImportError:
        return False
    return True


def require_dask():
    """The ``distributed`` module, or a CompositionError naming the extra to install."""
    try:
        import distributed
    except ImportError:
        raise CompositionError("--cluster and --workers need Dask: install the optional extra with "
                               "pip install 'composition[cluster]'.") from None
    return distributed


def run_units(todo: list, commit: Callable[[int, dict], None], *, checkpoint: str, fingerprint: str, options,
              address: str | None = None, workers: int | None = None) -> None:
    """Compute the units ``todo`` (``[(index, WorkUnit)]``) on a Dask cluster; ``commit(index, results)``
    each as it arrives.

    ``address``: a running scheduler (``tcp://host:8786``); otherwise a local cluster of
    ``workers`` processes is started here and stopped at the end.
    """
    distributed = require_dask()
    if not todo:
        return
    cluster = client = None
    futures: dict = {}
    try:
        if address is None:
            n = int(workers or 1)
            try:
                with _sigint_ignored():  # the workers inherit it: Ctrl-C is for this process alone
                    cluster = distributed.LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                                       host="127.0.0.1", dashboard_address=None,
                                                       silence_logs=logging.ERROR)
            except Exception as exc:  # noqa: BLE001  (any failure to start is one sentence)
                raise CompositionError(f"cannot start a local Dask cluster of {n} workers ({exc}).") from None
            client = distributed.Client(cluster)
            client.register_plugin(_ignore_sigint_plugin(distributed), name="composition-ignore-sigint")  # restarted workers too
            torch_threads = max(1, (os.cpu_count() or 1) // n)
        else:
            try:
                client = distributed.Client(address)  # timeout: distributed.comm.timeouts.connect
            except (OSError, TimeoutError, ValueError) as exc:
                raise CompositionError(f"cannot reach the Dask scheduler at {address} ({exc}).") from None
            torch_threads = None
        run = uuid.uuid4().hex[:12]

        def submit(i, unit, priority, attempt=0):
            future = client.submit(_compute_remote, checkpoint, fingerprint, options, unit, torch_threads,
                                   key=f"composition-unit-{run}-{i}-{attempt}", pure=False, priority=priority)
            futures[future] = (i, unit, attempt)
            return future

        for n_done, (i, unit) in enumerate(todo):
            submit(i, unit, len(todo) - n_done)
        pending = distributed.as_completed(list(futures))
        for future in pending:
            i, unit, attempt = futures.pop(future)
            try:
                results = _result(future, unit, distributed)
            except _WorkerTrouble:
                if attempt + 1 >= _ATTEMPTS:
                    raise CompositionError(
                        f"the work unit of writer {unit.writer[0]}.{unit.writer[1]} and responder layer "
                        f"{unit.responder_layer} failed on {_ATTEMPTS} workers in a row ({future.exception()!r}).") from None
                pending.add(submit(i, unit, len(todo), attempt + 1))  # results are deterministic: redo it
                future.release()
                continue
            commit(i, results)
            future.release()
    finally:
        for future in futures:
            future.cancel()
        for thing in (client, cluster):
            if thing is not None:
                try:
                    thing.close()
                except Exception:  # noqa: BLE001  (closing after a failure must not hide it)
                    pass


@contextmanager
def _sigint_ignored():
    """Ignore SIGINT while worker processes start (an ignored signal stays ignored across exec,
    and Python then installs no KeyboardInterrupt handler), so that Ctrl-C in the terminal
    reaches the client alone; the client stops the workers itself."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _ignore_sigint_plugin(distributed):
    """A worker plugin whose ``setup`` (run in the worker's main thread) ignores SIGINT there."""

    class IgnoreSigint(distributed.WorkerPlugin):
        def setup(self, worker):
            try:
                signal.signal(signal.SIGINT, signal.SIG_IGN)
            except ValueError:
                pass

    return IgnoreSigint()


def _result(future, unit, distributed) -> dict:
    try:
        return future.result()
    except CompositionError:
        raise
    except distributed.KilledWorker:
        raise CompositionError(
            f"the work unit of writer {unit.writer[0]}.{unit.writer[1]} and responder layer {unit.responder_layer} "
            "ended every worker that ran it (out of memory?); give the workers more memory.") from None
    except Exception:  # noqa: BLE001  (a worker dying mid-unit can surface as any error of Dask's own)
        raise _WorkerTrouble() from None


_ATTEMPTS = 3


class _WorkerTrouble(Exception):
    """A unit failed on a worker for a reason other than its input: run it again elsewhere."""


def _compute_remote(checkpoint: str, fingerprint: str, options, unit, torch_threads: int | None) -> dict:
    """The task a worker runs: one unit's ``{(writer, responder): PairStats}``."""
    with _LOCK:  # one unit at a time per process: the factors are shared and large
        factors = _worker_factors(checkpoint, fingerprint, options, torch_threads)
        return compute_unit(factors, unit, options)


def _worker_factors(checkpoint: str, fingerprint: str, options, torch_threads: int | None):
    key = (checkpoint, fingerprint, json.dumps(result_options(options), sort_keys=True))
    if _STATE.get("key") != key:
        _STATE.clear()
        if torch_threads:
            import torch

            torch.set_num_threads(torch_threads)
        where = _worker_name()
        try:
            w = load_weights(checkpoint, options.family, options.layout)
        except CompositionError as exc:
            raise CompositionError(f"worker {where} cannot read the checkpoint: {exc}") from None
        found = w.fingerprint()
        if found != fingerprint:
            raise CompositionError(
                f"the checkpoint at {checkpoint} on worker {where} is not the one the scan started from "
                f"(weights fingerprint {found[:12]}, expected {fingerprint[:12]}).")
        _STATE.update(key=key, factors=unit_factors(w, options))
    return _STATE["factors"]


def _worker_name() -> str:
    try:
        from distributed import get_worker

        return get_worker().address
    except (ImportError, ValueError):
        return "(unknown)"
