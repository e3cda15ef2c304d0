"""Work units: one writer head (or writer group) against the selected heads of one responder
layer; a writer group's OV profile; the reference writers of one responder layer.

Both the driver (``composition.run.scan``) and the cluster workers (``composition.run.cluster``)
compute units through ``compute_unit``; neither imports the other for it. The side (query,
key, value, or a query part) comes from the registry ``composition.compose.sides``: it supplies
each pair's two factors, and this module packs them for the ranks kernel: a per-layer factor
on the right is packed once per layer; a written factor on the left is evaluated only on the
rows the scan reads.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import torch

from ..compose import sides
from ..errors import CompositionError
from ..options import check_for_model, parse_heads
from ..compose.sides import Product, SideFactors
from ..extract.rotary import offsets_rotation
from ..extract.tables import token_table
from ..extract.weights import Weights
from ..score.ranks import RowProduct, prepare_right
from ..score.sampling import evaluate_pairs

Head = tuple[int, int]


@dataclass(frozen=True)
class WorkUnit:
    """One writer head against the selected heads of one responder layer."""

    writer: Head
    responder_layer: int
    responder_heads: tuple[int, ...]


def scan_pairs(w: Weights, options) -> list[tuple[Head, Head]]:
    """Every (writer, responder) of the selection with responder layer > writer layer; the options
    that need the model are checked here, before any file exists."""
    check_for_model(options, w.vocab_size)
    writers = parse_heads(options.writers, w.n_layers, w.n_heads, "--writers")
    responders = parse_heads(options.responders, w.n_layers, w.n_heads, "--responders")
    pairs = [(u, r) for u in writers for r in responders if r[0] > u[0]]
    if not pairs:
        raise CompositionError("the --writers/--responders selection leaves no pair with the responder in a later layer.")
    return pairs


def work_units(pairs: list[tuple[Head, Head]]) -> list[WorkUnit]:
    """Group pairs into work units, ordered (writer layer, responder layer, writer head) so
    that consecutive units share their writer values and responder keys."""
    grouped: dict[tuple[Head, int], list[int]] = {}
    for u, r in pairs:
        grouped.setdefault((u, r[0]), []).append(r[1])
    order = sorted(grouped, key=lambda key: (key[0][0], key[1], key[0][1]))
    return [WorkUnit(u, lR, tuple(sorted(grouped[(u, lR)]))) for u, lR in order]


def unit_factors(w: Weights, options) -> SideFactors:
    """What ``compute_unit`` needs besides the unit: built the same way here and on workers."""
    T = token_table(w, options.table_options())  # [V, d]
    return SideFactors(w, T, offsets_rotation(w, options.rotary_offsets))


def compute_unit(factors: SideFactors, unit, options):
    """Statistics of every pair of one work unit: ``{(writer, responder): PairStats}``; a writer
    group's or reference unit gives ``(group, index [n, m], {name: [n, ...]})`` for the store."""
    if isinstance(unit, GroupUnit):
        return compute_group_unit(factors, unit, options)
    if isinstance(unit, GroupHeadUnit):
        return compute_group_head_unit(factors, unit, options)
    if isinstance(unit, ReferenceUnit):
        return compute_reference_unit(factors, unit, options)
    side = sides.get(options.side, options.query_part)
    lR = unit.responder_layer
    stats = _evaluate(factors, side, side.written(factors, unit.writer, lR), lR, unit.responder_heads, options)
    fraction = side.write_fraction(factors, unit.writer)
    return {(unit.writer, (lR, hR)): replace(st, write_fraction=fraction)
            for hR, st in zip(unit.responder_heads, stats)}


def _evaluate(factors: SideFactors, side, written, lR: int, heads, options) -> list:
    """PairStats of one written factor (responder head -> factor) against the given heads of layer ``lR``."""
    lefts, rights = [], []
    for hR in heads:
        left, right = side.oriented(written(hR), _Fixed(side, lR, hR), options.orientation)
        lefts.append(_left(factors, left))
        rights.append(_right(factors, right, options))
    return _stats(factors, lefts, rights, options)


def _stats(factors: SideFactors, lefts, rights, options) -> list:
    return evaluate_pairs(lefts, rights, factors.w.vocab_size, tuple(int(k) for k in options.k),
                          options.sampling(), options.min_effect, options.precision, options.device,
                          options.engine, options.block_rows)


# ---------------------------------------------------------------------------
# writer groups (docs/groups.md §1): one more writer whose values have n dh columns
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class GroupUnit:
    """One writer group (index ``group`` into the scan's groups) against the selected heads of one
    responder layer later than all its members."""

    group: int
    spec: str  # NAME=L.H+L.H, normalised
    responder_layer: int
    responder_heads: tuple[int, ...]


@dataclass(frozen=True)
class GroupHeadUnit:
    """A writer group's OV profile: the sum of its members' OV token matrices (docs/methods.md §5)."""

    group: int
    spec: str


def _group(factors: SideFactors, spec: str):
    from ..compose.groups import parse_group

    return parse_group(spec, factors.w.n_layers, factors.w.n_heads)


def _group_values(factors: SideFactors, group) -> torch.Tensor:
    """``A_G``, kept while consecutive units use the same group. # -> [V, n dh]"""
    from ..compose.groups import group_values

    return factors.held("group_values", group.spec, lambda: group_values(factors.w, factors.table, group,
                                                                         values_of=factors.values))


def compute_group_unit(factors: SideFactors, unit: GroupUnit, options):
    """Pair statistics of a writer group against the unit's responders, through the scan's side: the
    written factor is ``A_G @ C_G,R`` with the members' middles of that side stacked (compose.groups).

    # -> ("groups", index [n, 3] (group, responder layer, head), {name: [n, ...]})
    """
    side = sides.get(options.side, options.query_part)
    group, lR = _group(factors, unit.spec), unit.responder_layer
    A = _group_values(factors, group)  # [V, n dh]
    middles = torch.cat([side.middles(factors, m, lR) for m in group.members], dim=1)  # [H, n dh, dh]
    stats = _evaluate(factors, side, lambda hR: Product(A, middles[hR]), lR, unit.responder_heads, options)
    fields = _fields("groups", len(stats), options)
    for j, st in enumerate(stats):
        _put(fields, j, replace(st, write_fraction=1.0).datasets())
    index = np.array([[unit.group, lR, h] for h in unit.responder_heads], dtype=np.int64).reshape(-1, 3)
    return "groups", index, fields


def compute_group_head_unit(factors: SideFactors, unit: GroupHeadUnit, options):
    """The group's OV profile, with the kernel and rule of a head profile (interpret.heads.profile_layer):
    diagonal midranks of ``F_G = A_G B_G^T`` over every row, and the eigenvalue copying score.

    # -> ("group_heads", index [1, 1], {name: [1, ...]})
    """
    from ..compose.groups import group_readouts
    from ..interpret.heads import put_ov_profile

    group = _group(factors, unit.spec)
    A = _group_values(factors, group)  # [V, n dh]
    B = group_readouts(factors.w, group)  # [V_out, n dh]
    fields = _fields("group_heads", 1, options)
    put_ov_profile(fields, 0, A, B, options.k, options.block_rows)
    fields.pop("label")
    fields.pop("q_value")
    return "group_heads", np.array([[unit.group]], dtype=np.int64), fields


# ---------------------------------------------------------------------------
# reference writers (docs/groups.md §2): identity, unembedding and the random band
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class ReferenceUnit:
    """Every reference writer of the selected heads of one responder layer (query side, full write, rows)."""

    layer: int
    heads: tuple[int, ...]


def compute_reference_unit(factors: SideFactors, unit: ReferenceUnit, options):
    """Identity, unembedding and every random draw against the unit's responders, each a written
    factor on the query side with the responder's own keys (compose.references); the draws are
    recomputed from ``(seed, layer, draw)``.

    # -> ("references", index [n, 2] (layer, head), {name: [n, ...]}, random_mean_percentile [n, draws])
    """
    from ..compose import references as ref

    side, w, lR, heads = sides.get("query"), factors.w, unit.layer, unit.heads
    draws = int(options.reference_draws)
    identity = ref.identity_queries(w, factors.table, lR, factors.rotation)  # [H, V, dh]
    unembedding = ref.unembedding_queries(w, lR, factors.rotation)  # [H, V, dh]
    fields = _fields("references", len(heads), options, draws)
    for kind, queries in (("identity", identity), ("unembedding", unembedding)):
        stats = _evaluate(factors, side, lambda hR, q=queries: q[hR], lR, heads, options)
        for j, st in enumerate(stats):
            fields[f"{kind}_mean_percentile"][j] = st.mean_percentile
            fields[f"{kind}_top_share"][j] = st.top_share
            fields[f"{kind}_bottom_share"][j] = st.bottom_share
            fields[f"{kind}_p_value"][j] = st.p_value
    for d in range(draws):
        rw = ref.random_writer(w, factors.table, lR, d, int(options.reference_seed))
        middles = ref.random_middles(w, rw, lR, factors.rotation)  # [H, dh, dh]
        stats = _evaluate(factors, side, lambda hR: Product(rw.values, middles[hR]), lR, heads, options)
        fields["random_mean_percentile"][:, d] = [st.mean_percentile for st in stats]
    fields["done"][:] = True
    return "references", np.array([[lR, h] for h in heads], dtype=np.int64).reshape(-1, 2), fields


def _fields(group: str, n: int, options, draws: int = 0) -> dict:
    from ..score.stats import HIST_BINS
    from ..store import schema

    return schema.unit_arrays(group, n, len(options.k), HIST_BINS, draws)


def _put(fields: dict, j: int, values: dict) -> None:
    for name, value in values.items():
        if name in fields:
            fields[name][j] = value
    fields["done"][j] = True


@dataclass(frozen=True)
class _Fixed:
    """The responder's per-layer factor of one head, fetched (and packed) only where it is used."""

    side: sides.Side
    layer: int
    head: int


def _left(factors: SideFactors, factor):
    """Rows of the left factor are built only where the kernel reads them. # -> [V, dh] (or lazy)"""
    if isinstance(factor, _Fixed):
        return factor.side.fixed(factors, factor.layer)[factor.head]  # [V, dh]
    if isinstance(factor, Product):
        return RowProduct(factor.A, factor.middle)
    return factor


def _right(factors: SideFactors, factor, options):
    """A per-layer factor is packed for the kernel once per layer; a written one when reached."""
    if isinstance(factor, Product):
        return factor.dense  # [V, dh], built when the kernel reaches the pair
    if not isinstance(factor, _Fixed):
        return factor
    key = (factor.side.fixed_name, factor.layer, options.precision, options.device, options.engine)
    packed = factors.held("packed", key, dict)
    if factor.head not in packed:
        packed[factor.head] = prepare_right(factor.side.fixed(factors, factor.layer)[factor.head],
                                            options.precision, options.device, options.engine)
    return packed[factor.head]


__all__ = ["GroupHeadUnit", "GroupUnit", "ReferenceUnit", "WorkUnit", "compute_unit", "scan_pairs", "unit_factors",
           "work_units"]
