"""From diagonal midranks to per-pair statistics and labels (METHODS §4).

Null model: when a row's entries are continuous and exchangeable, the diagonal's rank is
uniform on ``0 .. n-1``; the top-k share is then ``k/n`` and the percentile
``pi = 1 - r/(n-1)`` has mean 1/2 and variance ``(n+1) / (12 (n-1))`` (discrete uniform).
Ties (near-duplicate tokens) are handled by midranks; they shrink the variance, so the
test below stays conservative.

Labels need two things (both documented in the README):
* significance: a two-sided z-test of the mean percentile against 1/2, with the
  Benjamini-Hochberg false discovery rate controlled across all pairs of a scan
  (Benjamini & Hochberg 1995, via ``scipy.stats.false_discovery_control``);
* an effect size: ``|mean percentile - 1/2| >= min_effect``. With thousands of rows a mean
  percentile of 0.52 is significant and means nothing.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats as _st

DEFAULT_K = (1, 5, 10)
HIST_BINS = 20
DEFAULT_FDR = 0.01
DEFAULT_MIN_EFFECT = 0.15
LABEL_NOT_COMPUTED = -128  # fill value of the int8 label for pairs not in the scan


@dataclass(frozen=True)
class PairStats:
    top_share: np.ndarray  # [nk]
    bottom_share: np.ndarray  # [nk]
    mean_percentile: float
    histogram: np.ndarray  # [HIST_BINS] counts of percentiles
    rows: int
    p_value: float
    write_fraction: float = 1.0  # share of the writer's squared write in the scan's query part (METHODS §3b)


def summarise(ranks: np.ndarray, n: int, ks=DEFAULT_K) -> PairStats:
    """Statistics of one pair's diagonal midranks. # ranks [m] (0 = top), n keys per row"""
    ranks = np.asarray(ranks, dtype=np.float64)
    m = ranks.shape[0]
    ks = np.asarray(ks)
    top = (ranks[:, None] < ks[None, :]).mean(0)  # [nk]
    bottom = (ranks[:, None] > (n - 1 - ks)[None, :]).mean(0)  # [nk]
    pct = 1.0 - ranks / (n - 1)  # [m]
    hist, _ = np.histogram(pct, bins=HIST_BINS, range=(0.0, 1.0))
    mean = float(pct.mean())
    return PairStats(top, bottom, mean, hist.astype(np.int64), m, mean_percentile_p_value(mean, m, n))


def mean_percentile_p_value(mean: float, m: int, n: int) -> float:
    """Two-sided p-value of a mean percentile over ``m`` rows against the uniform null."""
    se = np.sqrt((n + 1) / (12.0 * (n - 1)) / m)
    return float(2.0 * _st.norm.sf(abs(mean - 0.5) / se))


def labels(mean_percentile: np.ndarray, p_values: np.ndarray, fdr: float = DEFAULT_FDR,
           min_effect: float = DEFAULT_MIN_EFFECT) -> tuple[np.ndarray, np.ndarray]:
    """+1 attention-raising, -1 attention-lowering, 0 neutral, for every computed pair.

    # mean_percentile [P], p_values [P] -> labels [P] int8, q_values [P]
    Benjamini-Hochberg over exactly the pairs given (the whole scan).
    """
    p = np.asarray(p_values, dtype=np.float64)
    if p.size == 0:
        return np.zeros(0, np.int8), np.zeros(0)
    q = _st.false_discovery_control(p, method="bh")
    effect = np.asarray(mean_percentile) - 0.5
    out = np.zeros(p.shape, np.int8)
    significant = q <= fdr
    out[significant & (effect >= min_effect)] = 1
    out[significant & (effect <= -min_effect)] = -1
    return out, q
