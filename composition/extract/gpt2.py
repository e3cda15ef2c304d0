"""GPT-2-style layout: fused QKV in the 1-D-convolution orientation, learned positions,
pre-norm LayerNorm, tied unembedding.

Tensor names follow the widely used GPT-2 export (``h.{i}.attn.c_attn.weight`` ``[d, 3d]``
with output columns ``[q | k | v]``), with or without a ``transformer.`` prefix.
"""

from __future__ import annotations

import torch

from ..errors import CompositionError
from .weights import MLP, Attention, Layer, Weights
from ._build import ACTIVATIONS as _ACTIVATIONS
from ._build import assemble, family_matches, layernorm, prefixed, unembedding
from .files import TensorSource


def matches(config: dict) -> bool:
    return family_matches(config, ("gpt2",), ("GPT2",))


def read(src: TensorSource, config: dict) -> Weights:
    try:
        d, H, L, V = (int(config[k]) for k in ("n_embd", "n_head", "n_layer", "vocab_size"))
    except (KeyError, TypeError, ValueError) as exc:
        raise CompositionError(f"the GPT-2 config lacks a usable {exc} entry.") from None
    if d % H:
        raise CompositionError(f"the config's n_embd={d} is not divisible by n_head={H}.")
    dh = d // H
    m = int(config.get("n_inner") or 4 * d)
    eps = float(config.get("layer_norm_epsilon", 1e-5))
    act_name = config.get("activation_function", "gelu_new")
    if act_name not in _ACTIVATIONS:
        raise CompositionError(f"the config's activation_function {act_name!r} is not supported.")
    act = _ACTIVATIONS[act_name]
    pre, get = prefixed(src, "transformer.", "wte.weight")

    def norm(name):
        return layernorm(get, name, d, eps)

    W_E = get("wte.weight", (V, d))  # [V, d]
    n_pos = src.shape(pre + "wpe.weight")[0] if src.has(pre + "wpe.weight") else None
    W_pos = get("wpe.weight", (n_pos, d)) if n_pos else None  # [P, d]

    def load_layer(i: int) -> Layer:
        p = f"h.{i}."
        qkv = get(p + "attn.c_attn.weight", (d, 3 * d))  # [d, 3d]
        qkv_b = get(p + "attn.c_attn.bias", (3 * d,))  # [3d]
        W_Q, W_K, W_V = (_heads(qkv[:, j * d:(j + 1) * d], H) for j in range(3))  # [H, d, dh]
        b_Q, b_K, b_V = (qkv_b[j * d:(j + 1) * d].reshape(H, dh) for j in range(3))  # [H, dh]
        W_O = get(p + "attn.c_proj.weight", (d, d)).reshape(H, dh, d)  # [H, dh, d]
        attn = Attention(W_Q, W_K, W_V, W_O, b_Q, b_K, b_V, get(p + "attn.c_proj.bias", (d,)), kv_heads=H)
        mlp = MLP(
            W_in=get(p + "mlp.c_fc.weight", (d, m)),
            b_in=get(p + "mlp.c_fc.bias", (m,)),
            W_out=get(p + "mlp.c_proj.weight", (m, d)),
            b_out=get(p + "mlp.c_proj.bias", (d,)),
            activation=act,
        )
        return Layer(norm(p + "ln_1"), attn, norm(p + "ln_2"), mlp)

    scale = None
    if not config.get("scale_attn_weights", True):
        scale = 1.0
    notes = ()
    if config.get("scale_attn_by_inverse_layer_idx"):
        notes = ("the config divides layer l's scores by l + 1 as well; that per-layer scale changes "
                 "no rank and is left out of the attention scale shown.",)
    return assemble("gpt2", src, config, W_E, unembedding(src, ("lm_head.weight",), W_E, tie=True), norm("ln_f"), L,
                    load_layer, W_pos=W_pos, placement="pre", attn_scale=scale, notes=notes)


def _heads(w: torch.Tensor, H: int) -> torch.Tensor:
    """``[d, H*dh]`` columns grouped per head -> ``[H, d, dh]``."""
    d, width = w.shape
    return w.reshape(d, H, width // H).permute(1, 0, 2).contiguous()
