"""Head profiles (docs/methods.md §5) and model-space scores (docs/methods.md §7): composition/heads.py.

Each test names its source (docs/testing.md). Demo-based tests test recovery of what was planted
in the invented demo model.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
import torch
from click.testing import CliRunner

from composition.extract import load_weights
from composition.present.cli import main
from composition.errors import CompositionError
from composition.interpret.heads import (HeadFactors, add_to_scan, composition_baseline, composition_scores, head_profiles,
                               load_heads, model_space_scores, orthonormal_basis, ov_factors, projection_kernel)
from composition.score.ranks import diagonal_midranks
from composition.extract.tables import token_table
from tests._demo_scan import demo_scan, random_gpt2
from tests.oracles import dense_gpt2 as og


def _orthonormal(rng, d, k):
    q, _ = np.linalg.qr(rng.normal(size=(d, k)))
    return torch.from_numpy(q)  # [d, k]


def _factors(Q_ov_in, Q_ov_out, Q_q, Q_k):
    return HeadFactors(Q_ov_in[None], Q_ov_out[None], Q_q[None], Q_k[None])  # each [1, d, k]


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    path, sd, cfg = random_gpt2(tmp_path_factory.mktemp("model"), seed=3, V=300, d=64, H=4, L=3)
    return load_weights(path), sd, cfg


# ---------------------------------------------------------------------------
# Composition scores
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("k", [1, 4, 16])
def test_composition_score_of_a_projection_with_itself(k):
    """score(P, P) = 1/sqrt(k) for a rank-k orthogonal projection P, in all three kinds.

    Source: docs/testing.md worked example (|P P|_F = |P|_F = sqrt(k)); composition scores from
    Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits".
    """
    Q = _orthonormal(np.random.default_rng(k), 64, k)
    head = _factors(Q, Q, Q, Q)  # W_OV = W_QK = Q Q^T = P
    scores = composition_scores(head, head)
    for kind in ("q", "k", "v"):
        assert float(scores[kind][0, 0]) == pytest.approx(1 / np.sqrt(k), rel=1e-12)


def test_composition_score_of_orthogonal_subspaces_is_zero():
    """Writer and responder on orthogonal subspaces give 0.

    Source: docs/testing.md worked example (P1 P2 = 0 for orthogonal projections).
    """
    Q = _orthonormal(np.random.default_rng(0), 64, 16)  # [d, 16]
    A, B = Q[:, :8], Q[:, 8:]
    scores = composition_scores(_factors(A, A, A, A), _factors(B, B, B, B))
    for kind in ("q", "k", "v"):
        assert abs(float(scores[kind][0, 0])) < 1e-14


def test_composition_scores_and_kernels_match_dense_matrices(small):
    """Every pair of a random GPT-2 checkpoint with LayerNorm: the factored scores equal the
    dense [d, d] definitions, with Lin(N) = P diag(gamma) from the independent oracle, and
    the projection kernels equal the sum of squared cosines of SciPy's principal angles.

    Source: Elhage et al. 2021 (composition scores, row-vector form as docs/methods.md §7).
    Reference library: scipy.linalg.subspace_angles, scipy.linalg.orth (Hamm & Lee 2008
    projection kernel = sum cos^2 of principal angles).
    """
    w, sd, cfg = small
    ms, _ = model_space_scores(w, draws=4)
    ow = og.get_weights(sd)
    L, H = cfg["n_layer"], cfg["n_head"]

    def head(l, h):
        hw = og.head_weights(ow, cfg, l, h)
        lin = og.layer_norm_linear_part(ow[f"h.{l}.ln_1.weight"])  # [d, d]
        return hw, lin

    def frob(x):
        return np.linalg.norm(x, "fro")

    for lU in range(L):
        for lR in range(lU + 1, L):
            for hU in range(H):
                U, linU = head(lU, hU)
                ov_u = linU @ U["W_V"] @ U["W_O"]  # [d, d]
                write = scipy.linalg.orth(U["W_O"].T)  # [d, a] row space of W_O
                for hR in range(H):
                    R, linR = head(lR, hR)
                    qk = (linR @ R["W_Q"]) @ (linR @ R["W_K"]).T  # [d, d]
                    ov_r = linR @ R["W_V"] @ R["W_O"]
                    i = (lU, hU, lR, hR)
                    assert ms["q_composition"][i] == pytest.approx(frob(ov_u @ qk) / (frob(ov_u) * frob(qk)), rel=1e-9)
                    assert ms["k_composition"][i] == pytest.approx(frob(ov_u @ qk.T) / (frob(ov_u) * frob(qk)), rel=1e-9)
                    assert ms["v_composition"][i] == pytest.approx(frob(ov_u @ ov_r) / (frob(ov_u) * frob(ov_r)), rel=1e-9)
                    for kind, read in (("q", linR @ R["W_Q"]), ("k", linR @ R["W_K"]), ("v", linR @ R["W_V"])):
                        angles = scipy.linalg.subspace_angles(write, scipy.linalg.orth(read))
                        assert ms[f"projection_kernel_{kind}"][i] == pytest.approx(np.sum(np.cos(angles) ** 2), abs=1e-9)
    assert np.isnan(ms["q_composition"][1, 0, 1, 0]) and np.isnan(ms["q_composition"][2, 0, 0, 0])


def test_gaussian_baseline_is_near_one_over_sqrt_d():
    """Gaussian factors of head shapes give a mean composition score close to 1/sqrt(d).

    From memory: Elhage et al. 2021 note that random matrices compose at about 1/sqrt(d).
    Derivation: for i.i.d. standard normal A [d,r], B [r,d], C [d,r], D [r,d],
    E|ABCD|^2 = d^3 r^2 and E|AB|^2 = d^2 r, so the ratio of norms is about sqrt(d^3 r^2 /
    (d^4 r^2)) = 1/sqrt(d).
    """
    d = 128
    base = composition_baseline(d, 16, draws=300, seed=1)
    for kind in ("q", "k", "v"):
        mean, sd = base[kind]
        assert mean == pytest.approx(d**-0.5, rel=0.05)
        assert 0 < sd < 0.2 * mean


# ---------------------------------------------------------------------------
# Projection kernel
# ---------------------------------------------------------------------------

def test_projection_kernel_worked_examples():
    """Identical subspaces give their dimension, orthogonal ones 0.

    Source: docs/testing.md worked example; Hamm & Lee 2008, "Grassmann discriminant analysis"
    (projection kernel |Q1^T Q2|_F^2).
    """
    rng = np.random.default_rng(5)
    Q = _orthonormal(rng, 40, 12)
    same = orthonormal_basis(Q[:, :7] @ torch.from_numpy(rng.normal(size=(7, 7))))  # same span, other basis
    assert projection_kernel(Q[:, :7], same) == pytest.approx(7.0, abs=1e-10)
    assert abs(projection_kernel(Q[:, :7], Q[:, 7:])) < 1e-14


def test_projection_kernel_of_random_subspaces_averages_ab_over_d():
    """Uniformly random subspaces of dimensions a and b in R^d: mean kernel ab/d.

    Source: docs/testing.md; Yamagiwa, Takase & Shimodaira 2026 (random baseline of the projection
    kernel). Reference library: scipy.stats.ortho_group for Haar-random orthonormal bases;
    the check allows five standard errors of the Monte-Carlo mean.
    """
    d, a, b, n = 20, 4, 6, 800
    draws = scipy.stats.ortho_group.rvs(d, size=2 * n, random_state=7)  # [2n, d, d]
    values = np.array([projection_kernel(torch.from_numpy(draws[2 * i][:, :a]), torch.from_numpy(draws[2 * i + 1][:, :b]))
                       for i in range(n)])
    assert abs(values.mean() - a * b / d) < 5 * values.std() / np.sqrt(n)


def test_stored_random_mean_is_ab_over_d(small):
    """The stored random mean of every pair is write dim x read dim / d.

    Source: docs/methods.md §7 (ab/d), Yamagiwa, Takase & Shimodaira 2026.
    """
    w, _, cfg = small
    ms, _ = model_space_scores(w, draws=4)
    d = cfg["n_embd"]
    expect = ms["write_dim"][0, 1] * ms["read_dim_q"][2, 3] / d
    assert ms["kernel_random_mean_q"][0, 1, 2, 3] == pytest.approx(expect)
    assert ms["write_dim"][0, 1] == 16 and ms["read_dim_q"][2, 3] == 16  # full head width 64/4


# ---------------------------------------------------------------------------
# OV token matrix
# ---------------------------------------------------------------------------

def test_eigen_copying_score_matches_dense_eigvals(small):
    """The [dh, dh] eigenvalue copying score equals sum Re / sum |.| over numpy.linalg.eigvals
    of the dense [V, V] OV token matrix, for every head.

    Source: Elhage et al. 2021 (eigenvalue copying score). Reference library:
    numpy.linalg.eigvals via tests/oracles/dense_gpt2.py (dense_ov_matrix, eigen_copying_score).
    """
    w, sd, cfg = small
    table = og.token_table(sd, cfg, "attn0-mlp0")  # [V, d]
    prof = head_profiles(w, torch.from_numpy(table))
    for l, h in ((0, 0), (1, 2), (2, 3)):
        dense = og.eigen_copying_score(og.dense_ov_matrix(sd, cfg, table, l, h))
        assert prof["eigen_copying_score"][l, h] == pytest.approx(dense, abs=1e-8)


def test_ov_diagonal_midranks_match_dense_rankdata(small):
    """OV token-matrix diagonal midranks with the exact kernel equal a dense float64 matrix
    ranked with scipy.stats.rankdata(method="average"), and the profile's statistics follow.

    Reference library: scipy.stats.rankdata via tests/oracles/dense_gpt2.py (docs/methods.md §4-§5).
    """
    w, sd, cfg = small
    table = og.token_table(sd, cfg, "attn0-mlp0")
    prof = head_profiles(w, torch.from_numpy(table), ks=(1, 5))
    n = cfg["vocab_size"]
    for l in range(cfg["n_layer"]):
        A, B = ov_factors(w, torch.from_numpy(table), l)  # [H, V, dh]
        for h in range(cfg["n_head"]):
            expect = og.midranks_rows(og.dense_ov_matrix(sd, cfg, table, l, h))  # [V]
            got = diagonal_midranks(A[h], B[h]).numpy()
            np.testing.assert_array_equal(got, expect)
            assert prof["mean_percentile"][l, h] == pytest.approx(np.mean(1 - expect / (n - 1)), abs=1e-12)
            assert prof["top_share"][l, h][1] == pytest.approx(np.mean(expect < 5))
            assert prof["bottom_share"][l, h][0] == pytest.approx(np.mean(expect > n - 2))


def test_sign_of_the_ov_circuit_swaps_copying_and_suppressing(small):
    """Negating W_O negates F: top and bottom shares swap exactly and the copying score flips.

    Source: docs/testing.md sign symmetry (negating the middle factor swaps top-k and bottom-k).
    """
    w, sd, cfg = small
    T = token_table(w)
    layer = w.layers[1]
    flipped = dataclasses.replace(w, layers=(w.layers[0], dataclasses.replace(
        layer, attn=dataclasses.replace(layer.attn, W_O=-layer.attn.W_O)), *w.layers[2:]))
    a, b = head_profiles(w, T), head_profiles(flipped, T)
    np.testing.assert_array_equal(a["top_share"][1], b["bottom_share"][1])
    np.testing.assert_allclose(a["eigen_copying_score"][1], -b["eigen_copying_score"][1], atol=1e-12)


# ---------------------------------------------------------------------------
# Storage and CLI
# ---------------------------------------------------------------------------

def test_heads_command_writes_a_heads_file(small, tmp_path):
    """`composition heads CHECKPOINT --out FILE` writes /heads [L, H] and /model_space
    [L, H, L, H]; a wrong option combination costs one line and exit status 2.

    Common practice, no source.
    """
    w, _, cfg = small
    checkpoint = w.source
    out = tmp_path / "heads.h5"
    r = CliRunner().invoke(main, ["heads", checkpoint, "--out", str(out), "--baseline-draws", "8"])
    assert r.exit_code == 0, r.output
    data = load_heads(out)
    L, H = cfg["n_layer"], cfg["n_head"]
    assert data.heads["label"].shape == (L, H)
    assert data.model_space["q_composition"].shape == (L, H, L, H)
    assert data.model_space_attrs["baseline_draws"] == 8
    r = CliRunner().invoke(main, ["heads", checkpoint, "--out", str(out), "--into", str(out)])
    assert r.exit_code == 2 and len(r.output.strip().splitlines()) == 1


def test_add_to_scan_refuses_other_weights(small):
    """Head profiles are only added to a scan of the same weights (fingerprint check).

    Common practice, no source.
    """
    w, _, _ = small
    with pytest.raises(CompositionError, match="does not match the scan"):
        add_to_scan(demo_scan() / "scan.h5", w)


# ---------------------------------------------------------------------------
# Recovery of the planted demo heads
# ---------------------------------------------------------------------------

def test_demo_head_labels_recover_the_planted_heads():
    """Recovery test on the invented demo model: exactly the planted heads are labelled, as
    copying or suppressing as planted, and their eigenvalue copying scores agree in sign.

    Tests recovery of what was planted (composition/demo.py, PLANTED_HEADS).
    """
    from composition.demo import PLANTED_HEADS

    data = load_heads(demo_scan() / "scan.h5")
    assert data is not None, "run_scan did not add /heads to the scan file"
    label = data.heads["label"]
    found = {tuple(int(v) for v in ix): int(label[tuple(ix)]) for ix in np.argwhere(np.isin(label, (1, -1)))}
    assert found == PLANTED_HEADS
    for head, sign in PLANTED_HEADS.items():
        assert np.sign(data.heads["eigen_copying_score"][head]) == sign


def test_restricted_scan_profiles_only_its_heads():
    """A scan restricted to some writers and responders profiles exactly those heads (the
    others hold the not-computed label) while the model-space scores cover every pair.

    Common practice, no source (a restricted quick scan stays quick).
    """
    from tests._demo_scan import planted_selection
    from composition.run.scan import parse_heads

    data = load_heads(demo_scan() / "scan.h5")
    writers, responders = planted_selection()
    L, H = data.heads["label"].shape
    expect = set(parse_heads(writers, L, H, "w")) | set(parse_heads(responders, L, H, "r"))
    assert {tuple(int(v) for v in ix) for ix in np.argwhere(data.heads["label"] != -128)} == expect
    assert np.isnan(data.heads["mean_percentile"][0]).all()
    assert np.isfinite(data.model_space["q_composition"][0, :, 1:, :]).all()


def test_demo_planted_pairs_compose_in_model_space():
    """Recovery test: every planted pair's Q- and K-composition scores lie far above the
    Gaussian baseline and its query-side projection kernel is near the head width.

    Tests recovery of what was planted (composition/demo.py, PLANTED_CIRCUITS: the
    responder's query and key read the writer's subspace).
    """
    from composition.demo import PLANTED_CIRCUITS

    data = load_heads(demo_scan() / "scan.h5")
    ms = data.model_space
    dh = data.model_space_attrs["d_head"]
    for u, r, *_ in PLANTED_CIRCUITS.values():
        i = (*u, *r)
        for kind in ("q", "k"):
            mean, sd = data.baseline(kind)
            assert ms[f"{kind}_composition"][i] > mean + 20 * sd
        assert ms["projection_kernel_q"][i] > 0.9 * dh
