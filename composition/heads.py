"""Head profiles (METHODS §5) and model-space scores for every pair (METHODS §7).

Head profiles. A head's OV token matrix ``F = A B^T`` ``[V, V]``, with
``A = N_l(T) W_V`` ``[V, dh]`` and ``B^T = W_O Lin(N_f) W_U`` ``[dh, V]``, says how much
attending to token ``t`` raises every token's logit. The diagonal midrank of row ``t``
(the exact kernel of :mod:`composition.ranks`) is high for a copying head and low for a
suppressing one; the shares, mean percentile and label use the same null model and the
same Benjamini-Hochberg rule as the pairs (:mod:`composition.stats`), controlled over all
heads of the model. The eigenvalue copying score is ``sum Re(lambda) / sum |lambda|`` over
the eigenvalues of the ``[dh, dh]`` matrix ``B^T A``, whose non-zero eigenvalues are those
of ``F`` (Elhage et al. 2021, "A Mathematical Framework for Transformer Circuits").

Model-space scores, norms folded (``Lin`` of METHODS §1):
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

Every Frobenius norm is computed from ``[dh, dh]`` Gram matrices, never from a ``[d, d]``
product: for ``Z = X M Y^T``, ``|Z|_F^2 = sum((X^T X) M * M (Y^T Y))``.

Storage: the groups ``/heads`` (datasets ``[L, H, ...]``) and ``/model_space`` (datasets
``[L, H, L, H]``) of a scan file (:func:`add_to_scan`) or of a separate heads file
(:func:`write_heads_file`), read back by :func:`load_heads`.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import torch

from .errors import CompositionError
from .factors import input_norm, writer_values
from .ranks import diagonal_midranks
from .stats import DEFAULT_FDR, DEFAULT_K, DEFAULT_MIN_EFFECT, HIST_BINS, LABEL_NOT_COMPUTED, labels, summarise
from .tables import TableOptions, apply_norm, norm_linear_part, token_table
from .weights import Weights

HEADS_FORMAT = "composition-heads"
HEADS_FORMAT_VERSION = 1
HEAD_LABEL_WORDS = {1: "copying", -1: "suppressing", 0: "neutral"}
BASELINE_DRAWS = 200
BASELINE_SEED = 0
KINDS = ("q", "k", "v")


# ---------------------------------------------------------------------------
# Head profiles (METHODS §5)
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
                  progress: Callable[[int, int], None] | None = None) -> dict[str, np.ndarray]:
    """OV diagonal statistics, eigenvalue copying score and label of every head.

    # table [V, d] -> {name: [L, H, ...]}; label +1 copying, -1 suppressing, 0 neutral
    """
    L, H = w.n_layers, w.n_heads
    ks = tuple(int(k) for k in ks)
    n_rows = min(w.vocab_size, w.W_U.shape[1])  # diagonal exists for t < min(V_in, V_out)
    n_keys = w.W_U.shape[1]
    out = {
        "top_share": np.full((L, H, len(ks)), np.nan),
        "bottom_share": np.full((L, H, len(ks)), np.nan),
        "mean_percentile": np.full((L, H), np.nan),
        "histogram": np.zeros((L, H, HIST_BINS), np.int64),
        "rows_evaluated": np.zeros((L, H), np.int64),
        "p_value": np.full((L, H), np.nan),
        "eigen_copying_score": np.full((L, H), np.nan),
    }
    rows = torch.arange(n_rows)
    for layer in range(L):
        A, B = ov_factors(w, table, layer)  # [H, V, dh], [H, V_out, dh]
        for h in range(H):
            ranks = diagonal_midranks(A[h, :n_rows], B[h], rows=rows, block_rows=block_rows).numpy()  # [V]
            s = summarise(ranks, n_keys, ks)
            out["top_share"][layer, h] = s.top_share
            out["bottom_share"][layer, h] = s.bottom_share
            out["mean_percentile"][layer, h] = s.mean_percentile
            out["histogram"][layer, h] = s.histogram
            out["rows_evaluated"][layer, h] = s.rows
            out["p_value"][layer, h] = s.p_value
            out["eigen_copying_score"][layer, h] = eigen_copying_score(A[h, :n_rows], B[h, :n_rows])
            if progress:
                progress(layer * H + h + 1, L * H)
    lab, q = labels(out["mean_percentile"].ravel(), out["p_value"].ravel(), fdr, min_effect)
    out["label"] = lab.reshape(L, H)
    out["q_value"] = q.reshape(L, H)
    return out


# ---------------------------------------------------------------------------
# Model-space scores (METHODS §7)
# ---------------------------------------------------------------------------

def _gram(X: torch.Tensor) -> torch.Tensor:
    """``X^T X`` over the model axis. # X [..., d, r] -> [..., r, r]"""
    return X.transpose(-1, -2) @ X


def _trace_product(A: torch.Tensor, B: torch.Tensor) -> torch.Tensor:
    """``tr(A B)`` of symmetric pairs. # A, B [n, r, r] -> [n]"""
    return (A * B).sum((-1, -2))


def _frob2_factored(G_left: torch.Tensor, M: torch.Tensor, G_right: torch.Tensor, paired: bool) -> torch.Tensor:
    """``|X M Y^T|_F^2`` from ``G_left = X^T X`` and ``G_right = Y^T Y``.

    # all pairs: G_left [a, r, r], M [a, b, r, s], G_right [b, s, s] -> [a, b]
    # paired:    G_left [n, r, r], M [n, r, s],    G_right [n, s, s] -> [n]
    """
    if paired:
        GM = G_left @ M  # [n, r, s]
        MG = M @ G_right  # [n, r, s]
    else:
        GM = torch.einsum("aer,abrs->abes", G_left, M)  # [a, b, r, s]
        MG = torch.einsum("abrs,bst->abrt", M, G_right)  # [a, b, r, s]
    return (GM * MG).sum((-1, -2)).clamp_min(0.0)


@dataclass(frozen=True)
class HeadFactors:
    """Norm-folded per-head factors of one layer (row-vector form):
    ``W_OV = ov_in @ ov_out.T`` and ``W_QK = q @ k.T``, each ``[d, d]`` of rank <= dh."""

    ov_in: torch.Tensor  # [H, d, dh]  Lin(N_l) W_V
    ov_out: torch.Tensor  # [H, d, dh]  W_O^T
    q: torch.Tensor  # [H, d, dh]  Lin(N_l) W_Q
    k: torch.Tensor  # [H, d, dh]  Lin(N_l) W_K


def layer_factors(w: Weights, layer: int) -> HeadFactors:
    """The norm-folded factors of every head of ``layer`` (METHODS §7)."""
    attn = w.layers[layer].attn
    lin = norm_linear_part(input_norm(w, layer), w.d_model)  # [d, d]
    fold = lambda W: torch.einsum("df,hfe->hde", lin, W.double())  # noqa: E731  [H, d, dh]
    return HeadFactors(fold(attn.W_V), attn.W_O.double().transpose(1, 2), fold(attn.W_Q), fold(attn.W_K))


@dataclass(frozen=True)
class _Basis:
    """``X = U R``: ``U`` orthonormal columns spanning ``X``'s column space (zero-padded to
    the head width), ``rank`` the numerical rank."""

    U: torch.Tensor  # [n, d, r]
    R: torch.Tensor  # [n, r, r]
    rank: np.ndarray  # [n]


_RANK_RTOL = 1e-6  # singular values below 1e-6 s_max count as zero (resolvable from the Gram matrix)


def _basis(X: torch.Tensor, G: torch.Tensor | None = None) -> _Basis:
    """Orthonormal basis of every head's factor from its ``[r, r]`` Gram matrix.

    # X [n, d, r], G [n, r, r] = X^T X -> _Basis
    Eigenvectors ``V`` of ``G`` with eigenvalues above ``(1e-6)^2 lambda_max`` give
    ``U0 = X V s^-1``; one Cholesky re-orthonormalisation (``U = U0 L^-T``, ``L L^T = U0^T U0``)
    removes the rounding that the Gram matrix's squared condition number leaves. ``R = U^T X``.
    Zero columns of ``U`` and zero rows of ``R`` add nothing to any product.
    """
    G = _gram(X) if G is None else G
    lam, V = torch.linalg.eigh(G)  # [n, r] ascending, [n, r, r]
    lam_max = lam[:, -1:].clamp_min(0.0)
    keep = (lam > (_RANK_RTOL**2) * lam_max) & (lam_max > 0)  # [n, r]
    scale = torch.where(keep, lam.clamp_min(torch.finfo(torch.float64).tiny).rsqrt(), torch.zeros_like(lam))
    U0 = (X @ V) * scale[:, None, :]  # [n, d, r], zero columns where not kept
    G0 = _gram(U0) + torch.diag_embed((~keep).double())  # [n, r, r], identity on dropped columns
    L = torch.linalg.cholesky(G0)  # [n, r, r]
    U = torch.linalg.solve_triangular(L, U0.transpose(1, 2), upper=False).transpose(1, 2)  # [n, d, r] = U0 L^-T
    U = U * keep[:, None, :]
    return _Basis(U, U.transpose(1, 2) @ X, keep.sum(1).numpy().astype(np.int64))


@dataclass(frozen=True)
class _Prepared:
    """Everything of one layer's heads that the pair scores need, computed once per layer."""

    G_in: torch.Tensor  # [n, r, r]  Gram of Lin W_V
    G_out: torch.Tensor  # [n, r, r]  Gram of W_O^T
    G_q: torch.Tensor
    G_k: torch.Tensor
    ov_norm2: torch.Tensor  # [n]  |W_OV|_F^2
    qk_norm2: torch.Tensor  # [n]  |W_QK|_F^2
    bases: dict  # "out", "q", "k", "v" -> _Basis of W_O^T, Lin W_Q, Lin W_K, Lin W_V


def _prepare(f: HeadFactors, with_bases: bool = True) -> _Prepared:
    G_in, G_out, G_q, G_k = _gram(f.ov_in), _gram(f.ov_out), _gram(f.q), _gram(f.k)  # [n, r, r]
    bases = ({"out": _basis(f.ov_out, G_out), "q": _basis(f.q, G_q), "k": _basis(f.k, G_k),
              "v": _basis(f.ov_in, G_in)} if with_bases else {})
    return _Prepared(G_in, G_out, G_q, G_k, _trace_product(G_in, G_out), _trace_product(G_q, G_k), bases)


def _scores(writer: _Prepared, responder: _Prepared, middles: dict, paired: bool) -> dict[str, torch.Tensor]:
    """Composition scores from the middles ``W_O^U Y^R`` of each kind. # -> {"q"|"k"|"v": [a, b] or [n]}"""
    right = {"q": responder.G_k, "k": responder.G_q, "v": responder.G_out}  # Gram of the right factor
    den = {"q": responder.qk_norm2, "k": responder.qk_norm2, "v": responder.ov_norm2}
    out = {}
    for kind in KINDS:
        num = _frob2_factored(writer.G_in, middles[kind], right[kind], paired)
        d = writer.ov_norm2 * den[kind] if paired else writer.ov_norm2[:, None] * den[kind][None, :]
        d = torch.sqrt(d)
        out[kind] = torch.where(d > 0, torch.sqrt(num) / torch.where(d > 0, d, 1.0), torch.nan)
    return out


def _pair_scores(writer: _Prepared, responder: _Prepared) -> tuple[dict, dict]:
    """Composition scores and projection kernels of every writer head against every responder head.

    # -> ({kind: [H_U, H_R]} scores, {kind: [H_U, H_R]} kernels)
    One [H dh, H dh] product per kind: the cosines ``C = U_out^T U_Y`` between the writer's
    write basis and the responder's read basis give the kernel ``|C|_F^2`` and, with
    ``X = U R``, the middle ``W_O^U Y^R = R_out^T C R_Y`` of the composition score.
    """
    wb = writer.bases["out"]
    middles, kernels = {}, {}
    for kind in KINDS:
        rb = responder.bases[kind]
        cos = torch.einsum("ade,bdf->abef", wb.U, rb.U)  # [HU, HR, r, r]
        kernels[kind] = cos.pow(2).sum((-1, -2))  # [HU, HR]
        middles[kind] = torch.einsum("aed,abef->abdf", wb.R, cos) @ rb.R[None]  # [HU, HR, dh, dh]
    return _scores(writer, responder, middles, paired=False), kernels


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
    g = torch.Generator().manual_seed(int(seed))

    def gauss():
        return torch.randn(draws, d, dh, generator=g, dtype=torch.float64)  # [n, d, dh]

    writer = HeadFactors(gauss(), gauss(), gauss(), gauss())
    responder = HeadFactors(gauss(), gauss(), gauss(), gauss())
    wp, rp = _prepare(writer, with_bases=False), _prepare(responder, with_bases=False)
    O_t = writer.ov_out.transpose(1, 2)  # [n, dh, d]  W_O^U
    middles = {"q": O_t @ responder.q, "k": O_t @ responder.k, "v": O_t @ responder.ov_in}  # [n, dh, dh]
    scores = _scores(wp, rp, middles, paired=True)  # {kind: [n]}
    return {kind: (float(s.mean()), float(s.std())) for kind, s in scores.items()}


def orthonormal_basis(X: torch.Tensor) -> torch.Tensor:
    """Orthonormal basis of the column space of ``X`` (numerical rank by SVD). # X [d, r] -> [d, rank]"""
    b = _basis(X.double()[None])
    return b.U[0, :, : int(b.rank[0])]


def projection_kernel(Q1: torch.Tensor, Q2: torch.Tensor) -> float:
    """``|Q1^T Q2|_F^2`` for orthonormal bases: the sum of squared cosines of the principal
    angles (Hamm & Lee 2008). # Q1 [d, a], Q2 [d, b] -> float in [0, min(a, b)]"""
    return float((Q1.T @ Q2).pow(2).sum())


def model_space_scores(w: Weights, draws: int = BASELINE_DRAWS, seed: int = BASELINE_SEED
                       ) -> tuple[dict[str, np.ndarray], dict]:
    """Composition scores and projection kernels of every pair, with their baselines.

    # -> ({name: [L, H, L, H] or [L, H]}, attrs); pairs with responder layer <= writer
    layer hold NaN.
    """
    L, H, d = w.n_layers, w.n_heads, w.d_model
    shape = (L, H, L, H)
    arrays = {f"{kind}_composition": np.full(shape, np.nan) for kind in KINDS}
    arrays.update({f"projection_kernel_{kind}": np.full(shape, np.nan) for kind in KINDS})
    arrays.update({f"kernel_random_mean_{kind}": np.full(shape, np.nan) for kind in KINDS})
    prepared = [_prepare(layer_factors(w, layer)) for layer in range(L)]
    arrays["write_dim"] = np.stack([p.bases["out"].rank for p in prepared])  # [L, H] rank of W_O
    for kind in KINDS:
        arrays[f"read_dim_{kind}"] = np.stack([p.bases[kind].rank for p in prepared])  # [L, H]
    for lU in range(L):
        for lR in range(lU + 1, L):
            scores, kernels = _pair_scores(prepared[lU], prepared[lR])  # {kind: [H, H]}
            for kind in KINDS:
                arrays[f"{kind}_composition"][lU, :, lR, :] = scores[kind].numpy()
                arrays[f"projection_kernel_{kind}"][lU, :, lR, :] = kernels[kind].numpy()
                dims = np.outer(arrays["write_dim"][lU], arrays[f"read_dim_{kind}"][lR])  # [H, H]
                arrays[f"kernel_random_mean_{kind}"][lU, :, lR, :] = dims / d
    base = composition_baseline(d, w.d_head, draws, seed)
    attrs = {"baseline_draws": int(draws), "baseline_seed": int(seed), "d_model": d, "d_head": w.d_head}
    for kind in KINDS:
        attrs[f"baseline_{kind}_mean"], attrs[f"baseline_{kind}_sd"] = base[kind]
    return arrays, attrs


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
        """A tidy table of heads: one 1-D array per column (pandas-ready)."""
        L, H = self.heads["label"].shape
        layer, head = np.divmod(np.arange(L * H), H)
        out = {"layer": layer, "head": head, "head_label": np.array([f"{a}.{b}" for a, b in zip(layer, head)])}
        ks = list(self.heads_attrs.get("k", []))
        for name, data in self.heads.items():
            flat = data.reshape(L * H, *data.shape[2:])
            if flat.ndim == 1:
                out[name] = flat
            elif name in ("top_share", "bottom_share"):
                for j, k in enumerate(ks):
                    out[f"{name}_{k}"] = flat[:, j]
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
        "label_meaning": "+1 copying, -1 suppressing, 0 neutral (OV token matrix diagonal, METHODS 5)",
        "label_fill": LABEL_NOT_COMPUTED,
    }


def compute_head_data(w: Weights, table: torch.Tensor, options: TableOptions, ks=DEFAULT_K,
                      fdr: float = DEFAULT_FDR, min_effect: float = DEFAULT_MIN_EFFECT,
                      draws: int = BASELINE_DRAWS, progress=None, fingerprint: str | None = None
                      ) -> tuple[dict, dict, dict, dict]:
    """Everything of ``/heads`` and ``/model_space``: (heads, heads_attrs, model_space, model_space_attrs)."""
    heads = head_profiles(w, table, ks, fdr, min_effect, progress=progress)
    ms, ms_attrs = model_space_scores(w, draws)
    return heads, head_attrs(w, options, ks, fdr, min_effect, fingerprint), ms, ms_attrs


def _write_groups(f, heads, heads_attrs, ms, ms_attrs) -> None:
    from .scanfile import _attr

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
                     draws: int = BASELINE_DRAWS, overwrite: bool = False, progress=None) -> Path:
    """Compute head profiles and model-space scores and write them as a separate heads file."""
    import h5py

    path = Path(path)
    if path.exists() and not overwrite:
        raise CompositionError(f"{path} exists already; pass --overwrite to replace it.")
    data = compute_head_data(w, table, options, ks, fdr, min_effect, draws, progress)
    with _atomic(path, copy=False) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = HEADS_FORMAT
            f.attrs["format_version"] = HEADS_FORMAT_VERSION
            f.attrs["checkpoint"] = w.source
            f.attrs["n_layers"], f.attrs["n_heads"] = w.n_layers, w.n_heads
            _write_groups(f, *data)
    return path


def add_to_scan(scan_path: str | os.PathLike, w: Weights, table: torch.Tensor | None = None,
                draws: int = BASELINE_DRAWS, progress=None) -> Path:
    """Add (or replace) the ``/heads`` and ``/model_space`` groups of a finished scan file.

    Uses the scan's own token table, k, FDR and effect threshold, and refuses weights whose
    fingerprint differs from the scan's. ``table`` may pass the already-built token table.
    The file is rewritten atomically (copy, add, rename).
    """
    import h5py

    from .scanfile import load_scan

    scan = load_scan(scan_path)
    a = scan.attrs
    fingerprint = w.fingerprint()
    if a.get("weights_fingerprint") not in (None, fingerprint):
        raise CompositionError(f"the checkpoint's weights differ from those {scan_path} was computed from.")
    position = a.get("position", "none")
    position = None if position in (None, "none") else ("mean" if position == "mean" else int(position))
    options = TableOptions(a.get("table", "attn0-mlp0"), position)
    if table is None:
        table = token_table(w, options)  # [V, d]
    data = compute_head_data(w, table, options, tuple(a.get("k", DEFAULT_K)), float(a.get("fdr", DEFAULT_FDR)),
                             float(a.get("min_effect", DEFAULT_MIN_EFFECT)), draws, progress, fingerprint)
    path = Path(scan_path)
    with _atomic(path, copy=True) as tmp:
        with h5py.File(tmp, "a") as f:
            _write_groups(f, *data)
    return path


def load_heads(path: str | os.PathLike) -> HeadData | None:
    """Read ``/heads`` and ``/model_space`` from a scan file or a heads file (None if absent)."""
    import h5py

    from .scanfile import _unattr

    path = Path(path)
    if not path.is_file():
        raise CompositionError(f"file {path} does not exist.")
    try:
        with h5py.File(path, "r") as f:
            if "heads" not in f or "model_space" not in f:
                return None
            groups = []
            for name in ("heads", "model_space"):
                g = f[name]
                groups.append({k: g[k][()] for k in g})
                groups.append({k: _unattr(v) for k, v in g.attrs.items()})
    except OSError as exc:
        raise CompositionError(f"{path} is not a readable HDF5 file ({exc}).") from None
    for attrs in (groups[1], groups[3]):
        for key, value in attrs.items():
            if isinstance(value, str) and value.startswith("["):
                import json

                attrs[key] = json.loads(value)
    return HeadData(path, groups[0], groups[1], groups[2], groups[3])


class _atomic:
    """Context manager yielding a temporary path beside ``path``, renamed onto it on success."""

    def __init__(self, path: Path, copy: bool):
        self.path, self.copy = Path(path), copy

    def __enter__(self) -> str:
        directory = self.path.parent if str(self.path.parent) else Path(".")
        if not directory.is_dir():
            raise CompositionError(f"output directory {directory} does not exist.")
        try:
            fd, self.tmp = tempfile.mkstemp(prefix=f".{self.path.name}.", suffix=".partial", dir=directory)
            os.close(fd)
            if self.copy:
                shutil.copyfile(self.path, self.tmp)
        except OSError as exc:
            raise CompositionError(f"cannot write {self.path} ({exc.strerror}).") from None
        return self.tmp

    def __exit__(self, kind, exc, tb):
        if kind is None:
            try:
                os.replace(self.tmp, self.path)
                return False
            except OSError as err:
                exc = err
                kind = OSError
        try:
            os.remove(self.tmp)
        except OSError:
            pass
        if kind is not None and issubclass(kind, OSError):
            raise CompositionError(f"cannot write {self.path} ({getattr(exc, 'strerror', None) or exc}).") from None
        return False
