"""Factors kept between work units: each is built once per layer (or per writer) and kept
until the next unit asks for another layer, so consecutive units of a scan share them."""

from __future__ import annotations

from typing import Callable

import torch

from .. import factors as fx
from ...extract.weights import Weights

Head = tuple[int, int]


class SideFactors:
    """The token table, the rotary matrix and every factor a side asks for, built on demand.

    ``rotation`` ``[dh, dh]`` or None: the (averaged) rotary matrix folded into every side that
    scores a query against a key.
    """

    def __init__(self, w: Weights, table: torch.Tensor, rotation: torch.Tensor | None = None):
        self.w, self.table, self.rotation = w, table, rotation  # table [V, d]
        self._held: dict[str, tuple[object, object]] = {}

    def held(self, name: str, key, build: Callable[[], object]):
        """One factor per name, kept until its key (a layer, a writer head) changes."""
        if name not in self._held or self._held[name][0] != key:
            self._held[name] = (key, build())
        return self._held[name][1]

    def values(self, layer: int) -> torch.Tensor:  # -> [H, V, dh]  A_U = N_l(T) W_V
        return self.held("values", layer, lambda: fx.writer_values(self.w, self.table, layer))

    def keys(self, layer: int) -> torch.Tensor:  # -> [H, V, dh]  K_R = N_l(T) W_K
        return self.held("keys", layer, lambda: fx.responder_keys(self.w, self.table, layer))

    def queries(self, layer: int) -> torch.Tensor:  # -> [H, V, dh]  full token-table queries (key side)
        return self.held("queries", layer, lambda: fx.responder_queries(self.w, self.table, layer))

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
