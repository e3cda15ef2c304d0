"""The numerics of the split-bfloat16 (bf16x3) pass, tested on any machine by emulation.

The AMX tile code runs only where the processor has AMX; its arithmetic does not depend on
it. Here the split (x ~ h + l in bfloat16), the three products h.h + h.l + l.h summed in
float32, and the bound E_t of composition.score.ranks (docstring step 5) are emulated in numpy,
and the band logic is run end to end by the torch emulation path (torch-bf16x3).
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest

from composition.score import ranks

from tests.oracles.dense_gpt2 import midranks_rows


def _unit_rows(rng, n, r, spread=False):
    x = rng.standard_normal((n, r))
    if spread:  # components over many binades, some subnormal in bfloat16/float32
        x *= np.exp2(rng.integers(-140, 1, (n, r)))
    return x / np.linalg.norm(x, axis=1, keepdims=True) * rng.uniform(0.5, 0.999, (n, 1))


def test_split_is_two_bfloat16_values_within_2_to_minus_16():
    """Source: Higham 2002, Accuracy and Stability of Numerical Algorithms, §2.1 (rounding to
    nearest with unit roundoff u = 2^-8 for an 8-bit significand) and Sterbenz's lemma (§2.5):
    h = bf16(v), l = bf16(v - h) with v - h exact, so |v - h - l| <= 2^-16 |v|."""
    rng = np.random.default_rng(0)
    v = (rng.standard_normal((500, 64)) * np.exp2(rng.integers(-30, 5, (500, 64)))).astype(np.float32)
    h, l = ranks.split_bf16(v)
    for part in (h, l):  # bfloat16 values: the low 16 bits of the float32 pattern are zero
        assert not (part.view(np.uint32) & np.uint32(0xFFFF)).any()
    v64, h64, l64 = v.astype(np.float64), h.astype(np.float64), l.astype(np.float64)
    assert np.all(np.abs(v64 - h64) <= 2.0**-8 * np.abs(v64))
    assert np.all(np.abs(v64 - h64 - l64) <= 2.0**-16 * np.abs(v64))
    # the residual v - h computed in float32 is exact (Sterbenz)
    assert np.array_equal((v - h).astype(np.float64), v64 - h64)


def _emulated_products(L3, R3, order):
    """s~ = float32 sum of the exact bf16 products, in one of several orders, as AMX (pairs
    accumulated in sequence), a tree (numpy pairwise) or reversed. # [m, 3r] x2 -> [m] f64"""
    prod = L3 * R3  # [m, 3r] float32, exact: products of two 8-bit significands
    if order == "tree":
        return prod.sum(1, dtype=np.float32).astype(np.float64)
    cols = range(prod.shape[1]) if order == "sequential" else reversed(range(prod.shape[1]))
    acc = np.zeros(prod.shape[0], np.float32)
    for k in cols:
        acc = (acc + prod[:, k]).astype(np.float32)
    return acc.astype(np.float64)


def _exact_dot_rational(x: np.ndarray, y: np.ndarray) -> float:
    """x.y exactly (rational arithmetic), rounded once to float64 at the end. # [r] x2"""
    return float(sum(Fraction(float(a)) * Fraction(float(b)) for a, b in zip(x, y)))


@pytest.mark.parametrize("spread", [False, True])
def test_bf16x3_bound_contains_the_true_error(spread):
    """Source: Higham 2002, §3.1 (gamma_n bound for a float32 sum of n = 3r exact products, any
    order) and exact rational arithmetic (Python fractions) for x.y.

    For every pair and three summation orders, |s~ - x.y| <= E_t (up to the final float64
    rounding of the rational value); and the bound is not absurdly loose."""
    rng = np.random.default_rng(1 + spread)
    r = 64
    x = _unit_rows(rng, 60, r, spread)  # [m, r] scaled left rows, |x| < 1
    y = _unit_rows(rng, 60, r, spread)
    y[::7] *= 1e-3  # rows of very different norms on the right too
    hx, lx = ranks.split_bf16(x.astype(np.float32))
    hy, ly = ranks.split_bf16(y.astype(np.float32))
    c = ranks.bf16x3_right_constants(y, hy, ly)
    E = ranks.bf16x3_bounds(x, hx, lx, c)  # [m]
    L3, R3 = ranks.bf16x3_left(hx, lx), ranks.bf16x3_right(hy, ly)
    worst = 0.0
    for j in range(y.shape[0]):  # every left row against right row j
        exact = np.array([_exact_dot_rational(x[t], y[j]) for t in range(x.shape[0])])
        for order in ("sequential", "tree", "reversed"):
            s = _emulated_products(L3, np.broadcast_to(R3[j], L3.shape), order)
            err = np.abs(s - exact)
            assert np.all(err <= E * (1 + 2.0**-50)), (j, order)
            worst = max(worst, float((err / E).max()))
    assert worst > 1e-3  # the bound is within a factor 1000 of the worst error seen


def test_bf16x3_bound_is_a_few_times_2_to_minus_16():
    """Source: the derivation in composition.score.ranks (step 5): |l| ~ 2^-8|x|, |dx| <= 2^-16|x|,
    so E_t / (|x| Y) is a few 2^-16 at r = 64, far below the bfloat16 unit 2^-8."""
    rng = np.random.default_rng(3)
    x, y = _unit_rows(rng, 200, 64), _unit_rows(rng, 200, 64)
    hx, lx = ranks.split_bf16(x.astype(np.float32))
    hy, ly = ranks.split_bf16(y.astype(np.float32))
    c = ranks.bf16x3_right_constants(y, hy, ly)
    rel = ranks.bf16x3_bounds(x, hx, lx, c) / (np.linalg.norm(x, axis=1) * c.Y)
    assert np.all(rel < 8 * 2.0**-16) and np.all(rel > 2.0**-18)  # ~5 x 2^-16


def _dense_fixed_order(left, right):
    S = np.outer(left[:, 0], right[:, 0])
    for i in range(1, left.shape[1]):
        S += np.outer(left[:, i], right[:, i])
    return S


@pytest.mark.parametrize("name", list(ranks.selfcheck_problems(V=201, r=24)))
def test_band_logic_gives_exact_ranks_under_the_bf16x3_bound(name):
    """Reference library: scipy (scipy.stats.rankdata on the dense float64 matrix summed in
    index order). The torch emulation of bf16x3 (split factors, tripled inner dimension,
    float32 products) with the band of step 5 gives the float64 midranks on random, planted,
    tied, duplicated, norm-spread and diagonal-at-the-minimum problems."""
    left, right = ranks.selfcheck_problems(V=201, r=24)[name]
    got = ranks.diagonal_midranks(left, right, path="torch-bf16x3").numpy()
    np.testing.assert_array_equal(got, midranks_rows(_dense_fixed_order(left, right)))


def test_band_is_wider_than_fp32_but_still_small():
    """Common practice, no source: on Gaussian factors at dh = 64 the bf16x3 pass sends some
    entries to float64 (more than fp32 does) yet well under 1 % of them."""
    rng = np.random.default_rng(4)
    left, right = rng.standard_normal((400, 64)), rng.standard_normal((400, 64))
    counts = {}
    for path in ("torch-fp32", "torch-bf16x3"):
        prep = ranks.prepare_right(right, path=path)
        lnorm = np.linalg.norm(left, axis=1)
        p, _, _, rr, _, _ = ranks._fast_pass(left, lnorm, np.arange(400), prep, 256)
        counts[path] = rr.size
    assert counts["torch-bf16x3"] >= counts["torch-fp32"]
    assert counts["torch-bf16x3"] < 0.01 * 400 * 400


def _bits_to_f32(u16: np.ndarray) -> np.ndarray:
    return (u16.astype(np.uint32) << np.uint32(16)).view(np.float32)


def test_amx_packing_read_as_the_tile_loads_read_it_gives_the_tripled_product():
    """Common practice, no source (Intel SDM, TDPBF16PS: C[m][n] += sum_k2 A[m][2k2+i] B[k2][n][i]).

    The packed left [n32, K] and right [np, K/2, 32, 2] arrays, read with the offsets and
    strides of count_rows_amx's tile loads (A: rows of K bf16 at k; B: 16 pair-rows of
    128 bytes at k*32 (+32 for columns 16-31)), give [h,h,l] . [h,l,h] for every entry.
    This checks the layout the AMX code relies on without AMX hardware."""
    from composition.score import _kernel

    rng = np.random.default_rng(6)
    n, V, r = 37, 70, 64  # neither a multiple of 32
    x, y = _unit_rows(rng, n, r), _unit_rows(rng, V, r)
    L3 = ranks.bf16x3_left(*ranks.split_bf16(x.astype(np.float32)))  # [n, 3r]
    R3 = ranks.bf16x3_right(*ranks.split_bf16(y.astype(np.float32)))  # [V, 3r]
    Lp, Pp = _kernel.pack_amx_left(L3), _kernel.pack_amx_right(R3)
    K = Lp.shape[1]
    assert K % 32 == 0 and Lp.shape[0] % 32 == 0 and Pp.shape[1:] == (K // 2, 32, 2)
    A = _bits_to_f32(Lp).astype(np.float64)  # [n32, K]
    out = np.zeros((Lp.shape[0], Pp.shape[0] * 32))
    for p in range(Pp.shape[0]):
        flat = Pp[p].reshape(-1)  # the panel as memory, uint16
        for k in range(0, K, 32):
            a = A[:, k:k + 32].reshape(-1, 16, 2)  # tile rows: 16 pairs along K
            for half in (0, 1):
                base = k * 32 + half * 32  # elements; stride 128 bytes = 64 elements
                tile = np.stack([flat[base + i * 64: base + i * 64 + 32] for i in range(16)])  # [16, 32]
                b = _bits_to_f32(tile).astype(np.float64).reshape(16, 16, 2)  # [k2, column, pair]
                out[:, p * 32 + half * 16: p * 32 + half * 16 + 16] += np.einsum("mkp,knp->mn", a, b)
    want = L3.astype(np.float64) @ R3.astype(np.float64).T  # [n, V]
    np.testing.assert_allclose(out[:n, :V], want, rtol=0, atol=1e-12)
    assert not out[n:].any() and not out[:, V:].any()  # padding rows and columns are zero
