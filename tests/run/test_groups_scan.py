"""Writer groups in a scan (docs/groups.md §1): ``--writer-group`` through ``run_scan`` and the CLI.

Small random GPT-2-layout checkpoints (tests/small_checkpoint.py, V = 512, 3 layers of 4 heads),
restricted selections, one torch thread: each scan takes about a second.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from composition import load_weights
from composition.compose.groups import WriterGroup, group_statistics
from composition.extract.tables import TableOptions, token_table
from composition.interpret.heads import load_heads
from composition.run.scan import ScanOptions, run_scan
from composition.store.scanfile import journal_path, load_scan

from ..oracles import dense_gpt2 as og
from ..small_checkpoint import build_small_gpt2, one_thread, random_gpt2  # noqa: F401  (one_thread: a fixture)

ROOT = Path(__file__).resolve().parents[2]
DUO = ("duo=0.1+1.3",)


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    return build_small_gpt2(tmp_path_factory.mktemp("groups-model"), vocab=512, seed=3)


def test_one_member_group_equals_the_single_writer_scan(model, tmp_path):
    """A one-member group's stored pairs are byte for byte its member's pairs, in the same scan (labels and
    q-values too: one Benjamini-Hochberg family, equal p-values give equal q-values) and in a scan without
    the group (every statistic before labelling); its OV profile is its member's head profile. Source: docs/groups.md §1
    (a group of one is its member)."""
    plain = run_scan(model, tmp_path / "plain.h5", ScanOptions(writers="1.2", responders="2"))
    scan = run_scan(model, tmp_path / "solo.h5", ScanOptions(writers="1.2", responders="2",
                                                             writer_groups=("solo=1.2",)))
    g = scan.groups["groups"]
    assert scan.group_names == ["solo"] and scan.group_members == {"solo": [(1, 2)]}
    for name, data in scan.arrays.items():
        assert g[name][0, 2].tobytes() == data[1, 2, 2].tobytes(), name
        if name not in ("label", "q_value"):
            assert g[name][0, 2].tobytes() == plain.arrays[name][1, 2, 2].tobytes(), name
    assert not g["done"][0, :2].any()  # responders only in layers after the member
    table = scan.group_pairs()
    assert list(table["writer"]) == ["solo"] * 4 and list(table["writer_group"]) == ["solo"] * 4
    assert (table["writer_layer"] == -1).all() and (table["writer_head"] == -1).all()
    np.testing.assert_array_equal(table["mean_percentile"], scan.pairs()["mean_percentile"])
    heads = load_heads(scan.path).heads  # the group's OV profile is its member's head profile
    for name in ("top_share", "bottom_share", "mean_percentile", "histogram", "rows_evaluated", "p_value"):
        np.testing.assert_array_equal(scan.groups["group_heads"][name][0], heads[name][1, 2], err_msg=name)
    assert scan.groups["group_heads"]["eigen_copying_score"][0] == pytest.approx(heads["eigen_copying_score"][1, 2],
                                                                                abs=1e-12)


def test_two_member_group_equals_group_statistics_and_dense_ranks(tmp_path):
    """A two-member group's stored statistics equal compose.groups.group_statistics exactly, and its mean
    percentiles and top-k shares equal those of the diagonal midranks of the members' summed dense float64
    token matrices (tests/oracles/dense_gpt2.py, docs/methods.md §3). Reference library: scipy (scipy.stats.rankdata
    in og.midranks_rows)."""
    path, sd, cfg = random_gpt2(str(tmp_path / "m"), seed=8, V=256, d=64, H=4, L=3)
    scan = run_scan(path, tmp_path / "duo.h5", ScanOptions(writers="0.1", responders="2", writer_groups=DUO))
    w = load_weights(path)
    T = token_table(w, TableOptions("attn0-mlp0"))
    ours = group_statistics(w, T, WriterGroup("duo", ((0, 1), (1, 3))), 2)
    g = scan.groups["groups"]
    T_oracle = og.token_table(sd, cfg, "attn0-mlp0", None)
    n = T_oracle.shape[0]
    for hR, s in enumerate(ours):
        assert g["mean_percentile"][0, 2, hR] == s.mean_percentile
        np.testing.assert_array_equal(g["top_share"][0, 2, hR], s.top_share)
        assert g["p_value"][0, 2, hR] == s.p_value
        dense = sum(og.dense_token_matrix(sd, cfg, T_oracle, m, (2, hR)) for m in ((0, 1), (1, 3)))  # [V, V]
        ranks = og.midranks_rows(dense)  # [V]
        assert g["mean_percentile"][0, 2, hR] == pytest.approx(float(np.mean(1 - ranks / (n - 1))), abs=1e-12)
        np.testing.assert_allclose(g["top_share"][0, 2, hR], [(ranks < k).mean() for k in scan.k])
    # one Benjamini-Hochberg family: the pairs' and the groups' q-values come from one call over all p-values
    from composition.score.stats import labels

    p = np.concatenate([scan.p_value[scan.done], g["p_value"][g["done"]]])
    mp = np.concatenate([scan.mean_percentile[scan.done], g["mean_percentile"][g["done"]]])
    _, q = labels(mp, p, scan.attrs["fdr"], scan.attrs["min_effect"])
    np.testing.assert_array_equal(np.concatenate([scan.q_value[scan.done], g["q_value"][g["done"]]]), q)


def _launch(model, out, *extra):
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "composition", "scan", str(model), "--out", str(out), "-q", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, cwd=ROOT,
                            start_new_session=True, text=True)


BEYOND = ("--writers", "0,1", "--responders", "2", "--writer-group", "duo=0.1+1.3", "--writer-group", "solo=1.2",
          "--references", "--reference-draws", "6")


def _wait_for(journal: Path, marker: bytes, proc, timeout=120.0) -> bool:
    import time

    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if proc.poll() is not None:
            return False
        try:
            if marker in journal.read_bytes():
                return True
        except FileNotFoundError:
            pass
        time.sleep(0.002)
    raise AssertionError(f"the scan never committed a {marker!r} unit")


def test_kill_9_with_groups_and_references_then_resume_equals_uninterrupted(model, tmp_path):
    """Kill -9 after a group unit and after a reference unit is committed; the same command then ends
    with a file whose every dataset of every group equals an uninterrupted run's byte for byte.
    Common practice, no source (crash testing of a write-ahead journal by killing the writer)."""
    ref = tmp_path / "ref.h5"
    assert _launch(model, ref, *BEYOND).wait(timeout=300) == 0
    out = tmp_path / "killed.h5"
    kills = 0
    for marker in (b'"group": "groups"', b'"group": "references"'):
        proc = _launch(model, out, *BEYOND)
        try:
            reached = _wait_for(journal_path(out), marker, proc)
            if reached:
                os.kill(proc.pid, signal.SIGKILL)
                kills += 1
        finally:
            proc.communicate(timeout=300)
        if not reached:
            break
    assert kills >= 1 and not load_scan(out).complete
    assert _launch(model, out, *BEYOND).wait(timeout=300) == 0
    with h5py.File(out, "r") as a, h5py.File(ref, "r") as b:
        assert sorted(a) == sorted(b) and "groups" in b and "references" in b and "group_heads" in b
        for group in b:
            assert sorted(a[group]) == sorted(b[group]), group
            for name in b[group]:
                assert a[group][name][()].tobytes() == b[group][name][()].tobytes(), f"/{group}/{name} differs"
            if group in ("groups", "references"):
                assert {k: str(v) for k, v in a[group].attrs.items()} == {k: str(v) for k, v in b[group].attrs.items()}


def test_resume_with_a_changed_group_is_refused_naming_the_option(model, tmp_path):
    """An unfinished scan resumed with another --writer-group is refused with one sentence naming the option,
    and the file is left as it was. Common practice, no source."""
    from composition.run.progress import ScanProgress

    out = tmp_path / "stopped.h5"

    def stop(event: ScanProgress):
        if event.kind == "unit" and event.units_done >= 2:
            raise RuntimeError("simulated crash")

    options = ScanOptions(writers="0,1", responders="2", writer_groups=DUO)
    with pytest.raises(RuntimeError):
        run_scan(model, out, options, progress=stop)
    before = out.read_bytes()
    proc = _launch(model, out, "--writers", "0,1", "--responders", "2", "--writer-group", "duo=0.1+1.2")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 2
    lines = [line for line in err.strip().splitlines() if line]
    assert len(lines) == 1 and "--writer-group differs" in lines[0] and "duo=0.1+1.3" in lines[0]
    assert out.read_bytes() == before


@pytest.mark.parametrize("spec, words", [("duo", "is not of the form NAME=L.H+L.H"),
                                         ("duo=0.1+7.0", "names layer 7"),
                                         ("late=2.0", "has a member in the last layer")])
def test_a_bad_group_spec_is_one_sentence_exit_2_nothing_written(model, tmp_path, spec, words):
    """A malformed or impossible --writer-group: one sentence on stderr, exit 2, no file and no journal.
    Common practice, no source."""
    out = tmp_path / "bad.h5"
    proc = _launch(model, out, "--writers", "0", "--responders", "2", "--writer-group", spec)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 2
    lines = [line for line in err.strip().splitlines() if line]
    assert len(lines) == 1 and words in lines[0] and "--writer-group" in lines[0] and "Traceback" not in err
    assert not out.exists() and not journal_path(out).exists()


def test_query_parts_are_refused_for_groups_with_a_sentence():
    """The query parts project each member's write on the token's direction one by one: not defined for a
    group, refused before any work. Common practice, no source."""
    from composition.errors import CompositionError

    with pytest.raises(CompositionError, match="--writer-group needs the query side's full write"):
        ScanOptions(writer_groups=DUO, query_part="unembed").validate()


def test_group_options_stay_out_of_old_fingerprints():
    """Scans without groups or references keep the result options (and fingerprint) they always had.
    Common practice, no source."""
    from composition.options import result_options

    assert "writer_groups" not in result_options(ScanOptions()) and "references" not in result_options(ScanOptions())
    assert result_options(ScanOptions(writer_groups=DUO))["writer_groups"] == ["duo=0.1+1.3"]
