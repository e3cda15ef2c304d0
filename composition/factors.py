"""Factored writer -> responder token matrices (METHODS §3).

The token matrix ``S = left @ right.T`` (times the attention scale, which no rank sees) is
only ever held as its two ``[V, r]`` factors, ``r <= dh``. Query side, row orientation:

    left  = A_U @ C_UR      A_U  = N_lU(T) W_V^U              [V, dh]  once per writer
                            C_UR = W_O^U Lin(N_lR) W_Q^R       [dh, dh] once per pair
    right = K_R             K_R  = N_lR(T) W_K^R               [V, dh]  once per responder

Left out, as METHODS §3 explains: the value bias (a constant write), the query constant
``beta W_Q + b_Q`` and the norm's division (per-row positive scale), and the key bias
(constant along a row). Column orientation compares ``S[j, j]`` within column ``j``: the
same factors with ``left`` and ``right`` swapped.

QK/OV view: Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits".
"""

from __future__ import annotations

import torch

from .errors import CompositionError
from .tables import apply_norm, norm_linear_part
from .weights import Norm, Weights

ORIENTATIONS = ("row", "column")
_IDENTITY = Norm("identity", None, None)
_BLOCK = 4096


def input_norm(w: Weights, layer: int) -> Norm:
    """``N_l``: the norm applied to the residual before layer ``l``'s attention reads it.

    Post-norm: none, the residual a layer reads is already the previous layer's norm output.
    """
    return _IDENTITY if w.placement == "post" else w.layers[layer].attn_norm


def residual_path(w: Weights, writer_layer: int, responder_layer: int) -> torch.Tensor:
    """The linear part of the path from a write in ``writer_layer`` to what ``responder_layer``'s
    attention reads (METHODS §1, §3). # -> [d, d]

    Pre-norm and parallel: ``Lin(N_lR)``. Post-norm: the write passes every norm after the
    residual adds in between, ``Lin(N_attn,lU) Lin(N_mlp,lU) ... Lin(N_mlp,lR-1)``; each norm's
    division is a positive per-row scale and its bias a constant, both left out as in §3.
    """
    d = w.d_model
    if w.placement != "post":
        return norm_linear_part(input_norm(w, responder_layer), d)
    path = torch.eye(d, dtype=torch.float64)
    for layer in range(writer_layer, responder_layer):
        for norm in (w.layers[layer].attn_norm, w.layers[layer].mlp_norm):
            path = path @ norm_linear_part(norm, d)  # [d, d]
    return path


def _normed_projection(w: Weights, table: torch.Tensor, layer: int, which: str) -> torch.Tensor:
    """``N_l(T) W`` for every head, W one of ``W_V``/``W_K``/``W_Q``. # table [V, d] -> [H, V, dh]"""
    W = getattr(w.layers[layer].attn, which).double()  # [H, d, dh]
    norm = input_norm(w, layer)
    out = torch.empty(W.shape[0], table.shape[0], W.shape[2], dtype=torch.float64)
    for start in range(0, table.shape[0], _BLOCK):
        x = apply_norm(norm, table[start:start + _BLOCK])  # [B, d]
        out[:, start:start + x.shape[0]] = torch.einsum("bd,hde->hbe", x, W)
    return out


def writer_values(w: Weights, table: torch.Tensor, layer: int) -> torch.Tensor:
    """``A_U = N_lU(T) W_V^U`` for every head of ``layer``. # table [V, d] -> [H, V, dh]"""
    return _normed_projection(w, table, layer, "W_V")


def responder_keys(w: Weights, table: torch.Tensor, layer: int) -> torch.Tensor:
    """``K_R = N_lR(T) W_K^R`` for every head of ``layer``, key bias left out. # -> [H, V, dh]"""
    return _normed_projection(w, table, layer, "W_K")


def query_middles(w: Weights, writer_layer: int, writer_head: int, responder_layer: int,
                  rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``C_UR = W_O^U Lin(N_lR) W_Q^R [M]`` for every responder head of a layer. # -> [H_R, dh, dh]

    ``rotation`` ``[dh, dh]``: the rotary ``M(delta)`` or its average over offsets
    (composition.rotary), folded in on the right; None for no rotation (delta = 0).
    """
    if responder_layer <= writer_layer:
        raise CompositionError(
            f"responder layer {responder_layer} must come after writer layer {writer_layer}."
        )
    W_O = w.layers[writer_layer].attn.W_O[writer_head].double()  # [dh, d]
    lin = residual_path(w, writer_layer, responder_layer)  # [d, d]
    W_Q = w.layers[responder_layer].attn.W_Q.double()  # [H, d, dh]
    middles = torch.einsum("ed,df,hfg->heg", W_O, lin, W_Q)  # [H, dh, dh]
    if rotation is not None:
        middles = middles @ rotation.double()  # [H, dh, dh]
    return middles


def query_side(A_writer: torch.Tensor, middle: torch.Tensor, K_responder: torch.Tensor,
               orientation: str = "row") -> tuple[torch.Tensor, torch.Tensor]:
    """The two factors whose product's diagonal is ranked within rows.

    # A_writer [V, dh], middle [dh, dh], K_responder [V, dh] -> left [V, dh], right [V, dh]
    Row orientation: ``(A C, K)``; column orientation: ``(K, A C)`` (the transpose).
    """
    Q = A_writer @ middle  # [V, dh]
    if orientation == "row":
        return Q, K_responder
    if orientation == "column":
        return K_responder, Q
    raise CompositionError(f"--orientation {orientation!r} is not one of: {', '.join(ORIENTATIONS)}.")
