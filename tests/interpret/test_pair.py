"""`composition pair`: one pair in depth on any side and query part, from any checkpoint the scan
reads (family, layout file, rotary offsets), with its side's words, ties, token lookup and the
readout assumption."""

from __future__ import annotations

import json

import numpy as np
import pytest
from click.testing import CliRunner

from composition.compose import sides
from composition.errors import CompositionError
from composition.extract import load_weights
from composition.extract.tables import TableOptions
from composition.extract.vocabulary import Vocabulary
from composition.interpret.pair import PairDetail, pair_detail, resolve_tokens, uncased
from composition.options import ScanOptions
from composition.present import terminal
from composition.present.cli import main
from composition.run.scan import run_scan

from ..oracles import dense_gpt2 as og
from ..oracles import dense_sides as osd
from ..small_checkpoint import random_gpt2


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    path, sd, cfg = random_gpt2(str(tmp_path_factory.mktemp("pair") / "model"))
    return path, {k: np.asarray(v) for k, v in sd.items()}, cfg


def _oracle(sd, cfg, side, part, writer, responder):
    T = og.token_table(sd, cfg, "attn0-mlp0", None)  # [V, d]
    if side == "key":
        return osd.dense_key_matrix(sd, cfg, T, writer, responder)
    if side == "value":
        return osd.dense_value_matrix(sd, cfg, T, writer, responder)
    return osd.dense_query_part_matrix(sd, cfg, T, writer, responder, part)


@pytest.mark.parametrize("side,part,orientation", [("key", "full", "row"), ("key", "full", "column"),
                                                   ("value", "full", "row"), ("query", "rest", "row")])
def test_pair_ranks_equal_the_dense_oracle_on_every_side(model, side, part, orientation):
    """pair_detail on a side or query part ranks every token exactly as scipy.stats.rankdata does on the
    oracle's dense float64 matrix of that side. Reference library: scipy.stats.rankdata (via
    tests/oracles/dense_gpt2.midranks_rows); Source: docs/methods.md §3b, §4"""
    path, sd, cfg = model
    w = load_weights(path)
    detail = pair_detail(w, (0, 1), (2, 3), TableOptions("attn0-mlp0"), orientation, side=side, query_part=part)
    S = _oracle(sd, cfg, side, part, (0, 1), (2, 3))
    ref = og.midranks_rows(S) if orientation == "row" else og.midranks_columns(S)
    np.testing.assert_array_equal(detail.ranks, ref)
    assert detail.side is sides.get(side, part)


def test_pair_equals_the_scan_on_the_key_side(model, tmp_path):
    """`pair --side key --scan KEY.h5` prints the scan's statistics for the pair in the key side's words
    and makes no prediction; the same scan with the default --side query is refused with one sentence
    naming the side to give. Common practice, no source (the pair and the scan share the factors)."""
    path, _, _ = model
    scan = run_scan(path, tmp_path / "key.h5", ScanOptions(side="key", writers="0.1", responders="2"))
    runner = CliRunner()
    args = ["pair", path, "0.1", "2.3", "--top", "2", "--scan", str(tmp_path / "key.h5")]
    out = runner.invoke(main, args + ["--side", "key"])
    assert out.exit_code == 0, out.output
    words = sides.get("key").words
    assert f"mean percentile {terminal.number(scan.mean_percentile[0, 1, 2, 3])}" in out.output
    assert f": {words[int(scan.label[0, 1, 2, 3])]} (q = " in out.output
    assert "s_QK" not in out.output and "key-side labels do not feed" in out.output
    assert f"toward '{words.raising}'" in out.output and f"toward '{words.lowering}'" in out.output
    bad = runner.invoke(main, args)
    assert bad.exit_code == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert "--side key" in bad.stderr and "key side" in bad.stderr


def test_pair_refuses_a_scan_of_other_weights(model, tmp_path):
    """Common practice, no source: `pair --scan` of another checkpoint's scan is one sentence, exit 2."""
    path, _, _ = model
    other, _, _ = random_gpt2(str(tmp_path / "other"), seed=5)
    run_scan(other, tmp_path / "o.h5", ScanOptions(writers="0.1", responders="2.3"))
    res = CliRunner().invoke(main, ["pair", path, "0.1", "2.3", "--scan", str(tmp_path / "o.h5")])
    assert res.exit_code == 2 and "its weights differ" in res.stderr and len(res.stderr.strip().splitlines()) == 1


def test_ties_at_the_extremes_are_counted(model, tmp_path):
    """A checkpoint with exact duplicate token rows has exact ties in its token matrices: `pair` says how
    many tokens tie at each end and that the listed ones are the first by token id.
    Common practice, no source (the midrank of tied entries, docs/methods.md §4)."""
    ranks = np.array([0.5, 0.5, 3.0, 7.0, 7.0, 7.0])
    detail = PairDetail((0, 0), (1, 0), ranks, 6, None, None, None, None)
    assert detail.ties("highest") == 2 and detail.ties("lowest") == 3
    assert [r["token"] for r in detail.extremes(2, "lowest")] == [3, 4]
    path, _, _ = random_gpt2(str(tmp_path / "dup"), duplicate_tokens=40)
    res = CliRunner().invoke(main, ["pair", path, "0.1", "2.3", "--top", "3"])
    assert res.exit_code == 0, res.output
    d = pair_detail(load_weights(path), (0, 1), (2, 3))
    tied = max(d.ties("highest"), d.ties("lowest"))
    assert tied > 1 and f"{tied} tokens tie at this end; listed: the first 3 by token id" in res.output


def test_token_lookup_follows_the_casing_and_suggests_near_matches():
    """An uncased vocabulary (word pieces lower case; bracketed special tokens do not count) finds
    'The' as 'the'; a cased one does not, and the sentence suggests the near match.
    Reference library: difflib.get_close_matches"""
    pieces = ("[CLS]", "[SEP]", "the", "cat", "##s", "sat")
    lower = Vocabulary(pieces, False, "uncased/tokenizer.json")
    cased = Vocabulary(pieces[:2] + ("The", "Cat", "##s", "sat"), False, "cased/tokenizer.json")
    assert uncased(lower) and not uncased(cased)
    assert resolve_tokens(["The", "CAT", "5"], lower, 6) == [2, 3, 5]
    with pytest.raises(CompositionError, match=r"near matches: 'The'"):
        resolve_tokens(["the"], cased, 6)
    with pytest.raises(CompositionError, match="not a token") as err:
        resolve_tokens(["zebra"], cased, 6)
    assert "near matches" not in str(err.value)


def test_numbers_below_the_float_range_and_small_nulls_print_alike():
    """Common practice, no source: one formatting helper for the terminal and pair: q = 0 prints as
    <1e-300, a small null value keeps its digits."""
    assert terminal.pvalue(0.0) == "<1e-300" and terminal.pvalue(3.3e-5) == "3.3e-05"
    assert terminal.number(1 / 30522) == "3.28e-05" and terminal.number(0.25) == "0.2500"
    assert terminal.number(0.0) == "0.0000"


def _layout_model(tmp_path):
    """The small GPT-2 checkpoint with its model type removed: readable only through a layout file."""
    path, _, cfg = random_gpt2(str(tmp_path / "anon"))
    config = json.loads((tmp_path / "anon" / "config.json").read_text())
    config.pop("model_type", None), config.pop("architectures", None)
    (tmp_path / "anon" / "config.json").write_text(json.dumps(config))
    t = "transformer.h.{i}."
    layout = {
        "family": "gpt2-by-layout", "layers": cfg["n_layer"], "heads": cfg["n_head"], "placement": "pre",
        "norm": "layernorm", "norm_eps": 1e-5, "activation": "gelu-tanh", "matrix_order": "in-out",
        "qkv_order": "blocks",
        "tensors": {
            "embed": "transformer.wte.weight", "positions": "transformer.wpe.weight",
            "final_norm_weight": "transformer.ln_f.weight", "final_norm_bias": "transformer.ln_f.bias",
            "attn_norm_weight": t + "ln_1.weight", "attn_norm_bias": t + "ln_1.bias",
            "mlp_norm_weight": t + "ln_2.weight", "mlp_norm_bias": t + "ln_2.bias",
            "qkv": t + "attn.c_attn.weight", "qkv_bias": t + "attn.c_attn.bias",
            "o": t + "attn.c_proj.weight", "o_bias": t + "attn.c_proj.bias",
            "mlp_in": t + "mlp.c_fc.weight", "mlp_in_bias": t + "mlp.c_fc.bias",
            "mlp_out": t + "mlp.c_proj.weight", "mlp_out_bias": t + "mlp.c_proj.bias",
        },
    }
    (tmp_path / "layout.json").write_text(json.dumps(layout))
    return path, str(tmp_path / "layout.json")


def test_heads_and_pair_read_a_layout_file_model(tmp_path):
    """A model read through a layout file can be profiled (`heads --layout`) and drilled into
    (`pair --layout`), with the same numbers as the GPT-2 reader gives the same tensors; without
    the layout file both refuse it in one sentence naming --layout. Common practice, no source."""
    path, layout = _layout_model(tmp_path)
    plain, _, _ = random_gpt2(str(tmp_path / "plain"))
    runner = CliRunner()
    for cmd in (["heads", path, "--out", str(tmp_path / "h.h5"), "--baseline-draws", "4"],
                ["pair", path, "0.1", "2.3", "--top", "1"]):
        bad = runner.invoke(main, cmd)
        assert bad.exit_code == 2 and "--layout" in bad.stderr and len(bad.stderr.strip().splitlines()) == 1
        good = runner.invoke(main, cmd + ["--layout", layout])
        assert good.exit_code == 0, good.output + good.stderr
    ref = pair_detail(load_weights(plain), (0, 1), (2, 3))
    assert f"mean percentile {terminal.number(ref.stats.mean_percentile)}" in good.output


def test_readout_assumption_is_stated_for_a_model_without_lm_head(tmp_path):
    """A BERT encoder without its masked-LM head is read with the input embedding as readout
    (Weights.readout = input-embedding): `pair` and `heads`, which print copying/suppressing evidence,
    say so; a GPT-2 model's output does not. Reference library: transformers (BertModel)."""
    from ..oracles import hf_models as hf

    bert = tmp_path / "bert"
    hf.build("bert-base", bert)
    runner = CliRunner()
    res = runner.invoke(main, ["pair", str(bert), "0.1", "1.2", "--top", "1"])
    assert res.exit_code == 0, res.output
    assert "no LM head" in res.output
    res = runner.invoke(main, ["heads", str(bert), "--out", str(tmp_path / "h.h5"), "--baseline-draws", "4"])
    assert res.exit_code == 0 and "no LM head" in res.output
    path, _, _ = random_gpt2(str(tmp_path / "gpt2"))
    assert "no LM head" not in runner.invoke(main, ["pair", path, "0.1", "2.3", "--top", "1"]).output
