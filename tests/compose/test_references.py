"""Reference writers (composition.compose.references): identity, unembedding and the random band,
against dense float64 references written here from docs/methods.md in plain NumPy, and the band's
coverage on random models."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from composition import load_weights
from composition.compose.factors import query_middles, responder_keys, writer_values
from composition.compose.references import (band, haar_frame, identity_queries, random_middles, random_writers,
                                            reference_statistics, standing, unembedding_queries)
from composition.extract.tables import TableOptions, token_table
from composition.score.ranks import diagonal_midranks

from ..oracles import dense_gpt2 as og
from ..small_checkpoint import random_gpt2


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    path, sd, cfg = random_gpt2(str(tmp_path_factory.mktemp("refs") / "m"), seed=7, V=300, d=64, H=4, L=3)
    w = load_weights(path)
    T = token_table(w, TableOptions("attn0-mlp0"))
    return dict(sd=sd, cfg=cfg, w=w, T=T, T_oracle=og.token_table(sd, cfg, "attn0-mlp0", None),
                g=og.get_weights(sd))


def _dense_keys(small, layer, head):
    """``k(j) = N_l(T[j]) W_K`` from the oracle's own LayerNorm and weights. # -> [V, dh]"""
    g, cfg = small["g"], small["cfg"]
    eps = cfg["layer_norm_epsilon"]
    x = og.layer_norm(small["T_oracle"], g[f"h.{layer}.ln_1.weight"], g[f"h.{layer}.ln_1.bias"], eps)
    return x @ og.head_weights(g, cfg, layer, head)["W_K"]


def _lin(small, layer):
    return og.layer_norm_linear_part(small["g"][f"h.{layer}.ln_1.weight"])  # [d, d] P diag(gamma)


def _check(left, K, dense_q, dense_k):
    """Our factors against the dense matrix, and our midranks against SciPy's on it."""
    dense = dense_q @ dense_k.T  # [V, V]
    ours = (left @ K.T).numpy()
    assert np.max(np.abs(ours - dense)) <= 1e-9 * np.max(np.abs(dense))
    np.testing.assert_array_equal(diagonal_midranks(left, K).numpy(), og.midranks_rows(dense))


@pytest.mark.parametrize("responder", [(1, 0), (2, 3)])
def test_identity_reference_against_dense_oracle(small, responder):
    """Source: docs/methods.md §3 with the write o_U(t) replaced by the table row T[t]:
    q(t) = T[t] P diag(gamma_lR) W_Q^R, keys N_lR(T) W_K^R; midranks against scipy.stats.rankdata
    (Reference library: SciPy) on the dense float64 matrix."""
    lR, hR = responder
    left = identity_queries(small["w"], small["T"], lR)[hR]  # [V, dh]
    K = responder_keys(small["w"], small["T"], lR)[hR]
    W_Q = og.head_weights(small["g"], small["cfg"], lR, hR)["W_Q"]
    _check(left, K, small["T_oracle"] @ _lin(small, lR) @ W_Q, _dense_keys(small, lR, hR))


@pytest.mark.parametrize("responder", [(1, 2), (2, 1)])
def test_unembedding_reference_against_dense_oracle(small, responder):
    """Source: docs/methods.md §3b, u_t = Lin(N_f) W_U[:, t] normalised, written into the query:
    q(t) = u_t P diag(gamma_lR) W_Q^R (tied W_U = W_E^T); ranks against scipy.stats.rankdata."""
    lR, hR = responder
    g = small["g"]
    U = (og.layer_norm_linear_part(g["ln_f.weight"]) @ g["wte.weight"].T).T  # [V, d]
    U = U / np.linalg.norm(U, axis=1, keepdims=True)
    W_Q = og.head_weights(g, small["cfg"], lR, hR)["W_Q"]
    left = unembedding_queries(small["w"], lR)[hR]
    _check(left, responder_keys(small["w"], small["T"], lR)[hR], U @ _lin(small, lR) @ W_Q, _dense_keys(small, lR, hR))


def test_random_writer_keeps_the_donor_spectrum_and_matches_dense(small):
    """Reference library: NumPy (numpy.linalg.svd of the donor's dense W_V W_O; the random writer's OV matrix
    U~ S V~^T has the same singular values, and its token matrix equals the dense one)."""
    w, T = small["w"], small["T"]
    writers = random_writers(w, T, 2, draws=4, seed=3)
    assert [rw.donor for rw in writers] == [rw.donor for rw in random_writers(w, T, 2, draws=4, seed=3)]
    for rw in writers:
        lU, hU = rw.donor
        assert lU < 2
        hw = og.head_weights(small["g"], small["cfg"], lU, hU)
        donor_s = np.linalg.svd(hw["W_V"] @ hw["W_O"], compute_uv=False)[: w.d_head]
        ov = (rw.read @ rw.out).numpy()  # [d, d]
        np.testing.assert_allclose(np.linalg.svd(ov, compute_uv=False)[: w.d_head], donor_s, rtol=1e-6)
        np.testing.assert_allclose(rw.read.T @ rw.read, np.eye(w.d_head), atol=1e-12)
        eps = small["cfg"]["layer_norm_epsilon"]
        g = small["g"]
        x = og.layer_norm(small["T_oracle"], g[f"h.{lU}.ln_1.weight"], g[f"h.{lU}.ln_1.bias"], eps)
        W_Q = og.head_weights(g, small["cfg"], 2, 1)["W_Q"]
        left = rw.values @ random_middles(w, rw, 2)[1]
        _check(left, responder_keys(w, T, 2)[1], x @ ov @ _lin(small, 2) @ W_Q, _dense_keys(small, 2, 1))


def test_haar_frame_is_orthonormal_and_uniform():
    """Source: Mezzadri 2007, "How to generate random matrices from the classical compact groups" (QR of a
    Gaussian matrix with R's diagonal signs fixed is Haar); a uniform frame's first column has
    E[x_1^2] = 1/d for every coordinate (Common practice, no source)."""
    rng = np.random.default_rng(0)
    frames = np.stack([haar_frame(8, 3, rng) for _ in range(4000)])  # [n, 8, 3]
    np.testing.assert_allclose(frames[0].T @ frames[0], np.eye(3), atol=1e-12)
    second = (frames[:, :, 0] ** 2).mean(0)  # [8]
    assert np.all(np.abs(second - 1 / 8) < 0.015)


def test_band_order_statistics():
    """Source: order statistics of n exchangeable draws (the n + 1 gaps are equally likely); with 39 draws
    the plotting-position quantiles 0.05 and 0.95 are the 2nd and 38th order statistics."""
    draws = np.arange(39, dtype=float)[::-1]
    lo, hi = band(draws)
    assert (lo, hi) == (1.0, 37.0)


def test_standing_worked_example():
    """Common practice, no source: the definitions of docs/groups.md on hand-computed numbers."""
    s = standing(np.array([0.9, 0.3, 0.55]), np.array([0.8, 0.45, 0.7]), np.array([0.6, 0.4, 0.5]),
                 np.array([[0.4, 0.5, 0.6]] * 3))
    np.testing.assert_allclose(s["above_identity"], [0.1, -0.15, -0.15])
    np.testing.assert_allclose(s["above_unembedding"], [0.3, -0.1, 0.05])
    np.testing.assert_allclose(s["random_z"], [4.0, -2.0, 0.5])
    np.testing.assert_allclose(s["above_generic"], [0.1, -0.1, 0.0])
    np.testing.assert_array_equal(s["outside_band"], [1, -1, 0])


def test_random_band_covers_the_stated_fraction_of_random_pairs(tmp_path):
    """Source: order statistics (a new exchangeable draw falls between the 2nd and 38th of 39 with probability
    36/40 = 0.9). On random models every real writer is itself a random head whose OV singular vectors are
    uniformly distributed, so about 90 % of real pairs lie inside their responder's band: 288 pairs of
    three random models (pairs of one responder share a band, so the count varies more than a binomial)."""
    inside = total = 0
    for seed in (1, 2, 3):
        path = random_gpt2(str(tmp_path / f"m{seed}"), seed=seed, V=512, d=64, H=4, L=4, init_std=64**-0.5)[0]
        w = load_weights(path)
        T = token_table(w, TableOptions("attn0-mlp0"))
        for lR in range(1, 4):
            ref = reference_statistics(w, T, lR, draws=39, seed=0)
            lo, hi = band(np.array([[s.mean_percentile for s in d] for d in ref["random"]]).T)  # [H], [H]
            K = responder_keys(w, T, lR)
            for lU in range(lR):
                A = writer_values(w, T, lU)
                for hU in range(w.n_heads):
                    M = query_middles(w, lU, hU, lR)
                    for hR in range(w.n_heads):
                        mp = float((1 - diagonal_midranks(A[hU] @ M[hR], K[hR]).numpy() / (w.vocab_size - 1)).mean())
                        inside += lo[hR] <= mp <= hi[hR]
                        total += 1
    assert total == 288
    assert 0.84 <= inside / total <= 0.95


def test_demo_references_tell_generic_from_specific(tmp_path):
    """Recovery of what was planted in the invented writer-group demo model (composition.demo,
    data_cards/demo-model.md): responder 3.1 prefers each token's own key, so its identity and unembedding
    references are as high as its pairs with the copying writers 1.2 and 2.2 (nothing above generic);
    responder 3.0 answers the planted group far above its references and its random band."""
    from composition.compose.groups import WriterGroup, group_statistics
    from composition.demo import GENERIC_RESPONDER, GENERIC_WRITERS, WRITER_GROUPS, build_group_demo

    w = load_weights(build_group_demo(tmp_path / "g"))
    T = token_table(w, TableOptions("attn0-mlp0"))
    ref = reference_statistics(w, T, 3)
    draws = np.array([[s.mean_percentile for s in d] for d in ref["random"]]).T  # [H, draws]
    ident = np.array([s.mean_percentile for s in ref["identity"]])
    unemb = np.array([s.mean_percentile for s in ref["unembedding"]])
    g = GENERIC_RESPONDER[1]
    assert ident[g] > 0.95 and unemb[g] > 0.95
    for writer in GENERIC_WRITERS:
        mp = group_statistics(w, T, WriterGroup("one", (writer,)), 3)[g].mean_percentile
        s = standing(mp, ident[g], unemb[g], draws[g])
        assert mp > 0.95 and s["outside_band"] == 1 and abs(float(s["above_generic"])) < 0.05
    members, (_, h) = WRITER_GROUPS["quartet"]
    mp = group_statistics(w, T, WriterGroup("quartet", members), 3)[h].mean_percentile
    s = standing(mp, ident[h], unemb[h], draws[h])
    assert abs(ident[h] - 0.5) < 0.05 and abs(unemb[h] - 0.5) < 0.05
    assert s["outside_band"] == 1 and float(s["random_z"]) > 5 and float(s["above_generic"]) > 0.15
