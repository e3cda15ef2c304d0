"""Independent dense float64 oracle for the key side, the value side and the
query side's mediation parts (METHODS §3b), GPT-2 layout.

Written from METHODS.md §1, §3 and §3b only (no code from the ``composition``
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
    """``Lin(N_l) = P diag(gamma)`` (METHODS §1)."""
    g = w["ln_f.weight"] if layer == "f" else w[f"h.{layer}.ln_1.weight"]
    return og.layer_norm_linear_part(g)


def unembedding(sd):
    """``W_U`` ``[d, V]`` float64."""
    if "lm_head.weight" in sd:
        return np.asarray(sd["lm_head.weight"], dtype=np.float64).T
    return og.get_weights(sd)["wte.weight"].T


def writer_write(sd, cfg, table, writer):
    """METHODS §3: ``o_U(t) = N_lU(T[t]) W_V^U W_O^U`` for every token, ``[V, d]`` (no value bias)."""
    w = og.get_weights(sd)
    lU, hU = int(writer[0]), int(writer[1])
    U = og.head_weights(w, cfg, lU, hU)
    return _ln(w, cfg, lU, np.asarray(table, dtype=np.float64)) @ U["W_V"] @ U["W_O"]


def dense_key_matrix(sd, cfg, table, writer, responder, rotation=None):
    """METHODS §3b key side, ``S [V, V]``: row ``j`` = query token, column ``t`` = written token.

    ``S[j, t] = (N_lR(T[j]) W_Q^R + b_Q^R) . (o_U(t) Lin(N_lR) W_K^R) * scale``; with an
    optional ``rotation`` ``M`` ``[dh, dh]`` the score is ``q M k^T`` (METHODS §3, row-vector form)."""
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
    """METHODS §3b value side, ``F [V, V]``: row ``t`` = written token, column ``u`` = logit.

    ``F[t, u] = o_U(t) Lin(N_lR) W_V^R W_O^R Lin(N_f) W_U[:, u]``."""
    w = og.get_weights(sd)
    lU, lR, hR = int(writer[0]), int(responder[0]), int(responder[1])
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    R = og.head_weights(w, cfg, lR, hR)
    o = writer_write(sd, cfg, table, writer)                              # [V, d]
    return o @ _lin(w, lR) @ R["W_V"] @ R["W_O"] @ _lin(w, "f") @ unembedding(sd)


def write_part(sd, cfg, table, writer, part):
    """METHODS §3b: ``o_U(t)`` (``full``), its projection on ``u_t`` = normalised
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


def dense_query_part_matrix(sd, cfg, table, writer, responder, part):
    """METHODS §3 query side with the write replaced by a §3b part, ``S [V, V]``:
    ``S[t, j] = o_part(t) Lin(N_lR) W_Q^R . N_lR(T[j]) W_K^R * scale``."""
    w = og.get_weights(sd)
    lU, lR, hR = int(writer[0]), int(responder[0]), int(responder[1])
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    R = og.head_weights(w, cfg, lR, hR)
    q = write_part(sd, cfg, table, writer, part) @ _lin(w, lR) @ R["W_Q"]  # [V, dh]
    k = _ln(w, cfg, lR, np.asarray(table, dtype=np.float64)) @ R["W_K"]   # [V, dh]
    return (q @ k.T) * og.attn_scale(cfg, lR)


def write_fraction(sd, cfg, table, writer, part):
    """METHODS §3b: mean over tokens of ``|o_part(t)|^2 / |o_U(t)|^2``."""
    o = writer_write(sd, cfg, table, writer)
    p = write_part(sd, cfg, table, writer, part)
    return float(np.mean(np.sum(p * p, axis=1) / np.sum(o * o, axis=1)))
