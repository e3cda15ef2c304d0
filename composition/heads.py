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


def composition_scores(writer: HeadFactors, responder: HeadFactors, paired: bool = False
                       ) -> dict[str, torch.Tensor]:
    """Q-, K- and V-composition scores of writer heads against responder heads.

    # all pairs -> {"q"|"k"|"v": [H_U, H_R]}; paired (head i with head i) -> {...: [n]}
    """
    G_in = _gram(writer.ov_in)  # [HU, dh, dh]  (Lin W_V^U)^T (Lin W_V^U)
    ov_norm2 = torch.einsum("ars,asr->a", G_in, _gram(writer.ov_out))  # [HU] |W_OV^U|_F^2
    Gq, Gk = _gram(responder.q), _gram(responder.k)  # [HR, dh, dh]
    qk_norm2 = torch.einsum("brs,bsr->b", Gq, Gk)  # [HR] |W_QK^R|_F^2
    G_rin, G_rout = _gram(responder.ov_in), _gram(responder.ov_out)
    rov_norm2 = torch.einsum("brs,bsr->b", G_rin, G_rout)  # [HR] |W_OV^R|_F^2
    O = writer.ov_out  # [HU, d, dh]  (W_O^U)^T

    def middle(Y):  # W_O^U Y^R: all pairs [HU, HR, dh, dh], paired [n, dh, dh]
        return O.transpose(1, 2) @ Y if paired else torch.einsum("ade,bdf->abef", O, Y)

    num = {
        "q": _frob2_factored(G_in, middle(responder.q), Gk, paired),  # W_OV^U W_QK^R
        "k": _frob2_factored(G_in, middle(responder.k), Gq, paired),  # W_OV^U (W_QK^R)^T
        "v": _frob2_factored(G_in, middle(responder.ov_in), G_rout, paired),  # W_OV^U W_OV^R
    }
    den = {"q": qk_norm2, "k": qk_norm2, "v": rov_norm2}
    out = {}
    for kind in KINDS:
        d = torch.sqrt(ov_norm2 * den[kind]) if paired else torch.sqrt(ov_norm2[:, None] * den[kind][None, :])
        out[kind] = torch.where(d > 0, torch.sqrt(num[kind]) / torch.where(d > 0, d, 1.0), torch.nan)
    return out


def composition_baseline(d: int, dh: int, draws: int = BASELINE_DRAWS, seed: int = BASELINE_SEED
                         ) -> dict[str, tuple[float, float]]:
    """Mean and standard deviation of each composition score for i.i.d. Gaussian factors.

    Factors of the same shapes as one head's (``W_V``, ``W_Q``, ``W_K`` ``[d, dh]``, ``W_O``
    ``[dh, d]``), standard normal entries, no norm. # -> {"q"|"k"|"v": (mean, sd)}
    """
    if draws < 2:
        raise CompositionError("--baseline-draws must be at least 2.")
    g = torch.Generator().manual_seed(int(seed))

    def gauss():
        return torch.randn(draws, d, dh, generator=g, dtype=torch.float64)  # [n, d, dh]

    writer = HeadFactors(gauss(), gauss(), gauss(), gauss())
    responder = HeadFactors(gauss(), gauss(), gauss(), gauss())
    scores = composition_scores(writer, responder, paired=True)  # {kind: [n]}
    return {kind: (float(s.mean()), float(s.std())) for kind, s in scores.items()}


def orthonormal_basis(X: torch.Tensor, rtol: float | None = None) -> torch.Tensor:
    """Orthonormal basis of the column space of ``X`` (numerical rank by SVD). # X [d, r] -> [d, rank]"""
    U, s, _ = torch.linalg.svd(X.double(), full_matrices=False)  # U [d, r], s [r]
    if s.numel() == 0 or float(s[0]) == 0.0:
        return U[:, :0]
    tol = (rtol if rtol is not None else max(X.shape) * torch.finfo(torch.float64).eps) * float(s[0])
    return U[:, s > tol]


def _padded_bases(per_layer: list[torch.Tensor]) -> tuple[list[torch.Tensor], np.ndarray]:
    """Orthonormal column-space bases of every head, zero-padded to the head width.

    # per_layer: L x [H, d, dh] -> (L x [H, d, dh], dims [L, H]); zero columns add nothing
    to a projection kernel.
    """
    out, dims = [], []
    for X in per_layer:
        bases = torch.zeros_like(X, dtype=torch.float64)  # [H, d, dh]
        row = []
        for h in range(X.shape[0]):
            Q = orthonormal_basis(X[h])  # [d, rank]
            bases[h, :, :Q.shape[1]] = Q
            row.append(Q.shape[1])
        out.append(bases)
        dims.append(row)
    return out, np.array(dims, np.int64)


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
    layers = [layer_factors(w, layer) for layer in range(L)]
    write, arrays["write_dim"] = _padded_bases([f.ov_out for f in layers])  # row space of W_O^U
    read = {}
    for kind, field_name in (("q", "q"), ("k", "k"), ("v", "ov_in")):
        read[kind], arrays[f"read_dim_{kind}"] = _padded_bases([getattr(f, field_name) for f in layers])
    for lU in range(L):
        for lR in range(lU + 1, L):
            scores = composition_scores(layers[lU], layers[lR])  # {kind: [H, H]}
            for kind in KINDS:
                arrays[f"{kind}_composition"][lU, :, lR, :] = scores[kind].numpy()
                cos = torch.einsum("hda,gdb->hgab", write[lU], read[kind][lR])  # [H, H, dh, dh]
                arrays[f"projection_kernel_{kind}"][lU, :, lR, :] = cos.pow(2).sum((-1, -2)).numpy()
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
