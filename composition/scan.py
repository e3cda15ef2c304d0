"""A scan: every selected (writer, responder) pair, ranked, summarised, labelled, saved.

Work is ordered so each factor is built once: per writer layer the writer values ``A_U``;
per responder layer the keys ``K_R``; per pair only the ``[dh, dh]`` middle and the
``[V, dh]`` query factor.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import re
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__
from .checkpoints import load_weights
from .errors import CompositionError
from .factors import ORIENTATIONS, query_middles, query_side, responder_keys, writer_values
from .ranks import diagonal_midranks
from .scanfile import CAUTION, FORMAT_NAME, FORMAT_VERSION, Scan, empty_pairs, load_scan, write_scan
from .stats import DEFAULT_FDR, DEFAULT_K, DEFAULT_MIN_EFFECT, HIST_BINS, labels, summarise
from .tables import TABLES, TableOptions, token_table
from .weights import Weights

Head = tuple[int, int]


@dataclass(frozen=True)
class ScanOptions:
    """Everything that changes a scan's numbers, plus the head selection."""

    table: str = "attn0-mlp0"
    position: int | str | None = None
    orientation: str = "row"
    k: tuple[int, ...] = DEFAULT_K
    fdr: float = DEFAULT_FDR
    min_effect: float = DEFAULT_MIN_EFFECT
    writers: str | None = None  # e.g. "1,2.3": whole layers or layer.head labels
    responders: str | None = None
    block_rows: int = 256

    def validate(self) -> None:
        if self.table not in TABLES:
            raise CompositionError(f"--table {self.table!r} is not one of: {', '.join(TABLES)}.")
        if self.orientation not in ORIENTATIONS:
            raise CompositionError(f"--orientation {self.orientation!r} is not one of: {', '.join(ORIENTATIONS)}.")
        if not self.k or any(int(k) < 1 for k in self.k):
            raise CompositionError("--k needs one or more positive integers, e.g. 1,5,10.")
        if not 0 < self.fdr < 1:
            raise CompositionError("--fdr must lie strictly between 0 and 1.")
        if not 0 <= self.min_effect < 0.5:
            raise CompositionError("--min-effect must lie in [0, 0.5).")


@dataclass
class ScanSummary:
    path: Path
    pairs: int
    labelled: list[dict] = field(default_factory=list)


def parse_heads(spec: str | None, n_layers: int, n_heads: int, option: str) -> list[Head]:
    """``"1,2.3"`` -> every head of layer 1 and head 3 of layer 2; None -> every head."""
    if spec is None or spec.strip() == "":
        return [(l, h) for l in range(n_layers) for h in range(n_heads)]
    heads: set[Head] = set()
    for item in spec.split(","):
        item = item.strip()
        m = re.fullmatch(r"(\d+)(?:\.(\d+))?", item)
        if not m:
            raise CompositionError(f"{option} item {item!r} is neither a layer (4) nor a head label (4.3).")
        layer = int(m.group(1))
        if layer >= n_layers:
            raise CompositionError(f"{option} names layer {layer}, but the model has layers 0-{n_layers - 1}.")
        if m.group(2) is None:
            heads.update((layer, h) for h in range(n_heads))
        else:
            head = int(m.group(2))
            if head >= n_heads:
                raise CompositionError(f"{option} names head {item}, but layers have heads 0-{n_heads - 1}.")
            heads.add((layer, head))
    return sorted(heads)


def scan_pairs(w: Weights, options: ScanOptions) -> list[tuple[Head, Head]]:
    """Every (writer, responder) of the selection with responder layer > writer layer."""
    writers = parse_heads(options.writers, w.n_layers, w.n_heads, "--writers")
    responders = parse_heads(options.responders, w.n_layers, w.n_heads, "--responders")
    pairs = [(u, r) for u in writers for r in responders if r[0] > u[0]]
    if not pairs:
        raise CompositionError("the --writers/--responders selection leaves no pair with the responder in a later layer.")
    return pairs


def result_options(options: ScanOptions) -> dict:
    """The options that change a scan's numbers (they enter the fingerprint)."""
    d = asdict(options)
    for key in ("writers", "responders", "block_rows"):
        d.pop(key)
    d["k"] = [int(k) for k in options.k]
    d["position"] = "none" if options.position is None else str(options.position)
    d["side"] = "query"
    return d


def run_scan(checkpoint: str | os.PathLike | Weights, out: str | os.PathLike, options: ScanOptions = ScanOptions(),
             overwrite: bool = False, progress: Callable[[int, int], None] | None = None) -> Scan:
    """Scan every selected pair of a checkpoint and write the scan file ``out``."""
    options.validate()
    out = Path(out)
    if out.exists() and not overwrite:
        raise CompositionError(f"{out} exists already; pass --overwrite to replace it.")
    if out.is_dir():
        raise CompositionError(f"{out} is a directory, not a scan file path.")
    w = checkpoint if isinstance(checkpoint, Weights) else load_weights(checkpoint)
    pairs = scan_pairs(w, options)
    T = token_table(w, TableOptions(options.table, options.position))  # [V, d]
    ks = tuple(int(k) for k in options.k)
    L, H, V = w.n_layers, w.n_heads, w.vocab_size
    arrays = empty_pairs(L, H, len(ks), HIST_BINS)

    factors = _FactorCache(w, T)
    units = work_units(pairs)
    done = 0
    for unit in units:
        for (u, r), stats in compute_unit(factors, unit, options).items():
            _store(arrays, u + r, stats)
            done += 1
        if progress:
            progress(done, len(pairs))
    _label_all(arrays, options)
    attrs = _attrs(w, options, ks, len(pairs))
    write_scan(out, attrs, arrays)
    from .heads import add_to_scan  # issue 6: /heads and /model_space groups (composition/heads.py)
    add_to_scan(out, w, T)
    return load_scan(out)


@dataclass(frozen=True)
class WorkUnit:
    """One writer head against the selected heads of one responder layer."""

    writer: Head
    responder_layer: int
    responder_heads: tuple[int, ...]


def work_units(pairs: list[tuple[Head, Head]]) -> list[WorkUnit]:
    """Group pairs into work units, ordered (writer layer, responder layer, writer head) so
    that consecutive units share their writer values and responder keys."""
    grouped: dict[tuple[Head, int], list[int]] = {}
    for u, r in pairs:
        grouped.setdefault((u, r[0]), []).append(r[1])
    order = sorted(grouped, key=lambda key: (key[0][0], key[1], key[0][1]))
    return [WorkUnit(u, lR, tuple(sorted(grouped[(u, lR)]))) for u, lR in order]


class _FactorCache:
    """Writer values and responder keys, built once per layer and kept for the next unit."""

    def __init__(self, w: Weights, table):
        self.w, self.table = w, table
        self._values: tuple[int, object] | None = None
        self._keys: tuple[int, object] | None = None

    def values(self, layer: int):  # -> [H, V, dh]
        if self._values is None or self._values[0] != layer:
            self._values = (layer, writer_values(self.w, self.table, layer))
        return self._values[1]

    def keys(self, layer: int):  # -> [H, V, dh]
        if self._keys is None or self._keys[0] != layer:
            self._keys = (layer, responder_keys(self.w, self.table, layer))
        return self._keys[1]


def compute_unit(factors: _FactorCache, unit: WorkUnit, options: ScanOptions) -> dict:
    """Statistics of every pair of one work unit: ``{(writer, responder): PairStats}``."""
    w = factors.w
    (lU, hU), lR = unit.writer, unit.responder_layer
    A = factors.values(lU)[hU]  # [V, dh]
    K = factors.keys(lR)  # [H, V, dh]
    middles = query_middles(w, lU, hU, lR)  # [H, dh, dh]
    ks = tuple(int(k) for k in options.k)
    out = {}
    for hR in unit.responder_heads:
        left, right = query_side(A, middles[hR], K[hR], options.orientation)
        ranks = diagonal_midranks(left, right, block_rows=options.block_rows).numpy()
        out[(unit.writer, (lR, hR))] = summarise(ranks, w.vocab_size, ks)
    return out


def _store(arrays, index, s) -> None:
    arrays["top_share"][index] = s.top_share
    arrays["bottom_share"][index] = s.bottom_share
    arrays["mean_percentile"][index] = s.mean_percentile
    arrays["histogram"][index] = s.histogram
    arrays["rows_evaluated"][index] = s.rows
    arrays["p_value"][index] = s.p_value
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
        "side": "query",
        "table": options.table,
        "position": opts["position"],
        "orientation": options.orientation,
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


__all__ = ["ScanOptions", "run_scan", "parse_heads", "scan_pairs", "load_scan"]
