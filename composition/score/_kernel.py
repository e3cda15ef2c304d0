"""The fused counting kernels: small C files compiled on first use, called through ctypes.

Two libraries, each compiled only where it can run and each optional:

* **The vector kernel** (``_SOURCE``), one source for every vector width. The compiler's
  predefined macros pick the width: with ``__AVX512F__`` (``-march=native`` on a processor
  with AVX-512) the register tile is 12 rows x 32 columns (two 512-bit vectors per row, 24
  accumulators + 2 loads of the right panel, the left value broadcast from memory: 26 of
  the 32 zmm registers); otherwise 6 rows x 16 columns of 256-bit AVX2 vectors (12 + 2 of
  16 ymm). ``COMPOSITION_FORCE_256`` forces the 256-bit tile on a 512-bit machine (the
  ``avx2-fp32`` path there, built with ``-mno-avx512f``), so both are tested on one machine.
* **The matrix-unit kernel** (``_AMX_SOURCE``, a separate library built with
  ``-mamx-tile -mamx-bf16`` only where ``/proc/cpuinfo`` lists ``amx_tile`` and
  ``amx_bf16``): split-bfloat16 products in AMX tiles (``bf16x3``, see :mod:`composition.score.ranks`).
  A compile failure, a refused ``arch_prctl`` permission or a failed self-check only
  removes that path.

One call of either kernel handles a range of rows of ``S = L @ P^T`` for one factor pair.
The vector kernel multiplies a register tile and, while it is still in registers, compares
every entry with its row's two thresholds (the tile is never written to memory); the AMX
kernel stores each 16 x 16 float32 tile to a 1 KiB buffer and compares it with AVX-512.
Per row both return

* ``above[t]``: the entries with ``S~[t, j] > hi[t]`` (certainly above the diagonal), and
* the band entries ``lo[t] <= S~[t, j] <= hi[t]``: the vector kernel decides them itself in
  float64 (the dot of the unscaled float64 rows in index order, the arithmetic of
  ``ranks.exact_dot``; the library is compiled with ``-ffp-contract=off`` so no product is
  fused), adding to ``above`` and ``ties``; a row with too many band entries is flagged and
  redone whole in float64 by the caller (:mod:`composition.score.ranks`). The AMX kernel does the
  same with the same code.

Loop order of the vector kernel: rows in blocks of ``RB`` (packed contiguously: the
broadcasts of one tile come from one stream of ``MR * r`` floats, 3 KiB at r = 64), the
right factor in chunks of panels that fit in L2 (256 KiB), and within a chunk each row
tile walks over all panels, so the left tile stays in L1 and the right chunk in L2.

Without a C compiler (``$CC``, else ``cc``) or without AVX2/FMA, :func:`load` returns None
and the plain torch path of :mod:`composition.score.ranks` runs, which gives the same ranks. The
compiled libraries are cached under ``$COMPOSITION_CACHE`` (default ``~/.cache/composition``),
keyed by the source text, the flags and the processor's flags.
"""

from __future__ import annotations

import ctypes
import functools
import hashlib
import os
import platform
import subprocess
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

_SOURCE = r"""
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <immintrin.h>

#if defined(__AVX512F__) && !defined(COMPOSITION_FORCE_256)
#define VBITS 512
#define W 16   /* float lanes per vector */
#define MR 12  /* rows of the register tile; NR = 2 vectors of columns */
typedef __m512 vf;
#define VZERO() _mm512_setzero_ps()
#define VLOAD(p) _mm512_loadu_ps(p)
#define VSET1(x) _mm512_set1_ps(x)
#define VFMA(a, b, c) _mm512_fmadd_ps(a, b, c)
/* lanes above hi; then the lanes of the rest that are >= lo (the compare masked by ~gt) */
#define GTMASK(x, h) ((uint32_t)_mm512_cmp_ps_mask(x, h, _CMP_GT_OQ))
#define BANDMASK(gt, x, l) ((uint32_t)_mm512_mask_cmp_ps_mask((__mmask16)~(gt), x, l, _CMP_GE_OQ))
#else
#define VBITS 256
#define W 8
#define MR 6
typedef __m256 vf;
#define VZERO() _mm256_setzero_ps()
#define VLOAD(p) _mm256_loadu_ps(p)
#define VSET1(x) _mm256_set1_ps(x)
#define VFMA(a, b, c) _mm256_fmadd_ps(a, b, c)
#define GTMASK(x, h) ((uint32_t)_mm256_movemask_ps(_mm256_cmp_ps(x, h, _CMP_GT_OQ)))
#define BANDMASK(gt, x, l) ((uint32_t)_mm256_movemask_ps(_mm256_cmp_ps(x, l, _CMP_GE_OQ)) & ~(gt))
#endif
#define NR (2 * W)
#define RB (32 * MR)            /* rows packed per block */
#define CHUNK_BYTES (256 * 1024) /* right panels per chunk: this many bytes (L2) */

/* The float64 decision of band entries, in the kernel: the reference value of an entry is
   the float64 dot of the two unscaled factor rows in index order, each product rounded
   (compiled with -ffp-contract=off: the arithmetic of ranks.exact_dot, so duplicated tokens
   tie exactly). The diagonal is computed the same way, once per row, when first needed. */
typedef struct {
  const double *L64, *R64;  /* [n][r] this call's left rows, [V][r] the right factor */
  const int64_t *dcol;      /* [n] the row's own column (excluded by index) */
  int64_t r, cap_row;       /* band entries per row before it is left to whole-row float64 */
  double *d64; uint8_t *dset; int64_t *nband, *ties; uint8_t *overflow;
} exact_t;

static double dot64(const double *a, const double *b, int64_t r) {
  double acc = a[0] * b[0];
  for (int64_t k = 1; k < r; k++) { double t = a[k] * b[k]; acc += t; }
  return acc;
}

/* band lanes ``bm`` (bit l = column col0 + l) of row ``row``; padding columns >= V dropped */
static __attribute__((noinline)) void band(exact_t *e, int64_t *cnt, int64_t row, int64_t col0, uint64_t bm,
                                           int64_t V) {
  const double *a = e->L64 + row * e->r;
  while (bm) {
    int l = __builtin_ctzll(bm); bm &= bm - 1;
    int64_t col = col0 + l;
    if (col >= V || col == e->dcol[row] || e->overflow[row]) continue;
    if (++e->nband[row] > e->cap_row) { e->overflow[row] = 1; continue; }
    if (!e->dset[row]) { e->d64[row] = dot64(a, e->R64 + e->dcol[row] * e->r, e->r); e->dset[row] = 1; }
    double v = dot64(a, e->R64 + col * e->r, e->r);
    *cnt += v > e->d64[row];
    e->ties[row] += v == e->d64[row];
  }
}

/* One MR x NR tile: ap [r][MR] packed left rows, bp [r][NR] one right panel. */
static inline void tile(const float *restrict ap, const float *restrict bp, int64_t r, const float *h,
                        const float *l, int64_t *cnt, int64_t row0, int64_t col0, int64_t V, exact_t *e) {
  vf c0[MR], c1[MR];
#pragma GCC unroll 16
  for (int i = 0; i < MR; i++) { c0[i] = VZERO(); c1[i] = VZERO(); }
#pragma GCC unroll 2
  for (int64_t k = 0; k < r; k++) {
    vf b0 = VLOAD(bp + k * NR), b1 = VLOAD(bp + k * NR + W);
#pragma GCC unroll 16
    for (int i = 0; i < MR; i++) {
      vf a = VSET1(ap[k * MR + i]);
      c0[i] = VFMA(a, b0, c0[i]); c1[i] = VFMA(a, b1, c1[i]);
    }
  }
#pragma GCC unroll 16
  for (int i = 0; i < MR; i++) {
    vf hh = VSET1(h[i]), ll = VSET1(l[i]);
    uint32_t g0 = GTMASK(c0[i], hh), g1 = GTMASK(c1[i], hh);
    cnt[i] += __builtin_popcount(g0 | (g1 << W));
    uint64_t bm = (uint64_t)BANDMASK(g0, c0[i], ll) | ((uint64_t)BANDMASK(g1, c1[i], ll) << W);
    if (__builtin_expect(bm != 0, 0)) band(e, cnt + i, row0 + i, col0, bm, V);
  }
}

/* out[0..3] = vector bits, float lanes, tile rows MR, tile columns NR */
int kernel_info(int64_t *out) { out[0] = VBITS; out[1] = W; out[2] = MR; out[3] = NR; return 0; }

/* Rows [0, n) of L [n][r] (float32, scaled); P packed [np][r][NR] (columns >= V are zero);
   thresholds hi, lo [n]. above [n] is incremented by the entries above the diagonal, ties [n]
   by those equal to it (float64, band entries only); a row with more than cap_row band
   entries gets overflow[row] = 1 and partial counts (the caller redoes it). L64 [n][r],
   R64 [V][r]: the unscaled float64 factors; dcol [n]: each row's own column.
   Returns 0, or -1 if out of memory. */
int64_t count_rows(const float *L, int64_t n, int64_t r, const float *P, int64_t np, int64_t V,
                   const float *hi, const float *lo, int64_t *above, int64_t *ties, uint8_t *overflow,
                   const double *L64, const double *R64, const int64_t *dcol, int64_t cap_row) {
  float *A = aligned_alloc(64, ((sizeof(float) * RB * r + 63) / 64) * 64);
  double *d64 = malloc(sizeof(double) * (n > 0 ? n : 1));
  uint8_t *dset = calloc(n > 0 ? n : 1, 1);
  int64_t *nband = calloc(n > 0 ? n : 1, sizeof(int64_t));
  if (!A || !d64 || !dset || !nband) { free(A); free(d64); free(dset); free(nband); return -1; }
  float h[RB], l[RB];
  int64_t cnt[RB];
  int64_t cp = CHUNK_BYTES / (r * NR * (int64_t)sizeof(float));
  if (cp < 1) cp = 1;
  for (int64_t b0 = 0; b0 < n; b0 += RB) {
    int64_t nb = n - b0 < RB ? n - b0 : RB, ng = (nb + MR - 1) / MR;
    /* the row block's view of the float64 data: row indices relative to b0 */
    exact_t e = {L64 + b0 * r, R64, dcol + b0, r, cap_row, d64 + b0, dset + b0, nband + b0, ties + b0,
                 overflow + b0};
    for (int64_t g = 0; g < ng; g++)  /* pack: A [ng][r][MR] */
      for (int64_t k = 0; k < r; k++)
        for (int i = 0; i < MR; i++) {
          int64_t t = g * MR + i;
          A[(g * r + k) * MR + i] = t < nb ? L[(b0 + t) * r + k] : 0.0f;
        }
    for (int64_t t = 0; t < ng * MR; t++) {
      h[t] = t < nb ? hi[b0 + t] : INFINITY;  /* padding rows: nothing above, no band */
      l[t] = t < nb ? lo[b0 + t] : INFINITY;
      cnt[t] = 0;
    }
    for (int64_t p0 = 0; p0 < np; p0 += cp)
      for (int64_t g = 0; g < ng; g++)
        for (int64_t p = p0; p < np && p < p0 + cp; p++)
          tile(A + g * r * MR, P + p * r * NR, r, h + g * MR, l + g * MR, cnt + g * MR, g * MR,
               p * NR, V, &e);
    for (int64_t t = 0; t < nb; t++) above[b0 + t] += cnt[t];
  }
  free(A); free(d64); free(dset); free(nband);
  return 0;
}

/* The machine's vector limit: independent FMA chains at this width, enough of them to cover
   the FMA latency on two pipes (16 with 32 registers, 12 with 16). Returns the lane-FMAs done. */
#if VBITS == 512
#define CHAINS(X) X(0) X(1) X(2) X(3) X(4) X(5) X(6) X(7) X(8) X(9) X(10) X(11) X(12) X(13) X(14) X(15)
#define NCH 16
#else
#define CHAINS(X) X(0) X(1) X(2) X(3) X(4) X(5) X(6) X(7) X(8) X(9) X(10) X(11)
#define NCH 12
#endif
double fma_limit(int64_t iters) {
  vf a = VSET1(1.0f - 1e-7f), b = VSET1(1e-9f);
#define DECL(i) vf c##i = VSET1((float)i);
#define STEP(i) c##i = VFMA(c##i, a, b); __asm__ volatile("" : "+v"(c##i));
#define SUM(i) { float buf[W]; memcpy(buf, &c##i, sizeof buf); sink += buf[0]; }
  CHAINS(DECL)
  for (int64_t it = 0; it < iters; it++) { CHAINS(STEP) }
  float sink = 0;
  CHAINS(SUM)
  return (double)iters * NCH * W + 0.0f * sink;
}
"""

# The matrix-unit kernel: C[32 x 32] in four 16 x 16 float32 tiles += A[32 x K] B[K x 32] in
# bfloat16, K = 3r padded to a multiple of 32 (one TDPBF16PS step takes 32 bf16 of K).
#   left  [n][K] bf16 (row-major, n padded to 32 with zero rows and +inf thresholds);
#   right [np][K/2][32][2] bf16: panels of 32 columns in the pair ("VNNI") layout that the
#         B operand of TDPBF16PS reads: row k2 of a panel holds (k = 2 k2, 2 k2 + 1) of each column.
# Tiles 0-3: accumulators; 4, 5: left rows 0-15, 16-31; 6, 7: right columns 0-15, 16-31.
_AMX_SOURCE = r"""
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <unistd.h>
#include <sys/syscall.h>
#include <immintrin.h>

#define ARCH_REQ_XCOMP_PERM 0x1023
#define XFEATURE_XTILEDATA 18

typedef struct { uint8_t palette, start; uint8_t pad[14]; uint16_t colsb[16]; uint8_t rows[16]; } __attribute__((packed)) tilecfg_t;
/* 0 when the OS grants this process the AMX tile state */
int amx_init(void) { return (int)syscall(SYS_arch_prctl, ARCH_REQ_XCOMP_PERM, XFEATURE_XTILEDATA); }

/* float64 decisions of band entries: the same code as in the vector kernel (see there) */
typedef struct {
  const double *L64, *R64; const int64_t *dcol; int64_t r, cap_row;
  double *d64; uint8_t *dset; int64_t *nband, *ties, *above; uint8_t *overflow;
} exact_t;

static double dot64(const double *a, const double *b, int64_t r) {
  double acc = a[0] * b[0];
  for (int64_t k = 1; k < r; k++) { double t = a[k] * b[k]; acc += t; }
  return acc;
}

static void decide(exact_t *e, int64_t row, int64_t col) {
  if (col == e->dcol[row] || e->overflow[row]) return;
  if (++e->nband[row] > e->cap_row) { e->overflow[row] = 1; return; }
  const double *a = e->L64 + row * e->r;
  if (!e->dset[row]) { e->d64[row] = dot64(a, e->R64 + e->dcol[row] * e->r, e->r); e->dset[row] = 1; }
  double v = dot64(a, e->R64 + col * e->r, e->r);
  e->above[row] += v > e->d64[row];
  e->ties[row] += v == e->d64[row];
}

/* compare a stored 16 x 16 tile (rows row0.., columns col0..) with the rows' thresholds */
static void epilogue(const float *c, const float *hi, const float *lo, int64_t row0, int64_t n,
                     int64_t col0, int64_t V, exact_t *e) {
  for (int i = 0; i < 16 && row0 + i < n; i++) {
    __m512 x = _mm512_loadu_ps(c + 16 * i);
    __m512 hh = _mm512_set1_ps(hi[row0 + i]), ll = _mm512_set1_ps(lo[row0 + i]);
    __mmask16 gt = _mm512_cmp_ps_mask(x, hh, _CMP_GT_OQ);
    e->above[row0 + i] += __builtin_popcount((uint32_t)gt);
    uint32_t bm = _mm512_mask_cmp_ps_mask((__mmask16)~gt, x, ll, _CMP_GE_OQ);
    while (bm) { int l = __builtin_ctz(bm); bm &= bm - 1; if (col0 + l < V) decide(e, row0 + i, col0 + l); }
  }
}

/* Rows [0, n) of left [n32][K] (n32 = n rounded up to 32), right [np][K/2][32][2]; hi, lo [n];
   above, ties [n] incremented, overflow [n] set, L64 [n][r], R64 [V][r], dcol [n] as in the
   vector kernel. Returns 0, -1 on bad arguments or no memory. */
int64_t count_rows_amx(const uint16_t *left, int64_t n, int64_t K, const uint16_t *right, int64_t np,
                       int64_t V, const float *hi, const float *lo, int64_t *above, int64_t *ties,
                       uint8_t *overflow, const double *L64, const double *R64, const int64_t *dcol,
                       int64_t r, int64_t cap_row) {
  if (K % 32) return -1;
  double *d64 = malloc(sizeof(double) * (n > 0 ? n : 1));
  uint8_t *dset = calloc(n > 0 ? n : 1, 1);
  int64_t *nband = calloc(n > 0 ? n : 1, sizeof(int64_t));
  if (!d64 || !dset || !nband) { free(d64); free(dset); free(nband); return -1; }
  exact_t e = {L64, R64, dcol, r, cap_row, d64, dset, nband, ties, above, overflow};
  tilecfg_t cfg; memset(&cfg, 0, sizeof cfg);
  cfg.palette = 1;
  for (int t = 0; t < 8; t++) { cfg.rows[t] = 16; cfg.colsb[t] = 64; }
  _tile_loadconfig(&cfg);
  float c[4][256] __attribute__((aligned(64)));
  int64_t strideA = K * 2, strideB = 128;  /* bytes per left row; per pair-row of a right panel */
  for (int64_t p = 0; p < np; p++) {
    const uint16_t *bp = right + p * K * 32;
    for (int64_t r0 = 0; r0 < n; r0 += 32) {
      const uint16_t *ap = left + r0 * K;
      _tile_zero(0); _tile_zero(1); _tile_zero(2); _tile_zero(3);
      for (int64_t k = 0; k < K; k += 32) {
        _tile_loadd(4, ap + k, strideA);
        _tile_loadd(5, ap + 16 * K + k, strideA);
        _tile_loadd(6, bp + k * 32, strideB);       /* pair-rows k/2 .. k/2 + 15, columns 0-15 */
        _tile_loadd(7, bp + k * 32 + 32, strideB);  /* columns 16-31 */
        _tile_dpbf16ps(0, 4, 6); _tile_dpbf16ps(1, 4, 7);
        _tile_dpbf16ps(2, 5, 6); _tile_dpbf16ps(3, 5, 7);
      }
      _tile_stored(0, c[0], 64); _tile_stored(1, c[1], 64);
      _tile_stored(2, c[2], 64); _tile_stored(3, c[3], 64);
      epilogue(c[0], hi, lo, r0, n, p * 32, V, &e);
      epilogue(c[1], hi, lo, r0, n, p * 32 + 16, V, &e);
      epilogue(c[2], hi, lo, r0 + 16, n, p * 32, V, &e);
      epilogue(c[3], hi, lo, r0 + 16, n, p * 32 + 16, V, &e);
    }
  }
  _tile_release();
  free(d64); free(dset); free(nband);
  return 0;
}
"""

CLOCK = time.perf_counter  # the clock of fma_limit_rate (the benchmark may use CPU time)
AMX_ROWS, AMX_COLS, AMX_K = 32, 32, 32  # rows and columns per AMX block, K granularity (bf16)


@functools.lru_cache(maxsize=1)
def _cpu_flags() -> frozenset[str]:
    """The processor's flags from /proc/cpuinfo (read once)."""
    try:
        line = next((ln for ln in Path("/proc/cpuinfo").read_text().splitlines() if ln.startswith("flags")), "")
    except OSError:
        line = ""
    return frozenset(line.split(":", 1)[-1].split())


def _cpu_key() -> str:
    return f"{platform.machine()}|{platform.processor()}|{' '.join(sorted(_cpu_flags()))}"


def _has_avx2() -> bool:
    f = _cpu_flags()
    return "avx2" in f and "fma" in f


def has_avx512() -> bool:
    return "avx512f" in _cpu_flags()


def has_amx() -> bool:
    """The processor lists AMX tiles with bfloat16 (the OS permission is asked separately)."""
    f = _cpu_flags()
    return "amx_tile" in f and "amx_bf16" in f


def _build(source: str, flags: list[str], tag: str) -> Path | None:
    """Compile ``source`` to a cached shared library; None when the compiler refuses."""
    cc = os.environ.get("CC", "cc")
    flags = ["-O3", *flags, "-fno-fast-math", "-ffp-contract=off", "-shared", "-fPIC"]
    digest = hashlib.sha256((source + " ".join(flags) + cc + _cpu_key()).encode()).hexdigest()[:16]
    cache = Path(os.environ.get("COMPOSITION_CACHE", Path.home() / ".cache" / "composition"))
    so = cache / f"ranks-{tag}-{digest}.so"
    if so.exists():
        return so
    try:
        cache.mkdir(parents=True, exist_ok=True)
        with tempfile.TemporaryDirectory(dir=cache) as tmp:
            src = Path(tmp) / "kernel.c"
            src.write_text(source)
            out = Path(tmp) / "kernel.so"
            subprocess.run([cc, *flags, "-o", str(out), str(src)],
                           check=True, capture_output=True, timeout=120)
            os.replace(out, so)
    except (OSError, subprocess.SubprocessError):
        return None
    return so


@dataclass
class VectorKernel:
    """A loaded vector kernel and its tile shape."""

    lib: ctypes.CDLL
    bits: int  # vector width in bits (512 or 256)
    lanes: int  # float32 lanes per vector
    MR: int  # rows of the register tile
    NR: int  # columns of the register tile (= packed panel width)

    @property
    def path(self) -> str:
        return "avx512-fp32" if self.bits == 512 else "avx2-fp32"


# variant -> extra compiler flags; "native" is what -march=native gives, "256" the AVX2 tile
_VARIANTS = {"native": ["-march=native", "-mavx2", "-mfma"],
             "256": ["-march=native", "-mavx2", "-mfma", "-mno-avx512f", "-DCOMPOSITION_FORCE_256"]}
_loaded: dict[str, VectorKernel | None] = {}


def load(variant: str = "native") -> VectorKernel | None:
    """The compiled vector kernel (``native``: the widest this machine has; ``256``: the AVX2
    tile), or None where it cannot be built here."""
    if variant in _loaded:
        return _loaded[variant]
    _loaded[variant] = None
    if os.environ.get("COMPOSITION_NO_KERNEL") or not _has_avx2():
        return None
    if variant == "256" and not has_avx512():
        return load("native")  # the native build is the 256-bit one here
    so = _build(_SOURCE, _VARIANTS[variant], f"kernel-{variant}")
    if so is None:
        return None
    try:
        lib = ctypes.CDLL(str(so))
    except OSError:
        return None
    vp, i64 = ctypes.c_void_p, ctypes.c_int64
    lib.count_rows.restype = i64
    lib.count_rows.argtypes = [vp, i64, i64, vp, i64, i64, vp, vp, vp, vp, vp, vp, vp, vp, i64]
    lib.fma_limit.restype = ctypes.c_double
    lib.fma_limit.argtypes = [i64]
    lib.kernel_info.argtypes = [vp]
    info = np.zeros(4, np.int64)
    lib.kernel_info(info.ctypes.data)
    _loaded[variant] = VectorKernel(lib, *(int(v) for v in info))
    return _loaded[variant]


_amx = {"tried": False, "lib": None, "why": "not tried"}


def load_amx():
    """The compiled AMX library with the OS permission granted, or None (``amx_status()`` says why).

    Not yet self-checked: :func:`composition.score.ranks.available_paths` runs the self-check."""
    if _amx["tried"]:
        return _amx["lib"]
    _amx["tried"] = True
    if os.environ.get("COMPOSITION_NO_KERNEL") or os.environ.get("COMPOSITION_NO_AMX"):
        _amx["why"] = "disabled by the environment"
        return None
    if not has_amx():
        _amx["why"] = "the processor has no AMX tiles with bfloat16 (amx_tile, amx_bf16)"
        return None
    so = _build(_AMX_SOURCE, ["-march=native", "-mamx-tile", "-mamx-bf16", "-mavx512f", "-mavx512bw"], "amx")
    if so is None:
        _amx["why"] = "the C compiler could not build the AMX kernel"
        return None
    try:
        lib = ctypes.CDLL(str(so))
    except OSError:
        _amx["why"] = "the AMX library could not be loaded"
        return None
    if lib.amx_init() != 0:
        _amx["why"] = "the operating system refused the AMX tile state (arch_prctl ARCH_REQ_XCOMP_PERM)"
        return None
    vp, i64 = ctypes.c_void_p, ctypes.c_int64
    lib.count_rows_amx.restype = i64
    lib.count_rows_amx.argtypes = [vp, i64, i64, vp, i64, i64, vp, vp, vp, vp, vp, vp, vp, vp, i64, i64]
    _amx["lib"], _amx["why"] = lib, "available"
    return lib


def amx_status() -> str:
    load_amx()
    return _amx["why"]


def amx_library_path() -> Path | None:
    """Where the AMX library is (or would be) cached; for the self-check's stamp file."""
    return _build(_AMX_SOURCE, ["-march=native", "-mamx-tile", "-mamx-bf16", "-mavx512f", "-mavx512bw"], "amx") \
        if has_amx() else None


def pack(right: np.ndarray, nr: int) -> np.ndarray:
    """Columns of the right factor in panels of ``nr``, zero-padded. # [V, r] float32 -> [np, r, nr]"""
    V, r = right.shape
    n_panels = -(-V // nr)
    padded = np.zeros((n_panels * nr, r), np.float32)  # [np*nr, r]
    padded[:V] = right
    return np.ascontiguousarray(padded.reshape(n_panels, nr, r).transpose(0, 2, 1))


def bf16_bits(a32: np.ndarray) -> np.ndarray:
    """The upper 16 bits of float32 values that are already bfloat16 values. # [..] -> [..] uint16"""
    return (np.ascontiguousarray(a32, np.float32).view(np.uint32) >> np.uint32(16)).astype(np.uint16)


def pack_amx_left(left3: np.ndarray) -> np.ndarray:
    """Split left rows, bf16 bits, rows and K padded. # [n, 3r] float32 (bf16 values) -> [n32, K] uint16"""
    n, k3 = left3.shape
    K = -(-k3 // AMX_K) * AMX_K
    out = np.zeros((-(-n // AMX_ROWS) * AMX_ROWS, K), np.uint16)
    out[:n, :k3] = bf16_bits(left3)
    return out


def pack_amx_right(right3: np.ndarray) -> np.ndarray:
    """Split right rows in the pair layout of TDPBF16PS. # [V, 3r] float32 (bf16 values) -> [np, K/2, 32, 2]"""
    V, k3 = right3.shape
    K = -(-k3 // AMX_K) * AMX_K
    n_panels = -(-V // AMX_COLS)
    full = np.zeros((n_panels * AMX_COLS, K), np.uint16)  # [V', K]
    full[:V, :k3] = bf16_bits(right3)
    # [np, 32 cols, K/2, 2] -> [np, K/2, 32 cols, 2]
    return np.ascontiguousarray(full.reshape(n_panels, AMX_COLS, K // 2, 2).transpose(0, 2, 1, 3))


def count_rows(kern: VectorKernel, L, P, V, hi, lo, above, ties, overflow, L64, R64, dcol, cap_row: int) -> None:
    """One vector-kernel call over all rows of ``L``, band entries decided in float64 inside.

    # L [n, r] f32, P [np, r, NR] f32, hi/lo [n] f32; above, ties [n] int64 and overflow [n]
    # uint8 updated in place; L64 [n, r] f64, R64 [V, r] f64 (C-contiguous), dcol [n] int64
    """
    n, r = L.shape
    got = kern.lib.count_rows(L.ctypes.data, n, r, P.ctypes.data, P.shape[0], V, hi.ctypes.data, lo.ctypes.data,
                              above.ctypes.data, ties.ctypes.data, overflow.ctypes.data, L64.ctypes.data,
                              R64.ctypes.data, dcol.ctypes.data, cap_row)
    if got < 0:
        raise MemoryError("the ranks kernel could not allocate its row buffers")


def count_rows_amx(lib, L, n, P, V, hi, lo, above, ties, overflow, L64, R64, dcol, cap_row: int) -> None:
    """One AMX call, band entries decided inside in float64 as in :func:`count_rows`.
    # L [n32, K] uint16 (first n rows real), P [np, K/2, 32, 2] uint16, hi/lo [n] f32,
    # above/ties [n] int64, overflow [n] uint8, L64 [n, r] f64, R64 [V, r] f64, dcol [n] int64"""
    got = lib.count_rows_amx(L.ctypes.data, n, L.shape[1], P.ctypes.data, P.shape[0], V, hi.ctypes.data,
                             lo.ctypes.data, above.ctypes.data, ties.ctypes.data, overflow.ctypes.data,
                             L64.ctypes.data, R64.ctypes.data, dcol.ctypes.data, L64.shape[1], cap_row)
    if got < 0:
        raise MemoryError("the AMX ranks kernel refused its arguments or could not allocate")


def fma_limit_rate(kern: VectorKernel, seconds: float = 0.3, r: int = 64, runs: int = 3) -> float:
    """The vector limit in entries/s at head width ``r``: independent FMAs per second x lanes / r
    (an entry of S needs r multiply-adds), best of ``runs`` runs of about ``seconds / 10`` each."""
    it = 1 << 16
    while True:
        t = CLOCK()
        kern.lib.fma_limit(it)
        if CLOCK() - t > seconds / 10 or it > 1 << 34:
            break
        it *= 4
    best = 0.0
    for _ in range(runs):
        t = CLOCK()
        lane_fmas = kern.lib.fma_limit(it)
        best = max(best, lane_fmas / max(CLOCK() - t, 1e-9))
    return best / r
