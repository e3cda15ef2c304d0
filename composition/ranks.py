"""Diagonal midranks of a factored token matrix, exact, without holding it (METHODS §4).

For ``S = left @ right.T`` and each evaluated row ``t``:

    r_t = #{j != t : S[t, j] > S[t, t]} + 1/2 #{j != t : S[t, j] = S[t, t]}

(0 = top), decided in float64. The fast pass runs in float32 on row-normalised factors;
every entry that float32 cannot order against the diagonal with certainty is recomputed
in float64 and compared there, so the result equals the float64 midranks.

Error bound (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed., §3.1).
Scale row ``t`` of ``left`` to unit norm and ``right`` by its largest row norm; both are
positive per-row scales of ``S``, which leave every row rank unchanged. Now ``|q| = 1`` and
``|k_j| <= 1``. Rounding the factors to float32 perturbs each product ``q_i k_i`` by at most
``(2u + u^2)|q_i k_i|`` and an ``r``-term float32 dot product, in any summation order and
with or without fused multiply-add, adds at most ``gamma_r = r u / (1 - r u)`` times
``sum |q_i k_i|``; by Cauchy-Schwarz ``sum |q_i k_i| <= |q||k_j| <= 1``. Hence every
computed entry is within ``e = (r + 4) u`` (``u = 2^-24``, for ``r u < 0.01``) of the exact
product of the scaled float64 factors, and two entries whose computed values differ by
more than ``2e`` are ordered the same in exact arithmetic. The band ``|S~[t,j] - S~[t,t]| <= 2e``
(plus a tiny absolute term for float32 underflow) is rechecked in float64. The diagonal
value is taken from the same computed row as the entries it is compared with.
"""

from __future__ import annotations

import torch

_U32 = 2.0**-24
_UNDERFLOW = 2.0**-100  # far above float32's subnormal spacing times any r used here


def float32_band(rank_dim: int) -> float:
    """Half-width ``2e`` of the float32 uncertainty band on unit-scaled factors."""
    if rank_dim * _U32 >= 0.01:
        raise ValueError(f"factor width {rank_dim} is too large for the float32 bound")
    return 2.0 * (rank_dim + 4) * _U32 + _UNDERFLOW


def diagonal_midranks(left: torch.Tensor, right: torch.Tensor, rows: torch.Tensor | None = None,
                      block_rows: int = 256) -> torch.Tensor:
    """Midrank of ``S[t, t]`` within row ``t`` of ``S = left @ right.T`` for each ``t`` in ``rows``.

    # left [V, r] float64, right [V, r] float64, rows [m] int64 (default all) -> [m] float64
    """
    V, r = right.shape
    left = left.double()
    right = right.double()
    rows = torch.arange(V) if rows is None else torch.as_tensor(rows, dtype=torch.long)
    tol = float32_band(r)
    lnorm = left.norm(dim=1)  # [V]
    lscale = torch.where(lnorm > 0, 1.0 / lnorm, torch.ones_like(lnorm))
    rmax = right.norm(dim=1).max()
    R32 = (right / rmax if rmax > 0 else right).float()  # [V, r]
    out = torch.empty(rows.shape[0], dtype=torch.float64)
    for start in range(0, rows.shape[0], block_rows):
        idx = rows[start:start + block_rows]  # [B]
        L32 = (left[idx] * lscale[idx, None]).float()  # [B, r]
        S = L32 @ R32.T  # [B, V]
        diag = S.gather(1, idx[:, None])  # [B, 1] from the same computed rows
        above = (S > diag + tol).sum(1)  # [B] certainly greater
        band = (S >= diag - tol).sum(1) - above - 1  # [B] uncertain, self excluded
        ranks = above.double()
        if bool((band > 0).any()):
            ranks += _recheck(S, diag, tol, idx, left, right)
        out[start:start + idx.shape[0]] = ranks
    return out


def _recheck(S, diag, tol, idx, left, right) -> torch.Tensor:
    """Midrank contribution of the uncertain band, decided in float64. # -> [B] float64"""
    B = idx.shape[0]
    mask = (S >= diag - tol) & (S <= diag + tol)  # [B, V]
    mask[torch.arange(B), idx] = False
    bi, cols = mask.nonzero(as_tuple=True)  # [M]
    values = exact_dot(left[torch.cat([idx[bi], idx])], right[torch.cat([cols, idx])])  # [M + B]
    entry, own = values[: bi.shape[0]], values[bi.shape[0]:]
    d = own[bi]
    contrib = (entry > d).double() + 0.5 * (entry == d).double()
    return torch.zeros(B, dtype=torch.float64).index_add_(0, bi, contrib)


def exact_dot(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """Row-wise float64 dot products in one fixed summation order. # a, b [M, r] -> [M]

    Identical inputs give identical outputs wherever they sit, so duplicate tokens tie exactly.
    """
    prod = a * b  # [M, r]
    acc = prod[:, 0].clone()
    for i in range(1, prod.shape[1]):
        acc += prod[:, i]
    return acc

