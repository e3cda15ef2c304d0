"""The compiled paths of composition.score.ranks: every vector width built on this machine, the AMX
matrix-unit path (where it exists), the precision names and the path the scan would record.

Each path is checked against the float64 reference: a dense S computed in one fixed
summation order (the order of ranks.exact_dot, so duplicated tokens tie exactly) and
scipy.stats.rankdata midranks of each row.
"""

from __future__ import annotations

import shutil
import subprocess

import numpy as np
import pytest
import torch

from composition.score import _kernel, ranks
from composition.errors import CompositionError

from tests.oracles.dense_gpt2 import midranks_rows

PATHS = ranks.available_paths()
AMX_REASON = f"no AMX path here: {_kernel.amx_status()}"


def dense_fixed_order(left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """S = left @ right.T in float64, each entry summed in index order. # [V, r] x2 -> [V, V]"""
    S = np.outer(left[:, 0], right[:, 0])
    for i in range(1, left.shape[1]):
        S += np.outer(left[:, i], right[:, i])
    return S


def reference(left, right, rows=None):
    """Reference library: scipy (scipy.stats.rankdata, method="average", through the oracle)."""
    return midranks_rows(dense_fixed_order(left, right), rows)


PROBLEMS = ranks.selfcheck_problems(V=301, r=64, seed=11)


@pytest.mark.parametrize("name", list(PROBLEMS))
@pytest.mark.parametrize("path", PATHS)
def test_every_path_at_head_width_64(path, name):
    """Reference library: scipy. Random, planted and adversarial factors (ties, duplicated
    rows, norm spread 2^-60..2^60, diagonal at the row minimum) at dh = 64, V = 301 (not a
    multiple of any tile), every path available here."""
    left, right = PROBLEMS[name]
    np.testing.assert_array_equal(ranks.diagonal_midranks(left, right, path=path).numpy(), reference(left, right))


@pytest.mark.skipif(not _kernel.has_avx512() or _kernel.load() is None,
                    reason="no 512-bit vectors here: the native build is the only (256-bit) one")
def test_both_vector_widths_are_built_and_exact():
    """Reference library: scipy. On a 512-bit machine the native build has the 12 x 32 tile of
    zmm registers and a second build (-mno-avx512f) the 6 x 16 AVX2 tile; both are exact on
    a planted problem whose row count is not a multiple of either tile."""
    wide, narrow = _kernel.load("native"), _kernel.load("256")
    assert (wide.bits, wide.lanes, wide.MR, wide.NR) == (512, 16, 12, 32)
    assert (narrow.bits, narrow.lanes, narrow.MR, narrow.NR) == (256, 8, 6, 16)
    assert {"avx512-fp32", "avx2-fp32"} <= set(PATHS)
    left, right = PROBLEMS["planted"]
    rows = np.arange(5, 290, 2)  # 143 rows
    want = reference(left, right, rows)
    for path in ("avx512-fp32", "avx2-fp32"):
        np.testing.assert_array_equal(ranks.diagonal_midranks(left, right, rows=rows, path=path).numpy(), want)


@pytest.mark.skipif(_kernel.load() is None, reason="no C kernel can be built here")
def test_one_and_two_threads_give_the_same_ranks():
    """Common practice, no source: splitting rows over threads changes no rank."""
    left, right = PROBLEMS["integer-ties"]
    a = ranks.midranks_batch([left], [right], threads=1)[0]
    b = ranks.midranks_batch([left], [right], threads=2)[0]
    assert torch.equal(a, b)


@pytest.mark.skipif(_kernel.load() is None, reason="no C kernel can be built here")
def test_fma_limit_loop_counts_lane_fmas():
    """Common practice, no source: the limit loop reports iterations x chains x lanes, and
    its rate is a positive finite number of entries per second."""
    k = _kernel.load()
    chains = 16 if k.bits == 512 else 12
    assert k.lib.fma_limit(1000) == 1000 * chains * k.lanes
    assert 0 < _kernel.fma_limit_rate(k, seconds=0.05) < float("inf")


def test_precision_names_and_resolved_paths():
    """Common practice, no source: PRECISIONS lists what this machine offers; resolve_path
    names a path of available_paths(); the removed bf16-checked is an alias of auto."""
    assert ranks.PRECISIONS[:2] == ("auto", "fp32")
    assert ("bf16x3" in ranks.PRECISIONS) == _kernel.has_amx()
    auto = ranks.resolve_path()
    assert auto == PATHS[0]  # the fastest path here
    assert ranks.resolve_path("bf16-checked") == auto
    assert ranks.resolve_path("fp32", engine="torch") == "torch-fp32"
    assert ranks.resolve_path("fp32") in ("avx512-fp32", "avx2-fp32", "torch-fp32")
    for p in PATHS:
        assert p in ranks.PATHS
    with pytest.raises(CompositionError, match="--precision 'fp64' is not one of: auto, fp32"):
        ranks.resolve_path("fp64")


@pytest.mark.skipif(_kernel.has_amx(), reason="this processor has AMX")
def test_bf16x3_is_refused_with_a_sentence_without_amx():
    """Common practice, no source: an option the machine cannot run is a user error."""
    with pytest.raises(CompositionError, match="bf16x3 needs AMX"):
        ranks.resolve_path("bf16x3")
    with pytest.raises(CompositionError, match="cannot run on this machine"):
        ranks.prepare_right(np.ones((4, 2)), path="amx-bf16x3")


def test_a_failed_amx_selfcheck_disables_the_path(monkeypatch):
    """Common practice, no source: where the AMX kernel loads but its self-check disagrees
    with the float64 midranks, the path is withdrawn with a warning and auto falls back."""
    monkeypatch.setattr(_kernel, "load_amx", lambda: object())
    monkeypatch.setattr(_kernel, "amx_library_path", lambda: None)
    monkeypatch.setattr(ranks, "_amx_selfcheck_run", lambda: (False, "ranks differ on the planted problem"))
    monkeypatch.setattr(ranks, "_amx_state", {"checked": False, "ok": False})
    with pytest.warns(RuntimeWarning, match="failed its self-check"):
        paths = ranks.available_paths()
    assert "amx-bf16x3" not in paths
    assert ranks.resolve_path() != "amx-bf16x3"


@pytest.mark.skipif(shutil.which("cc") is None, reason="no C compiler")
def test_amx_source_compiles_where_the_compiler_knows_amx(tmp_path):
    """Common practice, no source: the AMX translation unit is valid C for gcc/clang with
    -mamx-tile -mamx-bf16 (compiled only, never run, on machines without AMX)."""
    src = tmp_path / "amx.c"
    src.write_text(_kernel._AMX_SOURCE)
    probe = subprocess.run(["cc", "-mamx-tile", "-mamx-bf16", "-x", "c", "-c", "-o", "/dev/null", "-"],
                           input="int x;", capture_output=True, text=True)
    if probe.returncode != 0:
        pytest.skip("this C compiler does not know -mamx-tile")
    res = subprocess.run(["cc", "-O3", "-mamx-tile", "-mamx-bf16", "-mavx512f", "-mavx512bw", "-fPIC", "-shared",
                          "-o", str(tmp_path / "amx.so"), str(src)], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr


@pytest.mark.skipif("amx-bf16x3" not in PATHS, reason=AMX_REASON)
@pytest.mark.parametrize("name", list(PROBLEMS))
def test_amx_path_matches_dense_float64(name):
    """Reference library: scipy. The AMX split-bf16 path, random, planted and adversarial."""
    left, right = PROBLEMS[name]
    got = ranks.midranks_batch([left], [right], path="amx-bf16x3", threads=2)[0].numpy()
    np.testing.assert_array_equal(got, reference(left, right))


@pytest.mark.skipif("amx-bf16x3" not in PATHS, reason=AMX_REASON)
def test_amx_selfcheck_passes_here():
    """Common practice, no source: the built-in self-check (run in a child process) passes."""
    ok, said = ranks._amx_selfcheck_run()
    assert ok, said


def test_removed_bf16_checked_is_accepted_where_precision_is_validated():
    """Common practice, no source: callers that validate with `in PRECISIONS` (the scan
    options) accept the removed name, which is not listed among the choices."""
    assert "bf16-checked" in ranks.PRECISIONS
    assert "bf16-checked" not in list(ranks.PRECISIONS)
    assert ranks.check_precision("bf16-checked") == "auto"
    assert "fp64" not in ranks.PRECISIONS


@pytest.mark.skipif(_kernel.has_amx(), reason="this processor has AMX")
def test_selfcheck_child_process_reports_a_missing_amx():
    """Common practice, no source: the self-check runs in a child process and, without AMX,
    fails with the reason instead of crashing."""
    ok, said = ranks._amx_selfcheck_run()
    assert not ok and "AMX is not available" in said
