"""Norms, activations and token tables (docs/methods.md §1-§2).

A token table ``T`` ``[V, d]`` stands for what the residual stream holds at a position
whose token is ``t``, before heads move information between positions. All arithmetic
here is float64; rows are processed in blocks of ``_BLOCK`` rows so the MLP's hidden width
costs ``_BLOCK x m`` (and a few temporaries of it), never ``V x m``. Each row of a block is
computed by the same operations whatever the block size (row-wise norms, matrix products
split along rows only), so the block size changes memory, not a number.

Once the table is built, the embedding and the MLP weights are no longer read by a scan:
:func:`release_table_inputs` gives the weights without them (docs/performance.md, memory).

GELU: Hendrycks & Gimpel 2016, "Gaussian Error Linear Units (GELUs)".
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import torch

from ..errors import CompositionError
from ..memory import return_freed
from ._build import LazyLayers
from .weights import MLP, Attention, Layer, Norm, Weights

TABLES = ("embed", "mlp0", "attn0-mlp0")
_BLOCK = 1024  # rows per block: hidden activations [1024, m] float64 (GPT-2 small: 24 MiB each)


@dataclass(frozen=True)
class TableOptions:
    """Which token table to build: ``kind`` one of TABLES; ``position`` None, "mean" or an int."""

    kind: str = "attn0-mlp0"
    position: int | str | None = None

    def describe(self) -> str:
        pos = "none" if self.position is None else str(self.position)
        return f"{self.kind} (position {pos})"


def apply_norm(norm: Norm, x: torch.Tensor) -> torch.Tensor:
    """The full norm ``N(x)`` row-wise. # x [..., d] -> [..., d]"""
    if norm.kind == "identity":
        return x
    if norm.kind == "layernorm":
        mu = x.mean(-1, keepdim=True)
        var = (x - mu).pow(2).mean(-1, keepdim=True)  # population variance
        y = (x - mu) / torch.sqrt(var + norm.eps)
    elif norm.kind == "rmsnorm":
        y = x / torch.sqrt(x.pow(2).mean(-1, keepdim=True) + norm.eps)
    else:
        raise CompositionError(f"norm kind {norm.kind!r} is not supported.")
    if norm.weight is not None:
        y = y * norm.weight.to(x.dtype)
    if norm.bias is not None:
        y = y + norm.bias.to(x.dtype)
    return y


def norm_linear_part(norm: Norm, d: int) -> torch.Tensor:
    """``Lin(N)`` ``[d, d]``: ``P diag(gamma)`` for LayerNorm, ``diag(gamma)`` for RMSNorm (docs/methods.md §1)."""
    gamma = torch.ones(d, dtype=torch.float64) if norm.weight is None else norm.weight.double()
    if norm.kind == "identity":
        return torch.eye(d, dtype=torch.float64)
    if norm.kind == "rmsnorm":
        return torch.diag(gamma)
    if norm.kind == "layernorm":
        P = torch.eye(d, dtype=torch.float64) - 1.0 / d  # centering
        return P * gamma  # P @ diag(gamma): column j scaled by gamma_j
    raise CompositionError(f"norm kind {norm.kind!r} is not supported.")


def activate(name: str, x: torch.Tensor) -> torch.Tensor:
    """The MLP activation. # x [..., m] -> [..., m]"""
    if name == "gelu":
        return 0.5 * x * (1.0 + torch.erf(x / math.sqrt(2.0)))
    if name == "gelu-tanh":
        return 0.5 * x * (1.0 + torch.tanh(math.sqrt(2.0 / math.pi) * (x + 0.044715 * x.pow(3))))
    if name == "relu":
        return torch.clamp_min(x, 0.0)
    if name == "silu":
        return x * torch.sigmoid(x)
    raise CompositionError(f"activation {name!r} is not supported.")


def apply_mlp(mlp: MLP, x: torch.Tensor) -> torch.Tensor:
    """The MLP on rows of ``x``. # x [B, d] -> [B, d]"""
    h = x @ mlp.W_in.double() + mlp.b_in.double()  # [B, m]
    if mlp.W_gate is not None:
        gate = x @ mlp.W_gate.double()  # [B, m]
        if mlp.b_gate is not None:
            gate = gate + mlp.b_gate.double()
        h = activate(mlp.activation, gate) * h
    else:
        h = activate(mlp.activation, h)
    return h @ mlp.W_out.double() + mlp.b_out.double()  # [B, d]


def self_attention_output(attn: Attention, x_normed: torch.Tensor) -> torch.Tensor:
    """All heads attending only to their own position. # x_normed [B, d] -> [B, d]"""
    v = torch.einsum("bd,hde->hbe", x_normed, attn.W_V.double()) + attn.b_V.double()[:, None, :]  # [H, B, dh]
    return torch.einsum("hbe,hed->bd", v, attn.W_O.double()) + attn.b_O.double()  # [B, d]


def position_row(w: Weights, position: int | str | None) -> torch.Tensor | None:
    """The position embedding row ``p`` added to every token (docs/methods.md §2). # -> [d] or None"""
    if position is None:
        return None
    if w.W_pos is None:
        raise CompositionError("--position needs learned position embeddings, which this model does not have.")
    if position == "mean":
        return w.W_pos[:1024].double().mean(0)
    idx = int(position)
    if not 0 <= idx < w.W_pos.shape[0]:
        raise CompositionError(f"--position {idx} is outside the model's {w.W_pos.shape[0]} positions.")
    return w.W_pos[idx].double()


def token_table(w: Weights, options: TableOptions = TableOptions()) -> torch.Tensor:
    """The token table ``T`` (docs/methods.md §2). # -> [V, d] float64"""
    if options.kind not in TABLES:
        raise CompositionError(f"--table {options.kind!r} is not one of: {', '.join(TABLES)}.")
    p = position_row(w, options.position)
    V = w.vocab_size
    out = torch.empty(V, w.d_model, dtype=torch.float64)
    layer0 = _as_float64(w.layers[0]) if options.kind != "embed" else None  # converted once, not per block
    for start in range(0, V, _BLOCK):
        x = w.W_E[start:start + _BLOCK].double()  # [B, d]
        if p is not None:
            x = x + p
        if w.W_type is not None:
            x = x + w.W_type.double()
        if w.embed_norm is not None:
            x = apply_norm(w.embed_norm, x)
        if options.kind != "embed":
            x = _block0(w, layer0, x, with_attention=options.kind == "attn0-mlp0")
        out[start:start + x.shape[0]] = x
    return out


def _as_float64(layer: Layer) -> Layer:
    """A layer with its attention and MLP tensors in float64 (the values the blocks would convert)."""
    def conv(part):
        return dataclasses.replace(part, **{f.name: getattr(part, f.name).double() for f in dataclasses.fields(part)
                                            if isinstance(getattr(part, f.name), torch.Tensor)})
    return dataclasses.replace(layer, attn=conv(layer.attn), mlp=conv(layer.mlp))


def release_table_inputs(w: Weights) -> Weights:
    """The weights without what only the token table reads: the MLP weights of every layer and,
    for a tied readout, the separate embedding copy (``W_E`` becomes a view of ``W_U``).

    Shapes, activations, norms, the attention weights and ``W_U`` stay, so every factor, the
    head profiles, the model-space scores, :meth:`Weights.settings` and the sizes are unchanged;
    the MLP tensors are empty (``[0]``) and a token table or a fingerprint cannot be computed
    from the result: compute them first. Layers read lazily stay lazy: a layer loaded later is
    released on loading. # GPT-2 small: 216 MiB of MLP weights, 147 MiB of embedding
    """
    W_E = w.W_E
    if w.readout == "tied" and tuple(w.W_U.shape) == tuple(W_E.shape[::-1]) and torch.equal(w.W_U.T, W_E):
        W_E = w.W_U.T  # [V, d] view: the same values, no second copy
    fields = {f.name: getattr(w, f.name) for f in dataclasses.fields(Weights)}
    return _Released(**dict(fields, W_E=W_E, layers=_layers_without_mlp(w.layers)),
                     full_tensor_fingerprint=w.tensor_fingerprint())


@dataclass(frozen=True)
class _Released(Weights):
    """Weights after :func:`release_table_inputs`: their fingerprint is that of the full weights
    (computed before the release), so a resumed scan recognises its checkpoint."""

    full_tensor_fingerprint: str = ""

    def tensor_fingerprint(self) -> str:
        return self.full_tensor_fingerprint


def table_inputs(w: Weights) -> Weights:
    """The part of the weights the token table reads: the embedding, positions and layer 0
    (a one-layer view of ``w``; the other layers are not held for it)."""
    return dataclasses.replace(w, layers=(w.layers[0],))


_EMPTY = torch.empty(0)


def _without_mlp(layer: Layer) -> Layer:
    mlp = layer.mlp
    gate = None if mlp.W_gate is None else _EMPTY
    return dataclasses.replace(layer, mlp=MLP(_EMPTY, _EMPTY, _EMPTY, _EMPTY, mlp.activation, gate,
                                              None if mlp.b_gate is None else _EMPTY))


def _layers_without_mlp(layers):
    """Every layer with its MLP released. Layers a reader loads lazily (``LazyLayers``) stay lazy:
    they are read again through the reader's loader and released on loading, so the reader's
    cache of full layers is dropped with the old weights."""
    load = getattr(layers, "_load", None)
    if isinstance(layers, LazyLayers) and load is not None:
        def released(i: int) -> Layer:
            layer = _without_mlp(load(i))
            return_freed()  # the MLP tensors just read (each under the C library's mapping threshold)
            return layer
        return LazyLayers(len(layers), released)
    return tuple(_without_mlp(layers[i]) for i in range(len(layers)))


def _block0(w: Weights, layer, x: torch.Tensor, with_attention: bool) -> torch.Tensor:
    """Block 0 with every head attending to its own position. # x [B, d] -> [B, d]"""
    if w.placement == "post":  # x = N(x + sublayer(x)); skipping attention still passes its norm
        x = apply_norm(layer.attn_norm, x + self_attention_output(layer.attn, x) if with_attention else x)
        return apply_norm(layer.mlp_norm, x + apply_mlp(layer.mlp, x))
    attn = self_attention_output(layer.attn, apply_norm(layer.attn_norm, x)) if with_attention else 0.0
    if w.placement == "parallel":
        return x + attn + apply_mlp(layer.mlp, apply_norm(layer.mlp_norm, x))
    x = x + attn
    return x + apply_mlp(layer.mlp, apply_norm(layer.mlp_norm, x))
