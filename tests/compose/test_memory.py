"""What a scan holds in memory (docs/performance.md, "Memory"): released weights, factors of the
scanned heads only, the Gaussian baseline drawn step by step. Every release must leave each
number as it was; these tests check the released forms against the full ones bit for bit and
against the dense float64 oracle."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from composition.compose import factors as fx
from composition.compose.sides import SideFactors
from composition.extract import load_weights
from composition.extract.tables import release_table_inputs, table_inputs, token_table
from composition.interpret import heads as hd

from ..oracles import dense_gpt2 as oracle
from ..small_checkpoint import random_gpt2


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    path, sd, cfg = random_gpt2(str(tmp_path_factory.mktemp("memory") / "model"), seed=4, V=700, d=64, H=4, L=3)
    w = load_weights(path)
    return path, sd, cfg, w, token_table(w)


def test_released_weights_keep_every_factor_and_setting(model):
    """After release_table_inputs the MLP tensors are empty, the tied embedding is a view of the
    unembedding (no second copy), the settings and the fingerprint are the same, and the writer values, keys, head
    profiles and model-space scores are bit for bit those of the full weights.
    Common practice, no source"""
    path, _, _, w, T = model
    slim = release_table_inputs(w)
    assert all(slim.layers[i].mlp.W_in.numel() == 0 and slim.layers[i].mlp.W_out.numel() == 0
               for i in range(slim.n_layers))
    assert slim.W_E.data_ptr() == slim.W_U.data_ptr() and torch.equal(slim.W_E, w.W_E)
    assert slim.settings() == w.settings() and slim.vocab_size == w.vocab_size and slim.d_model == w.d_model
    assert slim.fingerprint() == w.fingerprint()  # a resumed scan checks it against the file
    for layer in range(w.n_layers):
        assert torch.equal(fx.writer_values(slim, T, layer), fx.writer_values(w, T, layer))
        assert torch.equal(fx.responder_keys(slim, T, layer), fx.responder_keys(w, T, layer))
    one = table_inputs(w)
    assert one.n_layers == 1 and torch.equal(token_table(one), T)
    a = hd.profile_layer(w, T, 1, (0, 2), (1, 5))
    b = hd.profile_layer(slim, T, 1, (0, 2), (1, 5))
    for name in a[1]:
        assert np.array_equal(a[1][name], b[1][name], equal_nan=True), name
    fresh = load_weights(path)  # a lazily read model: released layers are read again and released on reading
    lazy = release_table_inputs(fresh)
    assert lazy.layers[2].mlp.W_in.numel() == 0 and torch.equal(lazy.layers[2].attn.W_K, w.layers[2].attn.W_K)


def test_factors_of_named_heads_are_the_layers_own_bits(model):
    """writer_values / responder_keys / responder_queries of a few heads equal the slices of the whole
    layer's factor bit for bit (a product over fewer heads would round differently), and the
    values match the dense float64 oracle's N(T) W_V.
    Reference library: NumPy float64 dense oracle (tests/oracles/dense_gpt2.py)"""
    _, sd, cfg, w, T = model
    for build in (fx.writer_values, fx.responder_keys, fx.responder_queries):
        full = build(w, T, 2)
        some = build(w, T, 2, heads=(3, 1))
        assert torch.equal(some[0], full[3]) and torch.equal(some[1], full[1])
    ow = oracle.get_weights(sd)
    X = oracle.token_table(sd, cfg)  # [V, d]
    A = oracle._ln(ow, 2, "ln_1", cfg, X) @ oracle.head_weights(ow, cfg, 2, 3)["W_V"]  # [V, dh]
    np.testing.assert_allclose(fx.writer_values(w, T, 2, heads=(3,))[0].numpy(), A, rtol=1e-9, atol=1e-9)


def test_factor_cache_holds_only_the_scanned_heads(model):
    """With a head selection the cache holds the scanned heads' [V, dh] factors (a mapping head ->
    factor), equal to the whole layer's; a layer whose every head is scanned is one tensor.
    Common practice, no source"""
    _, _, _, w, T = model
    cache = SideFactors(w, T, heads=[(0, 1), (2, 0), (2, 1), (2, 2), (2, 3)])
    values = cache.values(0)
    assert sorted(values) == [1] and torch.equal(values[1], fx.writer_values(w, T, 0)[1])
    keys = cache.keys(2)
    assert isinstance(keys, torch.Tensor) and keys.shape == (4, w.vocab_size, w.d_head)
    assert sum(v.numel() for v in values.values()) * 8 == w.vocab_size * w.d_head * 8
    full = SideFactors(w, T)
    assert torch.equal(cache.alpha((0, 1)), full.alpha((0, 1)))


def test_gaussian_baseline_drawn_step_by_step_is_the_batched_one():
    """composition_baseline (each factor reduced as soon as its partner is drawn) equals the batched
    form it replaced, _prepare of four draws for the writer and four for the responder, exactly.
    Common practice, no source"""
    d, dh, draws, seed = 48, 8, 30, 7
    rng = np.random.default_rng(seed)

    def gauss():
        return torch.from_numpy(rng.standard_normal((draws, d, dh)))

    wp = hd._prepare(hd.HeadFactors(gauss(), gauss(), gauss(), gauss()), with_bases=False)
    rp = hd._prepare(hd.HeadFactors(gauss(), gauss(), gauss(), gauss()), with_bases=False)
    den = {"q": rp.qk_norm2, "k": rp.qk_norm2, "v": rp.ov_norm2}
    expected = {}
    for kind in hd.KINDS:
        num2 = (wp.writer_z.transpose(1, 2) @ rp.responder_z[kind]).pow(2).sum((-1, -2))
        s = hd._ratio(num2, wp.ov_norm2 * den[kind])
        expected[kind] = (float(s.mean()), float(s.std()))
    assert hd.composition_baseline(d, dh, draws, seed) == expected


def test_checkpoint_tensors_are_owned_copies(model):
    """Tensors read from a safetensors file equal the library's own reading and do not view its
    memory map (their storage is resizable, which a view of a file map is not).
    Reference library: safetensors"""
    from safetensors.torch import load_file

    from composition.extract.files import TensorSource

    path = model[0]
    src = TensorSource(f"{path}/model.safetensors")
    ref = load_file(f"{path}/model.safetensors")
    t = src.get("transformer.wte.weight")
    assert torch.equal(t, ref["transformer.wte.weight"])
    assert t.untyped_storage().resizable()
