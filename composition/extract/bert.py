"""BERT-style encoder layout: post-norm placement, LayerNorm of the embeddings, learned
absolute positions, token-type embeddings.

Tensor names follow the widely used BERT export (``encoder.layer.{i}.attention.self.query.
weight`` ``[d, d]``, out x in; ``attention.output.LayerNorm`` after the attention's residual
add, ``output.LayerNorm`` after the MLP's), with or without the ``bert.`` prefix. The token
table adds the token-type-0 row to every embedding, as the reference implementation does
for a single-segment input.

Readout for the OV analysis: the masked-LM head's decoder matrix when the checkpoint has
one (its transform, a dense layer with activation and LayerNorm, is left out, and said
so); without a head, the input embedding, and said so.
"""

from __future__ import annotations

from ..errors import CompositionError
from .weights import Attention, Layer, Norm, Weights
from ._build import (activation, assemble, config_sizes, family_matches, layernorm, linear_heads, linear_mlp, prefixed,
                     unembedding)
from .files import TensorSource

_IDENTITY = Norm("identity", None, None)


def matches(config: dict) -> bool:
    return family_matches(config, ("bert",), ("Bert",))


def read(src: TensorSource, config: dict) -> Weights:
    fam = "BERT-style"
    d, H, L, V, dh, m = config_sizes(config, fam)
    eps = float(config.get("layer_norm_eps", 1e-12))
    act = activation(config, "hidden_act", "gelu")
    kind = config.get("position_embedding_type", "absolute") or "absolute"
    if kind != "absolute":
        raise CompositionError(f"the config's position_embedding_type {kind!r} is not supported (only 'absolute').")
    pre, get = prefixed(src, "bert.", "embeddings.word_embeddings.weight")

    def norm(name):
        return layernorm(get, name, d, eps)

    def load_layer(i: int) -> Layer:
        p = f"encoder.layer.{i}."
        s = p + "attention.self."
        W = {x: linear_heads(get(s + x + ".weight", (d, d)), H) for x in ("query", "key", "value")}  # [H, d, dh]
        b = {x: get(s + x + ".bias", (d,)).reshape(H, dh) for x in ("query", "key", "value")}  # [H, dh]
        W_O = get(p + "attention.output.dense.weight", (d, d)).T.reshape(H, dh, d).contiguous()  # [H, dh, d]
        attn = Attention(W["query"], W["key"], W["value"], W_O, b["query"], b["key"], b["value"],
                         get(p + "attention.output.dense.bias", (d,)), kv_heads=H)
        mlp = linear_mlp(get, p + "intermediate.dense", p + "output.dense", d, m, act)
        return Layer(norm(p + "attention.output.LayerNorm"), attn, norm(p + "output.LayerNorm"), mlp)

    e = "embeddings."
    W_E = get(e + "word_embeddings.weight", (V, d))  # [V, d]
    P = src.shape(pre + e + "position_embeddings.weight")[0] if src.has(pre + e + "position_embeddings.weight") else 0
    W_pos = get(e + "position_embeddings.weight", (P, d))  # [P, d]
    W_type = None
    if src.has(pre + e + "token_type_embeddings.weight"):
        n_types = src.shape(pre + e + "token_type_embeddings.weight")[0]
        W_type = get(e + "token_type_embeddings.weight", (n_types, d))[0].contiguous()  # [d]

    notes = []
    # a head with a transform but no decoder matrix: the decoder is tied to the embedding
    unembed = unembedding(src, ("cls.predictions.decoder.weight",), W_E, src.has("cls.predictions.transform.dense.weight"))
    if unembed is None:
        unembed = W_E.T.contiguous(), "input-embedding"  # [d, V]
        notes.append("the checkpoint has no language-model head: the input embedding is used as the "
                     "readout for the OV analysis.")
    if unembed[1] != "input-embedding":
        notes.append("the masked-LM head's transform (dense layer, activation, LayerNorm) and output bias "
                     "are left out of the readout.")
    return assemble("bert", src, config, W_E, unembed, _IDENTITY, L, load_layer, W_pos=W_pos, placement="post",
                    embed_norm=norm(e + "LayerNorm"), W_type=W_type, notes=tuple(notes))
