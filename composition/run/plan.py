"""``composition plan``: what a scan will cost on this machine, before it runs.

The estimate adds up the stages of a scan, each timed here for a few seconds:
loading the checkpoint (timed for real), the token table, the per-layer writer values and the
side's per-layer responder factor (keys, queries or readouts: whatever the side in
``composition.compose.sides`` builds, timed on the first rows of the vocabulary and scaled to
all of it), per pair the side's written-token factor (timed on the side's own factors, scaled
likewise) and the packing of the right factor (timed on factors of the model's size), and the
ranks themselves: rows x vocabulary entries at the rate the ranks kernel reaches on Gaussian
factors of the model's vocabulary and head width.

A finished scan also profiles the OV circuit of every head it scanned (``composition.interpret.heads``):
one full-vocabulary diagonal rank per head, counted at the same kernel rate.

Peak memory: a model of what the driver holds in each phase (``_memory``; docs/performance.md),
the largest of: loading (every canonical tensor), the token table (the table, the embedding
and layer 0), the pairs (the weights without MLPs, the table, the float64 per-layer factors of
the scanned heads only, the packed right factors and one unit's working set), the head
profiles (the profiled heads' values, the float64 unembedding and one head's readout, the
table until its last use) and the model-space scores; plus the resident memory of a fresh
process that has imported the tool (measured once, in a child process of the same kind). Sequential scans (``--until-ci``) are estimated for pairs without
effect (mean percentile 1/2, null shares); pairs with a large effect stop at least as early,
pairs near a decision boundary may read up to every row (the maximum is printed too).
"""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from ..compose import sides
from ..compose.sides import Product, SideFactors
from ..extract import load_weights
from ..extract.rotary import offsets_rotation
from ..score.ranks import RowProduct, kernel_rate_entries, prepare_right, resolve_path
from ..score.sampling import expected_rows
from ..score.stats import summarise_many
from ..extract.tables import token_table
from ..extract.weights import Weights
from .units import scan_pairs, work_units

_SUBSET = 2048


@dataclass
class Plan:
    checkpoint: str
    vocab: int
    d_head: int
    pairs: int
    units: int
    rows_per_pair: int
    rows_most: int
    looks_per_pair: int
    entries: float
    rate: float  # entries per second of the ranks kernel here
    engine: str
    precision: str
    side: str
    seconds: dict  # stage -> estimated seconds
    peak_bytes: int
    memory: dict = dataclasses.field(default_factory=dict)  # phase -> estimated peak bytes (baseline included)

    @property
    def total_seconds(self) -> float:
        return float(sum(self.seconds.values()))

    def describe(self) -> str:
        s = self.seconds
        lines = [
            f"checkpoint         {self.checkpoint}",
            f"side               {self.side}",
            f"pairs              {self.pairs} ({self.units} work units)",
            f"rows per pair      {self.rows_per_pair} of {self.vocab}"
            + (f" (expected; at most {self.rows_most})" if self.rows_most != self.rows_per_pair else ""),
            f"entries            {self.entries:.3e} ({self.vocab} keys per row, head width {self.d_head})",
            f"ranks kernel       {self.rate / 1e9:.3f} G entries/s here ({self.engine}, {self.precision})",
            f"estimated time     {_duration(self.total_seconds)} in all; totals over the scan: "
            f"ranks {_duration(s['ranks'])}, per-layer factors {_duration(s['factors'] + s['table'])}, "
            f"per-pair factors {_duration(s['per_pair'])} ({_duration(s['per_pair'] / max(1, self.pairs))} a pair), "
            f"head profiles {_duration(s['heads'])}, load and write {_duration(s['load'] + s['write'])}",
            f"peak memory        {self.peak_bytes / 2**30:.2f} GiB"
            + (f" (during the {max(self.memory, key=self.memory.get)}; a fresh process alone: "
               f"{self.memory.get('baseline', 0) / 2**30:.2f} GiB)" if self.memory else ""),
        ]
        return "\n".join(lines)


def _duration(seconds: float) -> str:
    if seconds < 0.1:
        return f"{seconds * 1000:.1f} ms"
    if seconds < 90:
        return f"{seconds:.1f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


def _timed(fn, *args):
    t = time.perf_counter()
    out = fn(*args)
    return out, time.perf_counter() - t


def _best_of(n: int, fn, *args) -> float:
    """Shortest of ``n`` timings of a cheap step (a shared machine adds long stalls)."""
    return min(_timed(fn, *args)[1] for _ in range(n))


def _weights_bytes(w: Weights) -> int:
    """Bytes of every canonical tensor, each layer included (layers read lazily are read here)."""
    total = sum(_tensor_bytes(getattr(w, f.name)) for f in dataclasses.fields(w) if f.name != "layers")
    return total + sum(_tensor_bytes(w.layers[i]) for i in range(w.n_layers))


def _tensor_bytes(v) -> int:
    if isinstance(v, torch.Tensor):
        return v.numel() * v.element_size()
    if dataclasses.is_dataclass(v) and not isinstance(v, type):
        return sum(_tensor_bytes(getattr(v, f.name)) for f in dataclasses.fields(v))
    if isinstance(v, (list, tuple)):
        return sum(_tensor_bytes(x) for x in v)
    return 0


def plan_scan(checkpoint, options, calibrate_seconds: float = 3.0) -> Plan:
    """Estimate the wall time and peak memory of ``run_scan(checkpoint, ..., options)``."""
    options.validate()
    w, t_load = (checkpoint, 0.0) if isinstance(checkpoint, Weights) else _timed(load_weights, checkpoint, options.family, options.layout)
    pairs = scan_pairs(w, options)
    units = work_units(pairs)
    V, H, dh, d = w.vocab_size, w.n_heads, w.d_head, w.d_model

    # token table and per-layer factors, on the first rows of the vocabulary
    side = sides.get(options.side, options.query_part, options.orientation)
    n_sub = min(V, _SUBSET)
    w_sub = dataclasses.replace(w, W_E=w.W_E[:n_sub], W_U=w.W_U[:, :n_sub])
    T_sub, t_table = _timed(token_table, w_sub, options.table_options())
    first = units[0]
    sub = SideFactors(w_sub, T_sub, offsets_rotation(w, options.rotary_offsets))
    _, t_values = _timed(sub.values, first.writer[0])
    _, t_fixed = _timed(side.fixed, sub, first.responder_layer)
    scale = V / n_sub
    value_builds, fixed_builds = _factor_builds(units)
    _, t_fp = _timed(w.fingerprint)  # the scan file records it

    # per pair: the side's written-token factor (its per-writer parts included, timed on the subset);
    # per responder layer: the packed right factor (on factors of the model's size)
    written, t_written = _timed(side.written, sub, first.writer, first.responder_layer)
    factor = written(first.responder_heads[0])
    g = torch.Generator().manual_seed(0)
    A = torch.randn(V, dh, generator=g, dtype=torch.float64)
    C = torch.randn(dh, dh, generator=g, dtype=torch.float64)
    t_prep = _best_of(3, prepare_right, A, options.precision, options.device, options.engine)

    sampling = options.sampling()
    rows, rows_most = expected_rows(V, sampling, options.min_effect, options.k)
    looks = sampling.schedule(V)
    looks_used = max(1, sum(1 for n in looks if n <= rows))
    written_left = (options.orientation == "row") == side.written_rows
    if written_left and isinstance(factor, Product):  # only the evaluated rows of the written factor are built
        idx = np.arange(min(rows, V))
        t_left = _best_of(3, lambda: RowProduct(A, C)[idx])
    else:  # the whole written factor, built from the side's own factors
        t_left = _best_of(3, lambda: sides.dense(factor)) * scale
    t_left += t_written * scale / len(first.responder_heads)
    # the statistics of a unit's pairs are summarised together at each look
    demo = [np.random.default_rng(i).integers(0, V, rows).astype(np.float64) for i in range(H)]
    t_unit_summary = _best_of(2, summarise_many, demo, V, tuple(options.k), V, 0.05, len(looks))

    rate = kernel_rate_entries(options.precision, seconds=max(0.5, calibrate_seconds), V=V, r=dh,
                               engine=options.engine)
    n_pairs = len(pairs)
    profiled = {u for u, _ in pairs} | {r for _, r in pairs}
    entries = float(n_pairs) * rows * V
    seconds = {
        "load": t_load,
        "table": t_table * scale,
        "factors": (t_values * value_builds + t_fixed * fixed_builds) * scale
        + (t_prep * H * fixed_builds if written_left else t_prep * n_pairs * looks_used),
        "per_pair": n_pairs * t_left + len(units) * looks_used * t_unit_summary,
        "ranks": entries / rate,
        "write": t_fp,
        # a finished scan adds the OV profiles of its writers and responders (composition.interpret.heads):
        # one full V x V diagonal rank per head, a fresh token table and one value build per layer
        "heads": len(profiled) * float(V) * V / rate + t_table * scale
        + len({h[0] for h in profiled}) * t_values * scale,
    }
    path = resolve_path(options.precision, options.device, options.engine)
    memory = _memory(w, options, side, pairs, rows, path)
    peak = max(memory.values())
    engine = path
    return Plan(str(getattr(w, "source", checkpoint)), V, dh, n_pairs, len(units), rows, rows_most, looks_used,
                entries, rate, engine, options.precision, side.title, seconds, int(peak), memory)


_MiB = 2**20
_RUNTIME = 32 * _MiB  # what the phases add besides their tensors (library buffers, heap slack): measured, GPT-2 size
_baseline: list[int] = []


def baseline_bytes() -> int:
    """Resident memory of a fresh process that has imported the scan driver and run one matrix
    product (Python, torch, NumPy, h5py, the libraries' thread pools), measured once in a child."""
    if not _baseline:
        code = ("import torch, composition.run.scan, composition.score.ranks\n"
                "torch.ones(64, 64) @ torch.ones(64, 64)\n"
                "from composition.memory import resident_bytes\nprint(resident_bytes())")
        env = dict(os.environ, PYTHONPATH=os.pathsep.join(filter(None, [str(Path(__file__).resolve().parents[2]),
                                                                          os.environ.get("PYTHONPATH")])))
        try:
            out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120,
                                 check=True).stdout
            _baseline.append(int(out.strip().splitlines()[-1]))
        except (OSError, subprocess.SubprocessError, ValueError, IndexError):
            _baseline.append(300 * _MiB)  # what it is on Linux with torch 2.x CPU
    return _baseline[0]


def _memory(w: Weights, options, side, pairs, rows: int, path: str) -> dict[str, int]:
    """Estimated peak resident bytes of each phase of ``run_scan`` (what the driver holds then).

    # GPT-2 small, writer 0.0 x layer 1: table 294 MiB, one layer of keys 294 MiB, packed 147 MiB
    """
    V, H, dh, d, L = w.vocab_size, w.n_heads, w.d_head, w.d_model, w.n_layers
    V_out = w.W_U.shape[1]
    f64 = 8 * V * dh  # one head's float64 [V, dh] factor
    base = baseline_bytes()
    every = _weights_bytes(w)
    mlp = [_tensor_bytes(w.layers[i].mlp) for i in range(L)]
    tied = w.readout == "tied"
    slim = every - sum(mlp) - (_tensor_bytes(w.W_E) if tied else 0)  # after release_table_inputs
    table = 8 * V * d
    m = w.layers[0].mlp.W_in.shape[1]
    layer0 = _tensor_bytes(w.layers[0].attn) + mlp[0]
    from ..extract.tables import _BLOCK as table_block
    out = {"baseline": base,
           "loading": base + every + max(_tensor_bytes(w.W_E), 3 * d * d * 4),
           "token table": base + slim + _tensor_bytes(w.W_E) + 3 * layer0 + table + 6 * table_block * m * 8 + _RUNTIME}
    writers: dict[int, set] = {}
    responders: dict[int, set] = {}
    for (lU, hU), (lR, hR) in pairs:
        writers.setdefault(lU, set()).add(hU)
        responders.setdefault(lR, set()).add(hR)
    n_w = max(len(v) for v in writers.values())
    n_r = max(len(v) for v in responders.values())
    if side.fixed_name not in ("keys", "queries"):  # readouts: every head of the layer
        n_r = H
    packed = 3 * dh * 2 if path.endswith("bf16x3") else dh * 4
    extra = 0
    if side.part != "full":  # unembedding directions [V, d] and unembed queries [H, V, dh]
        extra = 8 * V * d + H * f64
    unit = max(len(v) for v in responders.values())
    working = unit * min(rows, V) * dh * 8 + V * dh * (8 + 4)  # evaluated rows; one packing's temporaries
    out["pairs"] = base + slim + table + n_w * f64 + n_r * (f64 + V * packed) + extra + working + _RUNTIME
    profiled: dict[int, set] = {}
    for u, r in pairs:
        for l, h in (u, r):
            profiled.setdefault(l, set()).add(h)
    head = 0
    last = max(profiled)
    for l, hs in profiled.items():
        held = len(hs) * f64 + 8 * d * V_out + 2 * 8 * V_out * dh  # the float64 unembedding while a readout is built
        build = table + len(hs) * f64 + 4 * 1024 * d * 8
        head = max(head, build, held + (0 if l == last else table))
    out["head profiles"] = base + slim + head + _RUNTIME
    per = max(1, 64 // H)
    group = min(per, L) * H * d * dh * 8  # one [H, d, dh] float64 per later layer of a group
    out["model-space scores"] = base + slim + max(8 * (H * d * dh * 8 + group) + 6 * group,  # reductions, concatenated
                                                  4 * 200 * d * dh * 8) + _RUNTIME  # the Gaussian baseline
    return out


def _factor_builds(units) -> tuple[int, int]:
    """How often the scan builds writer values and the side's per-layer responder factor (it keeps
    one layer of each)."""
    values = keys = 0
    last_v = last_k = None
    for u in units:
        if u.writer[0] != last_v:
            values, last_v = values + 1, u.writer[0]
        if u.responder_layer != last_k:
            keys, last_k = keys + 1, u.responder_layer
    return values, keys


__all__ = ["Plan", "plan_scan"]
