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
