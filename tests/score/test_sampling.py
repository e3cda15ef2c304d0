"""Sampled scans: intervals, sequential looks, FDR-controlled labels, plan, and the demo.

Factor pairs here stand in for (writer, responder) pairs: "planted" pairs have keys close
to (or opposite to) their queries, "random" pairs are independent Gaussians, for which the
diagonal's rank is uniform (exchangeable entries), i.e. they satisfy the null model.
"""

from __future__ import annotations

import json
import time

import numpy as np
import pytest
import scipy.stats
import torch
from click.testing import CliRunner

from composition.score import ranks
from composition.present.cli import main
from composition.demo import PLANTED_PAIRS, build_demo
from composition.score.sampling import Sampling, evaluate_pairs
from composition.run.scan import ScanOptions, run_scan
from composition.score.stats import labels, mean_percentile_halfwidth, share_intervals, summarise

KS = (1, 5, 20)


def _pairs(V, r, n_planted, n_random, seed, strength=None):
    g = torch.Generator().manual_seed(seed)
    lefts, rights, planted = [], [], []
    for i in range(n_planted + n_random):
        K = torch.randn(V, r, generator=g, dtype=torch.float64)
        if i < n_planted:
            s = strength[i % len(strength)] if strength else 1.0
            sign = 1.0 if i % 2 == 0 else -1.0
            Q = sign * s * K + torch.randn(V, r, generator=g, dtype=torch.float64)
        else:
            Q = torch.randn(V, r, generator=g, dtype=torch.float64)
        lefts.append(Q)
        rights.append(ranks.prepare_right(K))
        planted.append(i < n_planted)
    return lefts, rights, np.array(planted)


def test_hypergeometric_interval_tends_to_clopper_pearson():
    """Reference library: scipy.stats.binomtest(...).proportion_ci(method="exact").

    Sampling 300 of 10^7 rows without replacement is binomial to within 3e-5 in each count's
    probability, so the exact hypergeometric interval must match Clopper & Pearson (1934)."""
    N, m = 10_000_000, 300
    counts = np.array([0, 1, 7, 150, 299, 300])
    lo, hi = share_intervals(counts, m, N)
    for x, a, b in zip(counts, lo, hi):
        ci = scipy.stats.binomtest(int(x), m).proportion_ci(0.95, method="exact")
        assert abs(a - ci.low) < 2e-4 and abs(b - ci.high) < 2e-4


def test_hypergeometric_interval_against_direct_inversion():
    """Reference library: scipy.stats.hypergeom. A small population, where binomial intervals
    would be too wide: the interval is the set of population counts K not rejected by either
    one-sided test at 2.5 %, found here by brute force over every K."""
    N, m = 120, 70
    for x in (0, 3, 35, 70):
        Ks = np.arange(N + 1)
        keep = (scipy.stats.hypergeom.sf(x - 1, N, Ks, m) > 0.025) & (scipy.stats.hypergeom.cdf(x, N, Ks, m) > 0.025)
        lo, hi = share_intervals(np.array([x]), m, N)
        assert lo[0] == Ks[keep].min() / N and hi[0] == Ks[keep].max() / N
    lo, hi = share_intervals(np.array([5]), N, N)
    assert lo[0] == hi[0] == 5 / N  # every row evaluated: zero width


def test_serfling_interval_covers_means_of_samples_without_replacement():
    """Source: Serfling 1974, Ann. Statist. 2(1), Corollary 1.1 (Hoeffding bound for sampling
    without replacement). Coverage of the mean-percentile interval on a skewed population."""
    rng = np.random.default_rng(0)
    pop = rng.beta(0.3, 2.0, 2000)
    eps = mean_percentile_halfwidth(100, 2000)
    hits = [abs(rng.choice(pop, 100, replace=False).mean() - pop.mean()) <= eps for _ in range(2000)]
    assert np.mean(hits) >= 0.95
    assert mean_percentile_halfwidth(2000, 2000) == 0.0


@pytest.mark.parametrize("design", ["rows", "until-ci"])
def test_interval_coverage_over_seeds(design):
    """Reference library: scipy.stats.binomtest (the binomial limit of the same intervals,
    checked above). Exact shares are known from all rows; over many seeds of sampled runs
    the 95 % intervals of every share and of the mean percentile contain them in >= 93 %."""
    V = 1500
    lefts, rights, _ = _pairs(V, 16, 2, 2, seed=11, strength=[0.5])
    exact = evaluate_pairs(lefts, rights, V, KS, Sampling(), 0.15)
    truth_top = np.array([s.top_share for s in exact])
    truth_bottom = np.array([s.bottom_share for s in exact])
    truth_mean = np.array([s.mean_percentile for s in exact])
    assert np.all(np.maximum(truth_top, truth_bottom)[:, -1] > 0.005)  # shares not all zero
    assert (truth_top[:, -1] > 0.2).any() and (truth_bottom[:, -1] > 0.2).any()
    hits, total = 0, 0
    for seed in range(40):
        sampling = Sampling(rows=150, seed=seed) if design == "rows" else Sampling(seed=seed, until_ci=0.15, first=32)
        got = evaluate_pairs(lefts, rights, V, KS, sampling, 0.15)
        for i, s in enumerate(got):
            ok = np.concatenate([(s.ci_low <= truth_top[i]) & (truth_top[i] <= s.ci_high),
                                 (s.bottom_ci_low <= truth_bottom[i]) & (truth_bottom[i] <= s.bottom_ci_high),
                                 [s.mean_ci_low <= truth_mean[i] <= s.mean_ci_high]])
            hits += int(ok.sum())
            total += ok.size
    assert hits / total >= 0.93, hits / total


def test_sequential_scan_stops_early_and_records_rows():
    """Common practice, no source: decided pairs stop at an early look, undecided ones go on;
    the same seed reads the same rows."""
    V = 2000
    lefts, rights, planted = _pairs(V, 16, 2, 2, seed=12, strength=[2.0])
    s = Sampling(seed=3, until_ci=0.02, first=64)
    got = evaluate_pairs(lefts, rights, V, KS, s, 0.15)
    rows = np.array([g.rows for g in got])
    assert np.all(rows[planted] == 64)  # strong effects decided at the first look
    assert np.all(rows[~planted] < V)  # no-effect pairs decided neutral before all rows
    again = evaluate_pairs(lefts, rights, V, KS, s, 0.15)
    assert [g.mean_percentile for g in got] == [g.mean_percentile for g in again]
    assert s.schedule(V) == [64, 128, 256, 512, 1024, 2000]


def _fdp_over_seeds(n_planted, n_random, seeds, sampling_for, V=600):
    fdps, any_label = [], []
    for seed in seeds:
        lefts, rights, planted = _pairs(V, 8, n_planted, n_random, seed=100 + seed, strength=[0.15, 0.3, 0.6])
        st = evaluate_pairs(lefts, rights, V, KS, sampling_for(seed), 0.0)
        lab, _ = labels(np.array([s.mean_percentile for s in st]), np.array([s.p_value for s in st]),
                        fdr=0.05, min_effect=0.0)
        found = lab != 0
        fdps.append((found & ~planted).sum() / max(1, found.sum()))
        any_label.append(bool(found.any()))
    return np.array(fdps), np.array(any_label)


def test_false_discoveries_on_planted_and_random_mixes():
    """Reference library: scipy.stats.false_discovery_control (Benjamini & Hochberg 1995).

    With the effect threshold off (min_effect 0), so that only the multiple-testing control
    stands between random pairs and a label, the share of labelled pairs that are random,
    averaged over seeds, stays <= 5 % (FDR 0.05), for fixed and sequential samples."""
    for sampling_for in (lambda s: Sampling(rows=120, seed=s), lambda s: Sampling(seed=s, until_ci=0.1, first=40)):
        fdp, _ = _fdp_over_seeds(8, 24, range(20), sampling_for, V=400)
        assert fdp.mean() <= 0.05, fdp.mean()


def test_all_random_models_rarely_get_any_label():
    """Reference library: scipy.stats.false_discovery_control. Under the complete null,
    Benjamini-Hochberg at 0.05 gives any label at all in at most 5 % of seeds."""
    _, any_label = _fdp_over_seeds(0, 30, range(60), lambda s: Sampling(rows=120, seed=s), V=400)
    assert any_label.mean() <= 0.05, any_label.mean()


def test_summarise_without_sampling_has_zero_width_intervals():
    """Common practice, no source: when every row is evaluated the shares are exact."""
    r = np.random.default_rng(0).permutation(300).astype(float)
    s = summarise(r, 300, KS)
    np.testing.assert_array_equal(s.ci_low, s.top_share)
    np.testing.assert_array_equal(s.bottom_ci_high, s.bottom_share)
    assert s.mean_ci_low == s.mean_ci_high == s.mean_percentile


# --- the demo model: recovery of what was planted ---------------------------------------

SELECTION = dict(writers="1.0,1.1,1.2,1.5", responders="2.3,3.1,3.6")


@pytest.fixture(scope="module")
def demo_weights(tmp_path_factory):
    from composition.extract import load_weights

    return load_weights(build_demo(tmp_path_factory.mktemp("demo") / "model"))


def _labels_at(scan, pairs):
    return {(u, r): int(scan.label[u + r]) for u, r in pairs}


def test_demo_planted_labels_unchanged_under_every_precision_and_sampling(demo_weights, tmp_path):
    """Recovery of what was planted in the invented demo model (composition.demo.PLANTED_PAIRS):
    the labels of a restricted selection are the same under every ranks path this machine has
    (composition.score.ranks.available_paths: vector kernel, AMX where present, torch), a fixed
    row sample and a sequential sample; the scan file records the path that ran."""
    by_path = {"amx-bf16x3": dict(precision="bf16x3"), "avx512-fp32": dict(precision="fp32", engine="kernel"),
               "avx2-fp32": dict(precision="fp32", engine="kernel"), "torch-fp32": dict(precision="fp32", engine="torch")}
    paths = [p for p in ranks.available_paths() if p in by_path]
    modes = [dict()] + [by_path[p] for p in paths] + [dict(engine="torch", rows=1000), dict(rows=300, seed=1),
                                                     dict(until_ci=0.05, seed=2)]
    reference = None
    for i, mode in enumerate(modes):
        scan = run_scan(demo_weights, tmp_path / f"s{i}.h5", ScanOptions(**SELECTION, **mode))
        assert scan.attrs["ranks_path"] == ranks.resolve_path(**{k: v for k, v in mode.items()
                                                               if k in ("precision", "engine")})
        done = scan.done
        lab = scan.label[done]
        if reference is None:
            reference = lab
            planted = {p: v for p, v in PLANTED_PAIRS.items() if done[p[0] + p[1]]}  # those in SELECTION
            assert len(planted) == 3 and _labels_at(scan, planted) == planted
            assert (lab != 0).sum() == len(planted)
        np.testing.assert_array_equal(lab, reference, err_msg=str(mode))
        assert scan.ci_low.shape == scan.top_share.shape
        assert np.all(scan.ci_low[done] <= scan.top_share[done]) and np.all(scan.top_share[done] <= scan.ci_high[done])
        opts = json.loads(scan.attrs["options"])
        if mode.get("rows") == 300:
            assert opts["rows"] == 300 and opts["seed"] == 1 and np.all(scan.rows_evaluated[done] == 300)
        elif "rows" in mode:
            pass
        elif "until_ci" in mode:
            assert opts["until_ci"] == 0.05 and np.all(scan.rows_evaluated[done] < 4096)
        else:
            assert "rows" not in opts and np.all(scan.ci_low[done] == scan.top_share[done])


def test_plan_estimate_on_the_demo(demo_weights, tmp_path):
    """Common practice, no source: the plan's time estimate is close to the actual scan of a
    restricted selection (a generous factor here, since the machine is shared; the ratio is
    printed and reported in docs/performance.md)."""
    from composition.run.plan import plan_scan

    opts = ScanOptions(writers="1.0,1.1,1.2,1.3", responders="2,3.1")
    p = plan_scan(demo_weights, opts, calibrate_seconds=1.0)
    assert p.pairs == 4 * 9 and p.rows_per_pair == 4096 and p.entries == 36 * 4096 * 4096
    t = time.perf_counter()
    run_scan(demo_weights, tmp_path / "p.h5", opts)
    actual = time.perf_counter() - t
    ratio = p.total_seconds / actual
    print(f"plan estimate {p.total_seconds:.1f} s, actual {actual:.1f} s, ratio {ratio:.2f}")
    assert 1 / 3 < ratio < 3
    assert 0.2 * 2**30 < p.peak_bytes < 4 * 2**30


def test_cli_plan_and_device_errors(tmp_path):
    """Common practice, no source: plan prints its figures; bad options cost one sentence."""
    model = build_demo(tmp_path / "model")
    runner = CliRunner()
    res = runner.invoke(main, ["plan", str(model), "--writers", "1.0", "--responders", "2.3", "--calibrate", "0.5"])
    assert res.exit_code == 0, res.output
    assert "pairs              1" in res.output and "estimated time" in res.output and "peak memory" in res.output
    res = runner.invoke(main, ["plan", str(model), "--until-ci", "0.02", "--writers", "1.0", "--responders", "2.3",
                               "--calibrate", "0.5"])
    assert res.exit_code == 0 and "expected; at most 4096" in res.output
    if not torch.cuda.is_available():
        res = runner.invoke(main, ["scan", str(model), "-o", str(tmp_path / "x.h5"), "--device", "cuda"])
        assert res.exit_code == 2 and "--device cuda" in res.output and "Traceback" not in res.output
    res = runner.invoke(main, ["scan", str(model), "-o", str(tmp_path / "x.h5"), "--until-ci", "2"])
    assert res.exit_code == 2 and "--until-ci" in res.output


def test_scan_ranks_equal_the_dense_oracle(tmp_path):
    """Reference library: scipy.stats.rankdata, through the independent dense float64 oracle
    (tests/oracles/dense_gpt2.py) of a random GPT-2-layout checkpoint: the shares of an exact
    scan, and of a sampled scan on the rows of the documented permutation, are the oracle's."""
    from safetensors.numpy import save_file

    from tests.oracles import dense_gpt2 as og
    from tests.oracles.test_dense_gpt2_selfcheck import SMALL_CFG, random_numpy_sd

    cfg = dict(SMALL_CFG, n_layer=2)
    sd = random_numpy_sd(cfg, seed=4)
    save_file({k: np.ascontiguousarray(v) for k, v in sd.items()}, str(tmp_path / "model.safetensors"))
    (tmp_path / "config.json").write_text(json.dumps(dict(cfg, model_type="gpt2")))
    sd64 = {k: v.astype(np.float64) for k, v in sd.items()}
    T = og.token_table(sd64, cfg)
    V = cfg["vocab_size"]
    order = np.random.default_rng(5).permutation(V)
    for precision in ("auto", "fp32"):
        exact = run_scan(tmp_path, tmp_path / f"e-{precision}.h5",
                         ScanOptions(writers="0.1,0.2", responders="1.0,1.3", k=(1, 5), precision=precision))
        sampled = run_scan(tmp_path, tmp_path / f"s-{precision}.h5",
                           ScanOptions(writers="0.1,0.2", responders="1.0,1.3", k=(1, 5), precision=precision,
                                       rows=120, seed=5))
        for u in ((0, 1), (0, 2)):
            for r in ((1, 0), (1, 3)):
                ranks_all = og.midranks_rows(og.dense_token_matrix(sd64, cfg, T, u, r))
                want = summarise(ranks_all, V, (1, 5))
                np.testing.assert_array_equal(exact.top_share[u + r], want.top_share)
                np.testing.assert_array_equal(exact.bottom_share[u + r], want.bottom_share)
                assert exact.mean_percentile[u + r] == pytest.approx(want.mean_percentile, abs=1e-12)
                got = summarise(ranks_all[order[:120]], V, (1, 5))
                np.testing.assert_array_equal(sampled.top_share[u + r], got.top_share)
                assert sampled.mean_percentile[u + r] == pytest.approx(got.mean_percentile, abs=1e-12)
