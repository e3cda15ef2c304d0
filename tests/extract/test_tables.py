"""Norms, activations and token tables against outside references."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from composition import TableOptions, load_weights, token_table
from composition.extract.tables import activate, apply_norm, norm_linear_part
from composition.extract.weights import Norm

from ..conftest import random_gpt2
from ..oracles import dense_gpt2 as oracle


def test_layernorm_matches_torch():
    """Reference library: torch (torch.nn.functional.layer_norm)."""
    g = torch.Generator().manual_seed(0)
    x = torch.randn(50, 64, generator=g, dtype=torch.float64) * 3 + 1
    gamma, beta = torch.randn(64, generator=g, dtype=torch.float64), torch.randn(64, generator=g, dtype=torch.float64)
    ours = apply_norm(Norm("layernorm", gamma, beta, 1e-5), x)
    ref = torch.nn.functional.layer_norm(x, (64,), gamma, beta, eps=1e-5)
    assert torch.allclose(ours, ref, rtol=1e-12, atol=1e-12)


def test_rmsnorm_matches_torch():
    """Reference library: torch (torch.nn.functional.rms_norm)."""
    g = torch.Generator().manual_seed(1)
    x = torch.randn(50, 64, generator=g, dtype=torch.float64)
    gamma = torch.randn(64, generator=g, dtype=torch.float64)
    ours = apply_norm(Norm("rmsnorm", gamma, None, 1e-6), x)
    ref = torch.nn.functional.rms_norm(x, (64,), gamma, eps=1e-6)
    assert torch.allclose(ours, ref, rtol=1e-12, atol=1e-12)


def test_norm_linear_part_reproduces_the_norm_up_to_scale():
    """Source: docs/methods.md §1 (Lin(N) = P diag(gamma); N(x) = x Lin(N) / sigma + beta).

    Reference library: torch (layer_norm gives N(x))."""
    g = torch.Generator().manual_seed(2)
    x = torch.randn(20, 32, generator=g, dtype=torch.float64)
    gamma, beta = torch.randn(32, generator=g, dtype=torch.float64), torch.randn(32, generator=g, dtype=torch.float64)
    sigma = torch.sqrt(x.var(-1, unbiased=False, keepdim=True) + 1e-5)
    lin = norm_linear_part(Norm("layernorm", gamma, beta, 1e-5), 32)
    ref = torch.nn.functional.layer_norm(x, (32,), gamma, beta, eps=1e-5)
    assert torch.allclose(x @ lin / sigma + beta, ref, atol=1e-12)


@pytest.mark.parametrize("name, approximate", [("gelu", "none"), ("gelu-tanh", "tanh")])
def test_gelu_matches_torch(name, approximate):
    """Reference library: torch (torch.nn.functional.gelu); Source: Hendrycks & Gimpel 2016, GELUs."""
    x = torch.linspace(-8, 8, 2001, dtype=torch.float64)
    assert torch.allclose(activate(name, x), torch.nn.functional.gelu(x, approximate=approximate), atol=1e-14)


def test_exact_and_tanh_gelu_differ_as_stated():
    """Source: docs/methods.md §2 (exact and tanh GELU differ by up to ~5e-4). Reference library: torch."""
    x = torch.linspace(-6, 6, 20001, dtype=torch.float64)
    gap = (activate("gelu", x) - activate("gelu-tanh", x)).abs().max().item()
    assert 1e-4 < gap < 5e-4


@pytest.mark.parametrize("activation", ["gelu_new", "gelu", "relu"])
def test_attn0_mlp0_table_equals_block0_residual_at_position0(tmp_path, activation):
    """Source: docs/methods.md §2 exactness test: with --position index 0 a causal decoder's
    attn0-mlp0 table equals the residual stream at position 0 after block 0, computed here
    by an independent plain forward pass (tests/oracles/dense_gpt2.py, itself checked
    against transformers' GPT2Model)."""
    path, sd, cfg = random_gpt2(str(tmp_path / "m"), seed=3, activation=activation)
    T = token_table(load_weights(path), TableOptions("attn0-mlp0", 0)).numpy()
    for first in (0, 17, 299):
        ids = [first, 5, 9, 200]
        h = oracle.forward_block0_position0(sd, cfg, ids)
        np.testing.assert_allclose(T[first], h[0], rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("kind", ["embed", "mlp0", "attn0-mlp0"])
@pytest.mark.parametrize("position", [None, "mean", 7])
def test_token_tables_match_the_dense_oracle(small_model, kind, position):
    """Source: docs/methods.md §2, against the independent float64 oracle tests/oracles/dense_gpt2.py."""
    path, sd, cfg = small_model
    ours = token_table(load_weights(path), TableOptions(kind, position)).numpy()
    ref = oracle.token_table(sd, cfg, kind, position)
    np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-10)
