"""Hostile input and faults: property-based generation (Hypothesis) of configs, safetensors
headers, journals and options, and fault injection at the file-system level.

Every case asserts the promise of docs/reliability.md: bad input ends with one sentence
(a CompositionError, exit 2 from the CLI), no output file, no journal and no temporary file
is left behind, and nothing committed is lost. The model is a tiny random GPT-2-layout
checkpoint (2 layers of 2 heads, 64 tokens) so that each example takes milliseconds.
Kill -9 at random moments of every phase is in tests/run/test_resume.py.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import numpy as np
import pytest

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from composition.errors import CompositionError  # noqa: E402
from composition.extract import load_weights  # noqa: E402
from composition.run.scan import ScanOptions, run_scan  # noqa: E402
from composition.store.scanfile import journal_path, load_scan  # noqa: E402
from ..small_checkpoint import plant, random_gpt2  # noqa: E402
from ..small_checkpoint import one_thread  # noqa: E402, F401 (module fixtures)

ROOT = Path(__file__).resolve().parents[2]
FAST = settings(max_examples=30, deadline=None, suppress_health_check=list(HealthCheck), derandomize=True)
SELECT = dict(writers="0", responders="1")


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    return Path(random_gpt2(tmp_path_factory.mktemp("tiny") / "model", seed=3, V=64, d=16, H=2, L=2, P=8)[0])


def one_sentence(exc: BaseException) -> None:
    text = str(exc)
    assert text and "\n" not in text and "Traceback" not in text, text
    assert text.rstrip().endswith((".", ")")) or text.endswith("afresh."), text


def nothing_left(directory: Path, keep=()) -> None:
    left = sorted(p.name for p in directory.iterdir() if p.name not in keep)
    assert left == [], left


def copy_model(src: Path, dst: Path) -> Path:
    if dst.exists():
        shutil.rmtree(dst)
    shutil.copytree(src, dst)
    return dst


# --- configs --------------------------------------------------------------------------------

HOSTILE = st.one_of(st.none(), st.booleans(), st.integers(-3, 3), st.just(10**30),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=4),
                    st.lists(st.integers(0, 3), max_size=2), st.dictionaries(st.text(max_size=2), st.integers(), max_size=1))
KEYS = ("n_embd", "n_head", "n_layer", "vocab_size", "n_inner", "layer_norm_epsilon", "activation_function",
        "n_positions", "scale_attn_weights", "model_type")


@FAST
@given(key=st.sampled_from(KEYS), value=HOSTILE)
def test_hostile_config_values_give_one_sentence_and_leave_nothing(tiny, tmp_path_factory, key, value):
    """Any value of a config key either scans or is refused with one sentence before any output exists.

    Common practice, no source (property-based fuzzing of an input format).
    """
    work = tmp_path_factory.mktemp("cfg")
    model = copy_model(tiny, work / "model")
    config = json.loads((model / "config.json").read_text())
    config[key] = value
    (model / "config.json").write_text(json.dumps(config))
    out_dir = work / "out"
    out_dir.mkdir()
    try:
        scan = run_scan(model, out_dir / "s.h5", ScanOptions(**SELECT))
    except CompositionError as exc:
        one_sentence(exc)
        nothing_left(out_dir)
        return
    assert scan.complete
    for name in ("mean_percentile", "p_value"):
        assert np.isfinite(scan.arrays[name][scan.done]).all()


@pytest.mark.parametrize("key, value, words", [
    ("n_layer", 1, "layer 1"), ("n_layer", 0, "n_layer"), ("n_head", -2, "n_head"),
    ("layer_norm_epsilon", "tiny", "layer_norm_epsilon"), ("layer_norm_epsilon", -1e-5, "layer_norm_epsilon"),
    ("layer_norm_epsilon", float("nan"), "layer_norm_epsilon"), ("activation_function", 3, "activation_function"),
    ("n_inner", 63.5, "n_inner"), ("vocab_size", 10**30, "vocab_size"),
])
def test_each_bad_config_value_is_named(tiny, tmp_path, key, value, words):
    """Zero/negative counts, non-numeric/NaN/negative epsilon, a non-string activation, a non-integer
    width, a huge size and fewer layers than the tensors hold are refused naming the key.

    Common practice, no source.
    """
    model = copy_model(tiny, tmp_path / "model")
    config = json.loads((model / "config.json").read_text())
    config[key] = value
    (model / "config.json").write_text(json.dumps(config))
    with pytest.raises(CompositionError, match=words) as info:
        load_weights(model)
    one_sentence(info.value)


@pytest.mark.parametrize("value", [None, "big", float("inf"), -5.0, 0])
def test_bad_rotary_base_is_named(tmp_path, value):
    """A null, non-numeric, infinite, negative or zero rotary base is refused with a sentence.

    Common practice, no source.
    """
    from composition.extract.rotary import rotary_from_config

    with pytest.raises(CompositionError, match="rotary base|rope_theta") as info:
        rotary_from_config({"rope_theta": value}, 8)
    one_sentence(info.value)


# --- safetensors headers ---------------------------------------------------------------------

HEADER_VALUE = st.fixed_dictionaries({
    "dtype": st.sampled_from(["F32", "F16", "I64", "BOOL", "F64", "XX", ""]),
    "shape": st.lists(st.integers(-2, 10**6), max_size=3),
    "data_offsets": st.lists(st.integers(-5, 10**6), min_size=0, max_size=3),
})


@FAST
@given(header=st.dictionaries(st.sampled_from(["wte.weight", "h.0.ln_1.weight", "__metadata__", "x"]), HEADER_VALUE,
                              max_size=3),
       body=st.binary(max_size=64), claimed=st.one_of(st.none(), st.integers(0, 2**63)))
def test_hostile_safetensors_headers(tmp_path_factory, tiny, header, body, claimed):
    """A safetensors file with any header is read or refused with one sentence.

    Common practice, no source.
    """
    work = tmp_path_factory.mktemp("st")
    shutil.copyfile(tiny / "config.json", work / "config.json")
    raw = json.dumps(header).encode()
    n = len(raw) if claimed is None else claimed
    (work / "model.safetensors").write_bytes(struct.pack("<Q", n) + raw + body)
    try:
        load_weights(work)
    except CompositionError as exc:
        one_sentence(exc)


def test_duplicate_tensor_in_safetensors_header_is_refused(tmp_path, tiny):
    """A header naming a tensor twice is refused (the reader would keep one copy silently).

    Common practice, no source.
    """
    shutil.copyfile(tiny / "config.json", tmp_path / "config.json")
    raw = b'{"a": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}, "a": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}}'
    (tmp_path / "model.safetensors").write_bytes(struct.pack("<Q", len(raw)) + raw + b"\0" * 4)
    with pytest.raises(CompositionError, match="twice"):
        load_weights(tmp_path)


# --- HDF5 checkpoints read only from inside themselves --------------------------------------

def _hdf5_model(tiny: Path, directory: Path) -> Path:
    import h5py
    from safetensors.numpy import load_file

    directory.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(tiny / "config.json", directory / "config.json")
    with h5py.File(directory / "model.h5", "w") as f:
        for name, value in load_file(tiny / "model.safetensors").items():
            f.create_dataset(name, data=value)
    return directory / "model.h5"


@pytest.mark.parametrize("kind", ["external", "virtual", "soft", "external_link", "duplicate"])
def test_hdf5_checkpoints_cannot_read_outside_themselves(tiny, tmp_path, kind):
    """External storage, virtual datasets, soft and external links and two datasets for one tensor
    are refused with a sentence (a FIFO as external storage would hang the reader).

    Common practice, no source.
    """
    import h5py

    path = _hdf5_model(tiny, tmp_path / "m")
    with h5py.File(path, "a") as f:
        if kind == "external":
            os.mkfifo(tmp_path / "fifo")
            f.create_dataset("extra", shape=(4,), dtype="f4", external=[(str(tmp_path / "fifo"), 0, 16)])
        elif kind == "virtual":
            layout = h5py.VirtualLayout(shape=(4,), dtype="f4")
            layout[:] = h5py.VirtualSource(str(tmp_path / "other.h5"), "x", shape=(4,))
            f.create_virtual_dataset("extra", layout)
        elif kind == "soft":
            f["extra"] = h5py.SoftLink("/transformer.wte.weight")
        elif kind == "external_link":
            f["extra"] = h5py.ExternalLink(str(tmp_path / "other.h5"), "/x")
        else:
            f.create_dataset("transformer/wte.weight", data=np.zeros((64, 16), "f4"))
    with pytest.raises(CompositionError) as info:
        load_weights(tmp_path / "m")
    one_sentence(info.value)


def test_hdf5_checkpoint_directory_holding_the_scan_output_reruns(tiny, tmp_path):
    """A scan written into an HDF5 checkpoint's own directory does not make the rerun fail.

    Common practice, no source.
    """
    _hdf5_model(tiny, tmp_path / "m")
    out = tmp_path / "m" / "scan.h5"
    run_scan(tmp_path / "m", out, ScanOptions(**SELECT))
    assert run_scan(tmp_path / "m", out, ScanOptions(**SELECT)).complete


def test_a_fifo_checkpoint_is_refused_without_hanging(tmp_path, tiny):
    """A FIFO named as the checkpoint file is refused at once.

    Common practice, no source.
    """
    os.mkfifo(tmp_path / "model.safetensors")
    shutil.copyfile(tiny / "config.json", tmp_path / "config.json")
    with pytest.raises(CompositionError, match="not a regular file"):
        load_weights(tmp_path / "model.safetensors")


def test_a_tensor_in_two_shards_is_refused(tiny, tmp_path):
    """Two shards holding the same tensor are refused (one copy would be picked silently).

    Common practice, no source.
    """
    from safetensors.numpy import load_file, save_file

    sd = load_file(tiny / "model.safetensors")
    names = sorted(sd)
    save_file({n: sd[n] for n in names}, str(tmp_path / "a.safetensors"))
    save_file({names[0]: sd[names[0]]}, str(tmp_path / "b.safetensors"))
    shutil.copyfile(tiny / "config.json", tmp_path / "config.json")
    index = {"weight_map": dict({n: "a.safetensors" for n in names[1:]}, **{names[0]: "b.safetensors"})}
    (tmp_path / "model.safetensors.index.json").write_text(json.dumps(index))
    with pytest.raises(CompositionError, match="two shards"):
        load_weights(tmp_path / "model.safetensors.index.json")


# --- journals -------------------------------------------------------------------------------

def _frame(payload: bytes) -> bytes:
    return struct.pack("<4sII", b"CJ01", len(payload), zlib.crc32(payload)) + payload


@FAST
@given(head=st.one_of(st.binary(max_size=40), st.builds(lambda d: json.dumps(d).encode(), st.dictionaries(
           st.sampled_from(["group", "pairs", "fields"]),
           st.one_of(st.text(max_size=5), st.integers(-9, 9), st.lists(st.lists(st.integers(-3, 9), max_size=5), max_size=3),
                     st.lists(st.tuples(st.sampled_from(["done", "label", "top_share", "x"]),
                                        st.sampled_from(["|b1", "<f8", "|i1", "O", "<U3"]),
                                        st.lists(st.integers(0, 4), max_size=3)), max_size=2)), max_size=3))),
       body=st.binary(max_size=64))
def test_journal_records_that_pass_the_crc_but_hold_nonsense(partial_scan, tmp_path_factory, head, body):
    """A CRC-valid record with any content is applied only if it fits the scan, else refused with a
    sentence; nothing else escapes.

    Common practice, no source.
    """
    work = tmp_path_factory.mktemp("j")
    out = work / "p.h5"
    shutil.copyfile(partial_scan, out)
    journal = journal_path(out)
    shutil.copyfile(journal_path(partial_scan), journal)
    payload = struct.pack("<I", len(head)) + head + body
    with open(journal, "ab") as f:
        f.write(_frame(payload))
    try:
        load_scan(out)
    except CompositionError as exc:
        one_sentence(exc)


@pytest.fixture(scope="module")
def partial_scan(tiny, tmp_path_factory):
    out = tmp_path_factory.mktemp("partial") / "p.h5"

    def crash(event):
        if event.kind == "unit":
            raise RuntimeError("stop")

    with pytest.raises(RuntimeError):
        run_scan(tiny, out, progress=crash)
    return out


# --- options --------------------------------------------------------------------------------

@FAST
@given(k=st.lists(st.integers(-2, 200), min_size=0, max_size=3), position=st.one_of(st.none(), st.integers(-3, 40)),
       fdr=st.floats(allow_nan=True, allow_infinity=True), min_effect=st.floats(-1, 1),
       offsets=st.one_of(st.none(), st.tuples(st.integers(-2, 5), st.integers(-2, 5))))
def test_hostile_options_give_one_sentence_and_leave_nothing(tiny, tmp_path_factory, k, position, fdr, min_effect,
                                                              offsets):
    """Any combination of option values scans or is refused with one sentence, leaving nothing.

    Common practice, no source.
    """
    out_dir = tmp_path_factory.mktemp("opt")
    try:
        options = ScanOptions(k=tuple(k), position=position, fdr=fdr, min_effect=min_effect, rotary_offsets=offsets,
                              **SELECT)
        scan = run_scan(tiny, out_dir / "s.h5", options)
    except CompositionError as exc:
        one_sentence(exc)
        nothing_left(out_dir)
        return
    assert scan.complete and max(k) <= 64


# --- the file system --------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["symlink", "fifo", "device", "directory"])
def test_output_path_that_is_not_a_regular_file_is_refused_even_with_overwrite(tiny, tmp_path, kind):
    """A symlink, FIFO, device node or directory at the output path is never replaced, even with
    --overwrite; the CLI says so in one sentence with exit 2.

    Common practice, no source.
    """
    out = tmp_path / "out.h5"
    victim = tmp_path / "victim"
    victim.write_bytes(b"keep")
    plant(out, kind, victim)
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONPATH=str(ROOT))
    result = subprocess.run([sys.executable, "-m", "composition", "scan", str(tiny), "--out", str(out), "--overwrite",
                             "--writers", "0", "--responders", "1"], capture_output=True, text=True, env=env,
                            timeout=120)
    assert result.returncode == 2, result.stderr
    assert result.stderr.strip().count("\n") == 0 and "Traceback" not in result.stderr
    assert victim.read_bytes() == b"keep"
    assert not list(tmp_path.glob(".*.partial")) and not journal_path(out).exists()


def test_read_only_mount_fresh_scan_leaves_nothing(tiny, tmp_path):
    """A fresh scan into a read-only mount writes nothing and says why in one sentence.

    Common practice, no source.
    """
    mnt = tmp_path / "ro"
    mnt.mkdir()
    made = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m,ro", "tmpfs", str(mnt)], capture_output=True)
    if made.returncode != 0:
        pytest.skip("cannot mount a tmpfs here")
    try:
        with pytest.raises(CompositionError, match="read-only") as info:
            run_scan(tiny, mnt / "s.h5", ScanOptions(**SELECT))
        one_sentence(info.value)
        assert list(mnt.iterdir()) == []
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)
