"""Factors kept between work units: each is built once per layer (or per writer) and kept
until the next unit asks for another layer, so consecutive units of a scan share them.

Memory: a scan that names its heads (``heads=``) keeps, of each per-layer float64 factor
``[V, dh]`` per head, only the heads it scans (a writer head's values, the responder heads'
keys or queries): GPT-2 small, 24.5 MiB a head against 294 MiB a layer. The heads are still
computed with the whole layer's product, so their values are the same bits either way.
"""

from __future__ import annotations

from typing import Callable, Iterable

import torch

from .. import factors as fx
from ...extract.weights import Weights
from ...memory import return_freed

Head = tuple[int, int]


class SideFactors:
    """The token table, the rotary matrix and every factor a side asks for, built on demand.

    ``rotation`` ``[dh, dh]`` or None: the (averaged) rotary matrix folded into every side that
    scores a query against a key. ``heads``: the ``(layer, head)`` labels the scan will ask for
    (writers and responders); per-layer factors then hold those heads only, as a mapping
    head -> ``[V, dh]`` (None: every head, as one ``[H, V, dh]`` tensor).
    """

    def __init__(self, w: Weights, table: torch.Tensor, rotation: torch.Tensor | None = None,
                 heads: Iterable[Head] | None = None):
        self.w, self.table, self.rotation = w, table, rotation  # table [V, d]
        self._held: dict[str, tuple[object, object]] = {}
        self._heads: dict[int, tuple[int, ...]] | None = None
        if heads is not None:
            by_layer: dict[int, set[int]] = {}
            for layer, head in heads:
                by_layer.setdefault(int(layer), set()).add(int(head))
            self._heads = {layer: tuple(sorted(hs)) for layer, hs in by_layer.items()}

    def _per_head(self, layer: int, build: Callable[[object], torch.Tensor]):
        """A per-layer factor of the scanned heads of ``layer``: ``build(heads)`` -> ``[n, V, dh]``.

        # -> [H, V, dh] (no selection) or {head: [V, dh]}"""
        if self._heads is None or len(self._heads.get(layer, ())) == self.w.n_heads:
            return build(None)
        heads = self._heads.get(layer, ())
        if not heads:  # a layer the selection does not name: every head
            return build(None)
        factor = build(heads)  # [n, V, dh]
        return {h: factor[j] for j, h in enumerate(heads)}

    def held(self, name: str, key, build: Callable[[], object]):
        """One factor per name, kept until its key (a layer, a writer head) changes."""
        if name not in self._held or self._held[name][0] != key:
            self._held.pop(name, None)  # the old factor goes before the new one is built
            self._held[name] = (key, build())
            return_freed()  # the build's temporaries go back to the system
        return self._held[name][1]

    def values(self, layer: int):  # -> [H, V, dh] or {head: [V, dh]}  A_U = N_l(T) W_V
        return self.held("values", layer, lambda: self._per_head(
            layer, lambda hs: fx.writer_values(self.w, self.table, layer, hs)))

    def keys(self, layer: int):  # -> [H, V, dh] or {head: [V, dh]}  K_R = N_l(T) W_K
        return self.held("keys", layer, lambda: self._per_head(
            layer, lambda hs: fx.responder_keys(self.w, self.table, layer, hs)))

    def queries(self, layer: int):  # -> [H, V, dh] or {head: [V, dh]}  full token-table queries (key side)
        return self.held("queries", layer, lambda: self._per_head(
            layer, lambda hs: fx.responder_queries(self.w, self.table, layer, hs)))

    def readouts(self, layer: int) -> torch.Tensor:  # -> [H, V, dh]  (W_O Lin(N_f) W_U)^T (value side)
        return self.held("readouts", layer, lambda: fx.responder_readouts(self.w, layer))

    def directions(self, writer_layer: int) -> torch.Tensor:  # -> [V, d]  unit unembedding directions
        return self.held("directions", writer_layer, lambda: fx.unembed_directions(self.w, writer_layer))

    def unembed_queries(self, writer_layer: int, layer: int) -> torch.Tensor:  # -> [H, V, dh]
        return self.held("unembed_queries", (writer_layer, layer), lambda: fx.unembed_queries(
            self.w, self.directions(writer_layer), writer_layer, layer, rotation=self.rotation))

    def alpha(self, writer: Head) -> torch.Tensor:  # -> [V]  o_U(t) . u_t
        (lU, hU) = writer
        return self.held("alpha", writer, lambda: fx.unembed_coefficients(
            self.values(lU)[hU], self.w.layers[lU].attn.W_O[hU], self.directions(lU)))

    def write_fraction(self, writer: Head, part: str) -> float:
        """Fraction of the writer's squared write carried by ``part`` (docs/methods.md §3b)."""
        (lU, hU) = writer
        return self.held(f"fraction-{part}", writer, lambda: fx.write_fraction(
            self.values(lU)[hU], self.w.layers[lU].attn.W_O[hU], part, self.alpha(writer)))
