"""Compensation predictions, the shortlist, the report and the pair drill-down
(composition/predict.py, composition/report/).

Each test names its source (docs/testing.md). Demo-based tests test recovery of what was planted
in the invented demo model.
"""

from __future__ import annotations

import csv
import re
import shutil
import subprocess
import sys

import numpy as np
import pytest
import torch
from click.testing import CliRunner

from composition.extract import load_weights
from composition.present.cli import main
from composition.interpret.predict import compensation, shortlist
from composition.present.report import load_report_inputs, write_report
from composition.interpret.pair import pair_detail, resolve_tokens
from composition.extract.vocabulary import load_vocabulary
from composition.extract.tables import TableOptions
from tests._demo_scan import demo_scan, random_gpt2
from tests.oracles import dense_gpt2 as og

CHROMIUM = next((p for p in (shutil.which(n) for n in ("chromium", "chromium-browser")) if p), None)
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--no-first-run", "--disable-sync"]


@pytest.fixture(scope="module")
def demo():
    root = demo_scan()
    return root, *load_report_inputs(root / "scan.h5")


@pytest.fixture(scope="module")
def report_dir(demo, tmp_path_factory):
    root, _, _ = demo
    out = tmp_path_factory.mktemp("report")
    write_report(root / "scan.h5", out)
    return out


# ---------------------------------------------------------------------------
# Compensation and shortlist
# ---------------------------------------------------------------------------

def test_compensation_follows_the_sign_of_three_labels():
    """compensating iff s_U s_QK s_R < 0, reinforcing iff > 0, none with any neutral sign.

    Source: docs/methods.md §6 (three signs; supersedes two-sign wording); the glossary.s
    raising + suppressing / lowering + copying examples are the s_U = +1 cases.
    """
    L, H = 3, 2
    heads = np.array([[1, -1], [1, -1], [0, 1]], np.int8)  # [L, H]
    pairs = np.full((L, H, L, H), -128, np.int8)
    pairs[0, 0, 1, 1] = 1  # copying writer, raising, suppressing responder -> compensating
    pairs[0, 0, 1, 0] = 1  # copying, raising, copying -> reinforcing
    pairs[0, 1, 1, 0] = -1  # suppressing writer, lowering, copying -> reinforcing
    pairs[0, 1, 1, 1] = 1  # suppressing writer, raising, suppressing -> reinforcing
    pairs[1, 0, 2, 1] = -1  # copying, lowering, copying -> compensating
    pairs[1, 0, 2, 0] = -1  # responder neutral -> none
    pairs[0, 0, 2, 1] = 0  # neutral response -> none
    pred = compensation(pairs, heads)["prediction"]
    assert pred[0, 0, 1, 1] == -1 and pred[1, 0, 2, 1] == -1
    heads[2, 1] = -128  # a responder without a profile predicts nothing
    assert compensation(pairs, heads)["prediction"][1, 0, 2, 1] == -128
    assert pred[0, 0, 1, 0] == 1 and pred[0, 1, 1, 0] == 1 and pred[0, 1, 1, 1] == 1
    assert pred[1, 0, 2, 0] == 0 and pred[0, 0, 2, 1] == 0
    assert pred[2, 0, 0, 0] == -128


def test_demo_shortlist_names_exactly_the_planted_heads(demo):
    """Recovery test: the shortlist holds exactly the planted suppressor responders
    (raising + suppressing) and back-up responders (lowering + copying), each with its
    planted writer.

    Tests recovery of what was planted (composition/demo.py, PLANTED_CIRCUITS).
    """
    from composition.demo import PLANTED_CIRCUITS

    _, scan, heads = demo
    expect = {}
    for u, r, _, _, qk, ov in PLANTED_CIRCUITS.values():
        kind = {(1, -1): "suppressor", (-1, 1): "back-up"}.get((qk, ov))
        if kind:
            expect.setdefault((kind, r), set()).add(f"{u[0]}.{u[1]}")
    got = {(c.kind, c.head): {w["writer"] for w in c.writers} for c in shortlist(scan, heads)}
    assert got == expect


def test_demo_compensation_map_marks_exactly_the_planted_pairs(demo, report_dir):
    """Recovery test: the compensation predictions are non-'none' exactly at the planted
    pairs, compensating where the planted signs multiply to < 0 and reinforcing where > 0;
    the report's compensation.csv lists the same pairs.

    Tests recovery of what was planted (composition/demo.py, PLANTED_CIRCUITS, PLANTED_HEADS).
    """
    from composition.demo import PLANTED_CIRCUITS, PLANTED_HEADS

    _, scan, heads = demo
    pred = compensation(scan.label, heads.heads["label"])["prediction"]
    expect = {(*u, *r): int(np.sign(PLANTED_HEADS[u] * qk * ov)) for u, r, _, _, qk, ov in PLANTED_CIRCUITS.values()}
    got = {tuple(int(v) for v in ix): int(pred[tuple(ix)]) for ix in np.argwhere(np.isin(pred, (-1, 1)))}
    assert got == expect
    with open(report_dir / "tables" / "compensation.csv") as f:
        rows = {(r["writer"], r["responder"]): r["prediction_word"] for r in csv.DictReader(f)}
    words = {-1: "compensating", 1: "reinforcing"}
    assert rows == {(f"{i[0]}.{i[1]}", f"{i[2]}.{i[3]}"): words[s] for i, s in expect.items()}


def test_shortlist_command_prints_and_writes_csv(demo, tmp_path):
    """`composition shortlist SCAN.h5 --csv FILE` prints the table and writes one CSV row per
    (head, writer); a symlink at FILE and a scan without head profiles each cost one line and exit status 2.

    Common practice, no source.
    """
    root, scan, heads = demo
    out = tmp_path / "short.csv"
    r = CliRunner().invoke(main, ["shortlist", str(root / "scan.h5"), "--csv", str(out)])
    assert r.exit_code == 0, r.output
    assert "suppressor" in r.output and "back-up" in r.output
    with open(out) as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == sum(len(c.writers) for c in shortlist(scan, heads))
    victim, planted = tmp_path / "victim.txt", tmp_path / "planted.csv"
    victim.write_text("kept")
    planted.symlink_to(victim)  # README: files are never written through a symlink
    r = CliRunner().invoke(main, ["shortlist", str(root / "scan.h5"), "--csv", str(planted)])
    assert r.exit_code == 2 and "symbolic link" in r.output and victim.read_text() == "kept"
    import h5py

    bare = tmp_path / "bare.h5"
    shutil.copyfile(root / "scan.h5", bare)
    with h5py.File(bare, "a") as f:
        del f["heads"]
    r = CliRunner().invoke(main, ["shortlist", str(bare)])
    assert r.exit_code == 2 and len(r.output.strip().splitlines()) == 1 and "composition heads" in r.output


# ---------------------------------------------------------------------------
# Report
# ---------------------------------------------------------------------------

def test_report_files_and_heatmap_axes(report_dir, demo):
    """The report writes every figure as PNG and SVG and every CSV table; heatmap SVGs keep
    `layer.head` axis labels as text, and the page states the docs/methods.md §8 cautions.

    Common practice, no source.
    """
    _, scan, _ = demo
    figures = sorted(p.stem for p in (report_dir / "figures").glob("*.png"))
    assert figures == sorted(p.stem for p in (report_dir / "figures").glob("*.svg"))
    for name in ("mean_percentile", "compensation", "pair_labels", "q_composition", "projection_kernel_q",
                 "head_copying"):
        assert name in figures
    svg = (report_dir / "figures" / "mean_percentile.svg").read_text()
    assert ">2.3<" in svg and ">3.6<" in svg and ">1.0<" in svg
    for name in ("pairs", "heads", "model_space", "shortlist", "compensation"):
        assert (report_dir / "tables" / f"{name}.csv").is_file()
    page = (report_dir / "index.html").read_text()
    assert "not causal evidence" in page and "token-table assumption" in page
    assert "http://" not in page and "https://" not in page


def _chromium(url, *extra, tmp):
    """Run headless Chromium once; return (stdout, console lines from stderr)."""
    profile = tmp / f"profile-{len(list(tmp.iterdir()))}"
    cmd = [CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
           "--virtual-time-budget=5000", *extra, url]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    return done.stdout, console


@pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (Debian: apt-get install -y chromium)")
def test_report_opens_in_headless_chromium(report_dir, tmp_path):
    """The report page loads in headless Chromium with networking off: no console messages,
    every figure decoded (the page's own check sets data-heatmaps-loaded), and a screenshot.
    The same check flags a page with a broken image and a script error.

    Reference library: Chromium (Debian package), --dump-dom and --screenshot.
    """
    dom, console = _chromium((report_dir / "index.html").as_uri(), "--dump-dom", tmp=tmp_path)
    assert console == []
    total = re.search(r'data-heatmaps-total="(\d+)"', dom)
    loaded = re.search(r'data-heatmaps-loaded="(\d+)"', dom)
    assert total and loaded, "the page's figure check did not run"
    expected = (report_dir / "index.html").read_text().count('data-kind="heatmap"')
    assert int(total.group(1)) == expected >= 11 and int(loaded.group(1)) == expected
    assert re.search(r'data-figures-loaded="(\d+)"', dom).group(1) == re.search(r'data-figures-total="(\d+)"', dom).group(1)
    shot = report_dir / "screenshot.png"
    _chromium((report_dir / "index.html").as_uri(), f"--screenshot={shot}", "--window-size=1280,4000", tmp=tmp_path)
    assert shot.is_file() and shot.stat().st_size > 50_000

    broken = report_dir / "broken.html"
    page = (report_dir / "index.html").read_text()
    at = page.index('data-kind="heatmap"')  # break the first heatmap's image
    page = page[:at] + re.sub(r'src="data:image/png;base64,[^"]{200}', 'src="data:image/png;base64,AAAA',
                              page[at:], count=1)
    broken.write_text(page.replace("</body>", "<script>undefinedFunction();</script></body>"))
    dom, console = _chromium(broken.as_uri(), "--dump-dom", tmp=tmp_path)
    assert console
    assert int(re.search(r'data-heatmaps-loaded="(\d+)"', dom).group(1)) == expected - 1


def test_report_command(demo, tmp_path):
    """`composition report SCAN.h5 --out DIR` prints the path of index.html.

    Common practice, no source.
    """
    root, _, _ = demo
    r = CliRunner().invoke(main, ["report", str(root / "scan.h5"), "--out", str(tmp_path / "r")])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "r" / "index.html").is_file() and "index.html" in r.output


# ---------------------------------------------------------------------------
# Pair drill-down and token text
# ---------------------------------------------------------------------------

def test_pair_ranks_match_dense_rankdata(tmp_path):
    """The drill-down's per-token ranks equal the dense float64 token matrix ranked with
    scipy.stats.rankdata, row by row.

    Reference library: scipy.stats.rankdata via tests/oracles/dense_gpt2.py (docs/methods.md §3-§4).
    """
    path, sd, cfg = random_gpt2(tmp_path / "m", seed=11, V=200, d=32, H=2, L=3)
    w = load_weights(path)
    detail = pair_detail(w, (0, 1), (2, 0), TableOptions("attn0-mlp0"))
    table = og.token_table(sd, cfg, "attn0-mlp0")
    expect = og.midranks_rows(og.dense_token_matrix(sd, cfg, table, (0, 1), (2, 0)))
    np.testing.assert_array_equal(detail.ranks, expect)
    top = detail.extremes(3, "highest")
    assert [r["rank"] for r in top] == sorted(expect)[:3]


def test_byte_level_pieces_decode_like_gpt2(tmp_path):
    """Byte-level vocabulary pieces are shown as the text they stand for.

    Reference library: tokenizers (Hugging Face), ByteLevel pre-tokenizer to make the pieces
    and ByteLevel decoder to decode them.
    """
    tokenizers = pytest.importorskip("tokenizers")
    import json

    texts = [" the", "caf\u00e9", "\n", " \u00fcber", "\u4e2d"]
    split = tokenizers.pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=False)
    pieces = [split.pre_tokenize_str(t)[0][0] for t in texts]
    decoder = tokenizers.decoders.ByteLevel()
    (tmp_path / "tokenizer.json").write_text(json.dumps({
        "model": {"type": "BPE", "vocab": {p: i for i, p in enumerate(pieces)}},
        "decoder": {"type": "ByteLevel"}}))
    vocab = load_vocabulary(tmp_path, len(pieces) + 1)
    assert [vocab.text(i) for i in range(len(pieces))] == [decoder.decode([p]) for p in pieces] == texts
    assert vocab.text(len(pieces)) == f"#{len(pieces)}"
    assert resolve_tokens([" the", pieces[1], "5"], vocab, 6) == [0, 1, 5]


def test_pair_command_on_the_demo_decodes_invented_tokens(demo):
    """Recovery test: for the planted suppressor pair the command reports a mean percentile
    near 1, decodes tokens from the demo's invented tokenizer.json, places chosen tokens and
    prints the three signs from the scan; an unknown token costs one line and exit 2.

    Tests recovery of what was planted (composition/demo.py, PLANTED_CIRCUITS["suppressor"]).
    """
    from composition.demo import PLANTED_CIRCUITS

    root, _, _ = demo
    u, r = PLANTED_CIRCUITS["suppressor"][:2]
    vocab = load_vocabulary(root / "model", 4096)
    word = vocab.text(7)
    args = ["pair", str(root / "model"), f"{u[0]}.{u[1]}", f"{r[0]}.{r[1]}", "--top", "3"]
    out = CliRunner().invoke(main, args + ["--tokens", f"{word},9", "--scan", str(root / "scan.h5")])
    assert out.exit_code == 0, out.output
    mean = float(re.search(r"mean percentile ([0-9.]+)", out.output).group(1))
    assert mean > 0.95
    assert f"'{word}'" in out.output and "compensating" in out.output and "s_R -1" in out.output
    bad = CliRunner().invoke(main, args + ["--tokens", "no-such-token"])
    assert bad.exit_code == 2 and len(bad.output.strip().splitlines()) == 1
