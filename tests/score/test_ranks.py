"""Exact diagonal midranks (composition.score.ranks) against a dense float64 reference.

Every path that runs on this machine (ranks.available_paths(): the vector kernel at every
width built here, the AMX split-bf16 kernel where it exists, plain torch in fp32 and the
torch emulation of bf16x3) must give the float64 midranks of docs/methods.md §4 exactly, on random,
planted and adversarial factors.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import torch

from composition.score import ranks
from composition.errors import CompositionError
from composition.compose.factors import query_side
from composition.score.stats import summarise

from tests.oracles.dense_gpt2 import midranks_rows

ENGINES = ["torch"] + (["kernel"] if ranks.kernel_available() else [])
PRECISIONS = list(ranks.PRECISIONS)
PATHS = ranks.available_paths()


def dense_reference(left, right, rows=None):
    """Dense float64 S and scipy.stats.rankdata midranks (through the independent oracle)."""
    S = left.numpy() @ right.numpy().T  # [V, V]
    return midranks_rows(S, rows)


def _gen(seed):
    return torch.Generator().manual_seed(seed)


def _random(V, r, seed):
    g = _gen(seed)
    return torch.randn(V, r, generator=g, dtype=torch.float64), torch.randn(V, r, generator=g, dtype=torch.float64)


def _planted(V, r, seed):
    """Responder keys close to the writer's queries: diagonals near the top of their rows."""
    g = _gen(seed)
    right = torch.randn(V, r, generator=g, dtype=torch.float64)
    left = right + 0.3 * torch.randn(V, r, generator=g, dtype=torch.float64)
    return left, right


def _integer_ties(V, r, seed):
    """Small-integer factors: integer products are exact in float64, so ties are real ties."""
    g = _gen(seed)
    left = torch.randint(-2, 3, (V, r), generator=g).double()
    right = torch.randint(-2, 3, (V, r), generator=g).double()
    return left, right


def _duplicated(V, r, seed):
    """Many duplicated tokens: rows repeated in both factors (exact ties with the diagonal)."""
    left, right = _random(V, r, seed)
    src = torch.arange(V) % (V // 7)
    return left[src].clone(), right[src].clone()


def _norm_spread(V, r, seed):
    """Row norms spread over 2^-60 .. 2^60 in both factors."""
    g = _gen(seed)
    left, right = _random(V, r, seed)
    left *= torch.pow(2.0, torch.randint(-60, 61, (V, 1), generator=g).double())
    right *= torch.pow(2.0, torch.randint(-60, 61, (V, 1), generator=g).double())
    return left, right


def _diag_minimum(V, r, seed):
    """left = -right, unit distinct rows: every diagonal is its row's unique minimum."""
    _, right = _random(V, r, seed)
    right = right / right.norm(dim=1, keepdim=True)
    return -right.clone(), right


def _zero_rows(V, r, seed):
    """Zero rows in both factors (a zero left row ties with everything; zero keys score 0)."""
    left, right = _random(V, r, seed)
    left[::11] = 0.0
    right[3::13] = 0.0
    return left, right


CASES = {
    "random": _random,
    "planted": _planted,
    "integer-ties": _integer_ties,
    "duplicated-rows": _duplicated,
    "norm-spread": _norm_spread,
    "diagonal-minimum": _diag_minimum,
    "zero-rows": _zero_rows,
}


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("path", PATHS)
def test_exact_midranks_match_dense_float64(case, path):
    """Reference library: scipy.stats.rankdata (method="average") on the dense float64 matrix.

    Exact means equal to the float64 midranks, including ties (docs/methods.md §4)."""
    left, right = CASES[case](400, 16, seed=1)
    want = dense_reference(left, right)
    got = ranks.diagonal_midranks(left, right, path=path).numpy()
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("path", PATHS)
def test_full_width_and_sampled_rows(path):
    """Reference library: scipy.stats.rankdata. dh = 64 (the GPT-2 head width), odd V, a row subset."""
    left, right = _random(1531, 64, seed=2)
    rows = np.random.default_rng(0).choice(1531, 200, replace=False)
    want = dense_reference(left, right, rows)
    got = ranks.diagonal_midranks(left, right, rows=rows, path=path).numpy()
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("precision", PRECISIONS + list(ranks.ALIASES))
@pytest.mark.parametrize("engine", ENGINES)
def test_every_precision_and_engine_gives_the_float64_ranks(precision, engine):
    """Reference library: scipy.stats.rankdata. The user-facing names (and the removed
    bf16-checked, an alias of auto) on the planted and tied cases."""
    for case in ("planted", "integer-ties"):
        left, right = CASES[case](300, 24, seed=3)
        got = ranks.diagonal_midranks(left, right, precision=precision, engine=engine).numpy()
        np.testing.assert_array_equal(got, dense_reference(left, right))


@pytest.mark.skipif("kernel" not in ENGINES, reason="the fused C kernel cannot be built on this machine")
def test_kernel_and_plain_torch_paths_agree():
    """Common practice, no source: the compiled path and its plain fallback give the same ranks."""
    for make in (_random, _integer_ties, _planted):
        left, right = make(800, 40, seed=4)
        a = ranks.diagonal_midranks(left, right, engine="kernel")
        b = ranks.diagonal_midranks(left, right, engine="torch")
        assert torch.equal(a, b)


def test_overflowing_band_falls_back_to_whole_rows(monkeypatch):
    """Reference library: scipy.stats.rankdata. Factors with values in {-1, 0, 1} and width 2
    tie almost everywhere: the band records overflow and whole rows are decided in float64."""
    g = _gen(5)
    left = torch.randint(-1, 2, (900, 2), generator=g).double()
    right = torch.randint(-1, 2, (900, 2), generator=g).double()
    calls = []
    original = ranks._exact_rows
    monkeypatch.setattr(ranks, "_exact_rows", lambda *a: calls.append(1) or original(*a))
    for path in PATHS:
        got = ranks.diagonal_midranks(left, right, path=path).numpy()
        np.testing.assert_array_equal(got, dense_reference(left, right))
    if "kernel" in ENGINES:
        assert calls, "the overflow path was not exercised"


def test_batch_of_responder_heads_equals_one_at_a_time():
    """Reference library: scipy.stats.rankdata. One writer against several responder heads."""
    g = _gen(6)
    A = torch.randn(400, 16, generator=g, dtype=torch.float64)
    heads = [(torch.randn(16, 16, generator=g, dtype=torch.float64), torch.randn(400, 16, generator=g, dtype=torch.float64))
             for _ in range(3)]
    lefts = [A @ C for C, _ in heads]
    rights = [ranks.prepare_right(K) for _, K in heads]
    got = ranks.midranks_batch(lefts, rights)
    for (l, (_, K)), g_ in zip(zip(lefts, heads), got):
        np.testing.assert_array_equal(g_.numpy(), dense_reference(l, K))


def test_cauchy_schwarz_top1_share_is_one():
    """Source: Cauchy-Schwarz inequality (docs/testing.md): S = A A^T with distinct unit rows has
    each diagonal as its row's unique maximum, so the top-1 share is exactly 1."""
    g = _gen(7)
    A = torch.randn(700, 12, generator=g, dtype=torch.float64)
    A = A / A.norm(dim=1, keepdim=True)
    for path in PATHS:
        r = ranks.diagonal_midranks(A, A, path=path).numpy()
        assert summarise(r, 700, (1, 5)).top_share[0] == 1.0


def test_sign_symmetry_swaps_top_and_bottom_shares():
    """Source: docs/testing.md sign symmetry: negating the middle factor negates S, so with no ties
    top-k and bottom-k shares swap exactly."""
    g = _gen(8)
    A = torch.randn(800, 16, generator=g, dtype=torch.float64)
    C = torch.randn(16, 16, generator=g, dtype=torch.float64)
    K = A @ torch.randn(16, 16, generator=g, dtype=torch.float64) + 0.5 * torch.randn(800, 16, generator=g, dtype=torch.float64)
    ks = (1, 5, 20)
    for path in PATHS:
        plus = summarise(ranks.diagonal_midranks(*query_side(A, C, K), path=path).numpy(), 800, ks)
        minus = summarise(ranks.diagonal_midranks(*query_side(A, -C, K), path=path).numpy(), 800, ks)
        np.testing.assert_array_equal(plus.top_share, minus.bottom_share)
        np.testing.assert_array_equal(plus.bottom_share, minus.top_share)
        assert plus.top_share.sum() > 0  # the case is not degenerate


def test_float32_rounding_bound_holds():
    """Source: Higham 2002, Accuracy and Stability of Numerical Algorithms, §3.1 (gamma_r bound).

    On unit-scaled factors every float32 dot product lies within the per-entry bound E that
    the fast pass uses (half of the band half-width T minus the float64 part)."""
    g = _gen(9)
    r = 64
    x = torch.randn(2000, r, generator=g, dtype=torch.float64)
    x = x / x.norm(dim=1, keepdim=True) * 0.99
    y = torch.randn(2000, r, generator=g, dtype=torch.float64) * 1e3
    y = y / y.norm(dim=1).max() * 0.99
    exact = (x * y).sum(1)
    err32 = ((x.float() * y.float()).sum(1).double() - exact).abs()
    E32 = ((2 * 2.0**-24) + ranks._gamma(r, 2.0**-24) * (1 + 2.0**-24) ** 2) * 0.99 * 0.99
    assert float(err32.max()) <= E32
    assert float(err32.max()) > E32 / 1e4  # the bound is not absurdly loose either


def test_cuda_device_fails_with_a_sentence_where_there_is_none():
    """Common practice, no source: an unavailable device is a user error, not a traceback."""
    if torch.cuda.is_available():
        pytest.skip("this machine has a CUDA device")
    with pytest.raises(CompositionError, match="--device cuda"):
        ranks.check_device("cuda")
    with pytest.raises(CompositionError, match="--device"):
        ranks.check_device("tpu")


def test_non_finite_factors_are_refused():
    """Common practice, no source."""
    left, right = _random(50, 4, seed=10)
    right[3, 1] = float("nan")
    with pytest.raises(CompositionError, match="non-finite"):
        ranks.diagonal_midranks(left, right)


def test_scipy_reference_itself():
    """Reference library: scipy.stats.rankdata; the oracle's convention r = n - rankdata(...)[t]."""
    S = np.array([[3.0, 3.0, 1.0], [0.0, 2.0, 2.0], [5.0, 4.0, 5.0]])
    np.testing.assert_array_equal(midranks_rows(S), [0.5, 0.5, 0.5])
    assert scipy.stats.rankdata([1, 2, 2])[1] == 2.5
