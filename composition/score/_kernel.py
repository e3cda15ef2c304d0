"""The fused counting kernel: a small C file compiled on first use, called through ctypes.

One call handles a range of rows of ``S = L @ P^T`` for one factor pair: a register-tiled
multiply (6 rows x 16 columns of float32 accumulators, the usual AVX2 shape) whose epilogue
compares every entry of the tile with its row's two thresholds while it is still in
registers. The tile is never written to memory, so comparing and counting cost little
beyond the multiply. Per row it returns

* ``above[t]``: the entries with ``S~[t, j] > hi[t]`` (certainly above the diagonal), and
* the band entries ``lo[t] <= S~[t, j] <= hi[t]`` as ``(row, column)`` records, which the
  caller decides exactly in float64 (:mod:`composition.score.ranks`).

With a second, more precise copy of the factors (``refine``) the band entries of the first
pass are first recomputed from it, 16 columns at a time, and only those still inside the
second pair of thresholds become records: the ``bf16-checked`` precision.

The kernel needs AVX2 and FMA and a C compiler at run time (``$CC``, else ``cc``). Without
them :func:`load` returns None and the plain torch path of :mod:`composition.score.ranks` runs,
which gives the same ranks. The compiled library is cached under
``$COMPOSITION_CACHE`` (default ``~/.cache/composition``), keyed by the source text and
the processor's flags.
"""

from __future__ import annotations

import ctypes
import hashlib
import os
import platform
import subprocess
import tempfile
from pathlib import Path

import numpy as np

MR, NR = 6, 16  # rows and columns of one register tile

_SOURCE = r"""
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <math.h>
#include <immintrin.h>
#define MR 6
#define NR 16
#define RB 192

typedef struct { int32_t *rec; int64_t cap, n; uint8_t *overflow; } sink_t;
typedef struct { const float *L, *P, *hi, *lo; int64_t r; int64_t *above; } refine_t;

static void put(sink_t *s, int64_t row, int64_t col) {
  if (s->overflow[row]) return;
  if (s->n >= s->cap) { s->overflow[row] = 1; return; }
  s->rec[2 * s->n] = (int32_t)row; s->rec[2 * s->n + 1] = (int32_t)col; s->n++;
}

/* band lanes ``bm`` of row ``row`` in the panel starting at column ``col0`` */
static void band(sink_t *s, const refine_t *f, int64_t row, int64_t p, int64_t col0, int bm, int64_t V) {
  if (f) {  /* recompute the 16 columns from the precise factors, decide what they can */
    const float *a = f->L + row * f->r, *b = f->P + p * f->r * NR;
    __m256 x0 = _mm256_setzero_ps(), x1 = x0, y0 = x0, y1 = x0, z0 = x0, z1 = x0, w0 = x0, w1 = x0;
    int64_t k = 0;
    for (; k + 4 <= f->r; k += 4) {  /* four independent chains hide the FMA latency */
      __m256 a0 = _mm256_broadcast_ss(a + k), a1 = _mm256_broadcast_ss(a + k + 1);
      __m256 a2 = _mm256_broadcast_ss(a + k + 2), a3 = _mm256_broadcast_ss(a + k + 3);
      x0 = _mm256_fmadd_ps(a0, _mm256_loadu_ps(b + k * NR), x0);
      x1 = _mm256_fmadd_ps(a0, _mm256_loadu_ps(b + k * NR + 8), x1);
      y0 = _mm256_fmadd_ps(a1, _mm256_loadu_ps(b + (k + 1) * NR), y0);
      y1 = _mm256_fmadd_ps(a1, _mm256_loadu_ps(b + (k + 1) * NR + 8), y1);
      z0 = _mm256_fmadd_ps(a2, _mm256_loadu_ps(b + (k + 2) * NR), z0);
      z1 = _mm256_fmadd_ps(a2, _mm256_loadu_ps(b + (k + 2) * NR + 8), z1);
      w0 = _mm256_fmadd_ps(a3, _mm256_loadu_ps(b + (k + 3) * NR), w0);
      w1 = _mm256_fmadd_ps(a3, _mm256_loadu_ps(b + (k + 3) * NR + 8), w1);
    }
    for (; k < f->r; k++) {
      __m256 ak = _mm256_broadcast_ss(a + k);
      x0 = _mm256_fmadd_ps(ak, _mm256_loadu_ps(b + k * NR), x0);
      x1 = _mm256_fmadd_ps(ak, _mm256_loadu_ps(b + k * NR + 8), x1);
    }
    x0 = _mm256_add_ps(_mm256_add_ps(x0, y0), _mm256_add_ps(z0, w0));
    x1 = _mm256_add_ps(_mm256_add_ps(x1, y1), _mm256_add_ps(z1, w1));
    __m256 hh = _mm256_broadcast_ss(f->hi + row), ll = _mm256_broadcast_ss(f->lo + row);
    __m256 m0 = _mm256_cmp_ps(x0, hh, _CMP_GT_OQ), m1 = _mm256_cmp_ps(x1, hh, _CMP_GT_OQ);
    int up = (_mm256_movemask_ps(m0) | (_mm256_movemask_ps(m1) << 8)) & bm;
    int in = (_mm256_movemask_ps(_mm256_andnot_ps(m0, _mm256_cmp_ps(x0, ll, _CMP_GE_OQ)))
              | (_mm256_movemask_ps(_mm256_andnot_ps(m1, _mm256_cmp_ps(x1, ll, _CMP_GE_OQ))) << 8)) & bm;
    while (up) { int l = __builtin_ctz(up); up &= up - 1; if (col0 + l < V) f->above[row]++; }
    bm = in;
  }
  while (bm) { int l = __builtin_ctz(bm); bm &= bm - 1; if (col0 + l < V) put(s, row, col0 + l); }
}

#define ROW(i, c0, c1) { __m256 a = _mm256_broadcast_ss(ap + k * MR + i); \
  c0 = _mm256_fmadd_ps(a, b0, c0); c1 = _mm256_fmadd_ps(a, b1, c1); }
#define EPI(i, x0, x1) { __m256 hh = _mm256_broadcast_ss(h + i); \
  __m256 m0 = _mm256_cmp_ps(x0, hh, _CMP_GT_OQ), m1 = _mm256_cmp_ps(x1, hh, _CMP_GT_OQ); \
  cnt[i] = _mm256_add_epi32(cnt[i], _mm256_add_epi32(_mm256_castps_si256(m0), _mm256_castps_si256(m1))); \
  __m256 ll = _mm256_broadcast_ss(l + i); \
  __m256 g0 = _mm256_andnot_ps(m0, _mm256_cmp_ps(x0, ll, _CMP_GE_OQ)); \
  __m256 g1 = _mm256_andnot_ps(m1, _mm256_cmp_ps(x1, ll, _CMP_GE_OQ)); \
  int bm = _mm256_movemask_ps(g0) | (_mm256_movemask_ps(g1) << 8); \
  if (__builtin_expect(bm != 0, 0)) band(s, f, row0 + i, p, p * NR, bm, V); }

static inline void tile(const float *ap, const float *bp, int64_t r, const float *h, const float *l,
                        __m256i *cnt, int64_t row0, int64_t p, int64_t V, sink_t *s, const refine_t *f) {
  __m256 c00 = _mm256_setzero_ps(), c01 = c00, c10 = c00, c11 = c00, c20 = c00, c21 = c00,
         c30 = c00, c31 = c00, c40 = c00, c41 = c00, c50 = c00, c51 = c00;
#pragma GCC unroll 4
  for (int64_t k = 0; k < r; k++) {
    __m256 b0 = _mm256_loadu_ps(bp + k * NR), b1 = _mm256_loadu_ps(bp + k * NR + 8);
    ROW(0, c00, c01) ROW(1, c10, c11) ROW(2, c20, c21) ROW(3, c30, c31) ROW(4, c40, c41) ROW(5, c50, c51)
  }
  EPI(0, c00, c01) EPI(1, c10, c11) EPI(2, c20, c21) EPI(3, c30, c31) EPI(4, c40, c41) EPI(5, c50, c51)
}

/* Rows [0, n) of L [n][r]; P packed [np][r][NR] (columns >= V are zero); thresholds hi, lo [n].
   above [n] is incremented; band records (row, column) go to rec [cap][2]; a row whose records
   do not fit gets overflow[row] = 1. refine (may be NULL): precise L, P, hi, lo of the same
   shapes. Returns the number of records. */
int64_t count_rows(const float *L, int64_t n, int64_t r, const float *P, int64_t np, int64_t V,
                   const float *hi, const float *lo, int64_t *above, int32_t *rec, int64_t cap,
                   uint8_t *overflow, const float *rL, const float *rP, const float *rhi, const float *rlo) {
  sink_t s = {rec, cap, 0, overflow};
  refine_t fr = {rL, rP, rhi, rlo, r, above};
  const refine_t *f = rL ? &fr : NULL;
  float *A = aligned_alloc(64, ((sizeof(float) * RB * r + 63) / 64) * 64);
  if (!A) return -1;
  float h[RB], l[RB];
  __m256i cnt[RB];
  for (int64_t b0 = 0; b0 < n; b0 += RB) {
    int64_t nb = n - b0 < RB ? n - b0 : RB, ng = (nb + MR - 1) / MR;
    for (int64_t g = 0; g < ng; g++)
      for (int64_t k = 0; k < r; k++)
        for (int i = 0; i < MR; i++) {
          int64_t t = g * MR + i;
          A[(g * r + k) * MR + i] = t < nb ? L[(b0 + t) * r + k] : 0.0f;
        }
    for (int64_t t = 0; t < ng * MR; t++) {
      h[t] = t < nb ? hi[b0 + t] : INFINITY;  /* padding rows: nothing above, no band */
      l[t] = t < nb ? lo[b0 + t] : INFINITY;
      cnt[t] = _mm256_setzero_si256();
    }
    for (int64_t p = 0; p < np; p++) {
      const float *bp = P + p * r * NR;
      for (int64_t g = 0; g < ng; g++)
        tile(A + g * r * MR, bp, r, h + g * MR, l + g * MR, cnt + g * MR, b0 + g * MR, p, V, &s, f);
    }
    for (int64_t t = 0; t < nb; t++) {
      int32_t c[8]; memcpy(c, &cnt[t], 32);
      int64_t z = 0; for (int q = 0; q < 8; q++) z -= c[q];
      above[b0 + t] += z;
    }
  }
  free(A);
  return s.n;
}
"""

_lib = None
_tried = False


def _cpu_key() -> str:
    try:
        flags = next((line for line in Path("/proc/cpuinfo").read_text().splitlines() if line.startswith("flags")), "")
    except OSError:
        flags = ""
    return f"{platform.machine()}|{platform.processor()}|{flags}"


def _has_avx2() -> bool:
    key = _cpu_key()
    return " avx2" in key and " fma" in key


def load():
    """The compiled kernel (a ctypes library), or None where it cannot be built here."""
    global _lib, _tried
    if _tried:
        return _lib
    _tried = True
    if os.environ.get("COMPOSITION_NO_KERNEL") or not _has_avx2():
        return None
    digest = hashlib.sha256((_SOURCE + _cpu_key()).encode()).hexdigest()[:16]
    cache = Path(os.environ.get("COMPOSITION_CACHE", Path.home() / ".cache" / "composition"))
    so = cache / f"ranks-kernel-{digest}.so"
    try:
        if not so.exists():
            cache.mkdir(parents=True, exist_ok=True)
            with tempfile.TemporaryDirectory(dir=cache) as tmp:
                src = Path(tmp) / "kernel.c"
                src.write_text(_SOURCE)
                out = Path(tmp) / "kernel.so"
                cc = os.environ.get("CC", "cc")
                subprocess.run([cc, "-O3", "-march=native", "-mavx2", "-mfma", "-fno-fast-math", "-shared",
                                "-fPIC", "-o", str(out), str(src)], check=True, capture_output=True, timeout=120)
                os.replace(out, so)
        lib = ctypes.CDLL(str(so))
    except (OSError, subprocess.SubprocessError):
        return None
    vp, i64 = ctypes.c_void_p, ctypes.c_int64
    lib.count_rows.restype = i64
    lib.count_rows.argtypes = [vp, i64, i64, vp, i64, i64, vp, vp, vp, vp, i64, vp, vp, vp, vp, vp]
    _lib = lib
    return lib


def pack(right: np.ndarray) -> np.ndarray:
    """Columns of the right factor in panels of NR, zero-padded. # [V, r] float32 -> [np, r, NR]"""
    V, r = right.shape
    n_panels = -(-V // NR)
    padded = np.zeros((n_panels * NR, r), np.float32)  # [np*NR, r]
    padded[:V] = right
    return np.ascontiguousarray(padded.reshape(n_panels, NR, r).transpose(0, 2, 1))


def count_rows(lib, L, P, V, hi, lo, above, rec, overflow, refine=None) -> int:
    """One kernel call over all rows of ``L``. # L [n, r] f32, P [np, r, NR] f32, hi/lo [n] f32

    ``above`` [n] int64 and ``overflow`` [n] uint8 are updated in place, ``rec`` [cap, 2]
    int32 receives the band records; returns how many. ``refine``: (L, P, hi, lo) precise copies.
    """
    n, r = L.shape
    ptr = lambda a: a.ctypes.data  # noqa: E731
    rL = rP = rhi = rlo = None
    if refine is not None:
        rL, rP, rhi, rlo = (ptr(a) for a in refine)
    got = lib.count_rows(ptr(L), n, r, ptr(P), P.shape[0], V, ptr(hi), ptr(lo), ptr(above), ptr(rec),
                         rec.shape[0], ptr(overflow), rL, rP, rhi, rlo)
    if got < 0:
        raise MemoryError("the ranks kernel could not allocate its row buffer")
    return int(got)
