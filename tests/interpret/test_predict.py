"""Compensation predictions and the shortlist come only from the query side's full write
(docs/methods.md §6); every other side's scan is reported in that side's own words.

Recovery of what was planted in the invented demo model (composition.demo): the suppressor pair
1.0 -> 2.3 and the back-up pair 1.2 -> 3.1 are labelled on the query side and, with the same
signs, on the key side (docs/sides.md, "The demo"). Before the side registry, the key-side scan
shortlisted 2.3 and 3.1 as "compensating" with a "Q-comp z" column.
"""

from __future__ import annotations

import numpy as np
import pytest
from click.testing import CliRunner

from composition.compose import sides
from composition.interpret.predict import (pair_prediction, pair_table, readout_note, scan_compensation, shortlist,
                                           side_notes)
from composition.options import ScanOptions
from composition.present.cli import main
from composition.present.report import load_report_inputs, write_report
from composition.run.scan import run_scan
from composition.score.stats import LABEL_NOT_COMPUTED

WRITERS, RESPONDERS = "1.0,1.1,1.2", "2.2,2.3,3.1"  # the planted suppressor, back-up and copy-through pairs


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo model scanned on the planted pairs' heads, once per side (query full, key, value)
    and for the query side's unembed part; each file carries its head profiles."""
    from composition.demo import build_demo

    root = tmp_path_factory.mktemp("demo-sides")
    model = build_demo(root / "model")
    paths = {}
    for side, part in (("query", "full"), ("key", "full"), ("value", "full"), ("query", "unembed")):
        path = root / f"{side}-{part}.h5"
        run_scan(model, path, ScanOptions(side=side, query_part=part, writers=WRITERS, responders=RESPONDERS))
        paths[(side, part)] = path
    return root, paths


def test_query_side_full_write_shortlists_the_planted_heads(demo):
    """Positive control, recovery of the planted suppressor and back-up heads (composition.demo):
    the query side's full write shortlists 2.3 (suppressor) and 3.1 (back-up), both compensating."""
    scan, heads = load_report_inputs(demo[1][("query", "full")])
    found = {c.label: (c.kind, [r["prediction"] for r in c.writers]) for c in shortlist(scan, heads)}
    assert found == {"2.3": ("suppressor", ["compensating"]), "3.1": ("back-up", ["compensating"])}
    assert pair_prediction(scan, heads, (1, 0), (2, 3))["prediction"] == "compensating"


@pytest.mark.parametrize("side,part", [("key", "full"), ("value", "full"), ("query", "unembed")])
def test_other_sides_make_no_compensation_claim(demo, side, part):
    """Recovery test on the demo model: a key-side, value-side or query-part scan yields no shortlist
    and no prediction (every prediction "not computed"), while its labels stay in the table in its
    side's words. Source: docs/methods.md §6 (only the response s_QK of the full write enters)."""
    scan, heads = load_report_inputs(demo[1][(side, part)])
    registered = sides.get(side, part)
    assert not registered.feeds_prediction
    assert shortlist(scan, heads) == []
    comp = scan_compensation(scan, heads)
    assert np.all(comp["prediction"] == LABEL_NOT_COMPUTED)
    table = pair_table(scan, heads)
    labelled = np.isin(table["label"], (1, -1))
    assert labelled.any()  # the planted pairs are labelled on every side scanned here
    assert set(table["response_word"][labelled]) <= {registered.words.raising, registered.words.lowering}
    assert set(table["prediction_word"]) == {"not computed"}
    for (lU, hU, lR, hR) in np.argwhere(np.isin(scan.label, (1, -1))):
        pp = pair_prediction(scan, heads, (lU, hU), (lR, hR))
        assert pp["prediction"] == "not computed"
        assert pp["response"] == registered.words[int(scan.label[lU, hU, lR, hR])]
        assert pp["response"] not in ("attention-raising", "attention-lowering") or side == "query"
    assert any("do not feed the compensation prediction" in n for n in side_notes(scan))


def test_cli_shortlist_on_the_key_side_scan(demo):
    """`composition shortlist` on the demo's key-side scan: no candidates, no "Q-comp z" column, no
    "compensating"; it says why in one sentence. On the query-side scan the same command lists both
    planted heads. Recovery test on the demo model; Source: docs/methods.md §6."""
    runner = CliRunner()
    key = runner.invoke(main, ["shortlist", str(demo[1][("key", "full")])])
    assert key.exit_code == 0, key.output
    assert "Q-comp z" not in key.output and "compensating" not in key.output
    assert "shortlist: none" in key.output and "key-side labels do not feed" in key.output
    query = runner.invoke(main, ["shortlist", str(demo[1][("query", "full")])])
    assert "Q-comp z" in query.output and query.output.count("compensating") == 2


def test_report_on_the_key_side_scan_uses_key_words(demo, tmp_path):
    """The report of the key-side scan names its labels in the key side's words, counts no
    compensating pair, writes no compensating row, and states that its labels do not feed the
    prediction. Recovery test on the demo model; Source: docs/methods.md §6."""
    import csv

    index = write_report(demo[1][("key", "full")], tmp_path / "report")
    page = index.read_text()
    words = sides.get("key").words
    assert f"{words.raising} pairs" in page and "key-side labels do not feed" in page
    assert "compensating pairs</span>" not in page and "do not feed the compensation prediction" in page
    tables = tmp_path / "report" / "tables"
    with open(tables / "compensation.csv") as f:
        assert list(csv.DictReader(f)) == []  # the query-side report of the same pairs has two rows
    with open(tables / "pairs.csv") as f:
        pairs = list(csv.DictReader(f))
    assert {r["response_word"] for r in pairs} == {words.raising, words.lowering, words.neutral}
    assert {r["prediction_word"] for r in pairs} == {"not computed"}
    query = write_report(demo[1][("query", "full")], tmp_path / "query-report")
    with open(query.parent / "tables" / "compensation.csv") as f:
        assert len(list(csv.DictReader(f))) == 2


def test_readout_note_only_for_models_without_lm_head():
    """Common practice, no source: the readout sentence appears exactly for ``readout =
    input-embedding`` (composition.extract.weights.Weights.readout)."""
    assert "no LM head" in readout_note("input-embedding")
    assert readout_note("tied") is None and readout_note("lm-head") is None and readout_note(None) is None


def test_shortlist_and_report_state_the_readout_assumption(tmp_path):
    """A BERT encoder without its masked-LM head is read with the input embedding as readout: the
    shortlist and the report, which rest on copying/suppressing labels, say so; a GPT-2 model's do
    not. Reference library: transformers (BertModel, via tests/oracles/hf_models.py)."""
    from ..oracles import hf_models as hf
    from ..small_checkpoint import random_gpt2

    bert = tmp_path / "bert"
    hf.build("bert-base", bert)
    gpt2, _, _ = random_gpt2(str(tmp_path / "gpt2"), L=2)
    for model, expected in ((bert, True), (gpt2, False)):
        path = tmp_path / f"{'bert' if expected else 'gpt2'}.h5"
        run_scan(model, path, ScanOptions())
        res = CliRunner().invoke(main, ["shortlist", str(path)])
        assert res.exit_code == 0, res.output
        assert ("no LM head" in res.output) == expected
        page = write_report(path, tmp_path / f"report-{path.stem}").read_text()
        assert ("no LM head" in page) == expected
