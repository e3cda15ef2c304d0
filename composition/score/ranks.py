"""Diagonal midranks of a factored token matrix, exact, without holding it (docs/methods.md §4).

For ``S = left @ right.T`` and each evaluated row ``t`` (keys: every column):

    r_t = #{j != t : S[t, j] > S[t, t]} + 1/2 #{j != t : S[t, j] = S[t, t]}

(0 = top), decided in float64: the reference value of an entry is :func:`exact_dot` of
the two float64 factor rows (one fixed summation order, so identical rows tie exactly).

How it is computed. A fast pass in low precision compares every entry with its row's
diagonal using a proven error bound; entries it cannot order with certainty (the *band*)
are decided in float64. The ranks are identical whichever path runs. The paths
(:func:`available_paths`, fastest first; :func:`resolve_path` names the one that runs):

* ``amx-bf16x3``: AMX matrix units, each scaled factor split into two bfloat16 parts,
  three bf16 products accumulated in float32 (only where the processor has AMX, the OS
  grants it and the built-in self-check passes);
* ``avx512-fp32`` / ``avx2-fp32``: the fused C vector kernel of :mod:`composition.score._kernel`
  (multiply, compare and count in one pass over register tiles, the tile never stored) in
  float32, 512- or 256-bit vectors (on a 512-bit machine both builds exist);
* ``torch-fp32``: a plain torch loop over preallocated tiles (any machine, any device);
* ``torch-bf16x3``: the same torch loop on the split-bf16 factors, an exact emulation of
  the AMX arithmetic's bound (for tests; slow).

``--precision`` (``PRECISIONS``): ``auto`` (the fastest exact path here), ``fp32`` (the
vector kernel, else torch) and, only where AMX is, ``bf16x3``. ``bf16-checked`` (bfloat16
first pass with a float32 recheck, measured never faster than ``fp32``) was removed; the
name is accepted as an alias of ``auto``.

Error bounds (Higham, "Accuracy and Stability of Numerical Algorithms", 2nd ed. 2002, §3.1:
an ``n``-term dot product computed in floating point with unit roundoff ``u``, in any
summation order, with or without fused multiply-add, has error at most
``gamma_n * sum_i |a_i b_i|``, ``gamma_n = n u / (1 - n u)``).

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
   ``exact_dot`` (the compiled kernels evaluate it themselves, in C with the same
   arithmetic: index order, every product rounded, no fused multiply-add). The thresholds
   are rounded outwards to float32. The diagonal ``s~_tt``
   may come from a separately computed product: its own entry is then within ``2 E_t`` of
   it, always in the band, and excluded by index, never by value.
5. ``bf16x3`` (:func:`split_bf16`, :func:`bf16x3_bounds`). Split ``v = fl32(x)`` as
   ``h = bf16(v)``, ``l = bf16(v - h)`` (``v - h`` is exact in float32 by Sterbenz's lemma,
   since ``h`` is within a factor 2 of ``v``), so ``|v - h - l| <= 2^-8 |v - h| <= 2^-16 |v|``.
   Write ``X = h_x + l_x``, ``dx = x - X`` (the representation error, measured in float64,
   where ``h + l`` is exact), and likewise ``Y_j = h_y + l_y``, ``dy_j = y_j - Y_j``. The pass
   computes ``h_x.h_y + h_x.l_y + l_x.h_y`` (one product with the inner dimension tripled,
   ``[h_x, h_x, l_x] . [h_y, l_y, h_y]``), dropping ``l_x.l_y``. Exactly

       x.y - (h_x.h_y + h_x.l_y + l_x.h_y) = l_x.l_y + X.dy + dx.y,

   so by Cauchy-Schwarz the representation part is at most
   ``|l_x| Lmax + |X| Dmax + |dx| Y`` with ``Lmax = max_j |l_y,j|``, ``Dmax = max_j |dy_j|``,
   ``|X| <= |h_x| + |l_x|``. Products of two bfloat16 numbers (8-bit significands) are exact
   in float32; summing the ``3r`` products in float32 in any order adds at most
   ``gamma_3r(u') sum|terms| <= gamma_3r(u') (|h_x| + |l_x|) M``, ``M = max_j (|h_y,j| + |l_y,j|)``,
   with ``u' = 2^-23``: twice the round-to-nearest unit, so the bound holds for any faithful
   rounding of the matrix unit's accumulator (nearest or towards zero), which we do not rely on.
   AMX flushes bfloat16 subnormal inputs and float32 subnormal results to zero: at most
   ``6 r 2^-126`` more, inside ``eta`` for every width the gamma bound admits. So

       E_t = |l_x| Lmax + (|h_x| + |l_x|) Dmax + |dx_t| Y + gamma_3r(2u) (|h_x| + |l_x|) M + eta,

   and ``T_t = 2 E_t + 2 G_t`` as in 4. With ``|l| ~ 2^-8 |x|`` and ``|dx| <= 2^-16 |x|`` the
   band is about 5 x 2^-16 wide relative to ``|x| Y``: some 20 times the float32 band at
   ``r = 64``, still a tiny share of a row for real factors.

Every bound above is evaluated in float64 from the actual norms and inflated by
``1 + 2^-30``, which covers the rounding of its own evaluation.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from . import _kernel
from ..errors import CompositionError

ALIASES = {"bf16-checked": "auto"}  # removed precisions still accepted, and what they mean now


class _Names(tuple):
    """The precision names (iteration, ``--help``, ``click.Choice``) that also answer ``in``
    for the aliases, so callers that validate with ``precision in PRECISIONS`` keep
    accepting a removed name; :func:`check_precision` maps it."""

    def __contains__(self, name) -> bool:
        return tuple.__contains__(self, ALIASES.get(name, name))


# --precision names valid on this machine (bf16x3 only where the processor lists AMX)
PRECISIONS = _Names(("auto", "fp32") + (("bf16x3",) if _kernel.has_amx() else ()))
DEVICES = ("cpu", "cuda")
ENGINES = ("auto", "kernel", "torch")
PATHS = ("amx-bf16x3", "avx512-fp32", "avx2-fp32", "torch-fp32", "torch-bf16x3")  # every path there is

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


def check_device(device: str) -> torch.device:
    """``cpu`` or ``cuda``; a sentence when CUDA was asked for and there is none."""
    if device not in DEVICES:
        raise CompositionError(f"--device {device!r} is not one of: {', '.join(DEVICES)}.")
    if device == "cuda" and not torch.cuda.is_available():
        raise CompositionError("--device cuda was given, but torch finds no CUDA device on this machine; use --device cpu.")
    return torch.device(device)


def check_precision(precision: str) -> str:
    """The precision name after aliases; a sentence naming the choices when it is unknown here."""
    precision = ALIASES.get(precision, precision)
    if precision not in PRECISIONS:
        extra = " (bf16x3 needs AMX matrix units, which this processor does not have)" if precision == "bf16x3" else ""
        raise CompositionError(f"--precision {precision!r} is not one of: {', '.join(PRECISIONS)}{extra}.")
    return precision


def kernel_available() -> bool:
    """True when a compiled C kernel (vector or AMX) could be built and loaded on this machine."""
    return _kernel.load() is not None or _amx_checked()


# ---------------------------------------------------------------------------------------------
# paths


_amx_state = {"checked": False, "ok": False, "why": ""}
_AMX_UNDER_TEST = False  # set by the self-check itself, in its own process


def _amx_selfcheck_run() -> tuple[bool, str]:
    """Run :func:`_amx_selfcheck` in a child process (a crash or an illegal instruction there
    cannot take this process down). Returns (passed, what it said)."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]) + os.pathsep
               + os.environ.get("PYTHONPATH", ""), OMP_NUM_THREADS="1")
    try:
        res = subprocess.run([sys.executable, "-c", "from composition.score import ranks; raise SystemExit(ranks._amx_selfcheck())"],
                             capture_output=True, text=True, env=env, timeout=300)
    except (OSError, subprocess.SubprocessError) as exc:
        return False, f"the self-check could not run ({exc})"
    said = (res.stdout.strip().splitlines() or [""])[-1] or res.stderr.strip()[-300:]
    return res.returncode == 0, said or f"exit status {res.returncode}"


def _amx_checked() -> bool:
    """AMX is present, granted, compiled, and its ranks equal the float64 midranks on the
    self-check problems (once per library build: a stamp file next to it records the pass)."""
    if _AMX_UNDER_TEST:
        return _kernel.load_amx() is not None
    if _amx_state["checked"]:
        return _amx_state["ok"]
    _amx_state["checked"] = True
    if _kernel.load_amx() is None:
        _amx_state["why"] = _kernel.amx_status()
        return False
    so = _kernel.amx_library_path()
    stamp = Path(str(so) + ".selfcheck-ok") if so is not None else None
    if stamp is not None and stamp.exists():
        _amx_state["ok"] = True
        return True
    ok, said = _amx_selfcheck_run()
    if ok:
        if stamp is not None:
            try:
                stamp.write_text(said + "\n")
            except OSError:
                pass
    else:
        warnings.warn(f"the AMX ranks path failed its self-check and is disabled ({said}); "
                      "the vector kernel runs instead, with the same ranks.", RuntimeWarning, stacklevel=2)
    _amx_state["ok"], _amx_state["why"] = ok, "" if ok else f"its self-check failed: {said}"
    return ok


def available_paths() -> list[str]:
    """The concrete paths that can run on this machine (CPU), fastest first."""
    out = []
    if _amx_checked():
        out.append("amx-bf16x3")
    k = _kernel.load()
    if k is not None:
        out.append(k.path)
        if k.bits == 512 and _kernel.load("256") is not None:
            out.append("avx2-fp32")
    return out + ["torch-fp32", "torch-bf16x3"]


def resolve_path(precision: str = "auto", device: str = "cpu", engine: str = "auto") -> str:
    """The concrete path that runs for these options: ``amx-bf16x3``, ``avx512-fp32``,
    ``avx2-fp32``, ``torch-fp32`` or ``torch-bf16x3`` (the scan file records it)."""
    precision = check_precision(precision)
    if engine not in ENGINES:
        raise CompositionError(f"ranks engine {engine!r} is not one of: {', '.join(ENGINES)}.")
    dev = check_device(device)
    if engine == "torch" or dev.type != "cpu":
        return "torch-bf16x3" if precision == "bf16x3" else "torch-fp32"
    paths = available_paths()
    if precision in ("auto", "bf16x3") and "amx-bf16x3" in paths:
        return "amx-bf16x3"
    if precision == "bf16x3":
        warnings.warn(f"--precision bf16x3 cannot run here ({_amx_state['why']}); the fastest fp32 path runs "
                      "instead, with the same ranks.", RuntimeWarning, stacklevel=2)
    for p in ("avx512-fp32", "avx2-fp32"):
        if p in paths:
            return p
    if engine == "kernel":
        raise CompositionError("the fused ranks kernel cannot be built here (it needs AVX2, FMA and a C compiler).")
    return "torch-fp32"


def _check_path(path: str) -> str:
    if path not in PATHS:
        raise CompositionError(f"ranks path {path!r} is not one of: {', '.join(PATHS)}.")
    if path not in available_paths():
        raise CompositionError(f"ranks path {path!r} cannot run on this machine; it has: {', '.join(available_paths())}.")
    return path


def _vector_kernel(path: str):
    return _kernel.load("256" if path == "avx2-fp32" and _kernel.has_avx512() else "native")


# ---------------------------------------------------------------------------------------------
# the split-bfloat16 numerics (numpy; the AMX kernel and the torch emulation share them)


def _to_bf16(a32: np.ndarray) -> np.ndarray:
    """Round float32 values to bfloat16 (nearest, ties to even), kept as float32. # [n, r]

    (The bounds use the rounding errors actually made, so the rounding mode only has to be
    applied consistently, not assumed.)"""
    bits = np.ascontiguousarray(a32, dtype=np.float32).view(np.uint32)
    rounded = (bits + np.uint32(0x7FFF) + ((bits >> np.uint32(16)) & np.uint32(1))) & np.uint32(0xFFFF0000)
    return rounded.view(np.float32)


def split_bf16(v32: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``v ~ h + l`` with ``h = bf16(v)``, ``l = bf16(v - h)`` (bfloat16 values in float32).
    # [n, r] float32 -> ([n, r], [n, r]); ``|v - h - l| <= 2^-16 |v|`` elementwise."""
    h = _to_bf16(v32)
    return h, _to_bf16(v32 - h)  # v - h is exact in float32 (Sterbenz)


def bf16x3_left(h: np.ndarray, l: np.ndarray) -> np.ndarray:
    """``[h, h, l]``: the left operand of the tripled product. # [n, r] x2 -> [n, 3r] float32"""
    return np.concatenate([h, h, l], axis=1)


def bf16x3_right(h: np.ndarray, l: np.ndarray) -> np.ndarray:
    """``[h, l, h]``: the right operand. # [V, r] x2 -> [V, 3r] float32"""
    return np.concatenate([h, l, h], axis=1)


@dataclass
class Bf16x3Right:
    """The right-factor constants of the bf16x3 bound (docstring step 5), inflated by _SAFE."""

    Y: float  # max_j |y_j|
    Lmax: float  # max_j |l_y,j|
    Dmax: float  # max_j |y_j - (h_y,j + l_y,j)|
    M: float  # max_j (|h_y,j| + |l_y,j|)


def bf16x3_right_constants(y: np.ndarray, h: np.ndarray, l: np.ndarray) -> Bf16x3Right:
    """# y [V, r] float64 scaled rows, h, l [V, r] their split"""
    hn, ln = _row_norms(h), _row_norms(l)
    d = _row_norms(y - (h.astype(np.float64) + l.astype(np.float64)))  # h + l exact in float64
    return Bf16x3Right(float(_row_norms(y).max()) * _SAFE, float(ln.max()) * _SAFE, float(d.max()) * _SAFE,
                       float((hn + ln).max()) * _SAFE)


def bf16x3_bounds(x: np.ndarray, h: np.ndarray, l: np.ndarray, c: Bf16x3Right) -> np.ndarray:
    """Per-row ``E_t`` of step 5: every computed ``h_x.h_y + h_x.l_y + l_x.h_y`` (float32 sum
    of exact products, any order, any faithful rounding, subnormals flushed or not) lies
    within ``E_t`` of ``x_t.y_j``.
    # x [m, r] float64 scaled rows, h, l [m, r] their split -> [m] float64"""
    r = x.shape[1]
    hn, ln = _row_norms(h) * _SAFE, _row_norms(l) * _SAFE
    dx = _row_norms(x - (h.astype(np.float64) + l.astype(np.float64))) * _SAFE
    g3 = _gamma(3 * r, 2 * _U32)  # any faithful rounding of the float32 accumulator
    return (ln * c.Lmax + (hn + ln) * c.Dmax + dx * c.Y + g3 * (hn + ln) * c.M) * _SAFE + _ETA


def bf16x3_dot(left3: np.ndarray, right3: np.ndarray) -> np.ndarray:
    """Row-wise float32 sums of the exact bf16 products (the diagonal of the bf16x3 pass).
    # [m, 3r] x2 -> [m] float64"""
    return (left3 * right3).sum(1, dtype=np.float32).astype(np.float64)


# ---------------------------------------------------------------------------------------------
# preparing a right factor


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
    """A right factor made ready for one path, reusable for every left factor it meets.

    Built once per responder head (row orientation): the exactly scaled rows rounded and
    packed for the path (vector kernel panels, AMX pair panels, or torch tensors) and the
    norms the bounds need. The diagonal's factor rows are recomputed from ``exact``.
    """

    exact: np.ndarray  # [V, r] float64, as given
    path: str
    device: torch.device
    shift: int  # y = exact * 2^-shift
    Y: float  # max_j |y_j| of the scaled rows
    c3: Bf16x3Right | None  # the bf16x3 constants
    data: np.ndarray | torch.Tensor  # vector: [np, r, NR] f32; amx: [np, K/2, 32, 2] u16; torch: [V, r or 3r] f32

    @property
    def V(self) -> int:
        return self.exact.shape[0]

    @property
    def r(self) -> int:
        return self.exact.shape[1]

    @property
    def precision(self) -> str:
        return self.path.split("-", 1)[1]

    @property
    def packed(self) -> bool:
        return isinstance(self.data, np.ndarray)

    def scaled(self, idx: np.ndarray) -> np.ndarray:
        """Rows ``idx`` of the scaled right factor. # [k] -> [k, r] float64"""
        return np.ldexp(self.exact[idx], -self.shift)

    def nbytes(self) -> int:
        a = self.data
        return int(a.nbytes) if isinstance(a, np.ndarray) else a.numel() * a.element_size()


def _check_finite(t: np.ndarray, what: str) -> None:
    if not np.isfinite(t).all():
        raise CompositionError(f"the {what} factor of a token matrix has non-finite entries (inf or nan).")


def prepare_right(right: torch.Tensor, precision: str = "auto", device: str = "cpu",
                  engine: str = "auto", path: str | None = None) -> PreparedRight:
    """Scale, round and pack a right factor once for the path that will run. # right [V, r] float64

    ``path`` (a name from :data:`PATHS` that runs here) overrides ``precision`` and ``engine``."""
    path = _check_path(path) if path is not None else resolve_path(precision, device, engine)
    dev = check_device(device) if path.startswith("torch") else torch.device("cpu")
    right = _as_f64(right)  # [V, r]
    _check_finite(right, "right")
    V, r = right.shape
    _gamma(3 * r, _U32)
    norms = _row_norms(right)  # [V]
    shift = int(_pow2_exponents(np.array([norms.max() if V else 0.0]))[0])
    y = np.ldexp(right, -shift)  # [V, r] exact scaling
    Y = float(_row_norms(y).max()) * _SAFE if V else 0.0
    y32 = y.astype(np.float32)  # [V, r]
    c3 = None
    if path.endswith("bf16x3"):
        h, l = split_bf16(y32)  # [V, r] each
        c3 = bf16x3_right_constants(y, h, l)
        y3 = bf16x3_right(h, l)  # [V, 3r]
        del h, l
        data = _kernel.pack_amx_right(y3) if path == "amx-bf16x3" else torch.from_numpy(y3).to(dev)
    elif path.startswith("torch"):
        data = torch.from_numpy(y32).to(dev)
    else:
        data = _kernel.pack(y32, _vector_kernel(path).NR)
    del y, y32
    return PreparedRight(right, path, dev, shift, Y, c3, data)


def _as_f64(t) -> np.ndarray:
    """A CPU float64 C-contiguous NumPy view or copy. # [V, r]"""
    if isinstance(t, torch.Tensor):
        t = t.detach().to("cpu", torch.float64).numpy()
    return np.ascontiguousarray(t, dtype=np.float64)


def _row_norms(a: np.ndarray) -> np.ndarray:
    """Euclidean row norms in float64. # [n, r] -> [n]"""
    a = a.astype(np.float64, copy=False)
    return np.sqrt(np.einsum("ij,ij->i", a, a))


# ---------------------------------------------------------------------------------------------
# midranks


def diagonal_midranks(left: torch.Tensor, right, rows=None, block_rows: int = 256, precision: str = "auto",
                      device: str = "cpu", engine: str = "auto", path: str | None = None) -> torch.Tensor:
    """Midrank of ``S[t, t]`` within row ``t`` of ``S = left @ right.T`` for each ``t`` in ``rows``.

    # left [V, r] float64, right [V, r] float64 (or PreparedRight), rows [m] int64 (default all)
    # -> [m] float64
    """
    return midranks_batch([left], [right], rows, block_rows=block_rows, precision=precision, device=device,
                          engine=engine, path=path)[0]


def midranks_batch(lefts, rights, rows=None, block_rows: int = 256, precision: str = "auto", device: str = "cpu",
                   engine: str = "auto", threads: int | None = None, path: str | None = None) -> list[torch.Tensor]:
    """Diagonal midranks of several factor pairs at once (e.g. one writer against every
    responder head of a layer); the kernel's threads share the work of all pairs.

    # lefts: list of [V, r] float64 (or callables returning one, built when needed);
    # rights: the same, or PreparedRight; rows [m] int64 (the same rows for every pair)
    # -> list of [m] float64
    """
    check_device(device)
    threads = threads or max(1, torch.get_num_threads())
    pool = None
    out = []
    try:
        for left, right in zip(lefts, rights):
            if callable(right) and not isinstance(right, PreparedRight):
                right = right()
            if not isinstance(right, PreparedRight):
                right = prepare_right(right, precision, device, engine, path)
            if right.packed and pool is None:
                pool = ThreadPoolExecutor(threads)
            out.append(_midranks_one(left, right, rows, block_rows, pool, threads))
    finally:
        if pool is not None:
            pool.shutdown()
    return out


@dataclass
class _Pass:
    """Everything the fast pass needs for the evaluated rows of one pair."""

    rows: np.ndarray  # [m] int64 row (= diagonal column) indices
    L: np.ndarray  # [m, r] float32 (fp32) or [m, 3r] float32 bf16 values (bf16x3)
    hi: np.ndarray  # [m] float32
    lo: np.ndarray  # [m] float32


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
    lv, ln, rv = lrows[live], lnorm[live], rows[live]  # [m', r], [m'], [m']
    if not prep.packed:  # torch: one pass over all rows (torch threads itself)
        ranks[live] = _ranks_of(lv, ln, rv, prep, block_rows)
        return torch.from_numpy(ranks)
    # compiled paths: every step per chunk of rows, the chunks shared by the threads
    own_pool = pool is None
    if own_pool:
        pool = ThreadPoolExecutor(threads)
    try:
        bounds = _row_chunks(live.size, threads)
        parts = pool.map(lambda i: _ranks_of(lv[bounds[i]:bounds[i + 1]], ln[bounds[i]:bounds[i + 1]],
                                             rv[bounds[i]:bounds[i + 1]], prep, block_rows), range(len(bounds) - 1))
        ranks[live] = np.concatenate(list(parts))
    finally:
        if own_pool:
            pool.shutdown()
    return torch.from_numpy(ranks)


def _ranks_of(lv: np.ndarray, lnorm: np.ndarray, rows: np.ndarray, prep: PreparedRight, block_rows: int) -> np.ndarray:
    """Midranks of non-zero left rows: the fast pass, then float64 decisions for the band
    records (the self entry excluded by index) and whole rows for overflowed ones.
    # lv [k, r] float64, lnorm [k], rows [k] -> [k] float64"""
    p, above, ties, rec_rows, rec_cols, overflow = _fast_pass(lv, lnorm, rows, prep, block_rows)
    result = above + 0.5 * ties
    keep = (rec_cols != p.rows[rec_rows]) & ~overflow[rec_rows]
    rec_rows, rec_cols = rec_rows[keep], rec_cols[keep]
    if rec_rows.size:
        with_band = np.unique(rec_rows)  # diagonals only of the rows that have band records
        diag = np.zeros(result.size)
        diag[with_band] = exact_dot(lv[with_band], prep.exact[p.rows[with_band]])  # [k]
        for s in range(0, rec_rows.size, _EXACT_CHUNK):
            rr = rec_rows[s:s + _EXACT_CHUNK]
            v = exact_dot(lv[rr], prep.exact[rec_cols[s:s + _EXACT_CHUNK]])  # [M]
            d = diag[rr]
            contrib = (v > d) + 0.5 * (v == d)
            result += np.bincount(rr, weights=contrib, minlength=result.size)
    bad = np.nonzero(overflow)[0]
    if bad.size:
        result[bad] = _exact_rows(lv[bad], prep.exact, p.rows[bad])
    return result


def _fast_pass(lrows, lnorm, rows, prep: PreparedRight, block_rows):
    """Thresholds (docstring steps 2-5), then the path's pass. Returns the pass, the counts
    above and tied (float64 decisions the pass made itself), band records left to decide
    (row position, column) and the rows to redo whole. # lrows [m, r] float64, lnorm [m], rows [m]"""
    m, r = lrows.shape
    e = _pow2_exponents(lnorm)  # [m]
    x = np.ldexp(lrows, -e[:, None])  # [m, r] exact scaling
    xn = _row_norms(x) * _SAFE  # [m] |x_t|
    G = _gamma(r, _U64) * xn * prep.Y + _ETA  # [m]
    x32 = x.astype(np.float32)  # [m, r]
    yd32 = prep.scaled(rows).astype(np.float32)  # [m, r] the diagonal's right rows, as the pass has them
    if prep.c3 is None:  # fp32, step 2
        E = ((2 * _U32 + _U32**2) + _gamma(r, _U32) * (1 + _U32) ** 2) * xn * prep.Y * _SAFE + _ETA  # [m]
        L = x32
        d = (x32 * yd32).sum(1, dtype=np.float32).astype(np.float64)  # [m]
    else:  # bf16x3, step 5
        h, l = split_bf16(x32)
        E = bf16x3_bounds(x, h, l, prep.c3)  # [m]
        L = bf16x3_left(h, l)  # [m, 3r]
        d = bf16x3_dot(L, bf16x3_right(*split_bf16(yd32)))  # [m]
    T = 2 * E + 2 * G
    p = _Pass(rows, L, _round_out(d + T, True), _round_out(d - T, False))
    ties = np.zeros(m, np.int64)
    if prep.packed:  # the compiled kernels decide their band themselves
        above, ties, overflow = (_amx_pass if prep.path == "amx-bf16x3" else _vector_pass)(p, prep, lrows)
        rr = cc = np.zeros(0, np.int64)
    else:
        above, rr, cc, overflow = _torch_pass(p, prep, block_rows)
    return p, above, ties, rr, cc, overflow


def _row_chunks(m: int, threads: int) -> np.ndarray:
    """Chunk bounds: at least one chunk per thread (small samples use every core), up to four
    per thread for large ones (the last chunks even out uneven progress on shared cores), no
    chunk under 48 rows nor, while there are at most 4 per thread, under 768. # -> [n_chunks + 1]"""
    n_chunks = max(1, min(-(-m // 48), max(threads, min(4 * threads, -(-m // 768)))))
    return np.linspace(0, m, n_chunks + 1).astype(np.int64)


def _pad_correction(above: np.ndarray, p: _Pass, n_pad: int) -> None:
    """Padding columns of the last panel are zero vectors, their dot exactly 0: the pass
    counted them only where it was sure, i.e. where 0 > hi. # above [m] in place"""
    if n_pad:
        above -= n_pad * (np.float32(0.0) > p.hi)


def _cap_row(V: int) -> int:
    """Band entries per row that the kernels decide one by one; beyond it a row is cheaper
    as one float64 row product (:func:`_exact_rows`)."""
    return 256 + V // 64


def _vector_pass(p: _Pass, prep: PreparedRight, lrows: np.ndarray):
    """The vector kernel, band entries decided inside in float64. # lrows [m, r] float64 unscaled
    Returns above [m] int64, ties [m] int64, overflow [m] bool (rows to redo whole)."""
    kern = _vector_kernel(prep.path)
    m = p.rows.shape[0]
    above, ties, overflow = np.zeros(m, np.int64), np.zeros(m, np.int64), np.zeros(m, np.uint8)
    _kernel.count_rows(kern, np.ascontiguousarray(p.L), prep.data, prep.V, p.hi, p.lo, above, ties, overflow,
                       np.ascontiguousarray(lrows), prep.exact, np.ascontiguousarray(p.rows, np.int64),
                       _cap_row(prep.V))
    _pad_correction(above, p, prep.data.shape[0] * kern.NR - prep.V)
    return above, ties, overflow.astype(bool)


def _amx_pass(p: _Pass, prep: PreparedRight, lrows: np.ndarray):
    """The AMX kernel (split-bf16 products), band entries decided inside in float64, as above."""
    lib = _kernel.load_amx()
    m = p.rows.shape[0]
    above, ties, overflow = np.zeros(m, np.int64), np.zeros(m, np.int64), np.zeros(m, np.uint8)
    _kernel.count_rows_amx(lib, _kernel.pack_amx_left(p.L), m, prep.data, prep.V, p.hi, p.lo, above, ties,
                           overflow, np.ascontiguousarray(lrows), prep.exact, np.ascontiguousarray(p.rows, np.int64),
                           _cap_row(prep.V))
    _pad_correction(above, p, prep.data.shape[0] * _kernel.AMX_COLS - prep.V)
    return above, ties, overflow.astype(bool)


def _torch_pass(p: _Pass, prep: PreparedRight, block_rows):
    """Plain torch fast pass over preallocated tiles (any device). # R [V, r or 3r]"""
    dev = prep.device
    R = prep.data  # [V, k]
    L = torch.as_tensor(p.L, device=dev)  # [m, k]
    hi = torch.as_tensor(p.hi, device=dev)[:, None]  # [m, 1]
    lo = torch.as_tensor(p.lo, device=dev)[:, None]
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
            Lb = L[a:a + B]  # [b, k]
            b = Lb.shape[0]
            for c in range(0, V, C):
                Rt = R[c:c + C]  # [w, k]
                w = Rt.shape[0]
                S = torch.mm(Lb, Rt.T, out=buf[:b, :w])  # [b, w]
                torch.gt(S, hi[a:a + b], out=gt[:b, :w])
                torch.ge(S, lo[a:a + b], out=ge[:b, :w])
                above[a:a + b] += gt[:b, :w].sum(1)
                band = ge[:b, :w] & ~gt[:b, :w]
                if bool(band.any()):
                    br, bc = band.nonzero(as_tuple=True)
                    rec_r.append(br + a)
                    rec_c.append(bc + c)
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
    at = np.ascontiguousarray(np.asarray(a, np.float64).T)  # [r, M]: contiguous columns
    bt = np.ascontiguousarray(np.asarray(b, np.float64).T)
    acc = at[0] * bt[0]
    tmp = np.empty_like(acc)
    for i in range(1, at.shape[0]):  # acc = (...((a0 b0 + a1 b1) + a2 b2) ...), each product rounded
        np.multiply(at[i], bt[i], out=tmp)
        acc += tmp
    return acc


def kernel_rate_entries(precision: str = "auto", seconds: float = 2.0, V: int = 50257, r: int = 64,
                        engine: str = "auto", seed: int = 0, path: str | None = None,
                        threads: int | None = None) -> float:
    """Measured entries per second of :func:`diagonal_midranks` on Gaussian factors of this size
    (for ``composition plan``): rows are added until the run lasts about ``seconds``."""
    import time

    g = torch.Generator().manual_seed(seed)
    left = torch.randn(V, r, generator=g, dtype=torch.float64)
    right = torch.randn(V, r, generator=g, dtype=torch.float64)
    prep = prepare_right(right, precision, "cpu", engine, path)
    m = max(24, min(V, int(2e6 // max(V, 1))))
    while True:
        rows = np.arange(min(m, V))
        t = time.perf_counter()
        midranks_batch([left], [prep], rows, threads=threads)
        dt = time.perf_counter() - t
        if dt >= 0.25 * seconds or m >= V:
            break
        m = int(m * min(8.0, max(2.0, 0.3 * seconds / max(dt, 1e-4))))
    total, spent, reps = 0, 0.0, 0
    while spent < seconds * 0.75 and reps < 20:
        t = time.perf_counter()
        midranks_batch([left], [prep], rows, threads=threads)
        spent += time.perf_counter() - t
        total += rows.shape[0] * V
        reps += 1
    return total / spent if spent > 0 else math.inf


def selfcheck_problems(V: int = 301, r: int = 64, seed: int = 0) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Small random and adversarial factor pairs (V not a multiple of any tile size):
    random, planted, integer ties, duplicated rows, norm spread 2^-60..2^60, the diagonal at
    its row's minimum. # name -> (left [V, r], right [V, r]) float64"""
    rng = np.random.default_rng(seed)
    rnd = lambda: rng.standard_normal((V, r))  # noqa: E731
    right = rnd()
    unit = right / np.linalg.norm(right, axis=1, keepdims=True)
    src = np.arange(V) % (V // 7)
    a, b = rnd(), rnd()
    spread = lambda m: m * np.exp2(rng.integers(-60, 61, (V, 1)))  # noqa: E731
    return {
        "random": (rnd(), rnd()),
        "planted": (right + 0.3 * rnd(), right),
        "integer-ties": (rng.integers(-2, 3, (V, r)).astype(np.float64), rng.integers(-2, 3, (V, r)).astype(np.float64)),
        "duplicated-rows": (a[src].copy(), b[src].copy()),
        "norm-spread": (spread(rnd()), spread(rnd())),
        "diagonal-minimum": (-unit, unit.copy()),
    }


def _amx_selfcheck() -> int:
    """Run in a child process by :func:`_amx_checked`: the AMX path's ranks against float64
    whole-row midranks (:func:`_exact_rows`) on :func:`selfcheck_problems`. Exit status 0 = pass."""
    global _AMX_UNDER_TEST
    _AMX_UNDER_TEST = True
    if _kernel.load_amx() is None:
        print(f"AMX is not available: {_kernel.amx_status()}")
        return 2
    for V in (301, 64):
        for name, (L, R) in selfcheck_problems(V).items():
            got = midranks_batch([L], [R], path="amx-bf16x3", threads=2)[0].numpy()
            want = _exact_rows(L, R, np.arange(V))
            if not np.array_equal(got, want):
                print(f"AMX ranks differ from the float64 midranks on the {name} problem (V = {V}) "
                      f"in {int((got != want).sum())} rows")
                return 1
    print("AMX self-check passed")
    return 0
