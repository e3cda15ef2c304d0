"""What every side of the registry declares (docs/methods.md §3, §3b, §6): one ``Side`` object per
side and query part.

A side builds, for one (writer, responder) pair, the two factors of its token matrix in row
orientation: the **written** factor (one row per written token: a ``Product(A, middle)`` that is
evaluated row by row, or a zero-argument function giving ``[V, dh]``) and the **fixed** factor (the
responder's per-layer ``[V, dh]`` factor, built once per responder layer). ``written_rows`` says
which of the two indexes the rows of the token matrix; column orientation swaps them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import torch

from ...errors import CompositionError

ORIENTATIONS = ("row", "column")


@dataclass(frozen=True)
class Product:
    """``A @ middle`` kept as its two factors, so that only the rows a scan evaluates are built.

    # A [V, dh], middle [dh, dh]
    """

    A: torch.Tensor
    middle: torch.Tensor

    def dense(self) -> torch.Tensor:  # -> [V, dh]
        return self.A @ self.middle


Written = Product | Callable[[], torch.Tensor]


def dense(factor) -> torch.Tensor:
    """A factor as a plain ``[V, dh]`` tensor (for the drill-down and the dense tests)."""
    if isinstance(factor, Product):
        return factor.dense()
    return factor() if callable(factor) else factor


@dataclass(frozen=True)
class Words:
    """The words of a side's labels (+1, -1, 0) and what they mean, in one sentence."""

    raising: str
    lowering: str
    neutral: str
    meaning: str

    def __getitem__(self, label: int) -> str:
        return {1: self.raising, -1: self.lowering, 0: self.neutral}.get(int(label), "not computed")


class Side:
    """One side (or query part) of the registry. Subclasses set the class attributes and
    implement ``fixed`` and ``middles`` (or ``written``)."""

    name: str = ""  # --side
    part: str = "full"  # --query-part
    orientations: tuple[str, ...] = ORIENTATIONS
    written_rows: bool = True  # row orientation: rows are written tokens (False: query tokens)
    rows_are: str = "written tokens"
    words: Words
    title: str = ""  # "query side", "query side, unembed part of the write"
    feeds_prediction: bool = False  # do its labels give s_QK of docs/methods.md §6?
    prediction_note: str = ""  # one sentence: whether and how its labels enter the prediction
    fixed_name: str = ""  # what the per-layer factor is called (for caches and plan)

    def validate(self, orientation: str) -> None:
        """One sentence when the orientation is not offered by this side."""
        if orientation not in self.orientations:
            raise CompositionError(f"--side {self.name} ranks within {' or '.join(self.orientations)}s only; "
                                   f"--orientation {orientation} is not available for it.")

    def fixed(self, cache, layer: int) -> torch.Tensor:
        """The responder layer's per-layer factor for every head. # -> [H, V, dh]"""
        raise NotImplementedError

    def middles(self, cache, writer: tuple[int, int], layer: int) -> torch.Tensor:
        """The per-pair ``[dh, dh]`` middle of every responder head of ``layer``. # -> [H, dh, dh]"""
        raise NotImplementedError

    def written(self, cache, writer: tuple[int, int], layer: int) -> Callable[[int], Written]:
        """For one writer and responder layer: responder head -> the written factor ``A_U @ middle``."""
        (lU, hU) = writer
        A = cache.values(lU)[hU]  # [V, dh]
        middles = self.middles(cache, writer, layer)  # [H, dh, dh]
        return lambda hR: Product(A, middles[hR])

    def write_fraction(self, cache, writer: tuple[int, int]) -> float:
        """Fraction of the writer's squared write this side reads (docs/methods.md §3b); 1 for a whole write."""
        return 1.0

    def oriented(self, written, fixed, orientation: str) -> tuple:
        """``(left, right)`` of the ranks kernel: rows are the left factor's rows."""
        row_pair = (written, fixed) if self.written_rows else (fixed, written)
        return row_pair if orientation == "row" else row_pair[::-1]

    def pair_factors(self, cache, writer, responder, orientation: str = "row") -> tuple[torch.Tensor, torch.Tensor]:
        """Dense ``(left, right)`` of one pair. # -> [V, dh], [V, dh]"""
        self.validate(orientation)
        (lR, hR) = responder
        left, right = self.oriented(self.written(cache, writer, lR)(hR), self.fixed(cache, lR)[hR], orientation)
        return dense(left), dense(right)
