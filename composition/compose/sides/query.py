"""The query side and its mediation parts (docs/methods.md §3, §3b, §6).

``S[t, j] = o_U(t) Lin(N_lR) W_Q^R [M] . N_lR(T[j]) W_K^R``: the writer's write becomes the
responder's query and meets every token's key. Parts: the write replaced by its projection on
the written token's unembedding direction (``unembed``) or by the rest (``rest``).
"""

from __future__ import annotations

from .. import factors as fx
from ._side import Side, Words

RESPONSE = Words("attention-raising", "attention-lowering", "neutral",
                 "+1 attention-raising: writing the token makes the responder attend to that token more than to "
                 "other tokens; -1 attention-lowering: less.")


class Query(Side):
    name, part, title = "query", "full", "query side"
    words = RESPONSE
    fixed_name = "keys"
    feeds_prediction = True
    prediction_note = ("query-side labels of the full write are the responder's response s_QK of the "
                       "compensation prediction (docs/methods.md §6), with the writer's and the responder's own OV labels.")

    def fixed(self, cache, layer):  # -> [H, V, dh] responder keys
        return cache.keys(layer)

    def middles(self, cache, writer, layer):  # -> [H, dh, dh]
        return fx.query_middles(cache.w, *writer, layer, rotation=cache.rotation)


class QueryPart(Query):
    """One mediation part of the query side's write; its labels feed no prediction."""

    feeds_prediction = False

    def __init__(self, part: str, direction: str):
        self.part, self.title = part, f"query side, {part} part of the write"
        self.words = Words(RESPONSE.raising, RESPONSE.lowering, RESPONSE.neutral,
                           f"the query side's words, for the write's {direction} alone: read them as mediation of "
                           "a pair labelled on the full write, beside the fraction of the write this part carries.")
        self.prediction_note = (f"labels of the query side's {part} part do not feed the compensation prediction, which needs "
                                "the full write (docs/methods.md §6); they say through which direction a full-write "
                                "label arises.")

    def written(self, cache, writer, layer):
        (lU, hU) = writer
        full = super().written(cache, writer, layer)
        alpha, Uq = cache.alpha(writer), cache.unembed_queries(lU, layer)  # [V], [H, V, dh]

        def part(hR):
            projected = lambda: alpha[:, None] * Uq[hR]  # noqa: E731  [V, dh] the unembed part
            if self.part == "unembed":
                return projected
            return lambda: full(hR).dense() - projected()  # [V, dh] the rest
        return part

    def write_fraction(self, cache, writer):
        return cache.write_fraction(writer, self.part)


SIDES = [Query(),
         QueryPart("unembed", "projection on the written token's unembedding direction"),
         QueryPart("rest", "remainder after the projection on the written token's unembedding direction")]
