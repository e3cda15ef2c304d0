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
import re
import time
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Callable

import numpy as np

from .._version import __version__
from ..errors import CompositionError
from ..extract import load_weights
from ..extract.rotary import offsets_rotation
from ..extract.tables import release_table_inputs, table_inputs, token_table
from ..extract.weights import Weights
from ..compose.sides import SideFactors
from ..interpret.heads import (ModelSpace, head_attrs, head_units, label_heads, model_space_attrs,
                               model_space_unit, profile_layer)
from ..options import (ScanOptions, parse_heads, result_options,  # noqa: F401  (parse_heads: public API)
                       writer_groups_for_model)
from ..score.ranks import resolve_path
from ..score.stats import HIST_BINS, labels
from ..store import schema
from ..store.atomic import check_target, remove_quietly, special_kind
from ..store.scanfile import (CAUTION, FORMAT_NAME, FORMAT_VERSION, PAIR_DATASETS, STATUS_COMPLETE, Scan, ScanStore,
                              ScanWriteError, empty_pairs, journal_path, load_scan, read_scan_groups,
                              settings_change)
from ..memory import return_freed
from .interrupts import Guard, Interrupt, ScanInterrupted, signal_name
from .progress import ScanProgress
from .units import (GroupHeadUnit, GroupUnit, ReferenceUnit, WorkUnit, compute_unit, scan_pairs,  # noqa: F401
                    unit_factors, work_units)

Head = tuple[int, int]


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
    check_target(out, "scan file")
    check_target(journal_path(out), "journal")
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
    options = replace(options, writer_groups=writer_groups_for_model(options.writer_groups, w.n_layers, w.n_heads))
    ks = tuple(int(k) for k in options.k)
    extra = beyond_units(w, options, pairs)
    units = work_units(pairs) + extra + final_units(w, pairs) + [GroupHeadUnit(g, spec) for g, spec
                                                                 in enumerate(options.writer_groups)]
    attrs = dict(_attrs(w, options, ks, len(pairs)), units_total=len(units))  # the fingerprint reads every tensor
    w, table_w = release_table_inputs(w), table_inputs(w)  # from here only the table reads the MLP weights
    tables = [_checked_table(table_w, options)]  # [V, d]: every model fault is found before the file exists
    del table_w  # _complete releases the table after its last use
    return_freed()
    run = _Run(out, units, len(pairs), int(attrs["keys_per_row"]), options, progress)
    groups = {"pairs": empty_pairs(w.n_layers, w.n_heads, len(ks), HIST_BINS),
              "heads": schema.empty("heads", w.n_layers, w.n_heads, len(ks), HIST_BINS),
              "model_space": schema.empty("model_space", w.n_layers, w.n_heads, len(ks), HIST_BINS)}
    start_attrs = {}
    n_groups, draws = len(options.writer_groups), int(options.reference_draws)
    if n_groups:
        from ..compose.groups import parse_groups

        found = parse_groups(options.writer_groups, w.n_layers, w.n_heads)
        start_attrs["groups"] = {"group_names": [g.name for g in found],
                                 "group_members": [[list(m) for m in g.members] for g in found],
                                 "group_specs": [g.spec for g in found]}
        for name in ("groups", "group_heads"):
            groups[name] = schema.empty(name, w.n_layers, w.n_heads, len(ks), HIST_BINS, n_groups)
    if options.references:
        from ..compose.references import BAND

        groups["references"] = schema.empty("references", w.n_layers, w.n_heads, len(ks), HIST_BINS, 0, draws)
        start_attrs["references"] = {"draws": draws, "seed": int(options.reference_seed), "band": list(BAND),
                                     "band_positions": "weibull: p (n + 1)"}
    with Guard() as guard:
        try:
            with guard.critical():
                store = _open_store(out, attrs, groups, overwrite, w, start_attrs)
            with store:
                if not store.complete:
                    _complete(store, run, guard, w, attrs, options, tables,
                              dict(checkpoint=checkpoint, cluster=cluster, workers=workers,
                                   worker_checkpoint=worker_checkpoint))
        except Interrupt as stop:
            raise ScanInterrupted(
                f"interrupted by {signal_name(stop.signum)} with {run.committed_note()}; "
                "run the same command again to resume.", stop.signum) from None
        except RuntimeError:
            # A signal handler's exception raised inside a thread pool's wait can leave that wait's
            # lock half released, and the error of releasing it then replaces the Interrupt; the
            # file is valid either way (every commit is atomic), so a pending signal still wins.
            if guard.pending is None:
                raise
            raise ScanInterrupted(
                f"interrupted by {signal_name(guard.pending)} with {run.committed_note()}; "
                "run the same command again to resume.", guard.pending) from None
        except ScanWriteError as exc:
            _clean_if_nothing_committed(out, run)
            raise CompositionError(
                f"cannot write the scan file {out} ({exc.reason}); {run.committed_note(kept=True)}"
            ) from None
        except MemoryError:
            raise CompositionError(f"the scan of {out} ran out of memory; {run.committed_note(kept=True)}") from None
    return load_scan(out)


def beyond_units(w: Weights, options: ScanOptions, pairs) -> list:
    """The writer-group units (each group against every selected responder in a later layer than all
    its members) and the reference units (every responder of the scan), in that order; a group that
    meets no selected responder is refused with a sentence."""
    from ..compose.groups import parse_groups

    responders = parse_heads(options.responders, w.n_layers, w.n_heads, "--responders")
    units: list = []
    for g, group in enumerate(parse_groups(options.writer_groups, w.n_layers, w.n_heads)):
        later: dict[int, list[int]] = {}
        for lR, hR in responders:
            if lR > group.last_layer:
                later.setdefault(lR, []).append(hR)
        if not later:
            raise CompositionError(f"--writer-group {group.name}: no selected responder comes after its last member "
                                   f"(layer {group.last_layer}); widen --responders or drop the group.")
        units += [GroupUnit(g, group.spec, lR, tuple(hs)) for lR, hs in sorted(later.items())]
    if options.references:
        scanned = sorted({r for _, r in pairs} | {(u.responder_layer, h) for u in units for h in u.responder_heads})
        by_layer: dict[int, list[int]] = {}
        for lR, hR in scanned:
            by_layer.setdefault(lR, []).append(hR)
        units += [ReferenceUnit(lR, tuple(hs)) for lR, hs in sorted(by_layer.items())]
    return units


def _checked_table(w: Weights, options: ScanOptions):
    """The token table, refused with a sentence if it is not finite. # -> [V, d]"""
    import torch

    T = token_table(w, options.table_options())  # [V, d]
    if not all(bool(torch.isfinite(T[s:s + 4096]).all()) for s in range(0, T.shape[0], 4096)):  # no [V, d] temporary
        raise CompositionError(
            f"the token table of {w.source} ({options.table}) is not finite: check the config's norm epsilon "
            "(layer_norm_epsilon / layer_norm_eps / rms_norm_eps) and activation, and the weights' sizes.")
    return T


def _clean_if_nothing_committed(out: Path, run: "_Run") -> None:
    """A fresh scan that failed before committing anything leaves no file and no journal."""
    if run.fresh and run.units_done == 0:
        for path in (journal_path(out), out):
            if special_kind(path) is None:
                remove_quietly(path)


def _complete(store: ScanStore, run: "_Run", guard: Guard, w: Weights, attrs: dict, options: ScanOptions,
              tables: list, execution: dict) -> None:
    """Compute the missing units (pairs, then writer groups and references, then head profiles,
    model-space scores and the groups' OV profiles), committing each as it comes, then label all
    pairs and heads and finish: one transaction. Only pair units go to a cluster; the rest run here.
    ``tables`` holds the token table's only reference, so the last head profile can release it."""
    run.begin(store)

    def commit(i: int, results) -> None:
        group, index, fields = results if isinstance(results, tuple) else ("pairs", *_unit_fields(results))
        with guard.critical():
            store.commit(index, fields, group)
        run.committed(i, store.arrays)

    todo = run.todo()
    pair_todo = [(i, u) for i, u in todo if isinstance(u, WorkUnit)]
    beyond_todo = [(i, u) for i, u in todo if isinstance(u, (GroupUnit, GroupHeadUnit, ReferenceUnit))]
    final_todo = [(i, u) for i, u in todo if isinstance(u, (HeadUnit, SpaceUnit))]
    rotation = offsets_rotation(w, options.rotary_offsets)
    if pair_todo and (execution["cluster"] is not None or execution["workers"] is not None):
        from .cluster import run_units

        path = execution["worker_checkpoint"] or Path(execution["checkpoint"]).resolve()
        run_units(pair_todo, commit, checkpoint=str(path), fingerprint=attrs["weights_fingerprint"], options=options,
                  address=execution["cluster"], workers=execution["workers"])
    elif pair_todo:
        scanned = {u.writer for _, u in pair_todo} | {(u.responder_layer, h) for _, u in pair_todo for h in u.responder_heads}
        factors = SideFactors(w, tables[0], rotation, heads=scanned)
        for i, unit in pair_todo:
            commit(i, compute_unit(factors, unit, options))
        del factors  # the per-layer factors and packed keys go before the next phase
        return_freed()
    if beyond_todo:  # writer groups, their OV profiles and references: in this process, every head's factors
        factors = SideFactors(w, tables[0], rotation)
        for i, unit in beyond_todo:
            commit(i, compute_unit(factors, unit, options))
        del factors
        return_freed()
    space = ModelSpace(w)
    ks = tuple(int(k) for k in options.k)
    last_head = max((i for i, u in final_todo if isinstance(u, HeadUnit)), default=None)
    for i, unit in final_todo:
        if isinstance(unit, HeadUnit):  # the last head unit takes the table's last reference (and drops it)
            commit(i, ("heads", *profile_layer(w, tables.pop() if i == last_head else tables[0], unit.layer,
                                               unit.heads, ks, options.block_rows)))
        else:
            commit(i, ("model_space", *model_space_unit(space, unit.writer_layer)))
    group_attrs = {"heads": head_attrs(w, options.table_options(), ks, options.fdr,
                                       options.min_effect, attrs["weights_fingerprint"]),
                   "model_space": model_space_attrs(w)}
    with guard.critical():
        _label_all(store.arrays, options, store.groups.get("groups"))
        label_heads(store.groups["heads"], options.fdr, options.min_effect)
        if "group_heads" in store.groups:
            _label_group_heads(store.groups["heads"], store.groups["group_heads"], options)
        store.finish(dict(attrs, created=store.attrs.get("created", attrs["created"]), finished=_now()), group_attrs)
    run.finish()


@dataclass(frozen=True)
class HeadUnit:
    """Head profiles of the scanned heads of one layer (docs/methods.md §5)."""

    layer: int
    heads: tuple[int, ...]


@dataclass(frozen=True)
class SpaceUnit:
    """Model-space scores of one writer layer against every later layer (docs/methods.md §7)."""

    writer_layer: int


def final_units(w: Weights, pairs) -> list:
    """The head-profile units (heads of the scanned pairs) and model-space units of a scan."""
    heads = sorted({u for u, _ in pairs} | {r for _, r in pairs})
    return ([HeadUnit(l, hs) for l, hs in head_units(heads)]
            + [SpaceUnit(l) for l in range(w.n_layers)])


def _open_store(out: Path, attrs: dict, groups: dict, overwrite: bool, w: Weights,
                start_attrs: dict | None = None) -> ScanStore:
    """Resume the scan file ``out`` if it exists (refusing a different scan), else start it.

    A complete file without /heads or /model_space (left by an earlier version, or a kill
    in its final phase) is reopened with its pairs kept and the missing groups computed."""
    resume = out.exists() and not overwrite
    if resume:
        try:
            old_attrs, old_groups, old_group_attrs = read_scan_groups(out)
        except CompositionError as exc:
            if (f"{out} is not a scan file of this tool" in str(exc)) or "is not a readable" in str(exc):
                raise CompositionError(f"{out} exists and is not a scan file of this tool; "
                                       "pass --overwrite to replace it.") from None
            raise CompositionError(f"cannot resume {out}: {str(exc)[:-1]}; pass --overwrite to start afresh.") from None
        _check_resumable(out, old_attrs, attrs, w)
        for name, data in groups["pairs"].items():
            if old_groups["pairs"][name].shape != data.shape:
                raise CompositionError(f"cannot resume {out}: its dataset /pairs/{name} has another shape; "
                                       "pass --overwrite to start afresh.")
        complete = old_attrs.get("status", STATUS_COMPLETE) == STATUS_COMPLETE
        missing = [g for g in groups if g != "pairs" and g not in old_groups]
        if complete and missing:  # finish the groups in one transaction, the pairs kept as they are
            kept = dict(groups, pairs=old_groups["pairs"])
            try:
                return ScanStore.start(out, dict(attrs, created=old_attrs.get("created", attrs["created"])), kept,
                                       dict(old_group_attrs, **(start_attrs or {})))
            except ScanWriteError as exc:
                raise CompositionError(f"cannot write the scan file {out} ({exc.reason}); it is left as it was.") from None
        for g in missing:
            old_groups[g] = groups[g]
            if g in (start_attrs or {}):
                old_group_attrs[g] = start_attrs[g]
    else:
        if out.exists() and out.is_dir():
            raise CompositionError(f"{out} is a directory, not a scan file path.")
    try:
        if resume:
            return ScanStore.resume(out, old_attrs, old_groups, old_group_attrs)
        return ScanStore.start(out, attrs, groups, start_attrs)
    except ScanWriteError as exc:
        left = ("it is left as it was" if resume else
                "the existing file is left in place" if out.exists() else "nothing was written")
        raise CompositionError(f"cannot write the scan file {out} ({exc.reason}); {left}.") from None


def _check_resumable(out: Path, old: dict, new: dict, w: Weights) -> None:
    """Refuse to continue a file made from another checkpoint (weights or configuration) or
    with other result options, naming what changed."""
    diffs = []
    in_progress = old.get("status", STATUS_COMPLETE) != STATUS_COMPLETE
    version = old.get("format_version", 1)
    if in_progress and version != FORMAT_VERSION:
        raise CompositionError(f"cannot resume {out}: it was started by a version of the tool that writes scan "
                               f"format {version}, which did not record the checkpoint's configuration; "
                               "pass --overwrite to start afresh.")
    change = settings_change(old, w)
    if change:
        diffs.append(change)
    try:
        old_opts = json.loads(old.get("options", "{}"))
    except (TypeError, ValueError):
        old_opts = {}
    if not isinstance(old_opts, dict):
        old_opts = {}
    new_opts = json.loads(new["options"])
    for key in sorted(set(old_opts) | set(new_opts)):
        if old_opts.get(key) != new_opts.get(key):
            diffs.append(f"{_OPTION_NAMES.get(key, '--' + key.replace('_', '-'))} differs ({_show(old_opts.get(key))} in the file, "
                         f"{_show(new_opts.get(key))} now)")
    for key in ("writers", "responders"):
        if _selection(old.get(key), old, key) != _selection(new[key], new, key):
            diffs.append(f"--{key} differs ({old.get(key)} in the file, {new[key]} now)")
    if diffs:
        listed = diffs[0] if len(diffs) == 1 else ", ".join(diffs[:-1]) + " and " + diffs[-1]
        raise CompositionError(f"cannot resume {out}: {listed}; pass --overwrite to start afresh.")


_OPTION_NAMES = {"writer_groups": "--writer-group"}  # option keys whose command-line spelling differs


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
        self.fresh = False  # True once begun with nothing committed before
        self.n_layers = self.n_heads = 0
        self.final_start: float | None = None  # when this run's final phase began
        self.final_done = self.final_left = 0.0  # final phase: cost computed by this run, cost left

    def begin(self, store: ScanStore) -> None:
        done = store.arrays["done"]
        self.n_layers, self.n_heads = done.shape[:2]
        heads_done = store.groups["heads"]["done"]
        space_done = store.groups["model_space"]["done"]
        for i, unit in enumerate(self.units):
            if isinstance(unit, WorkUnit):
                self.done[i] = all(done[unit.writer + (unit.responder_layer, h)] for h in unit.responder_heads)
            elif isinstance(unit, HeadUnit):
                self.done[i] = all(heads_done[unit.layer, h] for h in unit.heads)
            elif isinstance(unit, GroupUnit):
                self.done[i] = all(store.groups["groups"]["done"][unit.group, unit.responder_layer, h]
                                   for h in unit.responder_heads)
            elif isinstance(unit, GroupHeadUnit):
                self.done[i] = bool(store.groups["group_heads"]["done"][unit.group])
            elif isinstance(unit, ReferenceUnit):
                self.done[i] = all(store.groups["references"]["done"][unit.layer, h] for h in unit.heads)
            else:
                self.done[i] = bool(space_done[unit.writer_layer])
        self.units_before = self.units_done = sum(self.done)
        self.pairs_before = self.pairs_done = int(done.sum())
        for i, unit in self.todo():
            if isinstance(unit, WorkUnit):
                self.left_in_layer[unit.responder_layer] = self.left_in_layer.get(unit.responder_layer, 0) + 1
        self.fresh = self.units_before == 0
        self.start = time.monotonic()
        self.final_left = float(sum(self._final_cost(u) for _, u in self.todo() if not isinstance(u, WorkUnit)))
        if not self.left_in_layer:  # every pair committed before: this run is the final phase only
            self.final_start = self.start
        if self.units_before:
            message = (f"resuming {self.out}: {self.units_before} of {len(self.units)} work units "
                       "already committed")
        else:
            message = f"scanning {self.n_pairs} pairs in {len(self.units)} work units into {self.out}"
        self._emit("start", message)

    def todo(self) -> list[tuple[int, object]]:
        return [(i, u) for i, u in enumerate(self.units) if not self.done[i]]

    def committed(self, i: int, arrays: dict) -> None:
        unit = self.units[i]
        if self.done[i]:
            return
        self.done[i] = True
        self.units_done += 1
        if not isinstance(unit, WorkUnit):  # head profiles and model-space scores: the final phase
            cost = self._final_cost(unit)
            self.final_done += cost
            self.final_left -= cost
            self._emit("unit")
            return
        n = len(unit.responder_heads)
        self.pairs_done += n
        rows = arrays["rows_evaluated"][unit.writer + (unit.responder_layer,)][list(unit.responder_heads)]
        self.entries += int(rows.sum()) * self.keys
        self._emit("unit")
        lR = unit.responder_layer
        self.left_in_layer[lR] -= 1
        if self.left_in_layer[lR] == 0:
            self._emit("layer", self._layer_summary(lR, arrays))
            del self.left_in_layer[lR]
            if not self.left_in_layer:
                self.final_start = time.monotonic()

    def _final_cost(self, unit) -> float:
        """A final-phase unit's cost in token-matrix entries, to pace the phase: a head profile ranks
        V x V entries per head; a model-space unit scores H^2 pairs per later layer, each costing about
        the time of V entries (scripts/bench-model-space at GPT-2 size: 13 s for 9,504 pairs against
        45 s per head at V = 50,257; docs/report.md)."""
        square = float(self.keys) * self.keys  # one V x V diagonal rank
        if isinstance(unit, HeadUnit):
            return len(unit.heads) * square
        if isinstance(unit, GroupUnit):  # a group against each responder head: one token matrix each
            return len(unit.responder_heads) * square
        if isinstance(unit, GroupHeadUnit):
            return square
        if isinstance(unit, ReferenceUnit):  # identity, unembedding and every random draw, per responder head
            return len(unit.heads) * (2 + self.options.reference_draws) * square
        return float((self.n_heads**2 * max(self.n_layers - 1 - unit.writer_layer, 0) + 1) * self.keys)  # never 0

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
        now = time.monotonic()
        final = {} if self.final_start is None else dict(
            phase="final", phase_cost_done=self.final_done, phase_cost_left=self.final_left,
            phase_elapsed=now - self.final_start)
        self.progress(ScanProgress(kind, self.units_done, len(self.units), self.units_before, self.pairs_done,
                                   self.pairs_before, self.n_pairs, self.entries, now - self.start, message, **final))


def _store(arrays, index, s) -> None:
    for name, value in s.datasets().items():
        if name in arrays:
            arrays[name][index] = value
    arrays["done"][index] = True


def _label_all(arrays, options: ScanOptions, group_arrays=None) -> None:
    """Labels and q-values of every pair, and of every writer group's pair, in ONE Benjamini-Hochberg
    family (docs/groups.md): a group is one more writer of the scan."""
    families = [arrays] + ([group_arrays] if group_arrays is not None else [])
    _label_family(families, options)


def _label_group_heads(heads, group_heads, options: ScanOptions) -> None:
    """Copying/suppressing labels of the groups' OV profiles, Benjamini-Hochberg over the profiled heads
    and the groups together; the heads keep their own labels (label_heads, over heads alone)."""
    before = {name: heads[name].copy() for name in ("label", "q_value")}
    _label_family([heads, group_heads], options)
    for name, values in before.items():
        heads[name][...] = values


def _label_family(families: list, options: ScanOptions) -> None:
    done = [a["done"] for a in families]
    mp = np.concatenate([a["mean_percentile"][d] for a, d in zip(families, done)])
    pv = np.concatenate([a["p_value"][d] for a, d in zip(families, done)])
    lab, q = labels(mp, pv, options.fdr, options.min_effect)
    start = 0
    for a, d in zip(families, done):
        n = int(d.sum())
        a["label"][d] = lab[start:start + n]
        a["q_value"][d] = q[start:start + n]
        start += n


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
        "ranks_path": resolve_path(options.precision, options.device, options.engine),  # never changes a number
        "weights_fingerprint": weights_fp,
        "model_settings": json.dumps(w.settings(), sort_keys=True),
        "fingerprint": fp,
        "label_fill": -128,
        "caution": CAUTION,
    }


__all__ = ["ScanOptions", "ScanInterrupted", "run_scan", "parse_heads", "scan_pairs", "load_scan"]
