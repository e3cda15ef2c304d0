"""The command line: bad input costs one sentence, a non-zero exit and nothing written.

Common practice, no source: a command-line tool reports user errors on stderr with a
non-zero exit status and leaves no partial output behind.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from click.testing import CliRunner

from composition.present.cli import main
from composition.store.scanfile import load_scan

from ..conftest import random_gpt2


def _run(*args):
    result = CliRunner().invoke(main, [str(a) for a in args])
    return result


def _assert_one_sentence(result, *words):
    assert result.exit_code != 0
    assert result.exception is None or isinstance(result.exception, SystemExit)
    err = result.stderr.strip()
    assert "Traceback" not in result.output + result.stderr
    assert len(err.splitlines()) == 1, err
    for word in words:
        assert word in err, err


def test_scan_and_inspect_succeed_on_a_small_model(small_model, tmp_path):
    path, _, _ = small_model
    out = tmp_path / "scan.h5"
    result = _run("scan", path, "--out", out, "--writers", "0", "--responders", "1.2,2", "-q")
    assert result.exit_code == 0, result.output + result.stderr
    assert out.is_file()
    result = _run("inspect", path)
    assert result.exit_code == 0 and "gpt2" in result.output and "fingerprint" in result.output


def test_missing_path(tmp_path):
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", tmp_path / "nope", "--out", out), "nope", "does not exist")
    assert not out.exists()


def test_directory_without_a_checkpoint(tmp_path):
    (tmp_path / "empty").mkdir()
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", tmp_path / "empty", "--out", out), "empty", "safetensors")
    assert not out.exists()


def test_file_that_is_not_safetensors(small_model, tmp_path):
    path, _, _ = small_model
    with open(os.path.join(path, "model.safetensors"), "wb") as f:
        f.write(b"this is not a checkpoint at all" * 10)
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", path, "--out", out), "model.safetensors", "safetensors")
    assert not out.exists()


def test_config_sizes_disagree_with_tensors(small_model, tmp_path):
    path, _, _ = small_model
    cfg_path = os.path.join(path, "config.json")
    cfg = json.load(open(cfg_path))
    cfg["n_embd"] = 96
    json.dump(cfg, open(cfg_path, "w"))
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", path, "--out", out), "wte.weight", "shape")
    assert not out.exists()


@pytest.mark.parametrize("spec, words", [("7", ["layer 7"]), ("1.9", ["1.9"]), ("x", ["'x'"])])
def test_head_label_that_does_not_exist(small_model, tmp_path, spec, words):
    path, _, _ = small_model
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", path, "--out", out, "--writers", spec), "--writers", *words)
    assert not out.exists()


def test_output_path_that_cannot_be_written(small_model, tmp_path):
    path, _, _ = small_model
    _assert_one_sentence(_run("scan", path, "--out", tmp_path / "no" / "such" / "s.h5"), "s.h5", "cannot write")
    if os.path.isdir("/proc"):  # not writable even for root
        _assert_one_sentence(_run("scan", path, "--out", "/proc/composition-test.h5"), "cannot write")
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        if os.access(locked, os.W_OK):  # root ignores permission bits
            pytest.skip("running as root: a read-only directory is still writable")
        _assert_one_sentence(_run("scan", path, "--out", locked / "s.h5"), "s.h5")
        assert list(locked.iterdir()) == []
    finally:
        locked.chmod(0o700)


def test_nonfinite_weight_is_refused_naming_the_tensor(tmp_path):
    from safetensors.numpy import load_file, save_file

    path, _, _ = random_gpt2(str(tmp_path / "m"))
    f = os.path.join(path, "model.safetensors")
    sd = load_file(f)
    sd["transformer.h.1.attn.c_attn.weight"][3, 4] = np.nan
    save_file(sd, f)
    out = tmp_path / "s.h5"
    _assert_one_sentence(_run("scan", path, "--out", out), "transformer.h.1.attn.c_attn.weight", "NaN")
    assert not out.exists()


def test_existing_output_is_not_overwritten_without_the_flag(small_model, tmp_path):
    path, _, _ = small_model
    out = tmp_path / "s.h5"
    out.write_text("keep me")
    _assert_one_sentence(_run("scan", path, "--out", out, "--writers", "0", "--responders", "1"), "--overwrite")
    assert out.read_text() == "keep me"


@pytest.mark.parametrize("args, option", [
    (["--seed", "-1"], "--seed"),
    (["--seed", "1" + "0" * 30], "--seed"),
    (["--seed", "9" * 5000], "--seed"),  # beyond Python's digit limit for int()
    (["--rows", "0"], "--rows"),
    (["--rows", "1" + "0" * 40], "--rows"),
    (["--k", "0"], "--k"),
    (["--k", "1,x"], "--k"),
    (["--k", "301"], "--k"),  # more than the 300 keys per row of the model
    (["--fdr", "1"], "--fdr"),
    (["--fdr", "nan"], "--fdr"),
    (["--min-effect", "0.5"], "--min-effect"),
    (["--min-effect", "-0.1"], "--min-effect"),
    (["--until-ci", "1"], "--until-ci"),
    (["--until-ci", "0"], "--until-ci"),
    (["--rotary-offset", "-2"], "--rotary-offset"),
    (["--rotary-offset", "10000001"], "--rotary-offset"),
    (["--rotary-offsets", "0:100000"], "--rotary-offsets"),  # 100001 offsets in the average
    (["--rotary-offsets", "5:2"], "--rotary-offsets"),
    (["--position", "-3"], "--position"),
    (["--side", "values"], "--side"),
    (["--precision", "fp8"], "--precision"),
    (["--writers", "1" * 40], "--writers"),
])
def test_option_bounds_are_one_sentence_and_nothing_is_written(small_model, tmp_path, args, option):
    """Every option out of its bounds (docs: `composition scan --help`) ends in one sentence naming the
    option, exit status 2, no scan file and no journal; the same options are refused by `plan`.
    Common practice, no source"""
    path, _, _ = small_model
    out = tmp_path / "s.h5"
    result = _run("scan", path, "--out", out, *args, "-q")
    assert result.exit_code == 2, result.output
    _assert_one_sentence(result, option)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model"]
    plan = _run("plan", path, *args, "--calibrate", "0.1")
    assert plan.exit_code == 2 and option in plan.stderr and len(plan.stderr.strip().splitlines()) == 1


def test_largest_accepted_rotary_span_and_seed_are_accepted_by_the_option_checks():
    """Common practice, no source: the bounds are inclusive (10^5 offsets; seeds up to 2^63 - 1)."""
    from composition import options

    assert options.offsets(None, "0:99999") == (0, 99999)
    assert options.offsets("10000000", None) == (10**7, 10**7)
    assert options.seed(str(2**63 - 1)) == 2**63 - 1
    assert options.ks("10,1,5,5") == (1, 5, 10)
    options.ScanOptions(rows=5, seed=3, until_ci=0.5, rotary_offsets=(0, 99999)).validate()


def _partial_scan(model, out):
    """A scan stopped after its first committed unit: an in-progress scan file."""
    from composition.run.scan import run_scan

    def crash(event):
        if event.kind == "unit":
            raise RuntimeError("stop")

    with pytest.raises(RuntimeError):
        run_scan(model, out, progress=crash)
    assert not load_scan(out).complete


def _files(directory):
    return sorted(p.relative_to(directory).as_posix() for p in directory.rglob("*"))


@pytest.mark.parametrize("command", ["shortlist", "report", "compare"])
def test_commands_that_read_a_scan_refuse_an_unfinished_one(small_model, tmp_path, command):
    """shortlist, report and compare refuse an in-progress scan (issue 11 item 6): one sentence on
    stderr naming the command and the file, exit status 2, nothing written.
    Common practice, no source"""
    path, _, _ = small_model
    scan = tmp_path / "partial.h5"
    _partial_scan(path, scan)
    before = _files(tmp_path)
    args = {"shortlist": ["shortlist", scan, "--csv", tmp_path / "s.csv"],
            "report": ["report", scan, "--out", tmp_path / "report"],
            "compare": ["compare", scan, scan, "--out", tmp_path / "cmp"]}[command]
    result = _run(*args)
    assert result.exit_code == 2, result.output + result.stderr
    _assert_one_sentence(result, "unfinished scan", str(scan), "run the same scan command again")
    assert f"{command} needs a finished scan" in result.stderr
    assert result.stdout == ""
    assert _files(tmp_path) == before


def test_pair_refuses_a_scan_of_another_model(small_model, tmp_path):
    """pair --scan checks the scan's fingerprint against the checkpoint before computing: the same
    tensors read under another activation are refused in one sentence naming what changed, exit
    status 2, no CSV or figure written; the matching checkpoint is accepted.
    Common practice, no source"""
    path, _, _ = small_model
    scan = tmp_path / "scan.h5"
    done = _run("scan", path, "--out", scan, "--writers", "0", "--responders", "1", "-q")
    assert done.exit_code == 0, done.output + done.stderr
    other = tmp_path / "relu"
    other.mkdir()
    for f in os.listdir(path):
        (other / f).write_bytes(open(os.path.join(path, f), "rb").read())
    config = json.loads((other / "config.json").read_text())
    config["activation_function"] = "relu"
    (other / "config.json").write_text(json.dumps(config))
    before = _files(tmp_path)
    result = _run("pair", other, "0.1", "1.2", "--scan", scan, "--csv", tmp_path / "p.csv",
                  "--figure", tmp_path / "p.png")
    assert result.exit_code == 2, result.output + result.stderr
    _assert_one_sentence(result, str(scan), "activation changed from gelu-tanh to relu")
    assert result.stdout == "" and _files(tmp_path) == before
    same = _run("pair", path, "0.1", "1.2", "--scan", scan, "--top", "2")
    assert same.exit_code == 0, same.output + same.stderr
    assert "0.1" in same.output and str(scan) in same.output


def test_pair_refuses_an_unfinished_scan(small_model, tmp_path):
    """pair --scan on an in-progress scan: one sentence, exit status 2, nothing written.
    Common practice, no source"""
    path, _, _ = small_model
    scan = tmp_path / "partial.h5"
    _partial_scan(path, scan)
    before = _files(tmp_path)
    result = _run("pair", path, "0.1", "1.2", "--scan", scan, "--csv", tmp_path / "p.csv")
    assert result.exit_code == 2
    _assert_one_sentence(result, "pair --scan needs a finished scan", str(scan))
    assert _files(tmp_path) == before


def test_compare_of_key_side_scans_uses_the_key_sides_words(small_model, tmp_path):
    """compare takes its label words from the sides registry for the scans' side: a comparison of
    key-side scans writes the key side's words, never the query side's (issue 10). The scans are
    copies of one key-side scan, so every label is unchanged and the tidy table holds each pair's
    own label. Common practice, no source"""
    import csv
    import shutil

    from composition.compose import sides

    path, _, _ = small_model
    first = tmp_path / "k1.h5"
    done = _run("scan", path, "--out", first, "--side", "key", "--writers", "0", "--responders", "1",
                "--fdr", "0.2", "--min-effect", "0.01", "-q")
    assert done.exit_code == 0, done.output + done.stderr
    shutil.copy(first, tmp_path / "k2.h5")
    result = _run("compare", first, tmp_path / "k2.h5", "--out", tmp_path / "cmp")
    assert result.exit_code == 0, result.output + result.stderr
    scan = load_scan(first)
    words = sides.get("key").words
    rows = list(csv.DictReader(open(tmp_path / "cmp" / "pairs_by_scan.csv")))
    codes = [int(scan.label[int(r["writer_layer"]), int(r["writer_head"]), int(r["responder_layer"]),
                            int(r["responder_head"])]) for r in rows]
    assert {1, -1} <= set(codes)  # the test means something only with labelled pairs of both signs
    assert [r["label"] for r in rows] == [words[c] for c in codes]
    query = sides.get("query").words
    assert not {query.raising, query.lowering} & {r["label"] for r in rows}


def test_terminal_label_words_come_from_their_homes(monkeypatch):
    """The shortlist header and the mediation note take the pair words from the sides registry and
    the head words from interpret/heads.py (issue 10: label words in one home): renaming them there
    renames them in the terminal. Common practice, no source"""
    from composition.compose import sides
    from composition.compose.sides import Words
    from composition.interpret import heads
    from composition.present import terminal

    monkeypatch.setattr(sides.get("query"), "words", Words("up-word", "down-word", "flat-word", "m."))
    monkeypatch.setitem(heads.HEAD_LABEL_WORDS, 1, "copy-word")
    monkeypatch.setitem(heads.HEAD_LABEL_WORDS, -1, "suppress-word")
    header = terminal.shortlist([])[0]
    assert "(suppress-word, up-word)" in header and "(copy-word, down-word)" in header
    assert "bottom-k share for down-word pairs" in "\n".join(terminal.mediation([], []))
