"""Head profiles (docs/methods.md §5) and model-space scores for every pair (docs/methods.md §7).

Head profiles. A head's OV token matrix ``F = A B^T`` ``[V, V]``, with
``A = N_l(T) W_V`` ``[V, dh]`` and ``B^T = W_O Lin(N_f) W_U`` ``[dh, V]``, says how much
attending to token ``t`` raises every token's logit. The diagonal midrank of row ``t``
(the exact kernel of :mod:`composition.score.ranks`) is high for a copying head and low for a
suppressing one; the shares, mean percentile and label use the same null model and the
same Benjamini-Hochberg rule as the pairs (:mod:`composition.score.stats`), controlled over all
heads of the model. The eigenvalue copying score is ``sum Re(lambda) / sum |lambda|`` over
the eigenvalues of the ``[dh, dh]`` matrix ``B^T A``, whose non-zero eigenvalues are those
of ``F`` (Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits").

Model-space scores, norms folded (``Lin`` of docs/methods.md §1):
``W_OV^U = Lin(N_lU) W_V^U W_O^U`` and ``W_QK^R = Lin(N_lR) W_Q^R (Lin(N_lR) W_K^R)^T``.
Q-, K- and V-composition scores (Elhage et al. 2021) are
``|W_OV^U W_QK^R|_F``, ``|W_OV^U (W_QK^R)^T|_F`` and ``|W_OV^U W_OV^R|_F`` divided by the
product of the two factors' Frobenius norms; their baseline is the same score for Gaussian
factors of the same shapes (mean and standard deviation over a stated number of draws).
The projection kernel ``|Q1^T Q2|_F^2`` of orthonormal bases of the writer's write
subspace (row space of ``W_O^U``) and the responder's read subspace (column space of
``Lin(N_lR) W_Q^R``, ``... W_K^R`` or ``... W_V^R``) is the sum of squared cosines of their
principal angles (Hamm & Lee 2008, "Grassmann discriminant analysis"; applied to
attention heads by Yamagiwa, Takase & Shimodaira 2026); for uniformly random subspaces of
dimensions ``a`` and ``b`` in ``R^d`` its mean is ``ab/d``.

No ``[d, d]`` matrix is formed: for ``Z = X M Y^T`` with Gram square roots
``S_X S_X^T = X^T X`` and ``S_Y S_Y^T = Y^T Y``, ``|Z|_F^2 = |S_X^T M S_Y|_F^2``, and with the
middle ``M = W_O^U Y'`` this is ``|(W_O^U^T S_X)^T (Y' S_Y)|_F^2``: one ``[dh, d] x [d, dh]``
product per pair, batched over heads, as for the projection kernel.

Storage: the groups ``/heads`` (datasets ``[L, H, ...]``) and ``/model_space`` (datasets
``[L, H, L, H]``) of a scan file (:func:`add_to_scan`) or of a separate heads file
(:func:`write_heads_file`), read back by :func:`load_heads`.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from ..errors import CompositionError
from ..compose.factors import input_norm, writer_values
from ..memory import return_freed
from ..score.ranks import diagonal_midranks
from ..store import schema
from ..store.atomic import atomic_write, check_target, special_kind
from ..score.stats import DEFAULT_FDR, DEFAULT_K, DEFAULT_MIN_EFFECT, HIST_BINS, LABEL_NOT_COMPUTED, labels, summarise
from ..extract.tables import TableOptions, apply_norm, norm_linear_part, token_table
from ..extract.weights import Weights

HEADS_FORMAT = "composition-heads"
HEADS_FORMAT_VERSION = 1
HEAD_LABEL_WORDS = {1: "copying", -1: "suppressing", 0: "neutral"}
BASELINE_DRAWS = 200
BASELINE_SEED = 0
KINDS = ("q", "k", "v")
# the model-space scores of every pair (docs/methods.md §7), in the order of the tables
MODEL_SPACE_SCORES = (*(f"{kind}_composition" for kind in KINDS), *(f"projection_kernel_{kind}" for kind in KINDS),
                      *(f"kernel_random_mean_{kind}" for kind in KINDS))


# ---------------------------------------------------------------------------
# Head profiles (docs/methods.md §5)
# ---------------------------------------------------------------------------

def ov_factors(w: Weights, table: torch.Tensor, layer: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The two factors of every head's OV token matrix ``F = A B^T`` in ``layer``.

    # table [V, d] -> A [H, V, dh] = N_l(T) W_V, B [H, V_out, dh] = (W_O Lin(N_f) W_U)^T
    """
    A = writer_values(w, table, layer)  # [H, V, dh]
    lin_f = norm_linear_part(w.final_norm, w.d_model)  # [d, d]
    W_O = w.layers[layer].attn.W_O.double()  # [H, dh, d]
    Bt = torch.einsum("hed,df,fv->hev", W_O, lin_f, w.W_U.double())  # [H, dh, V_out]
    return A, Bt.transpose(1, 2).contiguous()  # [H, V, dh], [H, V_out, dh]


def eigen_copying_score(A: torch.Tensor, B: torch.Tensor) -> float:
    """``sum Re(lambda) / sum |lambda|`` over the eigenvalues of ``B^T A`` (Elhage et al. 2021).

    # A [V, dh], B [V, dh] -> float in [-1, 1] (NaN for a zero matrix)
    The non-zero eigenvalues of the ``[V, V]`` matrix ``A B^T`` are those of ``B^T A``.
    """
    lam = np.linalg.eigvals((B.T @ A).numpy())  # [dh] complex
    total = float(np.abs(lam).sum())
    return float(lam.real.sum() / total) if total > 0 else float("nan")


def head_profiles(w: Weights, table: torch.Tensor, ks=DEFAULT_K, fdr: float = DEFAULT_FDR,
                  min_effect: float = DEFAULT_MIN_EFFECT, block_rows: int = 256,
                  progress: Callable[[int, int], None] | None = None,
                  heads: list[tuple[int, int]] | None = None) -> dict[str, np.ndarray]:
    """OV diagonal statistics, eigenvalue copying score and label of every head (or of ``heads``).

    # table [V, d] -> {name: [L, H, ...]} (the /heads datasets of store.schema); label +1
    copying, -1 suppressing, 0 neutral, LABEL_NOT_COMPUTED for heads left out.
    Benjamini-Hochberg runs over the computed heads.
    """
    L, H = w.n_layers, w.n_heads
    ks = tuple(int(k) for k in ks)
    chosen = sorted(set(heads)) if heads is not None else [(l, h) for l in range(L) for h in range(H)]
    out = schema.empty("heads", L, H, len(ks), HIST_BINS)
    done = 0
    for layer, in_layer in head_units(chosen):
        index, fields = profile_layer(w, table, layer, in_layer, ks, block_rows)
        out_sel = tuple(index.T)
        for name, values in fields.items():
            out[name][out_sel] = values
        done += len(in_layer)
        if progress:
            progress(done, len(chosen))
    label_heads(out, fdr, min_effect)
    return out


def head_units(chosen) -> list[tuple[int, tuple[int, ...]]]:
    """The head-profile work units of a scan: ``(layer, heads of that layer)`` in layer order."""
    layers: dict[int, list[int]] = {}
    for l, h in sorted(set(chosen)):
        layers.setdefault(int(l), []).append(int(h))
    return [(l, tuple(hs)) for l, hs in sorted(layers.items())]


def profile_layer(w: Weights, table: torch.Tensor, layer: int, heads, ks, block_rows: int = 256
                  ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """One head-profile work unit: the OV statistics of ``heads`` of ``layer``.

    # table [V, d] -> (index [n, 2], {name: [n, ...]} of the /heads dtypes, done set)
    """
    ks = tuple(int(k) for k in ks)
    fields = schema.unit_arrays("heads", len(heads), len(ks), HIST_BINS)
    # memory: the profiled heads' values and one head's readout at a time (the same bits as ov_factors)
    A = writer_values(w, table, layer, heads)  # [n, V, dh]
    del table  # a caller that handed over its last reference frees the table here
    lin_f = norm_linear_part(w.final_norm, w.d_model)  # [d, d]
    for j, h in enumerate(heads):
        W_O = w.layers[layer].attn.W_O[h:h + 1].double()  # [1, dh, d]
        B = torch.einsum("hed,df,fv->hev", W_O, lin_f, w.W_U.double())[0].T.contiguous()  # [V_out, dh]
        return_freed()  # the float64 unembedding is gone before the ranks run
        put_ov_profile(fields, j, A[j], B, ks, block_rows)
    fields.pop("label")
    fields.pop("q_value")
    index = np.array([[layer, h] for h in heads], dtype=np.int64).reshape(-1, 2)
    return index, fields


def put_ov_profile(fields: dict[str, np.ndarray], j: int, A: torch.Tensor, B: torch.Tensor, ks, block_rows: int) -> None:
    """Row ``j`` of a profile unit's ``fields``: the diagonal midranks of the OV token matrix ``A B^T``
    over every row, their statistics and the eigenvalue copying score (a head's, or a writer group's).

    # A [V, r], B [V_out, r]; the diagonal exists for t < min(V, V_out)
    """
    n_rows = min(A.shape[0], B.shape[0])
    ranks = diagonal_midranks(A[:n_rows], B, rows=torch.arange(n_rows), block_rows=block_rows).numpy()  # [n_rows]
    s = summarise(ranks, B.shape[0], tuple(int(k) for k in ks))
    fields["top_share"][j] = s.top_share
    fields["bottom_share"][j] = s.bottom_share
    fields["mean_percentile"][j] = s.mean_percentile
    fields["histogram"][j] = s.histogram
    fields["rows_evaluated"][j] = s.rows
    fields["p_value"][j] = s.p_value
    fields["eigen_copying_score"][j] = eigen_copying_score(A[:n_rows], B[:n_rows])
    fields["done"][j] = True


def label_heads(arrays: dict[str, np.ndarray], fdr: float, min_effect: float) -> None:
    """Labels and q-values of the profiled heads (Benjamini-Hochberg over all of them)."""
    done = arrays["done"]
    lab, q = labels(arrays["mean_percentile"][done], arrays["p_value"][done], fdr, min_effect)
    arrays["label"][done] = lab
    arrays["q_value"][done] = q


# ---------------------------------------------------------------------------
# Model-space scores (docs/methods.md §7)
# ---------------------------------------------------------------------------

def _gram(X: torch.Tensor) -> torch.Tensor:
    """``X^T X`` over the model axis. # X [..., d, r] -> [..., r, r]"""
    return X.transpose(-1, -2) @ X


def _sqrt_psd(G: torch.Tensor) -> torch.Tensor:
    """A square root ``S`` with ``S S^T = G`` of symmetric positive semi-definite matrices.

    # G [n, r, r] -> [n, r, r]
    """
    lam, V = torch.linalg.eigh(G)  # [n, r], [n, r, r]
    return V * lam.clamp_min(0.0).sqrt()[:, None, :]


_CHUNK_BYTES = 64 * 2**20  # cap on the [a, b, r, r] block of cosines held at once


def _cross_frob2(A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
    """``|A_i^T B_j|_F^2`` for every ``i``, ``j``. # A [a, d, r], B [b, d, s] -> [a, b]

    One matrix product per chunk of ``B``, so the ``[a, b, r, s]`` block stays small.
    """
    a, _, r = A.shape
    step = max(1, _CHUNK_BYTES // (8 * a * r * B.shape[2]))
    out = [torch.einsum("ade,bdf->abef", A, B[j:j + step]).pow(2).sum((-1, -2)) for j in range(0, B.shape[0], step)]
    return torch.cat(out, 1) if out else A.new_zeros(a, 0)


@dataclass(frozen=True)
class HeadFactors:
    """Norm-folded per-head factors of one layer (row-vector form):
    ``W_OV = ov_in @ ov_out.T`` and ``W_QK = q @ k.T``, each ``[d, d]`` of rank <= dh."""

    ov_in: torch.Tensor  # [H, d, dh]  Lin(N_l) W_V
    ov_out: torch.Tensor  # [H, d, dh]  W_O^T
    q: torch.Tensor  # [H, d, dh]  Lin(N_l) W_Q
    k: torch.Tensor  # [H, d, dh]  Lin(N_l) W_K


def fold_norm(norm, W: torch.Tensor) -> torch.Tensor:
    """``Lin(N) W`` without forming ``Lin(N)`` (docs/methods.md §1): ``diag(gamma)`` scales rows, the
    LayerNorm centring ``P = I - 11^T/d`` subtracts the mean over rows. # W [H, d, dh] -> [H, d, dh]"""
    W = W.double()
    if norm.kind == "identity":
        return W
    if norm.kind not in ("layernorm", "rmsnorm"):
        raise CompositionError(f"norm kind {norm.kind!r} is not supported.")
    if norm.weight is not None:
        W = W * norm.weight.double()[None, :, None]
    return W - W.mean(1, keepdim=True) if norm.kind == "layernorm" else W


def layer_factors(w: Weights, layer: int) -> HeadFactors:
    """The norm-folded factors of every head of ``layer`` (docs/methods.md §7)."""
    attn = w.layers[layer].attn
    norm = input_norm(w, layer)
    return HeadFactors(fold_norm(norm, attn.W_V), attn.W_O.double().transpose(1, 2), fold_norm(norm, attn.W_Q),
                       fold_norm(norm, attn.W_K))


_RANK_RTOL = 1e-6  # singular values below 1e-6 s_max count as zero (resolvable from the Gram matrix)


def _basis(X: torch.Tensor, G: torch.Tensor | None = None) -> tuple[torch.Tensor, np.ndarray]:
    """Orthonormal basis of every head's factor from its ``[r, r]`` Gram matrix.

    # X [n, d, r], G [n, r, r] = X^T X -> (U [n, d, r] zero-padded, rank [n])
    Eigenvectors ``V`` of ``G`` with eigenvalues above ``(1e-6)^2 lambda_max`` give
    ``U0 = X V s^-1``; one Cholesky re-orthonormalisation (``U = U0 L^-T``, ``L L^T = U0^T U0``)
    removes the rounding that the Gram matrix's squared condition number leaves. Zero
    columns of ``U`` add nothing to a projection kernel.
    """
    G = _gram(X) if G is None else G
    lam, V = torch.linalg.eigh(G)  # [n, r] ascending, [n, r, r]
    lam_max = lam[:, -1:].clamp_min(0.0)
    keep = (lam > (_RANK_RTOL**2) * lam_max) & (lam_max > 0)  # [n, r]
    scale = torch.where(keep, lam.clamp_min(torch.finfo(torch.float64).tiny).rsqrt(), torch.zeros_like(lam))
    U0 = (X @ V) * scale[:, None, :]  # [n, d, r], zero columns where not kept
    L = torch.linalg.cholesky(_gram(U0) + torch.diag_embed((~keep).double()))  # [n, r, r]
    U = torch.linalg.solve_triangular(L, U0.transpose(1, 2), upper=False).transpose(1, 2)  # [n, d, r] = U0 L^-T
    return U * keep[:, None, :], keep.sum(1).numpy().astype(np.int64)


@dataclass(frozen=True)
class _Prepared:
    """One layer's heads, reduced to what the pair scores need (computed once per layer).

    For ``Z = X M Y^T`` with Gram square roots ``S_X S_X^T = X^T X``, ``S_Y S_Y^T = Y^T Y``:
    ``|Z|_F^2 = |S_X^T M S_Y|_F^2``. With ``M = W_O^U Y'^R`` this is ``|Z_U^T Z_R|_F^2`` where
    ``Z_U = W_O^U^T S_X`` (writer side) and ``Z_R = Y'^R S_Y`` (responder side, per kind).
    """

    ov_norm2: torch.Tensor  # [n]  |W_OV|_F^2
    qk_norm2: torch.Tensor  # [n]  |W_QK|_F^2
    writer_z: torch.Tensor | None  # [n, d, dh]  W_O^T S(Lin W_V)
    responder_z: dict  # "q" | "k" | "v" -> [n, d, dh]
    bases: dict  # "out" | "q" | "k" | "v" -> (U [n, d, dh], rank [n]) of W_O^T, Lin W_Q, Lin W_K, Lin W_V


def _prepare(f: HeadFactors, with_bases: bool = True) -> _Prepared:
    G_in, G_out, G_q, G_k = _gram(f.ov_in), _gram(f.ov_out), _gram(f.q), _gram(f.k)  # [n, r, r]
    S_in, S_out, S_q, S_k = (_sqrt_psd(G) for G in (G_in, G_out, G_q, G_k))
    responder_z = {"q": f.q @ S_k,  # W_OV^U W_QK^R: middle W_O^U Lin W_Q^R, right factor Lin W_K^R
                   "k": f.k @ S_q,  # W_OV^U (W_QK^R)^T: middle W_O^U Lin W_K^R, right factor Lin W_Q^R
                   "v": f.ov_in @ S_out}  # W_OV^U W_OV^R: middle W_O^U Lin W_V^R, right factor W_O^R^T
    bases = ({"out": _basis(f.ov_out, G_out), "q": _basis(f.q, G_q), "k": _basis(f.k, G_k),
              "v": _basis(f.ov_in, G_in)} if with_bases else {})
    return _Prepared((G_in * G_out).sum((-1, -2)), (G_q * G_k).sum((-1, -2)), f.ov_out @ S_in, responder_z, bases)


def _ratio(num2: torch.Tensor, den2: torch.Tensor) -> torch.Tensor:
    d = torch.sqrt(den2)
    return torch.where(d > 0, torch.sqrt(num2.clamp_min(0.0)) / torch.where(d > 0, d, 1.0), torch.nan)


def _pair_scores(writer: _Prepared, responder: _Prepared) -> tuple[dict, dict]:
    """Composition scores and projection kernels of every writer head against every responder head.

    # -> ({kind: [H_U, H_R]} scores, {kind: [H_U, H_R]} kernels)
    """
    den = {"q": responder.qk_norm2, "k": responder.qk_norm2, "v": responder.ov_norm2}
    scores, kernels = {}, {}
    for kind in KINDS:
        num2 = _cross_frob2(writer.writer_z, responder.responder_z[kind])  # [HU, HR]
        scores[kind] = _ratio(num2, writer.ov_norm2[:, None] * den[kind][None, :])
        kernels[kind] = _cross_frob2(writer.bases["out"][0], responder.bases[kind][0])  # [HU, HR]
    return scores, kernels


def _layer_groups(first: int, L: int, H: int, max_heads: int = 64) -> list[list[int]]:
    """Consecutive responder layers ``first .. L-1`` in groups of at most ``max_heads`` heads."""
    per = max(1, max_heads // H)
    return [list(range(l, min(L, l + per))) for l in range(first, L, per)]


def composition_scores(writer: HeadFactors, responder: HeadFactors) -> dict[str, torch.Tensor]:
    """Q-, K- and V-composition scores of every writer head against every responder head.

    # -> {"q"|"k"|"v": [H_U, H_R]}
    """
    return _pair_scores(_prepare(writer), _prepare(responder))[0]


def composition_baseline(d: int, dh: int, draws: int = BASELINE_DRAWS, seed: int = BASELINE_SEED
                         ) -> dict[str, tuple[float, float]]:
    """Mean and standard deviation of each composition score for i.i.d. Gaussian factors.

    Factors of the same shapes as one head's (``W_V``, ``W_Q``, ``W_K`` ``[d, dh]``, ``W_O``
    ``[dh, d]``), standard normal entries, no norm; draw ``i``'s writer against draw ``i``'s
    responder. # -> {"q"|"k"|"v": (mean, sd)}
    """
    if draws < 2:
        raise CompositionError("--baseline-draws must be at least 2.")
    rng = np.random.default_rng(int(seed))

    def gauss():
        return torch.from_numpy(rng.standard_normal((draws, d, dh)))  # [n, d, dh] float64

    # The writer's and the responder's factors are drawn in this order: ov_in, ov_out, q, k (as
    # HeadFactors); each is reduced as soon as what it pairs with is drawn (the arithmetic of
    # _prepare, step by step), so at most four [n, d, dh] arrays are held at once.
    G_in = _gram(gauss())  # writer: ov_in
    ov_out = gauss()
    G_out = _gram(ov_out)
    writer_z = ov_out @ _sqrt_psd(G_in)  # [n, d, dh]
    ov_norm2 = (G_in * G_out).sum((-1, -2))  # [n]
    del ov_out
    gauss(), gauss()  # the writer's q and k: drawn (they fix the stream), not used by the baseline

    def paired(z):  # [n, d, dh] -> [n]
        return (writer_z.transpose(1, 2) @ z).pow(2).sum((-1, -2))

    r_in = gauss()  # responder: ov_in, ov_out
    G_in_r = _gram(r_in)
    r_out = gauss()
    G_out_r = _gram(r_out)
    del r_out
    num2 = {"v": paired(r_in @ _sqrt_psd(G_out_r))}
    del r_in
    r_q = gauss()  # responder: q, k
    G_q = _gram(r_q)
    r_k = gauss()
    G_k = _gram(r_k)
    num2["q"] = paired(r_q @ _sqrt_psd(G_k))
    del r_q
    num2["k"] = paired(r_k @ _sqrt_psd(G_q))
    del r_k
    den = {"q": (G_q * G_k).sum((-1, -2)), "v": (G_in_r * G_out_r).sum((-1, -2))}
    den["k"] = den["q"]
    out = {}
    for kind in KINDS:
        s = _ratio(num2[kind], ov_norm2 * den[kind])
        out[kind] = (float(s.mean()), float(s.std()))
    return out


def orthonormal_basis(X: torch.Tensor) -> torch.Tensor:
    """Orthonormal basis of the column space of ``X`` (numerical rank from its Gram matrix).

    # X [d, r] -> [d, rank]
    """
    U, rank = _basis(X.double()[None])
    return U[0][:, U[0].abs().sum(0) > 0][:, : int(rank[0])]


def projection_kernel(Q1: torch.Tensor, Q2: torch.Tensor) -> float:
    """``|Q1^T Q2|_F^2`` for orthonormal bases: the sum of squared cosines of the principal
    angles (Hamm & Lee 2008). # Q1 [d, a], Q2 [d, b] -> float in [0, min(a, b)]"""
    return float((Q1.T @ Q2).pow(2).sum())


class ModelSpace:
    """The per-layer reductions the model-space units need, built when a unit asks for them.

    Only the last writer layer's is kept: a unit holds its own layer and one group of later
    layers (GPT-2 small: 0.2 GB) instead of every layer (0.45 GB); a layer's reduction is
    recomputed for each unit that reads it (a few tens of milliseconds, the same bits)."""

    def __init__(self, w: Weights):
        self.w = w
        self._kept: tuple[int, _Prepared] | None = None

    def prepared(self, layer: int) -> _Prepared:
        if self._kept is not None and self._kept[0] == layer:
            return self._kept[1]
        return _prepare(layer_factors(self.w, layer))

    def writer(self, layer: int) -> _Prepared:
        """The reduction of a writer layer, kept until another writer layer is asked for."""
        if self._kept is None or self._kept[0] != layer:
            self._kept = None
            self._kept = (layer, _prepare(layer_factors(self.w, layer)))
        return self._kept[1]


def model_space_unit(space: ModelSpace, lU: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """One model-space work unit: every score of writer layer ``lU`` against later layers.

    # -> (index [[lU]], {name: [1, H, L, H] scores, [1, H] dims, [1] done})
    Later responder layers are handled in groups of up to 64 heads, one batched product per
    kind and group.
    """
    w = space.w
    L, H, d = w.n_layers, w.n_heads, w.d_model
    out = {}
    for name, decl in schema.datasets("model_space").items():
        shape = decl.shape(L, H, 0, 0)[1:]
        out[name] = np.full((1,) + shape, decl.fill, dtype=decl.dtype)
    mine = space.writer(lU)
    out["write_dim"][0] = mine.bases["out"][1]  # [H] rank of W_O
    for kind in KINDS:
        out[f"read_dim_{kind}"][0] = mine.bases[kind][1]
    for group in _layer_groups(lU + 1, L, H):
        later = [space.prepared(l) for l in group]
        responders = _Prepared(
            torch.cat([p.ov_norm2 for p in later]), torch.cat([p.qk_norm2 for p in later]), None,
            {kind: torch.cat([p.responder_z[kind] for p in later]) for kind in KINDS},
            {kind: (torch.cat([p.bases[kind][0] for p in later]), None) for kind in KINDS})
        read_dims = {kind: np.stack([p.bases[kind][1] for p in later]) for kind in KINDS}  # [n, H] each
        del later  # the group's reductions, now concatenated
        scores, kernels = _pair_scores(mine, responders)  # {kind: [H, len(group) H]}
        sl = slice(group[0], group[-1] + 1)
        for kind in KINDS:
            out[f"{kind}_composition"][0, :, sl, :] = scores[kind].numpy().reshape(H, len(group), H)
            out[f"projection_kernel_{kind}"][0, :, sl, :] = kernels[kind].numpy().reshape(H, len(group), H)
            read = read_dims[kind]  # [n, H]
            dims = np.einsum("a,lb->alb", out["write_dim"][0], read)  # [H, n, H]
            out[f"kernel_random_mean_{kind}"][0, :, sl, :] = dims / d
        del responders, scores, kernels  # before the next group's reductions are built
        return_freed()
    out["done"][0] = True
    return np.array([[lU]], dtype=np.int64), out


def model_space_attrs(w: Weights, draws: int = BASELINE_DRAWS, seed: int = BASELINE_SEED) -> dict:
    """The attributes of /model_space: the Gaussian baselines of the composition scores."""
    d = w.d_model
    base = composition_baseline(d, w.d_head, draws, seed)
    attrs = {"baseline_draws": int(draws), "baseline_seed": int(seed), "d_model": d, "d_head": w.d_head}
    for kind in KINDS:
        attrs[f"baseline_{kind}_mean"], attrs[f"baseline_{kind}_sd"] = base[kind]
    return attrs


def model_space_scores(w: Weights, draws: int = BASELINE_DRAWS, seed: int = BASELINE_SEED
                       ) -> tuple[dict[str, np.ndarray], dict]:
    """Composition scores and projection kernels of every pair, with their baselines.

    # -> ({name: [L, H, L, H] or [L, H]}, attrs); pairs with responder layer <= writer
    layer hold NaN. Memory: about eight ``[H, d, dh]`` float64 tensors per layer
    (GPT-2 small: 0.45 GB).
    """
    arrays = schema.empty("model_space", w.n_layers, w.n_heads, 0, 0)
    space = ModelSpace(w)
    for lU in range(w.n_layers):
        index, fields = model_space_unit(space, lU)
        for name, values in fields.items():
            arrays[name][tuple(index.T)] = values
    return arrays, model_space_attrs(w, draws, seed)


# ---------------------------------------------------------------------------
# Storage
# ---------------------------------------------------------------------------

@dataclass
class HeadData:
    """``/heads`` and ``/model_space`` in memory: plain NumPy arrays and their attributes."""

    path: Path
    heads: dict[str, np.ndarray]  # [L, H, ...]
    heads_attrs: dict
    model_space: dict[str, np.ndarray]  # [L, H, L, H] (and [L, H] dims)
    model_space_attrs: dict

    def baseline(self, kind: str) -> tuple[float, float]:
        """(mean, sd) of the Gaussian baseline of the ``kind`` ("q", "k", "v") composition score."""
        a = self.model_space_attrs
        return float(a[f"baseline_{kind}_mean"]), float(a[f"baseline_{kind}_sd"])

    def table(self) -> dict[str, np.ndarray]:
        """A tidy table of heads: one 1-D array per column (pandas-ready); integer ``layer``,
        ``head``, the ``head_label`` and ``label_word`` (store.schema.tidy)."""
        L, H = self.heads["label"].shape
        rows = np.stack(np.divmod(np.arange(L * H), H), axis=1)  # [L*H, 2]
        out = schema.tidy("heads", self.heads, self.heads_attrs.get("k", []), rows)
        out["label_word"] = np.array([HEAD_LABEL_WORDS.get(int(v), "not computed") for v in out["label"]])
        return out


def head_attrs(w: Weights, options: TableOptions, ks, fdr: float, min_effect: float,
               fingerprint: str | None = None) -> dict:
    return {
        "table": options.kind,
        "position": "none" if options.position is None else str(options.position),
        "k": [int(k) for k in ks],
        "fdr": float(fdr),
        "min_effect": float(min_effect),
        "keys_per_row": int(w.W_U.shape[1]),
        "histogram_bins": HIST_BINS,
        "weights_fingerprint": fingerprint or w.fingerprint(),
        "label_meaning": "+1 copying, -1 suppressing, 0 neutral, -128 not computed (OV token matrix diagonal, docs/methods.md §5)",
        "label_fill": LABEL_NOT_COMPUTED,
    }


def compute_head_data(w: Weights, table: torch.Tensor, options: TableOptions, ks=DEFAULT_K,
                      fdr: float = DEFAULT_FDR, min_effect: float = DEFAULT_MIN_EFFECT,
                      draws: int = BASELINE_DRAWS, progress=None, fingerprint: str | None = None,
                      heads: list[tuple[int, int]] | None = None) -> tuple[dict, dict, dict, dict]:
    """Everything of ``/heads`` and ``/model_space``: (heads, heads_attrs, model_space, model_space_attrs).

    Head profiles for ``heads`` (default every head); model-space scores for every pair.
    """
    profiles = head_profiles(w, table, ks, fdr, min_effect, progress=progress, heads=heads)
    ms, ms_attrs = model_space_scores(w, draws)
    return profiles, head_attrs(w, options, ks, fdr, min_effect, fingerprint), ms, ms_attrs


def _write_groups(f, heads, heads_attrs, ms, ms_attrs) -> None:
    from ..store.scanfile import _attr

    for name, data, attrs in (("heads", heads, heads_attrs), ("model_space", ms, ms_attrs)):
        if name in f:
            del f[name]
        group = f.create_group(name)
        for key, value in attrs.items():
            group.attrs[key] = _attr(value)
        for key, value in data.items():
            group.create_dataset(key, data=value)


def write_heads_file(path: str | os.PathLike, w: Weights, table: torch.Tensor, options: TableOptions,
                     ks=DEFAULT_K, fdr: float = DEFAULT_FDR, min_effect: float = DEFAULT_MIN_EFFECT,
                     draws: int = BASELINE_DRAWS, overwrite: bool = False, progress=None,
                     heads: list[tuple[int, int]] | None = None) -> Path:
    """Compute head profiles (of ``heads``, default all) and model-space scores and write
    them as a separate heads file (store.atomic: mode from the umask, flushed, renamed)."""
    import h5py

    path = Path(path)
    check_target(path, "heads file")
    if path.exists() and not overwrite:
        raise CompositionError(f"{path} exists already; pass --overwrite to replace it.")
    data = compute_head_data(w, table, options, ks, fdr, min_effect, draws, progress, heads=heads)
    with atomic_write(path, what="heads file") as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = HEADS_FORMAT
            f.attrs["format_version"] = HEADS_FORMAT_VERSION
            f.attrs["checkpoint"] = w.source
            f.attrs["n_layers"], f.attrs["n_heads"] = w.n_layers, w.n_heads
            _write_groups(f, *data)
    return path


def add_to_scan(scan_path: str | os.PathLike, w: Weights, table: torch.Tensor | None = None,
                draws: int = BASELINE_DRAWS, progress=None, all_heads: bool = False) -> Path:
    """Add (or replace) the ``/heads`` and ``/model_space`` groups of a finished scan file.

    Head profiles cover the heads of the scanned pairs (writers and responders; every head
    with ``all_heads``), so a restricted quick scan stays quick; model-space scores cover
    every pair. Uses the scan's own token table, k, FDR and effect threshold; refuses an
    unfinished scan and weights other than the scan's (store.scanfile.require_complete,
    check_matches). ``table`` may pass the already-built token table. The file is rewritten
    atomically (copy, add, flush, rename; store.atomic).
    """
    import h5py

    from ..store.scanfile import check_matches, load_scan, require_complete

    scan = require_complete(load_scan(scan_path), "heads --into")
    check_matches(scan, w)
    a = scan.attrs
    options = scan_table_options(a)
    if table is None:
        table = token_table(w, options)  # [V, d]
    idx = np.argwhere(scan.done)  # [P, 4]
    heads = None if all_heads else sorted({(int(r[0]), int(r[1])) for r in idx} | {(int(r[2]), int(r[3])) for r in idx})
    data = compute_head_data(w, table, options, tuple(int(k) for k in scan.k), float(a.get("fdr", DEFAULT_FDR)),
                             float(a.get("min_effect", DEFAULT_MIN_EFFECT)), draws, progress,
                             a.get("weights_fingerprint"), heads)
    path = Path(scan_path)
    with atomic_write(path, copy_from=path, what="scan file") as tmp:
        with h5py.File(tmp, "a") as f:
            _write_groups(f, *data)
    return path


def scan_table_options(attrs: dict) -> TableOptions:
    """The token table a scan file was computed with."""
    position = attrs.get("position", "none")
    position = None if position in (None, "none") else ("mean" if position == "mean" else int(position))
    return TableOptions(attrs.get("table", "attn0-mlp0"), position)


def load_heads(path: str | os.PathLike) -> HeadData | None:
    """Read ``/heads`` and ``/model_space`` from a scan file or a heads file (None if absent),
    checked against the schema (store.schema)."""
    import h5py

    from ..store.scanfile import _unattr

    path = Path(path)
    kind = special_kind(path)
    if kind is not None:
        raise CompositionError(f"{path} is {kind}, not a regular file.")
    if not path.is_file():
        raise CompositionError(f"file {path} does not exist.")
    try:
        with h5py.File(path, "r") as f:
            if "heads" not in f or "model_space" not in f:
                return None
            L, H = int(f.attrs["n_layers"]), int(f.attrs["n_heads"])
            groups = []
            for name in ("heads", "model_space"):
                g = f[name]
                attrs = {k: _unattr(v) for k, v in g.attrs.items()}
                n_k = len(np.atleast_1d(json.loads(attrs["k"]) if isinstance(attrs.get("k"), str) else
                                        attrs.get("k", []))) if name == "heads" else 0
                arrays = {}
                for key, decl in schema.datasets(name).items():
                    if key not in g:
                        if key == "done":
                            continue
                        raise CompositionError(f"{path} has no dataset /{name}/{key}.")
                    data = g[key]
                    if not isinstance(data, h5py.Dataset) or data.is_virtual or data.external:
                        raise CompositionError(f"/{name}/{key} of {path} is not a dataset stored in the file.")
                    want = decl.shape(L, H, n_k, int(attrs.get("histogram_bins", HIST_BINS)))
                    if data.dtype != np.dtype(decl.dtype) or data.shape != want:
                        raise CompositionError(f"/{name}/{key} of {path} has shape {data.shape} and type {data.dtype}, "
                                               f"not {want} and {np.dtype(decl.dtype)}.")
                    arrays[key] = data[()]
                groups += [arrays, attrs]
    except CompositionError:
        raise
    except (OSError, KeyError, ValueError, TypeError) as exc:
        raise CompositionError(f"{path} is not a readable heads or scan file ({str(exc).splitlines()[0] if str(exc) else exc!r}).") from None
    for attrs in (groups[1], groups[3]):
        for key, value in attrs.items():
            if isinstance(value, str) and value.startswith("["):
                attrs[key] = json.loads(value)
    if "done" not in groups[0]:
        groups[0]["done"] = groups[0]["label"] != LABEL_NOT_COMPUTED
    if "done" not in groups[2]:
        groups[2]["done"] = np.ones(groups[2]["write_dim"].shape[0], dtype=bool)
    return HeadData(path, groups[0], groups[1], groups[2], groups[3])
