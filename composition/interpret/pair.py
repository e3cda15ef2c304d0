"""One pair in depth: every token's diagonal rank, the percentile histogram, the tokens
ranked highest and lowest, and where chosen tokens sit (docs/methods.md §3-§4), on any side.

The ranks come from the same factors (the side registry, ``composition.compose.sides``) and
the same exact kernel as the scan, so the statistics printed here equal the scan file's for
the same options.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

import numpy as np

from ..compose import sides
from ..compose.sides import Side, SideFactors
from ..errors import CompositionError
from ..extract.rotary import offsets_rotation
from ..extract.tables import TableOptions, token_table
from ..extract.vocabulary import Vocabulary
from ..extract.weights import Weights
from ..score.ranks import diagonal_midranks
from ..score.stats import DEFAULT_K, PairStats, summarise
from .heads import eigen_copying_score, ov_factors

Head = tuple[int, int]


@dataclass
class HeadWrite:
    """A head's own write (docs/methods.md §5), unlabelled: labels need the whole model's heads."""

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
    side: Side = sides.get("query")

    @property
    def percentiles(self) -> np.ndarray:
        """``1 - rank / (n - 1)``, 1 = top. # [V]"""
        return 1.0 - self.ranks / (self.n_keys - 1)

    def text(self, token_id: int) -> str:
        return self.vocabulary.text(token_id) if self.vocabulary else f"#{token_id}"

    def extremes(self, n: int = 15, which: str = "highest") -> list[dict]:
        """The ``n`` tokens whose diagonal ranks highest (or lowest); among equal ranks, the lowest ids first."""
        order = np.lexsort((np.arange(self.ranks.shape[0]), self.ranks if which == "highest" else -self.ranks))
        return [self.row(int(t)) for t in order[:n]]

    def ties(self, which: str = "highest") -> int:
        """How many tokens share the most extreme rank at that end (1 when none tie)."""
        extreme = self.ranks.min() if which == "highest" else self.ranks.max()
        return int((self.ranks == extreme).sum())

    def row(self, token_id: int) -> dict:
        return {"token": token_id, "text": self.text(token_id), "rank": float(self.ranks[token_id]),
                "percentile": float(self.percentiles[token_id])}

    def table(self) -> dict[str, np.ndarray]:
        """Every token's rank and percentile, one 1-D array per column. # -> {column: [V]}"""
        ids = np.arange(self.ranks.shape[0])
        return {"token": ids, "text": np.array([self.text(int(t)) for t in ids]), "rank": self.ranks,
                "percentile": self.percentiles}


def uncased(vocabulary: Vocabulary) -> bool:
    """True when the vocabulary's word pieces are lower case (an uncased tokenizer lowercases its input).

    Pieces in brackets or angle brackets (``[CLS]``, ``<s>``) are special tokens and do not count.
    """
    words = [p for p in vocabulary.pieces if p and p.isalpha() and not p.startswith(("[", "<"))]
    return bool(words) and sum(p != p.lower() for p in words) <= 0.001 * len(words)


def resolve_tokens(items: list[str], vocabulary: Vocabulary | None, size: int) -> list[int]:
    """Token ids for ``--tokens`` items: a vocabulary piece or its text first (lower-cased for an
    uncased vocabulary), else an integer id; an unknown item is refused with near matches."""
    out = []
    lower = vocabulary is not None and uncased(vocabulary)
    for item in items:
        found = vocabulary.lookup(item) if vocabulary else None
        if found is None and lower:
            found = vocabulary.lookup(item.lower())
        if found is None:
            try:
                found = int(item)
            except ValueError:
                raise CompositionError(_not_found(item, vocabulary)) from None
            if not 0 <= found < size:
                raise CompositionError(f"--tokens id {found} is outside the vocabulary of {size} tokens.")
        out.append(found)
    return out


def _not_found(item: str, vocabulary: Vocabulary | None) -> str:
    if vocabulary is None:
        return f"--tokens item {item!r} is not a token of the checkpoint (it has no tokenizer.json; give ids)."
    texts = sorted({vocabulary.text(i) for i, p in enumerate(vocabulary.pieces) if p is not None})
    near = difflib.get_close_matches(item, texts, n=3, cutoff=0.6)
    hint = f"; near matches: {', '.join(repr(t) for t in near)}" if near else ""
    return f"--tokens item {item!r} is not a token of the vocabulary of {vocabulary.source}{hint}."


def _head_write(w: Weights, table, head: Head, ks) -> HeadWrite:
    """The head's OV token matrix (docs/methods.md §5): diagonal ranks and eigenvalue copying score."""
    layer, h = head
    A, B = (f[h] for f in ov_factors(w, table, layer))  # [V, dh], [V_out, dh]
    n = min(A.shape[0], B.shape[0])
    ranks = diagonal_midranks(A[:n], B, rows=np.arange(n)).numpy()  # [n]
    s = summarise(ranks, B.shape[0], ks)
    return HeadWrite(s.mean_percentile, s.p_value, eigen_copying_score(A[:n], B[:n]))


def pair_detail(w: Weights, writer: Head, responder: Head, options: TableOptions = TableOptions(),
                orientation: str = "row", ks=DEFAULT_K, vocabulary: Vocabulary | None = None,
                side: str = "query", query_part: str = "full",
                rotary_offsets: tuple[int, int] | None = None) -> PairDetail:
    """Rank every token of one (writer, responder) pair on one side, with both heads' own writes."""
    chosen = sides.get(side, query_part, orientation)
    for name, (layer, head) in (("writer", writer), ("responder", responder)):
        if not (0 <= layer < w.n_layers and 0 <= head < w.n_heads):
            raise CompositionError(f"{name} {layer}.{head} is not a head of this model "
                                   f"(layers 0-{w.n_layers - 1}, heads 0-{w.n_heads - 1}).")
    if responder[0] <= writer[0]:
        raise CompositionError(f"responder {responder[0]}.{responder[1]} must be in a later layer than "
                               f"writer {writer[0]}.{writer[1]}.")
    T = token_table(w, options)  # [V, d]
    cache = SideFactors(w, T, offsets_rotation(w, rotary_offsets))
    left, right = chosen.pair_factors(cache, writer, responder, orientation)  # [V, dh], [V, dh]
    ranks = diagonal_midranks(left, right).numpy()  # [V]
    return PairDetail(writer, responder, ranks, w.vocab_size, summarise(ranks, w.vocab_size, ks),
                      _head_write(w, T, writer, ks), _head_write(w, T, responder, ks), vocabulary, chosen)


def check_scan(scan, detail: PairDetail) -> None:
    """A scan file given to ``pair --scan`` must be of the side and part asked for (that it is of
    this model is checked before any computation, by ``composition.store.scanfile.check_matches``)."""
    found = sides.for_scan(scan.attrs)
    if found is not detail.side:
        raise CompositionError(f"{scan.path} is a scan of the {found.title}, not of the {detail.side.title}; give "
                               f"--side {found.name}" + (f" --query-part {found.part}" if found.part != "full" else "")
                               + " to compare this pair with it.")
