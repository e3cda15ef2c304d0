"""Factored writer -> responder token matrices (docs/methods.md §3).

The token matrix ``S = left @ right.T`` (times the attention scale, which no rank sees) is
only ever held as its two ``[V, r]`` factors, ``r <= dh``. Query side, row orientation:

    left  = A_U @ C_UR      A_U  = N_lU(T) W_V^U              [V, dh]  once per writer
                            C_UR = W_O^U Lin(N_lR) W_Q^R       [dh, dh] once per pair
    right = K_R             K_R  = N_lR(T) W_K^R               [V, dh]  once per responder

Left out, as docs/methods.md §3 explains: the value bias (a constant write), the query constant
``beta W_Q + b_Q`` and the norm's division (per-row positive scale), and the key bias
(constant along a row). Column orientation compares ``S[j, j]`` within column ``j``: the
same factors with ``left`` and ``right`` swapped.

QK/OV view: Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits".
"""

from __future__ import annotations

import torch

from ..errors import CompositionError
from ..extract.tables import apply_norm, norm_linear_part
from ..extract.weights import Norm, Weights

_IDENTITY = Norm("identity", None, None)
_BLOCK = 1024  # rows per block: the norm's temporaries are [1024, d] float64 (rows are independent)


def input_norm(w: Weights, layer: int) -> Norm:
    """``N_l``: the norm applied to the residual before layer ``l``'s attention reads it.

    Post-norm: none, the residual a layer reads is already the previous layer's norm output.
    """
    return _IDENTITY if w.placement == "post" else w.layers[layer].attn_norm


def residual_path(w: Weights, writer_layer: int, responder_layer: int) -> torch.Tensor:
    """The linear part of the path from a write in ``writer_layer`` to what ``responder_layer``'s
    attention reads (docs/methods.md §1, §3). # -> [d, d]

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


def _normed_projection(w: Weights, table: torch.Tensor, layer: int, which: str, heads=None) -> torch.Tensor:
    """``N_l(T) W`` for every head (or the heads listed in ``heads``), W one of ``W_V``/``W_K``/``W_Q``.

    # table [V, d] -> [H, V, dh] (or [len(heads), V, dh])
    Each block of rows is projected on every head at once and only the listed heads are kept, so
    a head's values are the same bits whichever heads are asked for (a product over fewer heads
    would round differently); the memory held is that of the listed heads.
    """
    W = getattr(w.layers[layer].attn, which).double()  # [H, d, dh]
    keep = None if heads is None else [int(h) for h in heads]
    norm = input_norm(w, layer)
    out = torch.empty(W.shape[0] if keep is None else len(keep), table.shape[0], W.shape[2], dtype=torch.float64)
    for start in range(0, table.shape[0], _BLOCK):
        x = apply_norm(norm, table[start:start + _BLOCK])  # [B, d]
        y = torch.einsum("bd,hde->hbe", x, W)  # [H, B, dh]
        out[:, start:start + x.shape[0]] = y if keep is None else y[keep]
    return out


def writer_values(w: Weights, table: torch.Tensor, layer: int, heads=None) -> torch.Tensor:
    """``A_U = N_lU(T) W_V^U`` for every head of ``layer`` (or of ``heads``). # table [V, d] -> [H, V, dh]"""
    return _normed_projection(w, table, layer, "W_V", heads)


def responder_keys(w: Weights, table: torch.Tensor, layer: int, heads=None) -> torch.Tensor:
    """``K_R = N_lR(T) W_K^R`` for every head of ``layer`` (or of ``heads``), key bias left out. # -> [H, V, dh]"""
    return _normed_projection(w, table, layer, "W_K", heads)


def query_middles(w: Weights, writer_layer: int, writer_head: int, responder_layer: int,
                  rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``C_UR = W_O^U Lin(N_lR) W_Q^R [M]`` for every responder head of a layer. # -> [H_R, dh, dh]

    ``rotation`` ``[dh, dh]``: the rotary ``M(delta)`` or its average over offsets
    (composition.extract.rotary), folded in on the right; None for no rotation (delta = 0).
    """
    _check_layers(writer_layer, responder_layer)
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
    return _oriented(A_writer @ middle, K_responder, orientation)  # [V, dh], [V, dh]


# ---------------------------------------------------------------------------
# Other sides and the query side's mediation parts (docs/methods.md §3b)
#
#   key side    S[j, t] = q_R(j) . k_U(t)   rows: query tokens j, columns: written tokens t
#               q_R = N_lR(T) W_Q^R + b_Q^R                       [V, dh] once per responder
#               k_U = A_U (W_O^U Lin(N_lR) W_K^R)                 [V, dh] per pair
#   value side  F[t, u] = o_U(t) Lin(N_lR) W_V^R W_O^R Lin(N_f) W_U[:, u]
#               left  = A_U (W_O^U Lin(N_lR) W_V^R)               [V, dh] per pair
#               right = (W_O^R Lin(N_f) W_U)^T                    [V, dh] once per responder
#   query parts o_U(t) = alpha_t u_t + rest_t,  u_t = Lin(N_f) W_U[:, t] / |.|,  alpha_t = o_U(t) . u_t
#               unembed: left = alpha * (U Lin(N_lR) W_Q^R)       [V, dh]: rows of a fixed matrix, signed scales
#               rest:    left = A_U C_UR - unembed left           [V, dh]: a difference of two factors
# Nothing [V, V] is ever formed. Lin(N_lR) stands for residual_path (post-norm: every norm in
# between), Lin(N_f) for readout_path; a rotary M folds as q M on queries and k M^T on the
# key side's written-token keys, so every score is q M k^T.
# Virtual heads (value side): Elhage et al. 2021, §"Virtual Attention Heads"; the key side's
# induction pattern: Olsson et al. 2022, "In-context Learning and Induction Heads".
# ---------------------------------------------------------------------------

def _oriented(row_left: torch.Tensor, row_right: torch.Tensor, orientation: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Row orientation as given; column orientation swaps the factors. # [V, r], [V, r] -> [V, r], [V, r]

    Options are validated where they enter (composition.options, composition.compose.sides); a
    wrong value here is a programming error.
    """
    if orientation not in ("row", "column"):
        raise ValueError(f"orientation {orientation!r}")
    return (row_left, row_right) if orientation == "row" else (row_right, row_left)


def _check_layers(writer_layer: int, responder_layer: int) -> None:
    if responder_layer <= writer_layer:
        raise CompositionError(
            f"responder layer {responder_layer} must come after writer layer {writer_layer}."
        )


def _writer_read(w: Weights, writer_layer: int, writer_head: int, responder_layer: int, which: str,
                 rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``W_O^U Lin(N_lR) W^R [M^T]`` for every responder head, W one of W_K/W_V. # -> [H_R, dh, dh]"""
    _check_layers(writer_layer, responder_layer)
    W_O = w.layers[writer_layer].attn.W_O[writer_head].double()  # [dh, d]
    lin = residual_path(w, writer_layer, responder_layer)  # [d, d]
    W = getattr(w.layers[responder_layer].attn, which).double()  # [H, d, dh]
    out = torch.einsum("ed,df,hfg->heg", W_O, lin, W)  # [H, dh, dh]
    if rotation is not None:
        out = out @ rotation.double().transpose(-1, -2)  # [H, dh, dh]
    return out


def responder_queries(w: Weights, table: torch.Tensor, layer: int, heads=None) -> torch.Tensor:
    """Key side: the full token-table query ``N_lR(T) W_Q^R + b_Q^R`` of every head (or of ``heads``).

    # table [V, d] -> [H, V, dh]"""
    b_Q = w.layers[layer].attn.b_Q.double()  # [H, dh]
    if heads is not None:
        b_Q = b_Q[[int(h) for h in heads]]
    queries = _normed_projection(w, table, layer, "W_Q", heads)  # [H, V, dh]
    queries += b_Q[:, None, :]  # in place: the same sums, no second [H, V, dh]
    return queries


def key_middles(w: Weights, writer_layer: int, writer_head: int, responder_layer: int,
                rotation: torch.Tensor | None = None) -> torch.Tensor:
    """Key side: ``W_O^U Lin(N_lR) W_K^R`` for every responder head of a layer. # -> [H_R, dh, dh]

    The written-token keys are ``A_U @ middle``. ``rotation``: an optional averaged rotary matrix
    ``M`` ``[dh, dh]`` (or ``[H_R, dh, dh]``) in the row-vector form of the score ``q M k^T``; it is
    folded into the key as ``k M^T``.
    """
    return _writer_read(w, writer_layer, writer_head, responder_layer, "W_K", rotation)


def key_side(A_writer: torch.Tensor, middle: torch.Tensor, Q_responder: torch.Tensor,
             orientation: str = "row") -> tuple[torch.Tensor, torch.Tensor]:
    """The key side's two factors, ``S[j, t] = Q_R[j] . (A_U middle)[t]``.

    # A_writer [V, dh], middle [dh, dh], Q_responder [V, dh] -> left [V, dh], right [V, dh]
    Row orientation (default): ``(Q_R, A_U middle)``, a query token chooses among written tokens
    (assumes a common residual scale at every source position). Column orientation:
    ``(A_U middle, Q_R)``, a written token across query tokens (free of the keys' scales).
    """
    return _oriented(Q_responder, A_writer @ middle, orientation)  # [V, dh], [V, dh]


def value_middles(w: Weights, writer_layer: int, writer_head: int, responder_layer: int) -> torch.Tensor:
    """Value side: ``W_O^U Lin(N_lR) W_V^R`` for every responder head of a layer. # -> [H_R, dh, dh]"""
    return _writer_read(w, writer_layer, writer_head, responder_layer, "W_V")


def readout_path(w: Weights, layer: int) -> torch.Tensor:
    """The linear part of the path from a write in ``layer`` to the logits. # -> [d, d]

    Pre-norm and parallel: ``Lin(N_f)``. Post-norm: every norm after the residual adds from
    ``layer`` on, then ``Lin(N_f)`` (the identity for encoders), as in :func:`residual_path`.
    """
    d = w.d_model
    path = torch.eye(d, dtype=torch.float64)
    if w.placement == "post":
        for later in range(layer, w.n_layers):
            for norm in (w.layers[later].attn_norm, w.layers[later].mlp_norm):
                path = path @ norm_linear_part(norm, d)  # [d, d]
    return path @ norm_linear_part(w.final_norm, d)  # [d, d]


def responder_readouts(w: Weights, layer: int) -> torch.Tensor:
    """Value side: ``(W_O^R Lin(N_f) W_U)^T`` for every head of ``layer``. # -> [H, V, dh]"""
    W_O = w.layers[layer].attn.W_O.double()  # [H, dh, d]
    lin = readout_path(w, layer)  # [d, d]
    W_U = w.W_U.double()  # [d, V]
    return torch.einsum("hed,dv->hve", W_O @ lin, W_U)  # [H, V, dh]


def value_side(A_writer: torch.Tensor, middle: torch.Tensor, readout: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """The value side's two factors, ``F[t, u] = (A_U middle)[t] . readout[u]``, row orientation only
    (``composition.compose.sides.value`` refuses columns).

    # A_writer [V, dh], middle [dh, dh], readout [V, dh] -> left [V, dh], right [V, dh]
    """
    return A_writer @ middle, readout  # [V, dh], [V, dh]


def unembed_directions(w: Weights, writer_layer: int) -> torch.Tensor:
    """Each token's effective unembedding direction ``u_t``: ``Lin(N_f) W_U[:, t]``, normalised.

    # -> [V, d] float64, one unit row per token (a zero column of W_U gives a zero row)
    Post-norm models: the whole path from a write in ``writer_layer`` to the logits
    (:func:`readout_path`); pre-norm models do not depend on the layer.
    """
    lin = readout_path(w, writer_layer)  # [d, d]
    U = (lin @ w.W_U.double()).T  # [V, d]
    n = U.norm(dim=1, keepdim=True)  # [V, 1]
    return U / torch.where(n > 0, n, torch.ones_like(n))  # [V, d]


def unembed_coefficients(A_writer: torch.Tensor, W_O_writer: torch.Tensor, directions: torch.Tensor) -> torch.Tensor:
    """``alpha_t = o_U(t) . u_t``, the signed length of the write along its token's direction.

    # A_writer [V, dh], W_O_writer [dh, d], directions [V, d] -> [V]
    """
    return (A_writer * (directions @ W_O_writer.double().T)).sum(1)  # [V]


def unembed_queries(w: Weights, directions: torch.Tensor, writer_layer: int, layer: int,
                    rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``u_t Lin(N_lR) W_Q^R [M]`` for every head of ``layer``: the query of a unit write along ``u_t``.

    # directions [V, d] -> [H, V, dh]; ``rotation`` as in :func:`query_middles`, folded as ``q M``.
    """
    _check_layers(writer_layer, layer)
    lin = residual_path(w, writer_layer, layer)  # [d, d]
    W_Q = w.layers[layer].attn.W_Q.double()  # [H, d, dh]
    out = torch.einsum("vd,hde->hve", directions @ lin, W_Q)  # [H, V, dh]
    if rotation is not None:
        out = out @ rotation.double()  # [H, V, dh]
    return out


def query_part_side(A_writer: torch.Tensor, middle: torch.Tensor, K_responder: torch.Tensor, part: str,
                    alpha: torch.Tensor | None = None, unembed_query: torch.Tensor | None = None,
                    orientation: str = "row") -> tuple[torch.Tensor, torch.Tensor]:
    """The query side's factors with the write replaced by one of its parts.

    # A_writer [V, dh], middle [dh, dh], K_responder [V, dh], alpha [V], unembed_query [V, dh]
    # -> left [V, dh], right [V, dh]
    ``full``: the whole write (as :func:`query_side`); ``unembed``: ``alpha_t u_t``, i.e. the rows of
    ``unembed_query`` scaled by ``alpha``; ``rest``: the full query factor minus the unembed one.
    """
    if part == "full":
        return query_side(A_writer, middle, K_responder, orientation)
    projected = alpha[:, None] * unembed_query  # [V, dh]
    left = projected if part == "unembed" else A_writer @ middle - projected  # [V, dh]
    return _oriented(left, K_responder, orientation)


def write_fraction(A_writer: torch.Tensor, W_O_writer: torch.Tensor, part: str,
                   alpha: torch.Tensor | None = None) -> float:
    """Mean over written tokens of ``|o_part(t)|^2 / |o_U(t)|^2`` (docs/methods.md §3b); tokens with a zero write are skipped.

    # A_writer [V, dh], W_O_writer [dh, d], alpha [V] -> float
    """
    W_O = W_O_writer.double()  # [dh, d]
    total = ((A_writer @ (W_O @ W_O.T)) * A_writer).sum(1)  # [V] |o_U(t)|^2
    keep = total > 0
    if not bool(keep.any()):
        return float("nan")
    if part == "full":
        return 1.0
    share = alpha[keep] ** 2 / total[keep]  # [V'] fraction along u_t
    return float((share if part == "unembed" else 1.0 - share).mean())
