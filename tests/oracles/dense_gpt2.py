"""Independent dense float64 oracle for GPT-2-layout checkpoints.

Written from docs/methods.md only (no code from the ``composition``
package), in plain NumPy float64 so that it can serve as an outside check of
the analyzer on small vocabularies.  Clarity over speed: every matrix here is
held whole ([V, V] included), so use it with small models only.

Conventions
-----------
* ``sd``: a plain dict ``name -> numpy array`` in the Hugging Face GPT-2
  layout (as returned by ``safetensors.numpy.load_file``).  Names may carry a
  ``"transformer."`` prefix or not; other keys (``lm_head.weight``, the
  ``attn.bias`` / ``attn.masked_bias`` buffers of old checkpoints) are ignored.
* ``cfg``: a dict of HF GPT-2 ``config.json`` keys (``n_embd``, ``n_head``,
  ``n_layer``, ``vocab_size``, ``n_positions``, ``layer_norm_epsilon``,
  ``activation_function``, ``n_inner``; optional ``scale_attn_weights``,
  ``scale_attn_by_inverse_layer_idx``).
* Row vectors throughout (``x @ W``); Conv1D weights are used as stored.
* Positions for token tables: ``None`` (p = 0), ``"mean"`` (mean of the first
  ``min(1024, P)`` rows of ``wpe``) or an ``int`` row index of ``wpe``.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.special
import scipy.stats

__all__ = [
    "get_weights",
    "layer_norm",
    "layer_norm_linear_part",
    "activation",
    "gelu_tanh",
    "gelu_exact",
    "head_weights",
    "attn_scale",
    "mlp",
    "forward_block0_position0",
    "token_table",
    "dense_token_matrix",
    "midranks_rows",
    "midranks_columns",
    "dense_ov_matrix",
    "eigen_copying_score",
]


# ---------------------------------------------------------------------------
# Weights and config
# ---------------------------------------------------------------------------

def get_weights(sd):
    """Return a new dict with the ``transformer.`` prefix stripped and every
    array converted to float64 (keys without the prefix are kept as they are).
    """
    out = {}
    for name, arr in sd.items():
        key = name[len("transformer."):] if name.startswith("transformer.") else name
        out[key] = np.asarray(arr, dtype=np.float64)
    return out


def _dims(cfg):
    d = int(cfg["n_embd"])
    H = int(cfg["n_head"])
    if d % H != 0:
        raise ValueError(f"n_embd={d} not divisible by n_head={H}")
    return d, H, d // H


def _eps(cfg):
    return float(cfg.get("layer_norm_epsilon", 1e-5))


def attn_scale(cfg, layer):
    """Attention score scale (docs/methods.md notation: ``scale = 1/sqrt(dh)`` unless
    the config says otherwise).  HF GPT-2 config keys honoured:
    ``scale_attn_weights`` (default True -> 1/sqrt(dh), False -> 1) and
    ``scale_attn_by_inverse_layer_idx`` (default False; True divides by
    ``layer + 1``)."""
    _, _, dh = _dims(cfg)
    s = 1.0 / math.sqrt(dh) if cfg.get("scale_attn_weights", True) else 1.0
    if cfg.get("scale_attn_by_inverse_layer_idx", False):
        s = s / float(layer + 1)
    return s


# ---------------------------------------------------------------------------
# Norms and activations (docs/methods.md §1, §2)
# ---------------------------------------------------------------------------

def layer_norm(x, gamma, beta, eps):
    """docs/methods.md §1: ``N(x) = gamma * (x - mean(x)) / sqrt(var(x) + eps) + beta``
    over the last axis, population variance (divide by d)."""
    x = np.asarray(x, dtype=np.float64)
    mu = x.mean(axis=-1, keepdims=True)
    xc = x - mu
    var = (xc * xc).mean(axis=-1, keepdims=True)
    return gamma * xc / np.sqrt(var + eps) + beta


def layer_norm_linear_part(gamma):
    """docs/methods.md §1: ``Lin(N) = P diag(gamma)`` with ``P = I - 11^T/d`` (the
    division is a per-row positive scalar, ``beta`` a constant: both dropped).
    Returns a dense ``[d, d]`` matrix for right-multiplication of row vectors."""
    gamma = np.asarray(gamma, dtype=np.float64)
    d = gamma.shape[0]
    P = np.eye(d) - np.ones((d, d)) / d
    return P @ np.diag(gamma)


def gelu_tanh(x):
    """GELU, tanh approximation (HF ``gelu_new``; Hendrycks & Gimpel 2016):
    ``0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3)))``."""
    x = np.asarray(x, dtype=np.float64)
    return 0.5 * x * (1.0 + np.tanh(math.sqrt(2.0 / math.pi) * (x + 0.044715 * x ** 3)))


def gelu_exact(x):
    """GELU, exact (HF ``gelu``; Hendrycks & Gimpel 2016): ``x Phi(x) =
    0.5 x (1 + erf(x / sqrt 2))``."""
    x = np.asarray(x, dtype=np.float64)
    return 0.5 * x * (1.0 + scipy.special.erf(x / math.sqrt(2.0)))


def activation(cfg):
    """The config's MLP activation (docs/methods.md §2: "the activation is the
    config's")."""
    name = cfg.get("activation_function", "gelu_new")
    if name in ("gelu_new", "gelu_pytorch_tanh", "gelu_fast"):
        # gelu_fast is the same tanh formula written differently.
        return gelu_tanh
    if name == "gelu":
        return gelu_exact
    if name == "relu":
        return lambda x: np.maximum(np.asarray(x, dtype=np.float64), 0.0)
    raise ValueError(f"unsupported activation_function {name!r}")


# ---------------------------------------------------------------------------
# Block components
# ---------------------------------------------------------------------------

def _ln(w, layer, which, cfg, x):
    """Apply LayerNorm ``which`` ('ln_1', 'ln_2') of block ``layer``, or the
    final norm if ``layer == 'f'``."""
    if layer == "f":
        g, b = w["ln_f.weight"], w["ln_f.bias"]
    else:
        g, b = w[f"h.{layer}.{which}.weight"], w[f"h.{layer}.{which}.bias"]
    return layer_norm(x, g, b, _eps(cfg))


def head_weights(w, cfg, layer, head):
    """Per-head matrices of layer ``layer`` head ``head`` (docs/methods.md notation):
    ``W_Q, W_K, W_V [d, dh]``, ``b_Q, b_K, b_V [dh]``, ``W_O [dh, d]``.

    ``c_attn.weight`` is ``[d, 3d]`` with output columns ``[q | k | v]``; head
    ``h`` owns columns ``h*dh:(h+1)*dh`` inside each block.  ``c_proj.weight``
    rows ``h*dh:(h+1)*dh`` belong to head ``h``.  ``w`` must come from
    :func:`get_weights`."""
    d, H, dh = _dims(cfg)
    if not 0 <= head < H:
        raise ValueError(f"head {head} out of range 0..{H - 1}")
    Wa = w[f"h.{layer}.attn.c_attn.weight"]
    ba = w[f"h.{layer}.attn.c_attn.bias"]
    Wp = w[f"h.{layer}.attn.c_proj.weight"]
    cols = slice(head * dh, (head + 1) * dh)
    out = {}
    for i, nm in enumerate("QKV"):
        out["W_" + nm] = Wa[:, i * d:(i + 1) * d][:, cols]
        out["b_" + nm] = ba[i * d:(i + 1) * d][cols]
    out["W_O"] = Wp[cols, :]
    return out


def mlp(w, cfg, layer, x):
    """``MLP_l(x) = act(x W_fc + b_fc) W_proj + b_proj`` (input already
    normed)."""
    act = activation(cfg)
    h = act(x @ w[f"h.{layer}.mlp.c_fc.weight"] + w[f"h.{layer}.mlp.c_fc.bias"])
    return h @ w[f"h.{layer}.mlp.c_proj.weight"] + w[f"h.{layer}.mlp.c_proj.bias"]


def _softmax(z, axis=-1):
    z = z - z.max(axis=axis, keepdims=True)
    e = np.exp(z)
    return e / e.sum(axis=axis, keepdims=True)


# ---------------------------------------------------------------------------
# 1. Ordinary forward pass through block 0
# ---------------------------------------------------------------------------

def forward_block0_position0(sd, cfg, token_ids):
    """Ordinary causal GPT-2 forward pass through block 0 (pre-norm).

    ``x = wte[ids] + wpe[0:T]``; ``a = x + CausalSelfAttention(ln_1(x))`` with
    softmax attention over positions ``src <= dest`` for all heads, scores
    ``q . k * scale``; ``out = a + MLP(ln_2(a))``.

    Returns the residual stream after block 0 at every position, ``[T, d]``
    float64 (row 0 is position 0, the row used by the docs/methods.md §2 exactness
    test).  This deliberately does not use the token-table shortcut."""
    w = get_weights(sd)
    d, H, dh = _dims(cfg)
    ids = np.asarray(token_ids, dtype=np.int64).reshape(-1)
    T = ids.shape[0]
    if T > w["wpe.weight"].shape[0]:
        raise ValueError("sequence longer than n_positions")
    x = w["wte.weight"][ids] + w["wpe.weight"][:T]

    h_in = _ln(w, 0, "ln_1", cfg, x)
    qkv = h_in @ w["h.0.attn.c_attn.weight"] + w["h.0.attn.c_attn.bias"]
    q_all, k_all, v_all = qkv[:, :d], qkv[:, d:2 * d], qkv[:, 2 * d:]
    scale = attn_scale(cfg, 0)
    causal = np.tril(np.ones((T, T), dtype=bool))
    z = np.zeros((T, d))
    for h in range(H):
        cols = slice(h * dh, (h + 1) * dh)
        q, k, v = q_all[:, cols], k_all[:, cols], v_all[:, cols]
        scores = (q @ k.T) * scale
        scores = np.where(causal, scores, -np.inf)
        pattern = _softmax(scores, axis=-1)
        z[:, cols] = pattern @ v
    attn_out = z @ w["h.0.attn.c_proj.weight"] + w["h.0.attn.c_proj.bias"]
    a = x + attn_out
    return a + mlp(w, cfg, 0, _ln(w, 0, "ln_2", cfg, a))


# ---------------------------------------------------------------------------
# 2. Token tables (docs/methods.md §2)
# ---------------------------------------------------------------------------

def _position_vector(w, position):
    wpe = w["wpe.weight"]
    d = wpe.shape[1]
    if position is None or (isinstance(position, str) and position == "none"):
        return np.zeros(d)
    if isinstance(position, str):
        if position == "mean":
            n = min(1024, wpe.shape[0])
            return wpe[:n].mean(axis=0)
        raise ValueError(f"unknown position {position!r}")
    idx = int(position)
    if not 0 <= idx < wpe.shape[0]:
        raise ValueError(f"position index {idx} out of range")
    return wpe[idx]


def token_table(sd, cfg, kind="attn0-mlp0", position=None):
    """docs/methods.md §2 token table ``T [V, d]`` (float64).

    * ``"embed"``: ``T = W_E + p``.
    * ``"mlp0"``: ``T = X + MLP_0(N2_0(X))``, ``X`` the embed table; layer-0
      attention skipped.
    * ``"attn0-mlp0"``: every layer-0 head attends only to its own position:
      ``X1 = X + sum_h (N_0(X) W_V + b_V) W_O + b_O``,
      ``T = X1 + MLP_0(N2_0(X1))`` (value bias included).

    ``position``: ``None`` (p = 0), ``"mean"`` (mean of the first
    ``min(1024, P)`` rows of ``wpe``) or an ``int`` row of ``wpe``."""
    w = get_weights(sd)
    d, H, dh = _dims(cfg)
    X = w["wte.weight"] + _position_vector(w, position)[None, :]
    if kind == "embed":
        return X
    if kind == "mlp0":
        return X + mlp(w, cfg, 0, _ln(w, 0, "ln_2", cfg, X))
    if kind == "attn0-mlp0":
        n0 = _ln(w, 0, "ln_1", cfg, X)
        attn = np.zeros_like(X)
        for h in range(H):
            hw = head_weights(w, cfg, 0, h)
            attn += (n0 @ hw["W_V"] + hw["b_V"]) @ hw["W_O"]
        X1 = X + attn + w["h.0.attn.c_proj.bias"]
        return X1 + mlp(w, cfg, 0, _ln(w, 0, "ln_2", cfg, X1))
    raise ValueError(f"unknown table kind {kind!r}")


# ---------------------------------------------------------------------------
# 3. Writer -> responder token matrix, query side (docs/methods.md §3)
# ---------------------------------------------------------------------------

def dense_token_matrix(sd, cfg, table, writer, responder):
    """docs/methods.md §3 query-side token matrix ``S [V, V]`` (float64, held whole).

    ``writer = (lU, hU)``, ``responder = (lR, hR)``, ``lR > lU``.
    ``o_U(t) = N_lU(T[t]) W_V^U W_O^U`` (no value bias);
    ``q(t) = o_U(t) Lin(N_lR) W_Q^R`` with ``Lin = P diag(gamma_lR)`` (no
    division, no ``beta W_Q + b_Q`` constant);
    ``k(j) = N_lR(T[j]) W_K^R`` (full norm, no key bias);
    ``S[t, j] = q(t) . k(j) * scale``.  Row ``t`` = written token, column
    ``j`` = key token."""
    w = get_weights(sd)
    lU, hU = (int(writer[0]), int(writer[1]))
    lR, hR = (int(responder[0]), int(responder[1]))
    if not lR > lU:
        raise ValueError("responder layer must be later than writer layer")
    T = np.asarray(table, dtype=np.float64)
    U = head_weights(w, cfg, lU, hU)
    R = head_weights(w, cfg, lR, hR)
    o_U = _ln(w, lU, "ln_1", cfg, T) @ U["W_V"] @ U["W_O"]            # [V, d]
    lin = layer_norm_linear_part(w[f"h.{lR}.ln_1.weight"])            # [d, d]
    q = o_U @ lin @ R["W_Q"]                                           # [V, dh]
    k = _ln(w, lR, "ln_1", cfg, T) @ R["W_K"]                          # [V, dh]
    return (q @ k.T) * attn_scale(cfg, lR)


# ---------------------------------------------------------------------------
# 4. Diagonal midranks (docs/methods.md §4)
# ---------------------------------------------------------------------------

def midranks_rows(S, rows=None):
    """docs/methods.md §4 row-orientation midranks of the diagonal (0 = top).

    For each evaluated row ``t``: ``r_t = n - rankdata(S[t], 'average')[t]``,
    ``n = S.shape[1]`` (all columns are the key set; ``S[t, t]`` is taken from
    the same row).  ``rows``: optional iterable of row indices (default all
    rows ``0..S.shape[0]-1``).  Returns float64 ``[len(rows)]``."""
    S = np.asarray(S, dtype=np.float64)
    n = S.shape[1]
    if rows is None:
        rows = range(S.shape[0])
    rows = [int(t) for t in rows]
    out = np.empty(len(rows), dtype=np.float64)
    for i, t in enumerate(rows):
        out[i] = n - scipy.stats.rankdata(S[t], method="average")[t]
    return out


def midranks_columns(S):
    """docs/methods.md §3 column orientation: for each column ``j``, the midrank of
    ``S[j, j]`` within column ``j`` (0 = top):
    ``r_j = n - rankdata(S[:, j], 'average')[j]``, ``n = S.shape[0]``.
    Returns float64 ``[S.shape[1]]``."""
    S = np.asarray(S, dtype=np.float64)
    return midranks_rows(S.T)


# ---------------------------------------------------------------------------
# 5. OV token matrix and eigenvalue copying score (docs/methods.md §5)
# ---------------------------------------------------------------------------

def dense_ov_matrix(sd, cfg, table, layer, head):
    """docs/methods.md §5 OV token matrix
    ``F[t, u] = N_l(T[t]) W_V W_O . Lin(N_f) . W_U[:, u]``, ``[V, V]`` float64,
    with ``Lin(N_f) = P diag(gamma_f)`` and tied ``W_U = wte.weight.T``.  No
    value bias (the formula has none)."""
    w = get_weights(sd)
    hw = head_weights(w, cfg, int(layer), int(head))
    T = np.asarray(table, dtype=np.float64)
    A = _ln(w, int(layer), "ln_1", cfg, T) @ hw["W_V"]                 # [V, dh]
    Bt = hw["W_O"] @ layer_norm_linear_part(w["ln_f.weight"]) @ w["wte.weight"].T
    return A @ Bt


def eigen_copying_score(F):
    """docs/methods.md §5 / Elhage et al. 2021: ``sum Re(lambda) / sum |lambda|`` over
    the eigenvalues of the dense matrix ``F`` (``numpy.linalg.eigvals``).
    The zero eigenvalues of a low-rank ``F`` contribute ~0 to both sums."""
    lam = np.linalg.eigvals(np.asarray(F, dtype=np.float64))
    return float(np.sum(lam.real) / np.sum(np.abs(lam)))
