"""``compare``: scans of one architecture lined up across checkpoints (composition.interpret.compare)."""

from __future__ import annotations

import csv
import os
import shutil

import numpy as np
import pytest
from click.testing import CliRunner

from composition import CompositionError, ScanOptions, load_weights, run_scan
from composition.interpret.compare import compare_scans
from composition.present.compare_command import compare

from ..small_checkpoint import random_gpt2

OPTIONS = ScanOptions(writers="1.0,1.1", responders="2.0,2.1")
PLANTED = (1, 1, 2, 0)  # writer 1.1 -> responder 2.0: the one pair model B changes


def _plant_pair(src, dst, writer=1, other=0, responder=0, scale=4.0):
    """Copy the checkpoint ``src`` to ``dst`` with responder 2.``responder``'s query weights changed so
    that it reads writer 1.``writer``'s write (query fitted to its own keys, by least squares), along
    directions that writer 1.``other`` cannot write: the pair (1.other, 2.responder) keeps its token
    matrix, and no other selected pair's factors change."""
    from safetensors.numpy import load_file, save_file

    from composition.compose.factors import residual_path, responder_keys, writer_values
    from composition.extract.tables import TableOptions, token_table

    w = load_weights(src)
    lin = residual_path(w, 1, 2).numpy()  # [d, d]
    write_u = w.layers[1].attn.W_O[writer].double().numpy() @ lin  # [dh, d]
    write_o = w.layers[1].attn.W_O[other].double().numpy() @ lin  # [dh, d]
    basis, _ = np.linalg.qr(write_o.T)  # [d, dh]
    away = np.eye(w.d_model) - basis @ basis.T  # [d, d]: nothing of writer 1.other's write passes
    T = token_table(w, TableOptions("attn0-mlp0", None))
    A = writer_values(w, T, 1)[writer].numpy()  # [V, dh]
    K = responder_keys(w, T, 2)[responder].numpy()  # [V, dh]
    middle = np.linalg.lstsq(A, K, rcond=None)[0]  # [dh, dh]
    delta = away @ np.linalg.pinv(write_u @ away) @ middle  # [d, dh]
    old = write_u @ w.layers[2].attn.W_Q[responder].double().numpy()
    delta *= scale * np.linalg.norm(old) / np.linalg.norm(write_u @ delta)
    sd = load_file(os.path.join(src, "model.safetensors"))
    key, dh = "transformer.h.2.attn.c_attn.weight", w.d_head
    weight = sd[key].astype(np.float64)
    weight[:, responder * dh:(responder + 1) * dh] += delta  # the query columns of head 2.responder
    sd[key] = weight.astype(np.float32)
    os.makedirs(dst, exist_ok=True)
    save_file(sd, os.path.join(dst, "model.safetensors"))
    shutil.copy(os.path.join(src, "config.json"), dst)
    return dst


@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    """Scans of a small random model (A), of A with one pair planted (B), and of A again."""
    d = tmp_path_factory.mktemp("compare")
    a = random_gpt2(str(d / "A"), V=512, d=64, H=4, L=3, init_std=64**-0.5)[0]
    b = _plant_pair(a, str(d / "B"))
    out = {"A": run_scan(a, d / "A.h5", OPTIONS).path, "B": run_scan(b, d / "B.h5", OPTIONS).path,
           "dir": d, "model": a}
    return out


def test_scan_compared_with_itself_shows_no_difference(scans, tmp_path):
    """Common practice, no source: a scan compared with itself has zero differences and no label change."""
    comp = compare_scans([scans["A"], scans["A"]])
    assert len(comp.index) == 4
    assert np.all(comp.difference(0, 1) == 0)
    assert comp.label_changes() == []
    assert "label changes between consecutive scans: 0" in comp.summary()
    assert "no pair's mean percentile differs" in comp.summary()


def test_planted_pair_is_the_only_difference(scans, tmp_path):
    """Common practice, no source: model B differs from A only in the query weights of responder 2.0, along
    directions writer 1.0 cannot write, so of the four selected pairs only 1.1 -> 2.0 may change; the
    planted query fits the responder's keys, so the pair becomes attention-raising."""
    comp = compare_scans([scans["A"], scans["B"]])
    diff = comp.difference(0, 1)
    changed = {tuple(int(x) for x in comp.index[p]) for p in np.flatnonzero(diff != 0)}
    assert changed == {PLANTED}
    rows = comp.label_changes()
    assert len(rows) == 1
    r = rows[0]
    assert (r["writer_layer"], r["writer_head"], r["responder_layer"], r["responder_head"]) == PLANTED
    assert r["label_before"] == "neutral" and r["label_after"] == "attention-raising"
    assert r["mean_percentile_after"] > 0.85
    assert r["q_value_after"] < 0.01
    files = comp.write(tmp_path / "out")
    with open(files["label_changes"]) as f:
        table = list(csv.DictReader(f))
    assert len(table) == 1 and table[0]["writer_layer"] == "1" and table[0]["responder_head"] == "0"
    with open(files["pairs"]) as f:
        tidy = list(csv.DictReader(f))
    assert len(tidy) == 2 * 4  # one row per pair and scan
    assert files["difference_1_2"].stat().st_size > 0
    assert "trajectories" not in files  # two scans: no trajectory figure


def test_three_scans_write_trajectories_and_the_cli_prints_a_summary(scans, tmp_path):
    """Common practice, no source: three scans (A, B, A) give the step differences, last minus first (zero
    here), a trajectory figure, and the terminal summary through the command."""
    paths = [str(scans["A"]), str(scans["B"]), str(scans["A"])]
    comp = compare_scans(paths, names=["before", "planted", "after"])
    assert comp.steps == [(0, 1), (1, 2), (0, 2)]
    assert np.all(comp.difference(0, 2) == 0)
    assert len(comp.label_changes()) == 2  # appears, then disappears
    result = CliRunner().invoke(compare, [*paths, "--out", str(tmp_path / "cmp"), "--names", "before,planted,after"])
    assert result.exit_code == 0, result.output
    assert "compared 3 scans" in result.output and "1.1 -> 2.0" in result.output
    for name in ("difference_1_2.png", "difference_2_3.png", "difference_1_3.png", "trajectories.png",
                 "label_changes.csv", "pairs_by_scan.csv"):
        assert (tmp_path / "cmp" / name).stat().st_size > 0


@pytest.mark.parametrize("change, words", [
    (dict(k=(1, 5)), "--k"),
    (dict(table="embed"), "--table"),
    (dict(orientation="column"), "--orientation"),
    (dict(min_effect=0.2), "--min-effect"),
    (dict(rows=256), "--rows"),
])
def test_mismatched_options_are_refused_naming_the_difference(scans, tmp_path, change, words):
    """Common practice, no source: scans made with other options are refused with one sentence naming the option."""
    from dataclasses import replace

    other = run_scan(scans["model"], tmp_path / "other.h5", replace(OPTIONS, **change)).path
    with pytest.raises(CompositionError, match=words) as err:
        compare_scans([scans["A"], other])
    assert "\n" not in str(err.value)


def test_mismatched_shapes_are_refused(scans, tmp_path):
    """Common practice, no source: a model with another number of heads is refused, naming it."""
    m = random_gpt2(str(tmp_path / "H2"), V=512, d=64, H=2, L=3)[0]
    other = run_scan(m, tmp_path / "h2.h5", OPTIONS).path
    with pytest.raises(CompositionError, match="heads per layer"):
        compare_scans([scans["A"], other])
    with pytest.raises(CompositionError, match="two or more"):
        compare_scans([scans["A"]])


def test_demo_before_and_after_compare_shows_the_removed_pair(tmp_path):
    """Recovery of what was planted in the invented demo model (composition.demo.build_demo_after leaves the
    suppressor circuit out, data_cards/demo-model.md): of the compared pairs only 1.0 -> 2.3 changes label,
    from attention-raising to neutral; every other tensor is the same, so pairs of other responders agree."""
    from composition.demo import COMPARE_SELECTION, PLANTED_CIRCUITS, build_demo, build_demo_after

    options = ScanOptions(**COMPARE_SELECTION)
    before = run_scan(build_demo(tmp_path / "before"), tmp_path / "before.h5", options).path
    after = run_scan(build_demo_after(tmp_path / "after"), tmp_path / "after.h5", options).path
    comp = compare_scans([before, after])
    (lU, hU), (lR, hR) = PLANTED_CIRCUITS["suppressor"][:2]
    rows = comp.label_changes()
    assert [(r["writer"], r["responder"], r["label_before"], r["label_after"]) for r in rows] == [
        (f"{lU}.{hU}", f"{lR}.{hR}", "attention-raising", "neutral")]
    moved = {tuple(int(x) for x in comp.index[p]) for p in np.flatnonzero(comp.difference(0, 1) != 0)}
    assert moved and all(p[2:] == (lR, hR) for p in moved)  # only pairs of the changed responder move
    assert (lU, hU, lR, hR) in comp.shortlisted  # a shortlisted suppressor before the change
    from safetensors.numpy import load_file

    a, b = load_file(str(tmp_path / "before" / "model.safetensors")), load_file(str(tmp_path / "after" / "model.safetensors"))
    assert sorted(a) == sorted(b)
    assert [n for n in a if not np.array_equal(a[n], b[n])] == [f"transformer.h.{lR}.attn.c_attn.weight"]


def test_shortlist_with_a_writer_group_lines_up_the_single_heads(tmp_path):
    """Recovery of what was planted in the invented demo model (composition.demo): a group of one member
    (``solo=1.0``, the planted suppressor's writer) is shortlisted beside the head itself; compare lines up
    single-head pairs only, so the shortlisted pairs are 1.0 -> 2.3 alone (a group's name is no head label)."""
    from composition.demo import PLANTED_CIRCUITS, build_demo
    from composition.interpret.predict import shortlist
    from composition.present.report import load_report_inputs

    (lU, hU), (lR, hR) = PLANTED_CIRCUITS["suppressor"][:2]
    options = ScanOptions(writers=f"{lU}.{hU}", responders=f"{lR}.{hR}", writer_groups=(f"solo={lU}.{hU}",))
    path = run_scan(build_demo(tmp_path / "model"), tmp_path / "groups.h5", options).path
    scan, heads = load_report_inputs(path)
    assert [(c.label, [r["writer"] for r in c.writers]) for c in shortlist(scan, heads)] == [
        (f"{lR}.{hR}", [f"{lU}.{hU}", "solo"])]
    assert compare_scans([path, path]).shortlisted == [(lU, hU, lR, hR)]
