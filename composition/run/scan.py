"""A scan: every selected (writer, responder) pair, ranked, summarised, labelled, saved.

Work is ordered so each factor is built once: per writer layer the writer values ``A_U``;
per responder layer the keys ``K_R``; per pair only the ``[dh, dh]`` middle and the
``[V, dh]`` query factor.

The driver (``run_scan``) commits every work unit to the scan file's journal as soon as it
is computed, so a killed scan resumes where it stopped (docs/long-runs.md); units run in
this process or on a Dask cluster (``composition.run.cluster``), and only this process writes
the file. Labels need the false discovery rate over all pairs: they are computed once,
when every unit is committed.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable

import numpy as np

from .._version import __version__
from ..extract import load_weights
from ..errors import CompositionError
from ..options import ScanOptions, parse_heads, result_options  # noqa: F401  (parse_heads: public API)
from .interrupts import Guard, Interrupt, ScanInterrupted, signal_name
from .progress import ScanProgress
from .units import WorkUnit, compute_unit, scan_pairs, unit_factors, work_units  # noqa: F401
from ..extract.rotary import offsets_rotation
from ..store.scanfile import (CAUTION, FORMAT_NAME, FORMAT_VERSION, PAIR_DATASETS, Scan, ScanStore, ScanWriteError,
                       empty_pairs, journal_path, load_scan, read_scan_file)
from ..score.stats import HIST_BINS, labels
from ..extract.weights import Weights

Head = tuple[int, int]


@dataclass
class ScanSummary:
    path: Path
    pairs: int
    labelled: list[dict] = field(default_factory=list)


def run_scan(checkpoint: str | os.PathLike | Weights, out: str | os.PathLike, options: ScanOptions = ScanOptions(),
             overwrite: bool = False, progress: Callable[[ScanProgress], None] | None = None, *,
             cluster: str | None = None, workers: int | None = None, worker_checkpoint: str | None = None) -> Scan:
    """Scan every selected pair of a checkpoint into the scan file ``out``, resumably.

    Each work unit is committed to the file's journal as soon as it is computed. Calling
    again on an unfinished file computes only the missing units and ends with the same
    ``/pairs`` arrays as an uninterrupted run; a file of another checkpoint or of other
    result-changing options is refused (``overwrite=True`` starts afresh), and a complete
    one is returned as it is. ``cluster`` (a Dask scheduler address) or ``workers`` (the
    number of processes of a local Dask cluster) run the units elsewhere; the workers read
    the checkpoint themselves (from ``worker_checkpoint`` if they see it under another
    path). ``progress`` receives :class:`~composition.run.progress.ScanProgress` events.
    SIGINT and SIGTERM stop the scan between commits and raise
    :class:`~composition.run.interrupts.ScanInterrupted`.
    """
    options.validate()
    out = Path(out)
    if out.is_dir():
        raise CompositionError(f"{out} is a directory, not a scan file path.")
    remote = cluster is not None or workers is not None
    if cluster is not None and workers is not None:
        raise CompositionError("give --cluster or --workers, not both.")
    if workers is not None and int(workers) < 1:
        raise CompositionError("--workers needs a positive number of processes.")
    if remote and isinstance(checkpoint, Weights):
        raise CompositionError("a cluster scan needs the checkpoint's path, which the workers read themselves.")
    if remote:
        from .cluster import require_dask

        require_dask()
    w = checkpoint if isinstance(checkpoint, Weights) else load_weights(checkpoint, options.family, options.layout)
    offsets_rotation(w, options.rotary_offsets)  # refuse rotary options the model cannot take, before any work
    if w.rotary is not None and options.rotary_offsets is None:
        options = replace(options, rotary_offsets=(0, 0))  # the default, recorded as such
    pairs = scan_pairs(w, options)
    ks = tuple(int(k) for k in options.k)
    units = work_units(pairs)
    attrs = dict(_attrs(w, options, ks, len(pairs)), units_total=len(units))
    run = _Run(out, units, len(pairs), int(attrs["keys_per_row"]), options, progress)
    with Guard() as guard:
        try:
            with guard.critical():
                store = _open_store(out, attrs, empty_pairs(w.n_layers, w.n_heads, len(ks), HIST_BINS), overwrite)
            with store:
                finishing = not store.complete
                if finishing:
                    _complete(store, run, guard, w, attrs, options,
                              dict(checkpoint=checkpoint, cluster=cluster, workers=workers,
                                   worker_checkpoint=worker_checkpoint))
        except Interrupt as stop:
            raise ScanInterrupted(
                f"interrupted by {signal_name(stop.signum)} with {run.committed_note()}; "
                "run the same command again to resume.", stop.signum) from None
        except ScanWriteError as exc:
            raise CompositionError(
                f"cannot write the scan file {out} ({exc.reason}); {run.committed_note(kept=True)}"
            ) from None
    if finishing:  # head profiles and model-space scores beside the pairs (composition/heads.py)
        from ..interpret.heads import add_to_scan

        add_to_scan(out, w)
    return load_scan(out)


def _complete(store: ScanStore, run: "_Run", guard: Guard, w: Weights, attrs: dict, options: ScanOptions,
              execution: dict) -> None:
    """Compute the missing units, committing each as it comes, then label all pairs and finish."""
    run.begin(store)

    def commit(i: int, results: dict) -> None:
        index, fields = _unit_fields(results)
        with guard.critical():
            store.commit(index, fields)
        run.committed(i, store.arrays)

    todo = run.todo()
    if execution["cluster"] is not None or execution["workers"] is not None:
        from .cluster import run_units

        path = execution["worker_checkpoint"] or Path(execution["checkpoint"]).resolve()
        run_units(todo, commit, checkpoint=str(path), fingerprint=attrs["weights_fingerprint"], options=options,
                  address=execution["cluster"], workers=execution["workers"])
    else:
        factors = unit_factors(w, options)
        for i, unit in todo:
            commit(i, compute_unit(factors, unit, options))
    with guard.critical():
        _label_all(store.arrays, options)
        store.finish(dict(attrs, created=store.attrs.get("created", attrs["created"]), finished=_now()))
    run.finish()


def _open_store(out: Path, attrs: dict, arrays: dict, overwrite: bool) -> ScanStore:
    """Resume the scan file ``out`` if it exists (refusing a different scan), else start it."""
    resume = out.exists() and not overwrite
    if resume:
        try:
            old_attrs, old_arrays = read_scan_file(out)
        except CompositionError:
            raise CompositionError(f"{out} exists and is not a scan file of this tool; "
                                   "pass --overwrite to replace it.") from None
        _check_resumable(out, old_attrs, attrs)
        for name, data in arrays.items():
            if name not in old_arrays or old_arrays[name].shape != data.shape:
                raise CompositionError(f"cannot resume {out}: its dataset /pairs/{name} has another shape; "
                                       "pass --overwrite to start afresh.")
    try:
        return ScanStore.resume(out, old_attrs, old_arrays) if resume else ScanStore.start(out, attrs, arrays)
    except ScanWriteError as exc:
        left = ("it is left as it was" if resume else
                "the existing file is left in place" if out.exists() else "nothing was written")
        raise CompositionError(f"cannot write the scan file {out} ({exc.reason}); {left}.") from None


def _check_resumable(out: Path, old: dict, new: dict) -> None:
    """Refuse to continue a file made from another checkpoint or with other result options."""
    diffs = []
    if old.get("weights_fingerprint") != new["weights_fingerprint"]:
        diffs.append(f"the checkpoint differs (weights fingerprint {str(old.get('weights_fingerprint'))[:12]} "
                     f"in the file, {new['weights_fingerprint'][:12]} now)")
    try:
        old_opts = json.loads(old.get("options", "{}"))
    except (TypeError, ValueError):
        old_opts = {}
    new_opts = json.loads(new["options"])
    for key in sorted(set(old_opts) | set(new_opts)):
        if old_opts.get(key) != new_opts.get(key):
            diffs.append(f"--{key.replace('_', '-')} differs ({_show(old_opts.get(key))} in the file, "
                         f"{_show(new_opts.get(key))} now)")
    for key in ("writers", "responders"):
        if _selection(old.get(key), old, key) != _selection(new[key], new, key):
            diffs.append(f"--{key} differs ({old.get(key)} in the file, {new[key]} now)")
    if diffs:
        listed = diffs[0] if len(diffs) == 1 else ", ".join(diffs[:-1]) + " and " + diffs[-1]
        raise CompositionError(f"cannot resume {out}: {listed}; pass --overwrite to start afresh.")


def _selection(spec, attrs: dict, key: str):
    """The heads a --writers/--responders spec selects (spellings of one selection compare equal)."""
    try:
        spec = None if spec in (None, "all") else str(spec)
        return parse_heads(spec, int(attrs["n_layers"]), int(attrs["n_heads"]), f"--{key}")
    except (CompositionError, KeyError, TypeError, ValueError):
        return spec


def _show(value) -> str:
    if value is None:
        return "not set"
    if isinstance(value, list):
        return ",".join(str(v) for v in value)
    return str(value)


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _unit_fields(results: dict) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """One unit's results as pair indices ``[n, 4]`` and per-pair arrays ``{name: [n, ...]}``.

    Built with ``_store`` into small arrays of the scan file's dtypes, so what is committed
    and replayed is bit for bit what an uninterrupted run stores.
    """
    keys = list(results)
    index = np.array([u + r for u, r in keys], dtype=np.int64).reshape(-1, 4)  # [n, 4]
    first = next(iter(results.values()))
    trailing = {None: (), "k": (len(first.top_share),), "bins": (len(first.histogram),)}
    fields = {name: np.full((len(keys),) + trailing[axis], fill, dtype=dtype)
              for name, (dtype, fill, axis) in PAIR_DATASETS.items()}
    for j, key in enumerate(keys):
        _store(fields, (j,), results[key])
    return index, fields


class _Run:
    """Counts and progress events of one call of ``run_scan``."""

    def __init__(self, out: Path, units: list, n_pairs: int, keys_per_row: int, options: ScanOptions, progress):
        self.out, self.units, self.n_pairs, self.keys = out, units, n_pairs, keys_per_row
        self.options, self.progress = options, progress
        self.done = [False] * len(units)
        self.units_before = self.pairs_before = self.units_done = self.pairs_done = self.entries = 0
        self.start = time.monotonic()
        self.left_in_layer: dict[int, int] = {}

    def begin(self, store: ScanStore) -> None:
        done = store.arrays["done"]
        for i, unit in enumerate(self.units):
            self.done[i] = all(done[unit.writer + (unit.responder_layer, h)] for h in unit.responder_heads)
        self.units_before = self.units_done = sum(self.done)
        self.pairs_before = self.pairs_done = int(done.sum())
        for i, unit in self.todo():
            self.left_in_layer[unit.responder_layer] = self.left_in_layer.get(unit.responder_layer, 0) + 1
        self.start = time.monotonic()
        if self.units_before:
            message = (f"resuming {self.out}: {self.units_before} of {len(self.units)} work units "
                       "already committed")
        else:
            message = f"scanning {self.n_pairs} pairs in {len(self.units)} work units into {self.out}"
        self._emit("start", message)

    def todo(self) -> list[tuple[int, "WorkUnit"]]:
        return [(i, u) for i, u in enumerate(self.units) if not self.done[i]]

    def committed(self, i: int, arrays: dict) -> None:
        unit = self.units[i]
        if self.done[i]:
            return
        self.done[i] = True
        self.units_done += 1
        n = len(unit.responder_heads)
        self.pairs_done += n
        rows = arrays["rows_evaluated"][unit.writer + (unit.responder_layer,)][list(unit.responder_heads)]
        self.entries += int(rows.sum()) * self.keys
        self._emit("unit")
        lR = unit.responder_layer
        self.left_in_layer[lR] -= 1
        if self.left_in_layer[lR] == 0:
            self._emit("layer", self._layer_summary(lR, arrays))

    def finish(self) -> None:
        self._emit("finish")

    def committed_note(self, kept: bool = False) -> str:
        total = len(self.units)
        if not kept:
            return f"{self.units_done} of {total} work units committed to {self.out}"
        if self.units_done == 0:
            return "nothing was committed before it."
        return (f"the {self.units_done} of {total} work units committed before are kept in it and its journal "
                f"{journal_path(self.out).name}: fix the cause and run the same command again to resume.")

    def _layer_summary(self, lR: int, arrays: dict) -> str:
        done = arrays["done"][:, :, lR, :]  # [L, H, H]
        effect = np.where(done, np.abs(arrays["mean_percentile"][:, :, lR, :] - 0.5), -1.0)  # [L, H, H]
        strong = int((effect >= self.options.min_effect).sum())
        lU, hU, hR = np.unravel_index(int(np.argmax(effect)), effect.shape)
        best = arrays["mean_percentile"][lU, hU, lR, hR]
        return (f"responder layer {lR}: {int(done.sum())} pairs done, {strong} with |mean percentile - 0.5| >= "
                f"{self.options.min_effect:g} (before the FDR over all pairs); strongest {lU}.{hU} -> {lR}.{hR}, "
                f"mean percentile {best:.3f}")

    def _emit(self, kind: str, message: str = "") -> None:
        if self.progress is None:
            return
        self.progress(ScanProgress(kind, self.units_done, len(self.units), self.units_before, self.pairs_done,
                                   self.pairs_before, self.n_pairs, self.entries, time.monotonic() - self.start,
                                   message))


def _store(arrays, index, s) -> None:
    for name, value in s.datasets().items():
        if name in arrays:
            arrays[name][index] = value
    arrays["done"][index] = True


def _label_all(arrays, options: ScanOptions) -> None:
    done = arrays["done"]
    lab, q = labels(arrays["mean_percentile"][done], arrays["p_value"][done], options.fdr, options.min_effect)
    arrays["label"][done] = lab
    arrays["q_value"][done] = q


def _attrs(w: Weights, options: ScanOptions, ks, n_pairs: int) -> dict:
    opts = result_options(options)
    weights_fp = w.fingerprint()
    fp = hashlib.sha256((weights_fp + json.dumps(opts, sort_keys=True)).encode()).hexdigest()
    return {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "tool_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "checkpoint": w.source,
        "family": w.family,
        "vocab_size": w.vocab_size,
        "keys_per_row": w.vocab_size,
        "n_layers": w.n_layers,
        "n_heads": w.n_heads,
        "d_model": w.d_model,
        "d_head": w.d_head,
        "side": options.side,
        "query_part": options.query_part,
        "table": options.table,
        "position": opts["position"],
        "orientation": options.orientation,
        "rotary_offsets": opts["rotary_offsets"],
        "readout": w.readout,
        "reader_notes": json.dumps(list(w.notes)),
        "k": list(ks),
        "fdr": options.fdr,
        "min_effect": options.min_effect,
        "histogram_bins": HIST_BINS,
        "writers": options.writers or "all",
        "responders": options.responders or "all",
        "pairs_selected": n_pairs,
        "options": json.dumps(opts, sort_keys=True),
        "weights_fingerprint": weights_fp,
        "fingerprint": fp,
        "label_fill": -128,
        "caution": CAUTION,
    }


__all__ = ["ScanOptions", "ScanInterrupted", "run_scan", "parse_heads", "scan_pairs", "load_scan"]
