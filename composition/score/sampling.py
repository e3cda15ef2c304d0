"""Which rows a scan evaluates: all of them, a fixed uniform sample, or sequential batches.

* exact (default): every row; intervals have zero width.
* ``--rows N``: the first ``N`` rows of one seeded permutation of the vocabulary
  (``numpy.random.default_rng(seed).permutation(V)``), i.e. a uniform sample without
  replacement, the same rows for every pair of the scan.
* ``--until-ci W``: the same permutation, read in looks of ``first``, ``2 first``,
  ``4 first``, ... rows (at most ``N`` with ``--rows``, else ``V``). A pair stops at the first
  look where every top-k and bottom-k share's interval is narrower than ``W`` or its label is
  decided: the mean percentile's interval lies wholly above ``1/2 + min_effect`` (raising),
  wholly below ``1/2 - min_effect`` (lowering), or wholly between them (neutral). Every
  interval and p-value is computed at level ``alpha / J`` for the ``J`` looks of the schedule
  (Bonferroni), so the reported 95 % intervals and the Benjamini-Hochberg labels stay valid
  whichever look a pair stopped at.

The statistics themselves (intervals, tests) are in :mod:`composition.score.stats`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import CompositionError
from .ranks import midranks_batch
from .stats import PairStats, summarise_many

DEFAULT_FIRST_ROWS = 256
ALPHA = 0.05


@dataclass(frozen=True)
class Sampling:
    rows: int | None = None  # fixed sample size (cap for until_ci); None: all rows
    seed: int = 0
    until_ci: float | None = None  # target interval width
    first: int = DEFAULT_FIRST_ROWS  # rows in the first look of a sequential scan

    def validate(self) -> None:
        if self.rows is not None and self.rows < 2:
            raise CompositionError("--rows must be at least 2.")
        if self.until_ci is not None and not 0 < self.until_ci < 1:
            raise CompositionError("--until-ci must lie strictly between 0 and 1 (an interval width).")
        if self.first < 2:
            raise CompositionError("--first-rows must be at least 2.")

    @property
    def sampled(self) -> bool:
        return self.rows is not None or self.until_ci is not None

    def order(self, V: int) -> np.ndarray:
        """The row order every pair reads. # -> [V] int64"""
        if not self.sampled:
            return np.arange(V, dtype=np.int64)
        return np.random.default_rng(self.seed).permutation(V).astype(np.int64)

    def schedule(self, V: int) -> list[int]:
        """Cumulative rows evaluated at each look."""
        cap = V if self.rows is None else min(self.rows, V)
        if self.until_ci is None:
            return [cap]
        looks, n = [], min(self.first, cap)
        while True:
            looks.append(n)
            if n >= cap:
                return looks
            n = min(cap, 2 * n)


def evaluate_pairs(lefts, rights, V: int, ks, sampling: Sampling, min_effect: float, precision: str = "fp32",
                   device: str = "cpu", engine: str = "auto", block_rows: int = 256) -> list[PairStats]:
    """Statistics of several factor pairs (one work unit) under a sampling design.

    # lefts, rights: lists of [V, r] float64 (rights may be PreparedRight) -> list of PairStats
    """
    order = sampling.order(V)
    looks = sampling.schedule(V)
    J = len(looks)
    kw = dict(block_rows=block_rows, precision=precision, device=device, engine=engine)
    ranks = [np.zeros(0) for _ in lefts]
    result: list[PairStats | None] = [None] * len(lefts)
    active = list(range(len(lefts)))
    done_rows = 0
    for n in looks:
        rows = order[done_rows:n]
        got = midranks_batch([lefts[i] for i in active], [rights[i] for i in active], rows, **kw)
        still = []
        for i, r in zip(active, got):
            ranks[i] = np.concatenate([ranks[i], r.numpy()])
        stats = summarise_many([ranks[i] for i in active], V, ks, population=V, alpha=ALPHA, looks=J)
        for i, st in zip(active, stats):
            result[i] = st
            if sampling.until_ci is not None and n < looks[-1] and not _finished(st, sampling.until_ci, min_effect):
                still.append(i)
        active, done_rows = still, n
        if not active:
            break
    return result  # type: ignore[return-value]


def _finished(st: PairStats, width: float, min_effect: float) -> bool:
    """Every share's interval narrower than ``width``, or the label decided."""
    narrow = bool(np.all(st.ci_high - st.ci_low < width) and np.all(st.bottom_ci_high - st.bottom_ci_low < width))
    lo, hi = st.mean_ci_low, st.mean_ci_high
    decided = lo >= 0.5 + min_effect or hi <= 0.5 - min_effect or (min_effect > 0 and lo > 0.5 - min_effect
                                                                  and hi < 0.5 + min_effect)
    return narrow or decided


def expected_rows(V: int, sampling: Sampling, min_effect: float, ks) -> tuple[int, int]:
    """Rows per pair a sequential scan reads for a pair with no effect (mean percentile 1/2,
    null shares ``k/V``), and at most. # -> (typical, most)"""
    looks = sampling.schedule(V)
    if sampling.until_ci is None:
        return looks[-1], looks[-1]
    J = len(looks)
    from .stats import mean_percentile_halfwidth, share_intervals

    for n in looks:
        eps = mean_percentile_halfwidth(n, V, ALPHA / J)
        decided = min_effect > 0 and eps < min_effect
        counts = np.rint(np.asarray(ks) / V * n).astype(np.int64)
        lo, hi = share_intervals(counts, n, V, ALPHA / J)
        if decided or bool(np.all(hi - lo < sampling.until_ci)):
            return n, looks[-1]
    return looks[-1], looks[-1]
