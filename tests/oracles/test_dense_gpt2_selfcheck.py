"""Self-checks of the dense GPT-2 oracle (tests/oracles/dense_gpt2.py) against
references outside the project.  Each test names its source in its docstring
(see DEVELOPERS.md, "Tests")."""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
import scipy.stats

from ..small_checkpoint import random_numpy_sd  # noqa: F401 (tests import it from here too)
from . import dense_gpt2 as og

os.environ.setdefault("HF_HUB_OFFLINE", "1")


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------

SMALL_CFG = dict(n_embd=64, n_head=4, n_layer=2, vocab_size=300, n_positions=32,
                 layer_norm_epsilon=1e-5, activation_function="gelu_new",
                 n_inner=None)


def rel_err(a, b):
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


# ---------------------------------------------------------------------------
# norms and activations
# ---------------------------------------------------------------------------

def test_layer_norm_matches_torch():
    """LayerNorm with population variance and eps vs torch.nn.functional.layer_norm.

    Reference library: torch"""
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(1)
    x = rng.normal(2.0, 3.0, (7, 5, 48))
    g, b = rng.normal(1, 0.3, 48), rng.normal(0, 0.3, 48)
    for eps in (1e-5, 1e-2):
        ref = torch.nn.functional.layer_norm(
            torch.tensor(x), (48,), torch.tensor(g), torch.tensor(b), eps).numpy()
        np.testing.assert_allclose(og.layer_norm(x, g, b, eps), ref, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("name,approx", [("gelu_new", "tanh"), ("gelu", "none")])
def test_gelu_matches_torch(name, approx):
    """GELU, tanh approximation (gelu_new) and exact erf (gelu), vs
    torch.nn.functional.gelu(approximate=...); Hendrycks & Gimpel 2016.

    Reference library: torch"""
    torch = pytest.importorskip("torch")
    x = np.linspace(-8, 8, 4001)
    ref = torch.nn.functional.gelu(torch.tensor(x), approximate=approx).numpy()
    act = og.activation({"activation_function": name})
    np.testing.assert_allclose(act(x), ref, rtol=1e-12, atol=1e-14)


def test_relu_matches_torch():
    """ReLU activation vs torch.nn.functional.relu.

    Reference library: torch"""
    torch = pytest.importorskip("torch")
    x = np.linspace(-3, 3, 601)
    ref = torch.nn.functional.relu(torch.tensor(x)).numpy()
    np.testing.assert_array_equal(og.activation({"activation_function": "relu"})(x), ref)


def test_layer_norm_linear_part_is_exact_derivative_direction():
    """Lin(LayerNorm) = P diag(gamma): N(x) - beta = Lin(N)(x) / sigma(x) for
    row vectors, i.e. x @ P diag(gamma) / sqrt(var + eps) + beta == N(x).

    Source: docs/methods.md §1"""
    rng = np.random.default_rng(2)
    d, eps = 32, 1e-5
    x = rng.normal(0, 1, (10, d))
    g, b = rng.normal(1, 0.3, d), rng.normal(0, 0.3, d)
    sigma = np.sqrt(x.var(axis=1, keepdims=True) + eps)
    got = x @ og.layer_norm_linear_part(g) / sigma + b
    np.testing.assert_allclose(got, og.layer_norm(x, g, b, eps), rtol=1e-12, atol=1e-12)


# ---------------------------------------------------------------------------
# forward pass vs transformers
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("act,prefix", [("gelu_new", ""), ("gelu", "transformer."),
                                        ("relu", "")])
def test_forward_block0_matches_transformers(act, prefix):
    """Residual stream after block 0 at every position equals transformers'
    GPT2Model hidden_states[1] (random-initialised 2-layer model built from a
    config in the test, all parameters perturbed so biases and norms are
    non-trivial; nothing downloaded), to 1e-6 relative.

    Reference library: transformers"""
    os.environ["HF_HUB_OFFLINE"] = "1"
    torch = pytest.importorskip("torch")
    transformers = pytest.importorskip("transformers")
    torch.manual_seed(0)
    hf_cfg = transformers.GPT2Config(n_embd=64, n_head=4, n_layer=2, vocab_size=300,
                                     n_positions=32, activation_function=act,
                                     resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0,
                                     bos_token_id=0, eos_token_id=0)
    try:
        hf_cfg._attn_implementation = "eager"
    except Exception:  # pragma: no cover - older/newer attribute handling
        pass
    model = transformers.GPT2Model(hf_cfg).double().eval()
    with torch.no_grad():
        for p in model.parameters():
            p.add_(0.1 * torch.randn_like(p))
    sd = {prefix + k: v.detach().cpu().numpy() for k, v in model.state_dict().items()
          if v.is_floating_point()}
    cfg = hf_cfg.to_dict()
    ids = np.array([5, 17, 299, 0, 42, 42, 7, 123, 250, 3, 88, 1])
    with torch.no_grad():
        out = model(torch.tensor(ids)[None, :], output_hidden_states=True)
    ref = out.hidden_states[1][0].numpy()
    got = og.forward_block0_position0(sd, cfg, ids)
    assert got.shape == (len(ids), 64)
    assert rel_err(got, ref) < 1e-6
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-6 * np.abs(ref).max())
    # docs/methods.md §2 exactness test on the same model: attn0-mlp0 table at index 0.
    table = og.token_table(sd, cfg, "attn0-mlp0", 0)
    assert rel_err(table[ids[0]], ref[0]) < 1e-6


# ---------------------------------------------------------------------------
# token tables
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("act", ["gelu_new", "gelu", "relu"])
@pytest.mark.parametrize("prefix", ["", "transformer."])
def test_attn0_mlp0_table_equals_forward_at_position0(act, prefix):
    """With position index 0, the attn0-mlp0 token table row of token ids[0]
    equals the residual stream at position 0 after block 0 of an ordinary
    causal forward pass (position 0 attends only to itself).

    Source: docs/methods.md §2"""
    cfg = dict(SMALL_CFG, activation_function=act)
    sd = random_numpy_sd(cfg, seed=3, prefix=prefix)
    rng = np.random.default_rng(4)
    for _ in range(3):
        ids = rng.integers(0, cfg["vocab_size"], size=9)
        fwd = og.forward_block0_position0(sd, cfg, ids)
        table = og.token_table(sd, cfg, "attn0-mlp0", 0)
        assert table.shape == (cfg["vocab_size"], cfg["n_embd"])
        np.testing.assert_allclose(table[ids[0]], fwd[0], rtol=1e-12, atol=1e-12)
    # positions: None == p = 0; "mean" = mean of all 32 rows here; int = row.
    w = og.get_weights(sd)
    np.testing.assert_array_equal(og.token_table(sd, cfg, "embed", None), w["wte.weight"])
    np.testing.assert_allclose(og.token_table(sd, cfg, "embed", "mean"),
                               w["wte.weight"] + w["wpe.weight"].mean(axis=0))
    np.testing.assert_allclose(og.token_table(sd, cfg, "embed", 5),
                               w["wte.weight"] + w["wpe.weight"][5])


# ---------------------------------------------------------------------------
# midranks
# ---------------------------------------------------------------------------

def _count_midrank(row, t):
    others = np.delete(row, t)
    return np.sum(others > row[t]) + 0.5 * np.sum(others == row[t])


def test_midranks_match_count_definition_with_ties():
    """Midranks from scipy.stats.rankdata(method='average') equal the counting
    definition r_t = #{j != t: S[t,j] > S[t,t]} + 1/2 #{j != t: S[t,j] = S[t,t]},
    rows and columns, on a matrix with many ties.

    Reference library: scipy.stats.rankdata"""
    rng = np.random.default_rng(5)
    S = rng.integers(0, 4, (40, 40)).astype(float)
    rows = og.midranks_rows(S)
    np.testing.assert_array_equal(rows, [_count_midrank(S[t], t) for t in range(40)])
    sub = [3, 0, 39, 17]
    np.testing.assert_array_equal(og.midranks_rows(S, rows=sub), rows[sub])
    cols = og.midranks_columns(S)
    np.testing.assert_array_equal(cols, [_count_midrank(S[:, j], j) for j in range(40)])
    assert np.all(rows >= 0) and np.all(rows <= 39)


def test_midranks_cauchy_schwarz_and_sign_symmetry():
    """S = A A^T with distinct unit-norm rows: every diagonal is its row's
    unique maximum (midrank 0, top-1 share 1); negating S maps r -> n-1-r,
    swapping top-k and bottom-k shares exactly.

    Source: docs/testing.md (Cauchy-Schwarz; sign symmetry); docs/methods.md §4"""
    rng = np.random.default_rng(6)
    A = rng.normal(size=(50, 8))
    A /= np.linalg.norm(A, axis=1, keepdims=True)
    S = A @ A.T
    np.testing.assert_array_equal(og.midranks_rows(S), np.zeros(50))
    np.testing.assert_array_equal(og.midranks_columns(S), np.zeros(50))
    B = rng.normal(size=(50, 50))
    r, rneg = og.midranks_rows(B), og.midranks_rows(-B)
    np.testing.assert_array_equal(rneg, 49 - r)


# ---------------------------------------------------------------------------
# token matrix and OV matrix
# ---------------------------------------------------------------------------

def test_dense_token_matrix_factored_form_and_bias_invariance():
    """The dense S equals the factored form A_U C_UR K_R^T scale with
    C_UR = W_O^U Lin(N_lR) W_Q^R, computed by a separate path; the value,
    query and key biases do not enter S.

    Source: docs/methods.md §3"""
    cfg = dict(SMALL_CFG)
    sd = random_numpy_sd(cfg, seed=7)
    table = og.token_table(sd, cfg, "attn0-mlp0", None)
    S = og.dense_token_matrix(sd, cfg, table, writer=(0, 1), responder=(1, 2))
    assert S.shape == (300, 300)
    w = og.get_weights(sd)
    d, dh = 64, 16
    eps = cfg["layer_norm_epsilon"]
    g0, b0 = w["h.0.ln_1.weight"], w["h.0.ln_1.bias"]
    g1, b1 = w["h.1.ln_1.weight"], w["h.1.ln_1.bias"]
    Wv_U = w["h.0.attn.c_attn.weight"][:, 2 * d + dh:2 * d + 2 * dh]
    Wo_U = w["h.0.attn.c_proj.weight"][dh:2 * dh]
    Wq_R = w["h.1.attn.c_attn.weight"][:, 2 * dh:3 * dh]
    Wk_R = w["h.1.attn.c_attn.weight"][:, d + 2 * dh:d + 3 * dh]

    def ln(x, g, b):
        mu = x.mean(1, keepdims=True)
        return g * (x - mu) / np.sqrt(((x - mu) ** 2).mean(1, keepdims=True) + eps) + b

    A_U = ln(table, g0, b0) @ Wv_U
    C = Wo_U @ ((np.eye(d) - 1.0 / d) * g1[None, :]) @ Wq_R
    K = ln(table, g1, b1) @ Wk_R
    ref = A_U @ C @ K.T / math.sqrt(dh)
    np.testing.assert_allclose(S, ref, rtol=1e-10, atol=1e-10 * np.abs(ref).max())
    # biases of c_attn (q, k, v of every head) do not enter S
    sd2 = dict(sd)
    sd2["h.0.attn.c_attn.bias"] = sd["h.0.attn.c_attn.bias"] + 5.0
    sd2["h.1.attn.c_attn.bias"] = sd["h.1.attn.c_attn.bias"] - 3.0
    S2 = og.dense_token_matrix(sd2, cfg, table, writer=(0, 1), responder=(1, 2))
    np.testing.assert_allclose(S2, S, rtol=1e-12, atol=1e-12 * np.abs(S).max())
    with pytest.raises(ValueError):
        og.dense_token_matrix(sd, cfg, table, writer=(1, 0), responder=(1, 2))


def test_ov_matrix_and_eigen_copying_score():
    """F = A B^T (A = N_l(T) W_V, B^T = W_O Lin(N_f) W_U) has rank <= dh; its
    eigen copying score from numpy.linalg.eigvals on the dense [V, V] matrix
    equals the score from the [dh, dh] matrix B^T A; +-identity give +-1.

    Source: docs/methods.md §5; Elhage et al. 2021"""
    cfg = dict(SMALL_CFG, vocab_size=120)
    sd = random_numpy_sd(cfg, seed=8)
    table = og.token_table(sd, cfg, "attn0-mlp0", "mean")
    F = og.dense_ov_matrix(sd, cfg, table, layer=1, head=3)
    assert F.shape == (120, 120)
    assert np.linalg.matrix_rank(F) <= 16
    w = og.get_weights(sd)
    hw = og.head_weights(w, cfg, 1, 3)
    A = og.layer_norm(table, w["h.1.ln_1.weight"], w["h.1.ln_1.bias"], 1e-5) @ hw["W_V"]
    Bt = hw["W_O"] @ og.layer_norm_linear_part(w["ln_f.weight"]) @ w["wte.weight"].T
    lam = np.linalg.eigvals(Bt @ A)
    small = lam.real.sum() / np.abs(lam).sum()
    assert abs(og.eigen_copying_score(F) - small) < 1e-8
    assert og.eigen_copying_score(np.eye(10)) == pytest.approx(1.0)
    assert og.eigen_copying_score(-np.eye(10)) == pytest.approx(-1.0)
    # a pure rotation by 90 degrees has purely imaginary eigenvalues: score 0
    assert og.eigen_copying_score(np.array([[0.0, -1.0], [1.0, 0.0]])) == pytest.approx(0.0, abs=1e-12)
