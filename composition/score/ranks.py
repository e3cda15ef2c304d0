"""Diagonal midranks of a factored token matrix, exact, without holding it (METHODS §4).

For ``S = left @ right.T`` and each evaluated row ``t`` (keys: every column):

    r_t = #{j != t : S[t, j] > S[t, t]} + 1/2 #{j != t : S[t, j] = S[t, t]}

(0 = top), decided in float64: the reference value of an entry is :func:`exact_dot` of
the two float64 factor rows (one fixed summation order, so identical rows tie exactly).

How it is computed. A fast pass in low precision compares every entry with its row's
diagonal using a proven error bound; entries it cannot order with certainty (the *band*)
are decided in float64. Two precisions:

* ``fp32``: the factors rounded to float32, float32 products and sums;
* ``bf16-checked``: the factors rounded to bfloat16 (products exact in float32, float32
  sums), then every band entry recomputed in float32 with the ``fp32`` bound, and only
  what is still undecided goes to float64. The ranks equal the ``fp32`` ranks because
  both equal the float64 midranks.

Two engines run the fast pass: the fused C kernel of :mod:`composition.score._kernel` (multiply,
compare and count in one pass over register tiles, the tile never stored), and a plain
torch loop over preallocated tiles (any machine, any torch device). Both feed the same
float64 recheck and give the same ranks.

Error bounds (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed. 2002, §3.1:
an ``r``-term dot product computed in floating point with unit roundoff ``u``, in any
summation order, with or without fused multiply-add, has error at most
``gamma_r * sum_i |a_i b_i|``, ``gamma_r = r u / (1 - r u)``).

1. Scaling. Row ``t`` of ``left`` is multiplied by a power of two ``2^a_t`` that brings its
   norm into [1/2, 1), and all of ``right`` by one power of two ``2^-b`` that brings the
   largest row norm into [1/2, 1). Powers of two scale exactly, and a positive per-row
   factor ``2^(a_t - b)`` leaves every comparison within row ``t`` unchanged, in exact
   arithmetic and for the float64 reference alike. Call the scaled rows ``x_t``, ``y_j``;
   ``|x_t| < 1``, ``|y_j| <= Y = max_j |y_j| < 1``.
2. ``fp32``. With ``q = fl32(x_t)``, ``k_j = fl32(y_j)``: ``|q_i - x_i| <= u|x_i|``
   (``u = 2^-24``), so ``|q.k_j - x_t.y_j| <= (2u + u^2) sum|x_i y_i|``, and the computed
   ``s~_tj`` adds at most ``gamma_r (1 + u)^2 sum|x_i y_i|``. By Cauchy-Schwarz
   ``sum|x_i y_i| <= |x_t| |y_j| <= |x_t| Y``. So ``|s~_tj - x_t.y_j| <= E_t``,

       E_t = ((2u + u^2) + gamma_r(u) (1 + u)^2) |x_t| Y + eta,

   for every ``j`` including the diagonal (``eta = 2^-100`` covers float32 underflow).
3. The reference. ``exact_dot`` (float64, ``u' = 2^-53``) differs from ``x_t.y_j`` (after
   the same exact scaling) by at most ``G_t = gamma_r(u') |x_t| Y + eta``.
4. Decision. If ``s~_tj > s~_tt + T_t`` with ``T_t = 2 E_t + 2 G_t``, then
   ``x_t.y_j - x_t.y_t > 2 G_t`` and the reference has ``S[t, j] > S[t, t]``; likewise below
   ``s~_tt - T_t``. Everything in ``[s~_tt - T_t, s~_tt + T_t]`` is the band, decided by
   ``exact_dot``. The thresholds are rounded outwards to float32. The diagonal ``s~_tt``
   may come from a separately computed product: its own entry is then within ``2 E_t`` of
   it, always in the band, and excluded by index, never by value.
5. ``bf16-checked``. With ``q = bf16(x_t)``, ``k_j = bf16(y_j)`` (rounded to nearest) and the
   actual rounding errors ``dq_t = q - x_t``, ``dk_j = k_j - y_j`` measured in float64:
   ``q.k_j - x_t.y_j = dq_t.y_j + q.dk_j``, so ``|q.k_j - x_t.y_j| <= |dq_t| Y + |q| D``,
   ``D = max_j |dk_j|`` (Cauchy-Schwarz twice). Products of two bfloat16 numbers are exact
   in float32; the float32 sum adds at most ``gamma_r(u) |q| K``, ``K = max_j |k_j|``. So
   ``E_t = |dq_t| Y + |q| D + gamma_r(u) |q| K + eta`` and ``T_t = 2 E_t + 2 G_t`` as in 4.
   ``|dq_t| <= 2^-8 |x_t|``: the band is about 2^8 times wider than in float32, so its
   entries are recomputed in float32 and decided by step 4 before any float64 work.

Every bound above is evaluated in float64 from the actual norms and inflated by
``1 + 2^-30``, which covers the rounding of its own evaluation.
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
import torch

from . import _kernel
from ..errors import CompositionError

PRECISIONS = ("fp32", "bf16-checked")
DEVICES = ("cpu", "cuda")
ENGINES = ("auto", "kernel", "torch")

_U32 = 2.0**-24
_U64 = 2.0**-53
_ETA = 2.0**-100
_SAFE = 1.0 + 2.0**-30
_TILE_COLS = 2048
_EXACT_CHUNK = 1 << 15  # entries per float64 recheck chunk


def _gamma(r: int, u: float) -> float:
    if r * u >= 0.01:
        raise CompositionError(f"factor width {r} is too large for the rounding bound of the ranks kernel.")
    return r * u / (1.0 - r * u)


def float32_band(rank_dim: int) -> float:
    """Half-width ``T`` of the float32 band for unit-scaled factors (``|x_t| = Y = 1``)."""
    return 2.0 * ((2 * _U32 + _U32**2) + _gamma(rank_dim, _U32) * (1 + _U32) ** 2 + _gamma(rank_dim, _U64)) * _SAFE \
        + 4 * _ETA


def check_device(device: str) -> torch.device:
    """``cpu`` or ``cuda``; a sentence when CUDA was asked for and there is none."""
    if device not in DEVICES:
        raise CompositionError(f"--device {device!r} is not one of: {', '.join(DEVICES)}.")
    if device == "cuda" and not torch.cuda.is_available():
        raise CompositionError("--device cuda was given, but torch finds no CUDA device on this machine; use --device cpu.")
    return torch.device(device)


def kernel_available() -> bool:
    """True when the fused C kernel could be built and loaded on this machine."""
    return _kernel.load() is not None


def _pow2_exponents(norms: np.ndarray) -> np.ndarray:
    """Integer ``e`` with ``norm * 2^-e`` in [1/2, 1); 0 for zero norms. # [n] -> [n]"""
    _, e = np.frexp(norms)
    return np.where(norms > 0, e, 0).astype(np.int64)


def _round_out(values: np.ndarray, up: bool) -> np.ndarray:
    """float64 -> float32, rounded towards +inf (``up``) or -inf. # [n] -> [n]"""
    v32 = values.astype(np.float32)
    wrong = (v32 < values) if up else (v32 > values)
    return np.where(wrong, np.nextafter(v32, np.float32(np.inf if up else -np.inf)), v32).astype(np.float32)


@dataclass
class PreparedRight:
    """A right factor made ready for the fast pass, reusable for every left factor it meets.

    Built once per responder head (row orientation), it holds the exactly scaled float32
    (and bfloat16-valued) copies, packed for the kernel or as torch tensors, and the norms
    the bounds need.
    """

    exact: np.ndarray  # [V, r] float64, as given
    precision: str
    device: torch.device
    Y: float  # max_j |y_j| of the scaled rows
    D: float  # max_j |bf16(y_j) - y_j|
    K: float  # max_j |bf16(y_j)|
    y32: np.ndarray | torch.Tensor  # kernel: [np, r, NR] packed; torch: [V, r]; float32
    yb: np.ndarray | torch.Tensor | None  # the same layout, bfloat16 values in float32

    @property
    def V(self) -> int:
        return self.exact.shape[0]

    @property
    def r(self) -> int:
        return self.exact.shape[1]

    @property
    def packed(self) -> bool:
        return isinstance(self.y32, np.ndarray)

    def rows_of(self, which: np.ndarray | torch.Tensor, idx: np.ndarray) -> np.ndarray:
        """Rows ``idx`` of ``y32`` or ``yb`` as a [len(idx), r] float32 array."""
        if self.packed:
            return np.ascontiguousarray(which[idx // _kernel.NR, :, idx % _kernel.NR])
        return which[torch.from_numpy(idx).to(which.device)].cpu().numpy()  # torch engine

    def nbytes(self) -> int:
        arrays = [a for a in (self.y32, self.yb) if a is not None]
        return sum(int(a.nbytes) if isinstance(a, np.ndarray) else a.numel() * a.element_size() for a in arrays)


def _check_finite(t: np.ndarray, what: str) -> None:
    if not np.isfinite(t).all():
        raise CompositionError(f"the {what} factor of a token matrix has non-finite entries (inf or nan).")


def prepare_right(right: torch.Tensor, precision: str = "fp32", device: str = "cpu",
                  engine: str = "auto") -> PreparedRight:
    """Scale, round and pack a right factor once. # right [V, r] float64"""
    if precision not in PRECISIONS:
        raise CompositionError(f"--precision {precision!r} is not one of: {', '.join(PRECISIONS)}.")
    dev = check_device(device)
    right = _as_f64(right)  # [V, r]
    _check_finite(right, "right")
    V, r = right.shape
    _gamma(r, _U32)
    norms = _row_norms(right)  # [V]
    shift = int(_pow2_exponents(np.array([norms.max() if V else 0.0]))[0])
    y = np.ldexp(right, -shift)  # [V, r] exact scaling
    Y = float(_row_norms(y).max()) * _SAFE if V else 0.0
    y32 = y.astype(np.float32)  # [V, r]
    yb, D, K = None, 0.0, 0.0
    if precision == "bf16-checked":
        yb = _to_bf16(y32)  # [V, r] bfloat16 values
        D = float(_row_norms(yb.astype(np.float64) - y).max()) * _SAFE
        K = float(_row_norms(yb).max()) * _SAFE
    del y
    if _use_kernel(engine, dev):
        y32 = _kernel.pack(y32)
        yb = None if yb is None else _kernel.pack(yb)
    else:
        y32 = torch.from_numpy(y32).to(dev)
        yb = None if yb is None else torch.from_numpy(yb).to(dev)
    return PreparedRight(right, precision, dev, Y, D, K, y32, yb)


def _as_f64(t) -> np.ndarray:
    """A CPU float64 C-contiguous NumPy view or copy. # [V, r]"""
    if isinstance(t, torch.Tensor):
        t = t.detach().to("cpu", torch.float64).numpy()
    return np.ascontiguousarray(t, dtype=np.float64)


def _row_norms(a: np.ndarray) -> np.ndarray:
    """Euclidean row norms in float64. # [n, r] -> [n]"""
    a = a.astype(np.float64, copy=False)
    return np.sqrt(np.einsum("ij,ij->i", a, a))


def _to_bf16(a32: np.ndarray) -> np.ndarray:
    """Round float32 values to bfloat16 (nearest, ties to even), kept as float32. # [n, r]

    (The bounds use the rounding errors actually made, so the rounding mode only has to be
    applied consistently, not assumed.)"""
    bits = np.ascontiguousarray(a32, dtype=np.float32).view(np.uint32)
    rounded = (bits + np.uint32(0x7FFF) + ((bits >> np.uint32(16)) & np.uint32(1))) & np.uint32(0xFFFF0000)
    return rounded.view(np.float32)


def _use_kernel(engine: str, dev: torch.device) -> bool:
    if engine not in ENGINES:
        raise CompositionError(f"ranks engine {engine!r} is not one of: {', '.join(ENGINES)}.")
    if engine == "torch" or dev.type != "cpu":
        return False
    if engine == "kernel":
        if not kernel_available():
            raise CompositionError("the fused ranks kernel cannot be built here (it needs AVX2, FMA and a C compiler).")
        return True
    return kernel_available()


def diagonal_midranks(left: torch.Tensor, right, rows=None, block_rows: int = 256, precision: str = "fp32",
                      device: str = "cpu", engine: str = "auto") -> torch.Tensor:
    """Midrank of ``S[t, t]`` within row ``t`` of ``S = left @ right.T`` for each ``t`` in ``rows``.

    # left [V, r] float64, right [V, r] float64 (or PreparedRight), rows [m] int64 (default all)
    # -> [m] float64
    """
    return midranks_batch([left], [right], rows, block_rows=block_rows, precision=precision, device=device,
                          engine=engine)[0]


def midranks_batch(lefts, rights, rows=None, block_rows: int = 256, precision: str = "fp32", device: str = "cpu",
                   engine: str = "auto", threads: int | None = None) -> list[torch.Tensor]:
    """Diagonal midranks of several factor pairs at once (e.g. one writer against every
    responder head of a layer); the kernel's threads share the work of all pairs.

    # lefts: list of [V, r] float64 (or callables returning one, built when needed);
    # rights: the same, or PreparedRight; rows [m] int64 (the same rows for every pair)
    # -> list of [m] float64
    """
    dev = check_device(device)
    threads = threads or max(1, torch.get_num_threads())
    pool = ThreadPoolExecutor(threads) if _use_kernel(engine, dev) else None
    out = []
    try:
        for left, right in zip(lefts, rights):
            if callable(right) and not isinstance(right, PreparedRight):
                right = right()
            if not isinstance(right, PreparedRight):
                right = prepare_right(right, precision, device, engine)
            out.append(_midranks_one(left, right, rows, block_rows, pool if right.packed else None, threads))
    finally:
        if pool is not None:
            pool.shutdown()
    return out


@dataclass
class _Pass:
    """Everything the fast pass needs for the evaluated rows of one pair."""

    rows: np.ndarray  # [m] int64 row (= diagonal column) indices
    L: np.ndarray | torch.Tensor  # [m, r] float32, first-pass values
    hi: np.ndarray | torch.Tensor  # [m] float32
    lo: np.ndarray | torch.Tensor  # [m] float32
    refine: tuple | None  # (L32, hi32, lo32) for bf16-checked


class RowProduct:
    """A left factor ``A @ C`` of which only the indexed rows are ever computed (float64).

    # A [V, dh], C [dh, r]; ``obj[idx]`` -> [len(idx), r]. Sampled scans evaluate a few rows,
    so the query factor of those rows costs ``m dh r`` instead of ``V dh r``.
    """

    def __init__(self, A, C):
        self.A, self.C = _as_f64(A), _as_f64(C)
        self.shape = (self.A.shape[0], self.C.shape[1])

    def __getitem__(self, idx) -> np.ndarray:
        idx = np.asarray(idx)
        n = idx.shape[0]
        if n and idx[0] + n - 1 == idx[-1] and np.array_equal(idx, np.arange(idx[0], idx[0] + n)):
            return self.A[idx[0]:idx[0] + n] @ self.C  # a contiguous range: no gathered copy
        return self.A[idx] @ self.C


def _midranks_one(left, prep: PreparedRight, rows, block_rows, pool, threads) -> torch.Tensor:
    if callable(left):
        left = left()
    if not isinstance(left, RowProduct):
        left = _as_f64(left)  # [V, r]
    if tuple(left.shape) != prep.exact.shape:
        raise CompositionError(f"token-matrix factors disagree in shape: {tuple(left.shape)} vs {tuple(prep.exact.shape)}.")
    V, r = left.shape
    rows = np.arange(V, dtype=np.int64) if rows is None else np.asarray(rows, dtype=np.int64).reshape(-1)
    if rows.size and (rows.min() < 0 or rows.max() >= V):
        raise CompositionError(f"row indices must lie in 0..{V - 1}.")
    ranks = np.zeros(rows.shape[0], np.float64)
    if rows.size == 0:
        return torch.from_numpy(ranks)
    lrows = np.ascontiguousarray(left[rows])  # [m, r]: the only rows of left ever used
    del left
    _check_finite(lrows, "left")
    lnorm = _row_norms(lrows)  # [m]
    zero = lnorm == 0
    ranks[zero] = 0.5 * (V - 1)  # a zero row ties everywhere
    live = np.nonzero(~zero)[0]
    if live.size == 0:
        return torch.from_numpy(ranks)
    if prep.packed and pool is None:
        pool = ThreadPoolExecutor(threads)
    p, above, rec_rows, rec_cols, overflow = _fast_pass(lrows[live], lnorm[live], rows[live],
                                                        prep, block_rows, pool, threads)
    result = above.astype(np.float64)
    # float64 decisions for the band records; the self entry is excluded by index
    keep = (rec_cols != p.rows[rec_rows]) & ~overflow[rec_rows]
    rec_rows, rec_cols = rec_rows[keep], rec_cols[keep]
    lv = lrows[live]  # [m', r] left rows of the pass, in its order
    if rec_rows.size:
        diag = exact_dot(lv, prep.exact[p.rows])  # [m']
        for s in range(0, rec_rows.size, _EXACT_CHUNK):
            rr = rec_rows[s:s + _EXACT_CHUNK]
            v = exact_dot(lv[rr], prep.exact[rec_cols[s:s + _EXACT_CHUNK]])  # [M]
            d = diag[rr]
            contrib = (v > d) + 0.5 * (v == d)
            result += np.bincount(rr, weights=contrib, minlength=result.size)
    bad = np.nonzero(overflow)[0]
    if bad.size:
        result[bad] = _exact_rows(lv[bad], prep.exact, p.rows[bad])
    ranks[live] = result
    return torch.from_numpy(ranks)


def _fast_pass(lrows, lnorm, rows, prep: PreparedRight, block_rows, pool, threads):
    """Thresholds, then the kernel or torch pass. Returns the pass, above counts, band
    records (row position, column) and the rows whose records overflowed."""
    m, r = lrows.shape
    e = _pow2_exponents(lnorm)  # [m]
    x = np.ldexp(lrows, -e[:, None])  # [m, r] exact scaling
    xn = _row_norms(x) * _SAFE  # [m] |x_t|
    g32 = _gamma(r, _U32)
    G = _gamma(r, _U64) * xn * prep.Y + _ETA  # [m]
    E32 = ((2 * _U32 + _U32**2) + g32 * (1 + _U32) ** 2) * xn * prep.Y * _SAFE + _ETA  # [m]
    T32 = 2 * E32 + 2 * G
    x32 = x.astype(np.float32)  # [m, r]
    d32 = (x32 * prep.rows_of(prep.y32, rows)).sum(1, dtype=np.float32).astype(np.float64)  # [m]
    hi32, lo32 = _round_out(d32 + T32, True), _round_out(d32 - T32, False)
    refine = None
    if prep.precision == "bf16-checked":
        xb = _to_bf16(x32)  # [m, r]
        dq = _row_norms(xb.astype(np.float64) - x) * _SAFE
        qn = _row_norms(xb) * _SAFE
        Eb = (dq * prep.Y + qn * prep.D + g32 * qn * prep.K) * _SAFE + _ETA  # [m]
        Tb = 2 * Eb + 2 * G
        db = (xb * prep.rows_of(prep.yb, rows)).sum(1, dtype=np.float32).astype(np.float64)
        p = _Pass(rows, xb, _round_out(db + Tb, True), _round_out(db - Tb, False), (x32, hi32, lo32))
    else:
        p = _Pass(rows, x32, hi32, lo32, None)
    if prep.packed:
        above, rr, cc, overflow = _kernel_pass(p, prep, pool, threads)
    else:
        above, rr, cc, overflow = _torch_pass(p, prep, block_rows)
    return p, above, rr, cc, overflow


def _kernel_pass(p: _Pass, prep: PreparedRight, pool, threads):
    lib = _kernel.load()
    m = p.rows.shape[0]
    above = np.zeros(m, np.int64)
    overflow = np.zeros(m, np.uint8)
    first = prep.yb if p.refine is not None else prep.y32
    n_chunks = max(1, min(4 * threads, -(-m // 96)))
    bounds = np.linspace(0, m, n_chunks + 1).astype(np.int64)

    def job(i):
        a, b = int(bounds[i]), int(bounds[i + 1])
        if b <= a:
            return np.zeros((0, 2), np.int32)
        rec = np.empty((4 * (b - a) + 4096, 2), np.int32)  # [cap, 2]
        refine = None
        if p.refine is not None:
            L32, h32, l32 = p.refine
            refine = (L32[a:b], prep.y32, h32[a:b], l32[a:b])
        ov = np.zeros(b - a, np.uint8)
        ab = np.zeros(b - a, np.int64)
        n = _kernel.count_rows(lib, np.ascontiguousarray(p.L[a:b]), first, prep.V, p.hi[a:b], p.lo[a:b], ab, rec, ov,
                               refine)
        above[a:b] = ab
        overflow[a:b] = ov
        out = rec[:n].copy()
        out[:, 0] += a
        return out

    recs = list(pool.map(job, range(n_chunks)))
    # padding columns of the last panel are zero vectors: their dot is exactly 0
    n_pad = first.shape[0] * _kernel.NR - prep.V
    if n_pad:  # counted by the first pass only where it was sure, i.e. 0 > hi
        above -= n_pad * (np.float32(0.0) > p.hi)
    rec = np.concatenate(recs) if recs else np.zeros((0, 2), np.int32)
    return above, rec[:, 0].astype(np.int64), rec[:, 1].astype(np.int64), overflow.astype(bool)


def _torch_pass(p: _Pass, prep: PreparedRight, block_rows):
    """Plain torch fast pass over preallocated tiles (any device)."""
    dev = prep.device
    R = prep.yb if p.refine is not None else prep.y32  # [V, r]
    R32 = prep.y32
    L = torch.as_tensor(p.L, device=dev)  # [m, r]
    hi = torch.as_tensor(p.hi, device=dev)[:, None]  # [m, 1]
    lo = torch.as_tensor(p.lo, device=dev)[:, None]
    if p.refine is not None:
        L32, h32, l32 = (torch.as_tensor(a, device=dev) for a in p.refine)
    m, V = L.shape[0], prep.V
    above = torch.zeros(m, dtype=torch.int64, device=dev)
    rec_r, rec_c = [], []
    B, C = max(1, block_rows), _TILE_COLS
    buf = torch.empty(B, C, dtype=torch.float32, device=dev)  # [B, C]
    gt = torch.empty(B, C, dtype=torch.bool, device=dev)
    ge = torch.empty(B, C, dtype=torch.bool, device=dev)
    prec = torch.backends.cuda.matmul.allow_tf32 if dev.type == "cuda" else None
    if dev.type == "cuda":
        torch.backends.cuda.matmul.allow_tf32 = False  # the bound assumes true float32 products
    try:
        for a in range(0, m, B):
            Lb = L[a:a + B]  # [b, r]
            b = Lb.shape[0]
            for c in range(0, V, C):
                Rt = R[c:c + C]  # [w, r]
                w = Rt.shape[0]
                S = torch.mm(Lb, Rt.T, out=buf[:b, :w])  # [b, w]
                torch.gt(S, hi[a:a + b], out=gt[:b, :w])
                torch.ge(S, lo[a:a + b], out=ge[:b, :w])
                above[a:a + b] += gt[:b, :w].sum(1)
                band = ge[:b, :w] & ~gt[:b, :w]
                if bool(band.any()):
                    br, bc = band.nonzero(as_tuple=True)
                    br, bc = br + a, bc + c
                    if p.refine is not None:  # recompute the band in float32
                        v = (L32[br] * R32[bc]).sum(1)  # [M]
                        up = v > h32[br]
                        above.index_add_(0, br[up], torch.ones_like(br[up]))
                        still = ~up & (v >= l32[br])
                        br, bc = br[still], bc[still]
                    rec_r.append(br)
                    rec_c.append(bc)
    finally:
        if dev.type == "cuda":
            torch.backends.cuda.matmul.allow_tf32 = prec
    rr = torch.cat(rec_r).cpu().numpy() if rec_r else np.zeros(0, np.int64)
    cc = torch.cat(rec_c).cpu().numpy() if rec_c else np.zeros(0, np.int64)
    return above.cpu().numpy(), rr, cc, np.zeros(m, bool)


def _exact_rows(lrows: np.ndarray, right: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Midranks of whole rows in float64 (rows whose band did not fit the record buffer).

    A float64 product ``left[t] @ right.T`` in any order is within ``gamma_r(u') |l_t| R``
    (``R = max_j |right_j|``) of the exact value, like ``exact_dot``; entries more than
    four times that from the diagonal are ordered as ``exact_dot`` orders them, the rest
    are compared with ``exact_dot``. # lrows [m, r] (the left rows ``rows``), right [V, r] -> [m]
    """
    V, r = right.shape
    rmax = float(_row_norms(right).max())
    out = np.zeros(rows.shape[0], np.float64)
    for s in range(0, rows.shape[0], 64):
        idx = rows[s:s + 64]  # [c]
        Lc = lrows[s:s + 64]  # [c, r]
        S = Lc @ right.T  # [c, V]
        d = exact_dot(Lc, right[idx])[:, None]  # [c, 1]
        tol = (4 * _gamma(r, _U64) * _row_norms(Lc) * rmax * _SAFE + 2.0**-1000)[:, None]  # [c, 1]
        above = (S > d + tol).sum(1).astype(np.float64)  # [c]
        band = (S >= d - tol) & (S <= d + tol)
        band[np.arange(idx.shape[0]), idx] = False
        bi, bj = np.nonzero(band)
        extra = np.zeros(idx.shape[0], np.float64)
        for a in range(0, bi.shape[0], _EXACT_CHUNK):
            i, j = bi[a:a + _EXACT_CHUNK], bj[a:a + _EXACT_CHUNK]
            v = exact_dot(Lc[i], right[j])
            dd = d[i, 0]
            extra += np.bincount(i, weights=(v > dd) + 0.5 * (v == dd), minlength=extra.size)
        out[s:s + idx.shape[0]] = above + extra
    return out


def exact_dot(a, b):
    """Row-wise float64 dot products in one fixed summation order. # a, b [M, r] -> [M]

    Identical inputs give identical outputs wherever they sit, so duplicate tokens tie exactly.
    Accepts NumPy arrays or torch tensors and returns the same kind.
    """
    if isinstance(a, torch.Tensor):
        return torch.from_numpy(exact_dot(_as_f64(a), _as_f64(b)))
    a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
    acc = a[:, 0] * b[:, 0]
    for i in range(1, a.shape[1]):
        acc += a[:, i] * b[:, i]
    return acc


def kernel_rate_entries(precision: str = "fp32", seconds: float = 2.0, V: int = 50257, r: int = 64,
                        engine: str = "auto", seed: int = 0) -> float:
    """Measured entries per second of :func:`diagonal_midranks` on Gaussian factors of this size
    (for ``composition plan``): rows are added until the run lasts about ``seconds``."""
    import time

    g = torch.Generator().manual_seed(seed)
    left = torch.randn(V, r, generator=g, dtype=torch.float64)
    right = torch.randn(V, r, generator=g, dtype=torch.float64)
    prep = prepare_right(right, precision, "cpu", engine)
    m = max(24, min(V, int(2e6 // max(V, 1))))
    while True:
        rows = np.arange(min(m, V))
        t = time.perf_counter()
        midranks_batch([left], [prep], rows)
        dt = time.perf_counter() - t
        if dt >= 0.25 * seconds or m >= V:
            break
        m = int(m * min(8.0, max(2.0, 0.3 * seconds / max(dt, 1e-4))))
    total, spent, reps = 0, 0.0, 0
    while spent < seconds * 0.75 and reps < 20:
        t = time.perf_counter()
        midranks_batch([left], [prep], rows)
        spent += time.perf_counter() - t
        total += rows.shape[0] * V
        reps += 1
    return total / spent if spent > 0 else math.inf
