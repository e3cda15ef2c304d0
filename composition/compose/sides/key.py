"""The key side (docs/methods.md §3b): the write becomes the key of the position it was written to.

``S[j, t] = (N_lR(T[j]) W_Q^R + b_Q^R) . o_U(t) Lin(N_lR) W_K^R [M^T]``: rows are query tokens
``j``, columns written tokens ``t``; a high diagonal means a query for ``j`` picks out the
position where the writer wrote ``j`` (the induction pattern; Olsson et al. 2022, "In-context
Learning and Induction Heads").
"""

from __future__ import annotations

from .. import factors as fx
from ._side import Side, Words


class Key(Side):
    name, part, title = "key", "full", "key side"
    written_rows = False
    rows_are = "query tokens"
    fixed_name = "queries"
    words = Words("draws its query", "repels its query", "neutral",
                  "+1 draws its query: a query for a token attends more to the position where the writer wrote "
                  "that token than to positions holding other written tokens; -1 repels its query: less.")
    prediction_note = ("key-side labels do not feed the compensation prediction, which needs the responder's "
                       "query response to the written token (docs/methods.md §6); they rank candidates for "
                       "induction-like pairs.")

    def fixed(self, cache, layer):  # -> [H, V, dh] full token-table queries
        return cache.queries(layer)

    def middles(self, cache, writer, layer):  # -> [H, dh, dh]
        return fx.key_middles(cache.w, *writer, layer, rotation=cache.rotation)


SIDES = [Key()]
