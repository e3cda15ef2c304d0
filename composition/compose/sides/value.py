"""The value side (docs/methods.md §3b): the responder moves the write on through its own OV circuit.

``F[t, u] = o_U(t) Lin(N_lR) W_V^R W_O^R Lin(N_f) W_U[:, u]``, a virtual head (Elhage et al.
2021, "A Mathematical Framework for Transformer Circuits", §"Virtual Attention Heads"), read at
the logits. Row orientation only (scale-free); no positions in it, so rotary offsets do not apply.
"""

from __future__ import annotations

from .. import factors as fx
from ._side import Side, Words


class Value(Side):
    name, part, title = "value", "full", "value side"
    orientations = ("row",)
    fixed_name = "readouts"
    words = Words("copies through", "suppresses", "neutral",
                  "+1 copies through: the responder, moving the writer's write of a token on through its own OV "
                  "circuit, raises that token's logit above the others; -1 suppresses: lowers it.")
    prediction_note = ("value-side labels do not feed the compensation prediction, which needs the responder's "
                       "query response and the heads' own OV labels (docs/methods.md §6); they rank candidates for "
                       "virtual-head pairs.")

    def fixed(self, cache, layer):  # -> [H, V, dh] (W_O^R Lin(N_f) W_U)^T
        return cache.readouts(layer)

    def middles(self, cache, writer, layer):  # -> [H, dh, dh]
        return fx.value_middles(cache.w, *writer, layer)


SIDES = [Value()]
