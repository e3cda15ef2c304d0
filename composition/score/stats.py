"""From diagonal midranks to per-pair statistics and labels (docs/methods.md §4).

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

Sampled rows (docs/methods.md §4). When only ``m`` of the ``N`` rows are evaluated (a uniform sample
without replacement), the number of sampled rows in the top k is hypergeometric. The 95 %
interval of a share is the exact hypergeometric interval for the population count,
found by inverting the two one-sided tests as Clopper & Pearson (1934) do for the binomial:
``K_low`` is the smallest count with ``P(X >= x | K) > alpha/2`` and ``K_high`` the largest
with ``P(X <= x | K) > alpha/2``. It is exact at every sample fraction (zero width when all
rows are evaluated) and tends to the Clopper-Pearson interval when ``m << N``. The interval
of the mean percentile (values in [0, 1]) is Serfling's (1974) bound for sampling without
replacement, ``eps = sqrt(log(2/alpha) (1 - (m-1)/N) / (2m))``. Both are conservative.
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
    # intervals (confidence ``1 - alpha``; equal to the value when every row was evaluated)
    ci_low: np.ndarray | None = None  # [nk] top-k share
    ci_high: np.ndarray | None = None  # [nk]
    bottom_ci_low: np.ndarray | None = None  # [nk] bottom-k share
    bottom_ci_high: np.ndarray | None = None  # [nk]
    mean_ci_low: float = float("nan")  # mean percentile
    mean_ci_high: float = float("nan")
    write_fraction: float = 1.0  # share of the writer's squared write in the scan's query part (docs/methods.md §3b)

    def datasets(self) -> dict:
        """Scan-file ``/pairs`` dataset name -> this pair's value."""
        out = {"top_share": self.top_share, "bottom_share": self.bottom_share,
               "mean_percentile": self.mean_percentile, "histogram": self.histogram,
               "rows_evaluated": self.rows, "p_value": self.p_value, "write_fraction": self.write_fraction}
        for name in ("ci_low", "ci_high", "bottom_ci_low", "bottom_ci_high", "mean_ci_low", "mean_ci_high"):
            value = getattr(self, name)
            if value is not None:
                out[name] = value
        return out


def summarise(ranks: np.ndarray, n: int, ks=DEFAULT_K, population: int | None = None, alpha: float = 0.05,
              looks: int = 1) -> PairStats:
    """Statistics of one pair's diagonal midranks, with intervals.

    # ranks [m] (0 = top), n keys per row; ``population`` rows the sample was drawn from
    (default ``n``: the sample is all rows when ``m == n``); ``looks``: how many times a
    sequential scan may have looked at this pair: intervals are at level ``alpha / looks``
    and the p-value is multiplied by ``looks`` (Bonferroni), so stopping at any look keeps
    them valid.
    """
    return summarise_many([ranks], n, ks, population, alpha, looks)[0]


def summarise_many(ranks_list, n: int, ks=DEFAULT_K, population: int | None = None, alpha: float = 0.05,
                   looks: int = 1) -> list[PairStats]:
    """:func:`summarise` for several pairs at once (one interval search for all of them)."""
    N = n if population is None else int(population)
    ks = np.asarray(ks)
    nk = ks.shape[0]
    a = alpha / looks
    parts, counts, sizes = [], [], []
    for ranks in ranks_list:
        ranks = np.asarray(ranks, dtype=np.float64)
        m = ranks.shape[0]
        top_count = (ranks[:, None] < ks[None, :]).sum(0)  # [nk]
        bottom_count = (ranks[:, None] > (n - 1 - ks)[None, :]).sum(0)  # [nk]
        pct = 1.0 - ranks / (n - 1)  # [m]
        hist, _ = np.histogram(pct, bins=HIST_BINS, range=(0.0, 1.0))
        parts.append((m, top_count, bottom_count, float(pct.mean()), hist.astype(np.int64)))
        counts.append(np.concatenate([top_count, bottom_count]))
        sizes.append(np.full(2 * nk, m))
    if not parts:
        return []
    lo, hi = share_intervals(np.concatenate(counts), np.concatenate(sizes), N, a)
    out = []
    for i, (m, top_count, bottom_count, mean, hist) in enumerate(parts):
        eps = mean_percentile_halfwidth(m, N, a)
        p = min(1.0, looks * mean_percentile_p_value(mean, m, n))
        l, h = lo[2 * nk * i:2 * nk * (i + 1)], hi[2 * nk * i:2 * nk * (i + 1)]
        out.append(PairStats(top_count / m, bottom_count / m, mean, hist, m, p, l[:nk], h[:nk], l[nk:], h[nk:],
                             max(0.0, mean - eps), min(1.0, mean + eps)))
    return out


def share_intervals(counts, m, N: int, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Exact hypergeometric ``1 - alpha`` intervals of population shares ``K/N`` from ``counts``
    successes among ``m`` rows drawn without replacement from ``N``.
    # counts [c], m scalar or [c] -> low, high [c]

    Inverts the two one-sided tests (Clopper-Pearson style) by bisection on the integer ``K``.
    """
    x = np.asarray(counts, dtype=np.int64)
    m = np.broadcast_to(np.asarray(m, dtype=np.int64), x.shape)
    if np.all(m >= N):
        share = x / N
        return share.astype(np.float64), share.astype(np.float64)
    lowest, highest = x.copy(), np.where(m >= N, x, x + (N - m))  # feasible population counts
    # K_low: smallest K with P(X >= x | K) > alpha/2 (increasing in K)
    lo_a, lo_b = lowest.copy(), highest.copy()
    while True:
        open_ = lo_a < lo_b
        if not open_.any():
            break
        mid = (lo_a + lo_b) // 2
        ok = _st.hypergeom.sf(x - 1, N, mid, m) > alpha / 2
        lo_b = np.where(open_ & ok, mid, lo_b)
        lo_a = np.where(open_ & ~ok, mid + 1, lo_a)
    # K_high: largest K with P(X <= x | K) > alpha/2 (decreasing in K)
    hi_a, hi_b = lowest.copy(), highest.copy()
    while True:
        open_ = hi_a < hi_b
        if not open_.any():
            break
        mid = (hi_a + hi_b + 1) // 2
        ok = _st.hypergeom.cdf(x, N, mid, m) > alpha / 2
        hi_a = np.where(open_ & ok, mid, hi_a)
        hi_b = np.where(open_ & ~ok, mid - 1, hi_b)
    return lo_a / N, hi_a / N


def mean_percentile_halfwidth(m: int, N: int, alpha: float = 0.05) -> float:
    """Half-width of Serfling's (1974) ``1 - alpha`` interval for a mean of values in [0, 1]
    from ``m`` of ``N`` rows drawn without replacement (0 when ``m >= N``)."""
    if m >= N:
        return 0.0
    return float(np.sqrt(np.log(2.0 / alpha) * (1.0 - (m - 1) / N) / (2.0 * m)))


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
