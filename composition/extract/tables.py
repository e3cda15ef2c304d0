"""Norms, activations and token tables (docs/methods.md §1-§2).

A token table ``T`` ``[V, d]`` stands for what the residual stream holds at a position
whose token is ``t``, before heads move information between positions. All arithmetic
here is float64; rows are processed in blocks so the MLP's hidden width never costs
``V x m`` memory at once.

GELU: Hendrycks & Gimpel 2016, "Gaussian Error Linear Units (GELUs)".
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch

from ..errors import CompositionError
from .weights import MLP, Attention, Norm, Weights

TABLES = ("embed", "mlp0", "attn0-mlp0")
_BLOCK = 4096


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
    layer0 = w.layers[0]
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
