"""Work units: one writer head against the selected heads of one responder layer.

Both the driver (``composition.run.scan``) and the cluster workers (``composition.run.cluster``)
compute units through ``compute_unit``; neither imports the other for it. The side (query,
key, value, or a query part) comes from the registry ``composition.compose.sides``: it supplies
each pair's two factors, and this module packs them for the ranks kernel: a per-layer factor
on the right is packed once per layer; a written factor on the left is evaluated only on the
rows the scan reads.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

from ..compose import sides
from ..errors import CompositionError
from ..options import check_for_model, parse_heads
from ..compose.sides import Product, SideFactors
from ..extract.rotary import offsets_rotation
from ..extract.tables import TableOptions, token_table
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
    T = token_table(w, TableOptions(options.table, options.position))  # [V, d]
    return SideFactors(w, T, offsets_rotation(w, options.rotary_offsets))


def compute_unit(factors: SideFactors, unit: WorkUnit, options) -> dict:
    """Statistics of every pair of one work unit: ``{(writer, responder): PairStats}``."""
    side = sides.get(options.side, options.query_part)
    lR = unit.responder_layer
    written = side.written(factors, unit.writer, lR)
    lefts, rights = [], []
    for hR in unit.responder_heads:
        left, right = side.oriented(written(hR), _Fixed(side, lR, hR), options.orientation)
        lefts.append(_left(factors, left))
        rights.append(_right(factors, right, options))
    stats = evaluate_pairs(lefts, rights, factors.w.vocab_size, tuple(int(k) for k in options.k),
                           options.sampling(), options.min_effect, options.precision, options.device,
                           options.engine, options.block_rows)
    fraction = side.write_fraction(factors, unit.writer)
    return {(unit.writer, (lR, hR)): replace(st, write_fraction=fraction)
            for hR, st in zip(unit.responder_heads, stats)}


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


__all__ = ["WorkUnit", "compute_unit", "scan_pairs", "unit_factors", "work_units"]
