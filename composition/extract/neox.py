"""GPT-NeoX-style layout: fused QKV interleaved per head, parallel residual, partial
rotary (split-half pairs), LayerNorm, untied unembedding.

Tensor names follow the widely used GPT-NeoX export (``gpt_neox.layers.{i}.attention.
query_key_value.weight`` ``[3d, d]``, out x in, whose output rows are grouped per head as
``[q_h | k_h | v_h]``), with or without the ``gpt_neox.`` prefix; the unembedding is
``embed_out.weight`` (or ``lm_head.weight``).
"""

from __future__ import annotations

import torch

from .rotary import rotary_from_config
from .weights import Attention, Layer, Weights
from ._build import (activation, assemble, config_sizes, family_matches, layernorm, linear_mlp, prefixed,
                     unembedding)
from .files import TensorSource


def matches(config: dict) -> bool:
    return family_matches(config, ("gpt_neox",), ("GPTNeoX",), excluded=("GPTNeoXJapanese",))


def read(src: TensorSource, config: dict) -> Weights:
    fam = "GPT-NeoX"
    d, H, L, V, dh, m = config_sizes(config, fam)
    eps = float(config.get("layer_norm_eps", 1e-5))
    act = activation(config, "hidden_act", "gelu")
    bias = bool(config.get("attention_bias", True))
    parallel = bool(config.get("use_parallel_residual", True))
    rotary = rotary_from_config(config, dh, "split-half", default_fraction=0.25)
    _, get = prefixed(src, "gpt_neox.", "embed_in.weight")

    def norm(name):
        return layernorm(get, name, d, eps)

    def load_layer(i: int) -> Layer:
        p = f"layers.{i}."
        qkv = get(p + "attention.query_key_value.weight", (3 * d, d)).reshape(H, 3, dh, d)  # [H, 3, dh, d]
        W_Q, W_K, W_V = (qkv[:, j].permute(0, 2, 1).contiguous() for j in range(3))  # [H, d, dh]
        if bias:
            qkv_b = get(p + "attention.query_key_value.bias", (3 * d,)).reshape(H, 3, dh)  # [H, 3, dh]
            b_Q, b_K, b_V = (qkv_b[:, j].contiguous() for j in range(3))  # [H, dh]
            b_O = get(p + "attention.dense.bias", (d,))  # [d]
        else:
            b_Q = b_K = b_V = torch.zeros(H, dh)
            b_O = torch.zeros(d)
        W_O = get(p + "attention.dense.weight", (d, d)).T.reshape(H, dh, d)  # [H, dh, d]
        attn = Attention(W_Q.contiguous(), W_K, W_V, W_O.contiguous(), b_Q, b_K, b_V, b_O, kv_heads=H)
        mlp = linear_mlp(get, p + "mlp.dense_h_to_4h", p + "mlp.dense_4h_to_h", d, m, act)
        return Layer(norm(p + "input_layernorm"), attn, norm(p + "post_attention_layernorm"), mlp)

    W_E = get("embed_in.weight", (V, d))  # [V, d]
    unembed = unembedding(src, ("embed_out.weight", "lm_head.weight"), W_E, bool(config.get("tie_word_embeddings")),
                          f"tensor embed_out.weight (the unembedding) is missing from {src.path}.")
    return assemble("gpt-neox", src, config, W_E, unembed, norm("final_layer_norm"), L, load_layer,
                    placement="parallel" if parallel else "pre", rotary=rotary)
