"""The composer, the kernel and the scorer against dense float64 references and the null model."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats
import torch

from composition import ScanOptions, TableOptions, diagonal_midranks, load_scan, load_weights, run_scan, token_table
from composition.compose.factors import query_middles, query_side, responder_keys, writer_values
from composition.score.stats import summarise

from ..conftest import random_gpt2
from ..oracles import dense_gpt2 as oracle


def _our_ranks(w, T, writer, responder, orientation):
    (lU, hU), (lR, hR) = writer, responder
    left, right = query_side(writer_values(w, T, lU)[hU], query_middles(w, lU, hU, lR)[hR],
                             responder_keys(w, T, lR)[hR], orientation)
    return diagonal_midranks(left, right, block_rows=64).numpy()


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("orientation", ["row", "column"])
def test_every_diagonal_midrank_matches_dense_reference(tmp_path, seed, orientation):
    """Reference library: scipy.stats.rankdata (method="average") on the dense float64 token
    matrix built by the independent oracle tests/oracles/dense_gpt2.py from docs/methods.md §3-§4.
    Duplicate tokens in the vocabulary give exact ties."""
    path, sd, cfg = random_gpt2(str(tmp_path / "m"), seed=seed, V=257, duplicate_tokens=5 if seed == 2 else 0)
    w = load_weights(path)
    T = token_table(w, TableOptions("attn0-mlp0"))
    T_ref = oracle.token_table(sd, cfg, "attn0-mlp0", None)
    for writer, responder in [((0, 0), (1, 2)), ((1, 3), (2, 1)), ((0, 2), (2, 0))]:
        S = oracle.dense_token_matrix(sd, cfg, T_ref, writer, responder)
        ref = oracle.midranks_rows(S) if orientation == "row" else oracle.midranks_columns(S)
        np.testing.assert_array_equal(_our_ranks(w, T, writer, responder, orientation), ref)
    if seed == 2:  # the ties really are there: some midranks are half-integers
        assert np.any(ref % 1 == 0.5)


def test_scan_file_statistics_match_the_dense_reference(tmp_path):
    """Reference library: scipy.stats.rankdata via the dense oracle; the stored shares, mean
    percentile and histogram are those of the reference midranks (docs/methods.md §4)."""
    path, sd, cfg = random_gpt2(str(tmp_path / "m"), seed=4, V=200, L=2)
    scan = run_scan(path, tmp_path / "s.h5", ScanOptions(k=(1, 3, 20)))
    T_ref = oracle.token_table(sd, cfg, "attn0-mlp0", None)
    n = 200
    for hU in range(4):
        for hR in range(4):
            ranks = oracle.midranks_rows(oracle.dense_token_matrix(sd, cfg, T_ref, (0, hU), (1, hR)))
            i = (0, hU, 1, hR)
            assert scan.done[i]
            np.testing.assert_array_equal(scan.top_share[i], [(ranks < k).mean() for k in (1, 3, 20)])
            np.testing.assert_array_equal(scan.bottom_share[i], [(ranks > n - 1 - k).mean() for k in (1, 3, 20)])
            assert scan.mean_percentile[i] == pytest.approx((1 - ranks / (n - 1)).mean(), abs=1e-15)
            np.testing.assert_array_equal(scan.histogram[i], np.histogram(1 - ranks / (n - 1), 20, (0, 1))[0])
            assert scan.rows_evaluated[i] == n
    assert not scan.done[1, 0, 0, 0] and scan.label[1, 0, 0, 0] == -128


def test_null_model_gives_uniform_diagonal_rank():
    """docs/testing.md null model: i.i.d. continuous entries give a uniform diagonal rank, so the
    top-k share is k/n (Reference library: scipy.stats.binomtest) and the mean percentile 1/2."""
    g = torch.Generator().manual_seed(5)
    n = 3000
    left = torch.randn(n, 16, generator=g, dtype=torch.float64)
    right = torch.randn(n, 16, generator=g, dtype=torch.float64)
    ranks = diagonal_midranks(left, right).numpy()
    for k in (30, 150, 300):
        hits = int((ranks < k).sum())
        assert scipy.stats.binomtest(hits, n, k / n).pvalue > 1e-3
    assert abs((1 - ranks / (n - 1)).mean() - 0.5) < 4 * np.sqrt(1 / 12 / n)


def test_cauchy_schwarz_diagonal_is_row_maximum():
    """docs/testing.md Cauchy-Schwarz: S = A A^T with distinct unit-norm rows has every diagonal as its
    row's unique maximum, so the top-1 share is exactly 1. Common practice, no source."""
    g = torch.Generator().manual_seed(6)
    A = torch.randn(2000, 24, generator=g, dtype=torch.float64)
    A = A / A.norm(dim=1, keepdim=True)
    stats = summarise(diagonal_midranks(A, A).numpy(), 2000, (1,))
    assert stats.top_share[0] == 1.0 and stats.mean_percentile == 1.0


def test_negating_the_middle_factor_swaps_top_and_bottom_shares():
    """docs/testing.md sign symmetry: negating the middle factor swaps top-k and bottom-k shares
    exactly (midranks r -> n-1-r, ties included). Common practice, no source."""
    g = torch.Generator().manual_seed(7)
    A = torch.randint(-2, 3, (800, 8), generator=g).double()  # small integers: many exact ties
    K = torch.randint(-2, 3, (800, 8), generator=g).double()
    C = torch.randn(8, 8, generator=g, dtype=torch.float64).round()
    up = summarise(diagonal_midranks(A @ C, K).numpy(), 800, (1, 5, 50))
    down = summarise(diagonal_midranks(A @ -C, K).numpy(), 800, (1, 5, 50))
    np.testing.assert_array_equal(up.top_share, down.bottom_share)
    np.testing.assert_array_equal(up.bottom_share, down.top_share)
    assert up.mean_percentile + down.mean_percentile == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("seed", [10, 11])
def test_random_models_are_labelled_neutral(tmp_path, seed):
    """Null model at scan level (docs/methods.md §4; labels with Benjamini-Hochberg 1995 via
    scipy.stats.false_discovery_control): in a model of random weights at most 1 % of the
    pairs earn a non-neutral label. GPT-2-style initialisation, std 0.02 (From memory: the
    GPT-2 initialiser's standard deviation)."""
    path, _, _ = random_gpt2(str(tmp_path / "m"), seed=seed, V=1500, d=128, H=4, L=4, init_std=0.02)
    scan = run_scan(path, tmp_path / "s.h5")
    lab = scan.label[scan.done]
    assert lab.size == 96
    assert np.mean(lab != 0) <= 0.01


def test_demo_scan_labels_exactly_the_planted_responders(tmp_path):
    """Recovery of what was planted in the invented demo model (composition.demo): every planted
    writer -> responder pair gets its planted label, and no other pair is labelled."""
    from composition.demo import PLANTED_PAIRS, build_demo

    model = build_demo(tmp_path / "demo")
    scan = run_scan(model, tmp_path / "demo.h5")
    assert scan.done.sum() == 6 * 64  # every pair with a later responder
    found = {((a, b), (c, d)): int(scan.label[a, b, c, d]) for a, b, c, d in np.argwhere(scan.label == 1)}
    found.update({((a, b), (c, d)): int(scan.label[a, b, c, d]) for a, b, c, d in np.argwhere(scan.label == -1)})
    assert found == PLANTED_PAIRS
    again = load_scan(tmp_path / "demo.h5")
    assert again.attrs["fingerprint"] == scan.attrs["fingerprint"]


def test_column_orientation_scan_matches_the_dense_reference(tmp_path):
    """Reference library: scipy.stats.rankdata via the dense oracle's column midranks
    (docs/methods.md §3, column orientation): the scan's shares and mean percentile are those of the
    reference ranks of every column."""
    path, sd, cfg = random_gpt2(str(tmp_path / "m"), seed=8, V=180, L=2)
    scan = run_scan(path, tmp_path / "s.h5", ScanOptions(orientation="column", k=(1, 5)))
    T_ref = oracle.token_table(sd, cfg, "attn0-mlp0", None)
    for hU, hR in ((0, 0), (1, 3), (3, 2)):
        ranks = oracle.midranks_columns(oracle.dense_token_matrix(sd, cfg, T_ref, (0, hU), (1, hR)))
        i = (0, hU, 1, hR)
        np.testing.assert_array_equal(scan.top_share[i], [(ranks < k).mean() for k in (1, 5)])
        assert scan.mean_percentile[i] == pytest.approx((1 - ranks / 179).mean(), abs=1e-15)
