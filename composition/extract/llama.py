"""Llama-style layout: RMSNorm, separate Q/K/V/O projections, grouped-query attention, full
rotary (split-half pairs), gated MLP, tied or untied unembedding.

Tensor names follow the widely used Llama export (``model.layers.{i}.self_attn.q_proj.weight``
``[H*dh, d]``, out x in; ``mlp.gate_proj``/``up_proj``/``down_proj``; ``model.norm``;
``lm_head.weight``), with or without the ``model.`` prefix. Close relatives read the same
way: Mistral (no biases) and Qwen2 (biases on Q, K and V). Key/value heads are expanded
to one slice per query head (query head ``h`` reads key head ``h // (H / kv)``).
"""

from __future__ import annotations

import torch

from ..errors import CompositionError
from .rotary import rotary_from_config
from .weights import Attention, Layer, Norm, Weights
from ._build import (activation, assemble, config_int, expand_kv, family_matches, linear_heads, linear_mlp, prefixed,
                     unembedding)
from .files import TensorSource

MODEL_TYPES = ("llama", "mistral", "qwen2")


def matches(config: dict) -> bool:
    return family_matches(config, MODEL_TYPES, ("Llama", "Mistral", "Qwen2F", "Qwen2M"), excluded=("Qwen2Moe",))


def read(src: TensorSource, config: dict) -> Weights:
    fam = "Llama-style"
    d = config_int(config, fam, "hidden_size")
    H = config_int(config, fam, "num_attention_heads")
    L = config_int(config, fam, "num_hidden_layers")
    V = config_int(config, fam, "vocab_size")
    kv = config_int(config, fam, "num_key_value_heads", default=H)
    dh = config_int(config, fam, "head_dim", default=d // H if d % H == 0 else 0)
    if dh <= 0:
        raise CompositionError(f"the config's hidden_size={d} is not divisible by num_attention_heads={H}.")
    if H % kv:
        raise CompositionError(f"the config's {H} query heads cannot share {kv} key/value heads evenly.")
    m = config_int(config, fam, "intermediate_size")
    eps = float(config.get("rms_norm_eps", 1e-6))
    act = activation(config, "hidden_act", "silu")
    qwen = config.get("model_type") == "qwen2"
    qkv_bias = qwen or bool(config.get("attention_bias", False))
    o_bias = (not qwen) and bool(config.get("attention_bias", False))
    mlp_bias = bool(config.get("mlp_bias", False))
    rotary = rotary_from_config(config, dh, "split-half", default_fraction=1.0)
    _, get = prefixed(src, "model.", "embed_tokens.weight")

    def rms(name):
        return Norm("rmsnorm", get(name, (d,)), None, eps)

    def zeros(*shape):
        return torch.zeros(*shape)

    def load_layer(i: int) -> Layer:
        p = f"layers.{i}."
        a = p + "self_attn."
        W_Q = linear_heads(get(a + "q_proj.weight", (H * dh, d)), H)  # [H, d, dh]
        W_K = expand_kv(linear_heads(get(a + "k_proj.weight", (kv * dh, d)), kv), H)  # [H, d, dh]
        W_V = expand_kv(linear_heads(get(a + "v_proj.weight", (kv * dh, d)), kv), H)  # [H, d, dh]
        W_O = get(a + "o_proj.weight", (d, H * dh)).T.reshape(H, dh, d).contiguous()  # [H, dh, d]
        if qkv_bias:
            b_Q = get(a + "q_proj.bias", (H * dh,)).reshape(H, dh)  # [H, dh]
            b_K = expand_kv(get(a + "k_proj.bias", (kv * dh,)).reshape(kv, dh), H)  # [H, dh]
            b_V = expand_kv(get(a + "v_proj.bias", (kv * dh,)).reshape(kv, dh), H)  # [H, dh]
        else:
            b_Q = b_K = b_V = zeros(H, dh)
        b_O = get(a + "o_proj.bias", (d,)) if o_bias else zeros(d)  # [d]
        attn = Attention(W_Q, W_K, W_V, W_O, b_Q, b_K, b_V, b_O, kv_heads=kv)
        f = p + "mlp."
        mlp = linear_mlp(get, f + "up_proj", f + "down_proj", d, m, act, gate=f + "gate_proj", bias=mlp_bias)
        return Layer(rms(p + "input_layernorm.weight"), attn, rms(p + "post_attention_layernorm.weight"), mlp)

    W_E = get("embed_tokens.weight", (V, d))  # [V, d]
    unembed = unembedding(src, ("lm_head.weight",), W_E, bool(config.get("tie_word_embeddings")),
                          f"tensor lm_head.weight is missing from {src.path}, and the config does not tie the "
                          "unembedding.")
    return assemble("llama", src, config, W_E, unembed, rms("norm.weight"), L, load_layer, placement="pre",
                    rotary=rotary)
