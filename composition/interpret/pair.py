"""One pair in depth: every token's diagonal rank, the percentile histogram, the tokens
ranked highest and lowest, and where chosen tokens sit (METHODS §3-§4).

The ranks come from the same factors and the same exact kernel as the scan, so the
statistics printed here equal the scan file's for the same options.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import CompositionError
from ..compose.factors import input_norm, query_middles, query_side, responder_keys, writer_values
from .heads import eigen_copying_score
from ..score.ranks import diagonal_midranks
from ..score.stats import DEFAULT_K, PairStats, summarise
from ..extract.tables import TableOptions, apply_norm, norm_linear_part, token_table
from ..extract.weights import Weights
from ..extract.vocabulary import Vocabulary

Head = tuple[int, int]


@dataclass
class HeadWrite:
    """A head's own write (METHODS §5), unlabelled: labels need the whole model's heads."""

    mean_percentile: float
    p_value: float  # uncorrected, this head alone
    copying_score: float


@dataclass
class PairDetail:
    writer: Head
    responder: Head
    ranks: np.ndarray  # [V] midrank of the diagonal, 0 = top
    n_keys: int
    stats: PairStats
    writer_write: HeadWrite
    responder_write: HeadWrite
    vocabulary: Vocabulary | None

    @property
    def percentiles(self) -> np.ndarray:
        """``1 - rank / (n - 1)``, 1 = top. # [V]"""
        return 1.0 - self.ranks / (self.n_keys - 1)

    def text(self, token_id: int) -> str:
        return self.vocabulary.text(token_id) if self.vocabulary else f"#{token_id}"

    def extremes(self, n: int = 15, which: str = "highest") -> list[dict]:
        """The ``n`` tokens whose diagonal ranks highest (or lowest), ties by token id."""
        order = np.lexsort((np.arange(self.ranks.shape[0]), self.ranks if which == "highest" else -self.ranks))
        return [self.row(int(t)) for t in order[:n]]

    def row(self, token_id: int) -> dict:
        return {"token": token_id, "text": self.text(token_id), "rank": float(self.ranks[token_id]),
                "percentile": float(self.percentiles[token_id])}

    def table(self) -> dict[str, np.ndarray]:
        """Every token's rank and percentile, one 1-D array per column. # -> {column: [V]}"""
        ids = np.arange(self.ranks.shape[0])
        return {"token": ids, "text": np.array([self.text(int(t)) for t in ids]), "rank": self.ranks,
                "percentile": self.percentiles}


def resolve_tokens(items: list[str], vocabulary: Vocabulary | None, size: int) -> list[int]:
    """Token ids for ``--tokens`` items: a vocabulary piece or its text first, else an integer id."""
    out = []
    for item in items:
        found = vocabulary.lookup(item) if vocabulary else None
        if found is None:
            try:
                found = int(item)
            except ValueError:
                where = f"the vocabulary of {vocabulary.source}" if vocabulary else "the checkpoint (it has no tokenizer.json; give ids)"
                raise CompositionError(f"--tokens item {item!r} is not a token of {where}.") from None
            if not 0 <= found < size:
                raise CompositionError(f"--tokens id {found} is outside the vocabulary of {size} tokens.")
        out.append(found)
    return out


def _head_write(w: Weights, table, head: Head, ks) -> HeadWrite:
    layer, h = head
    A = apply_norm(input_norm(w, layer), table) @ w.layers[layer].attn.W_V[h].double()  # [V, dh]
    lin_f = norm_linear_part(w.final_norm, w.d_model)  # [d, d]
    B = (w.layers[layer].attn.W_O[h].double() @ lin_f @ w.W_U.double()).T.contiguous()  # [V_out, dh]
    n = min(A.shape[0], B.shape[0])
    ranks = diagonal_midranks(A[:n], B, rows=np.arange(n)).numpy()  # [n]
    s = summarise(ranks, B.shape[0], ks)
    return HeadWrite(s.mean_percentile, s.p_value, eigen_copying_score(A[:n], B[:n]))


def pair_detail(w: Weights, writer: Head, responder: Head, options: TableOptions = TableOptions(),
                orientation: str = "row", ks=DEFAULT_K, vocabulary: Vocabulary | None = None) -> PairDetail:
    """Rank every token of one (writer, responder) pair, with both heads' own writes."""
    for name, (layer, head) in (("writer", writer), ("responder", responder)):
        if not (0 <= layer < w.n_layers and 0 <= head < w.n_heads):
            raise CompositionError(f"{name} {layer}.{head} is not a head of this model "
                                   f"(layers 0-{w.n_layers - 1}, heads 0-{w.n_heads - 1}).")
    if responder[0] <= writer[0]:
        raise CompositionError(f"responder {responder[0]}.{responder[1]} must be in a later layer than "
                               f"writer {writer[0]}.{writer[1]}.")
    T = token_table(w, options)  # [V, d]
    A = writer_values(w, T, writer[0])[writer[1]]  # [V, dh]
    K = responder_keys(w, T, responder[0])[responder[1]]  # [V, dh]
    middle = query_middles(w, writer[0], writer[1], responder[0])[responder[1]]  # [dh, dh]
    left, right = query_side(A, middle, K, orientation)  # [V, dh], [V, dh]
    ranks = diagonal_midranks(left, right).numpy()  # [V]
    return PairDetail(writer, responder, ranks, w.vocab_size, summarise(ranks, w.vocab_size, ks),
                      _head_write(w, T, writer, ks), _head_write(w, T, responder, ks), vocabulary)


def parse_head(label: str, option: str) -> Head:
    """``"4.3"`` -> ``(4, 3)``."""
    parts = label.strip().split(".")
    if len(parts) != 2 or not all(p.isdigit() for p in parts):
        raise CompositionError(f"{option} {label!r} is not a head label of the form layer.head, e.g. 4.3.")
    return int(parts[0]), int(parts[1])
