"""Independent dense float64 oracle for the key side, the value side and the
query side's mediation parts (docs/methods.md §3b), GPT-2 layout.

Written from docs/methods.md §1, §3 and §3b only (no code from the ``composition``
package), in plain NumPy float64, reusing the GPT-2 helpers of
``dense_gpt2``.  Every matrix is held whole ([V, V] included), and every
vector lives in the residual space ``R^d``: the projections of the mediation
parts are done there explicitly, one token at a time, not through head-space
factors.  Use with small models only.

Conventions as in ``dense_gpt2``: ``sd`` a GPT-2-layout state dict, ``cfg`` a
GPT-2 config dict, row vectors, ``table`` a ``[V, d]`` token table.
The unembedding ``W_U`` ``[d, V]`` is ``lm_head.weight`` transposed when the
state dict has one, else the tied ``wte.weight`` transposed.
"""

from __future__ import annotations

import numpy as np

from . import dense_gpt2 as og

__all__ = [
    "unembedding",
    "writer_write",
    "dense_key_matrix",
    "dense_value_matrix",
    "write_part",
    "dense_query_part_matrix",
    "write_fraction",
]


def _ln(w, cfg, layer, x):
    """Full LayerNorm ``N_l`` in front of layer ``layer``'s attention (``'f'``: the final norm)."""
    if layer == "f":
        return og.layer_norm(x, w["ln_f.weight"], w["ln_f.bias"], float(cfg.get("layer_norm_epsilon", 1e-5)))
    return og.layer_norm(x, w[f"h.{layer}.ln_1.weight"], w[f"h.{layer}.ln_1.bias"],
                         float(cfg.get("layer_norm_epsilon", 1e-5)))


def _lin(w, layer):
    """``Lin(N_l) = P diag(gamma)`` (docs/methods.md §1)."""
    g = w["ln_f.weight"] if layer == "f" else w[f"h.{layer}.ln_1.weight"]
    return og.layer_norm_linear_part(g)


def unembedding(sd):
    """``W_U`` ``[d, V]`` float64."""
    if "lm_head.weight" in sd:
        return np.asarray(sd["lm_head.weight"], dtype=np.float64).T
    return og.get_weights(sd)["wte.weight"].T


def writer_write(sd, cfg, table, writer):
    """docs/methods.md §3: ``o_U(t) = N_lU(T[t]) W_V^U W_O^U`` for every token, ``[V, d]`` (no value bias)."""
    w = og.get_weights(sd)
    lU, hU = int(writer[0]), int(writer[1])
    U = og.head_weights(w, cfg, lU, hU)
    return _ln(w, cfg, lU, np.asarray(table, dtype=np.float64)) @ U["W_V"] @ U["W_O"]


def dense_key_matrix(sd, cfg, table, writer, responder, rotation=None):
    """docs/methods.md §3b key side, ``S [V, V]``: row ``j`` = query token, column ``t`` = written token.

    ``S[j, t] = (N_lR(T[j]) W_Q^R + b_Q^R) . (o_U(t) Lin(N_lR) W_K^R) * scale``; with an
    optional ``rotation`` ``M`` ``[dh, dh]`` the score is ``q M k^T`` (docs/methods.md §3, row-vector form)."""
    w = og.get_weights(sd)
    lU, lR, hR = int(writer[0]), int(responder[0]), int(responder[1])
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    T = np.asarray(table, dtype=np.float64)
    R = og.head_weights(w, cfg, lR, hR)
    q = _ln(w, cfg, lR, T) @ R["W_Q"] + R["b_Q"]                         # [V, dh] query tokens
    k = writer_write(sd, cfg, T, writer) @ _lin(w, lR) @ R["W_K"]         # [V, dh] written tokens
    if rotation is not None:
        q = q @ np.asarray(rotation, dtype=np.float64)
    return (q @ k.T) * og.attn_scale(cfg, lR)


def dense_value_matrix(sd, cfg, table, writer, responder):
    """docs/methods.md §3b value side, ``F [V, V]``: row ``t`` = written token, column ``u`` = logit.

    ``F[t, u] = o_U(t) Lin(N_lR) W_V^R W_O^R Lin(N_f) W_U[:, u]``."""
    w = og.get_weights(sd)
    lU, lR, hR = int(writer[0]), int(responder[0]), int(responder[1])
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    R = og.head_weights(w, cfg, lR, hR)
    o = writer_write(sd, cfg, table, writer)                              # [V, d]
    return o @ _lin(w, lR) @ R["W_V"] @ R["W_O"] @ _lin(w, "f") @ unembedding(sd)


def write_part(sd, cfg, table, writer, part):
    """docs/methods.md §3b: ``o_U(t)`` (``full``), its projection on ``u_t`` = normalised
    ``Lin(N_f) W_U[:, t]`` (``unembed``), or the remainder (``rest``); ``[V, d]``.
    Computed token by token in the residual space."""
    w = og.get_weights(sd)
    o = writer_write(sd, cfg, table, writer)                              # [V, d]
    if part == "full":
        return o
    if part not in ("unembed", "rest"):
        raise ValueError(f"unknown part {part!r}")
    G = _lin(w, "f") @ unembedding(sd)                                    # [d, V]
    out = np.empty_like(o)
    for t in range(o.shape[0]):
        u = G[:, t] / np.linalg.norm(G[:, t])                             # [d] unit direction
        proj = np.dot(o[t], u) * u
        out[t] = proj if part == "unembed" else o[t] - proj
    return out


def dense_query_part_matrix(sd, cfg, table, writer, responder, part, rotation=None):
    """docs/methods.md §3 query side with the write replaced by a §3b part, ``S [V, V]``:
    ``S[t, j] = o_part(t) Lin(N_lR) W_Q^R . N_lR(T[j]) W_K^R * scale``; with an optional
    ``rotation`` ``M`` the score is ``q M k^T``."""
    w = og.get_weights(sd)
    lU, lR, hR = int(writer[0]), int(responder[0]), int(responder[1])
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    R = og.head_weights(w, cfg, lR, hR)
    q = write_part(sd, cfg, table, writer, part) @ _lin(w, lR) @ R["W_Q"]  # [V, dh]
    if rotation is not None:
        q = q @ np.asarray(rotation, dtype=np.float64)
    k = _ln(w, cfg, lR, np.asarray(table, dtype=np.float64)) @ R["W_K"]   # [V, dh]
    return (q @ k.T) * og.attn_scale(cfg, lR)


def write_fraction(sd, cfg, table, writer, part):
    """docs/methods.md §3b: mean over tokens of ``|o_part(t)|^2 / |o_U(t)|^2``."""
    o = writer_write(sd, cfg, table, writer)
    p = write_part(sd, cfg, table, writer, part)
    return float(np.mean(np.sum(p * p, axis=1) / np.sum(o * o, axis=1)))


# ---------------------------------------------------------------------------
# Any family, from canonical weights (composition.extract.weights.Weights, read by the
# package's checkpoint readers, which are themselves checked against
# transformers).  Norms, linear parts and residual paths are re-derived here
# from docs/methods.md §1 in NumPy; only the weights come from the package.
# ---------------------------------------------------------------------------

def _np(t):
    return None if t is None else t.detach().double().cpu().numpy()


def _norm_full(norm, x):
    """docs/methods.md §1: LayerNorm (population variance) or RMSNorm, row-wise; identity passes."""
    if norm.kind == "identity":
        return x
    if norm.kind == "layernorm":
        y = x - x.mean(-1, keepdims=True)
        y = y / np.sqrt((y * y).mean(-1, keepdims=True) + norm.eps)
    elif norm.kind == "rmsnorm":
        y = x / np.sqrt((x * x).mean(-1, keepdims=True) + norm.eps)
    else:
        raise ValueError(norm.kind)
    if norm.weight is not None:
        y = y * _np(norm.weight)
    if norm.bias is not None:
        y = y + _np(norm.bias)
    return y


def _norm_lin(norm, d):
    """docs/methods.md §1: ``Lin(N)`` = ``P diag(gamma)`` (LayerNorm), ``diag(gamma)`` (RMSNorm), I (identity)."""
    g = np.ones(d) if norm.weight is None else _np(norm.weight)
    if norm.kind == "identity":
        return np.eye(d)
    if norm.kind == "rmsnorm":
        return np.diag(g)
    return (np.eye(d) - np.ones((d, d)) / d) @ np.diag(g)


def _reads(w, layer):
    """The norm in front of a layer's attention; post-norm layers read the previous norm's output."""
    from composition.extract.weights import Norm

    return Norm("identity", None, None) if w.placement == "post" else w.layers[layer].attn_norm


def _path(w, start, stop):
    """Linear part from a write in layer ``start`` to what ``stop`` reads (``stop = 'out'``: the logits).

    Pre-norm/parallel: the residual is additive, only the reader's norm acts.  Post-norm
    (``x = N(x + sublayer(x))``): every norm after the write, up to the reader."""
    d = w.d_model
    P = np.eye(d)
    if w.placement == "post":
        end = w.n_layers if stop == "out" else stop
        for layer in range(start, end):
            P = P @ _norm_lin(w.layers[layer].attn_norm, d) @ _norm_lin(w.layers[layer].mlp_norm, d)
    elif stop != "out":
        P = _norm_lin(w.layers[stop].attn_norm, d)
    return P @ _norm_lin(w.final_norm, d) if stop == "out" else P


def canonical_matrix(w, table, writer, responder, side, part="full", rotation=None):
    """docs/methods.md §3/§3b dense ``[V, V]`` matrix of any family (rows as in the package's row orientation).

    ``rotation`` ``M`` ``[dh, dh]``: the score is ``q M k^T`` (query and key sides)."""
    T = np.asarray(table, dtype=np.float64)
    (lU, hU), (lR, hR) = writer, responder
    U, R = w.layers[lU].attn, w.layers[lR].attn
    o = _norm_full(_reads(w, lU), T) @ _np(U.W_V[hU]) @ _np(U.W_O[hU])       # [V, d] o_U(t)
    M = np.eye(w.d_head) if rotation is None else np.asarray(rotation, dtype=np.float64)
    to_R = _path(w, lU, lR)
    if side == "value":
        return o @ to_R @ _np(R.W_V[hR]) @ _np(R.W_O[hR]) @ _path(w, lR, "out") @ _np(w.W_U)
    if side == "key":
        q = _norm_full(_reads(w, lR), T) @ _np(R.W_Q[hR]) + _np(R.b_Q[hR])   # [V, dh] query tokens
        return q @ M @ (o @ to_R @ _np(R.W_K[hR])).T
    if part != "full":
        G = _path(w, lU, "out") @ _np(w.W_U)                                  # [d, V]
        u = (G / np.linalg.norm(G, axis=0, keepdims=True)).T                  # [V, d] unit rows
        proj = np.sum(o * u, axis=1, keepdims=True) * u
        o = proj if part == "unembed" else o - proj
    k = _norm_full(_reads(w, lR), T) @ _np(R.W_K[hR])                        # [V, dh]
    return (o @ to_R @ _np(R.W_Q[hR])) @ M @ k.T
