"""Models in memory: ``load_weights(state_dict, config=mapping)`` against the same weights saved
to disk (composition.extract.memory)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from composition import CompositionError, load_weights

from ..oracles import hf_models

KINDS = ["gpt2", "neox", "llama", "bert"]


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    """One random-initialised ``transformers`` model per family, saved with ``save_pretrained``."""
    out = {}
    for kind in KINDS:
        d = tmp_path_factory.mktemp(kind)
        model, _ = hf_models.build(kind, d)  # float64 copy returned; the files hold float32
        out[kind] = (model.float(), d)
    return out


@pytest.mark.parametrize("kind", KINDS)
def test_state_dict_gives_the_fingerprint_of_the_saved_files(saved, kind):
    """Reference library: transformers (``state_dict()``, ``config.to_dict()`` and ``save_pretrained``'s
    safetensors file of the same random model); the canonical weights must be identical."""
    model, directory = saved[kind]
    from_disk = load_weights(directory)
    in_memory = load_weights(model.state_dict(), config=model.config.to_dict())
    assert in_memory.family == from_disk.family
    assert in_memory.readout == from_disk.readout
    assert in_memory.fingerprint() == from_disk.fingerprint()
    assert in_memory.source == "state dict in memory"


def test_numpy_arrays_and_config_object_read_the_same(saved):
    """Reference library: transformers (the GPT-2 state dict as NumPy arrays, and the config object
    itself); the fingerprint is that of the saved file."""
    model, directory = saved["gpt2"]
    arrays = {k: v.numpy() for k, v in model.state_dict().items()}
    w = load_weights(arrays, config=model.config)
    assert w.fingerprint() == load_weights(directory).fingerprint()


def test_weights_are_copies_of_the_model_parameters(saved):
    """Common practice, no source: changing the model after loading leaves the loaded weights as they were."""
    model, _ = saved["gpt2"]
    sd = {k: v.clone() for k, v in model.state_dict().items()}
    w = load_weights(sd, config=model.config.to_dict())
    before = w.W_E.clone()
    sd["transformer.wte.weight"].add_(1.0)
    assert torch.equal(w.W_E, before)


def test_scan_of_state_dict_equals_scan_of_files(saved, tmp_path):
    """Reference library: transformers (save_pretrained); a restricted scan of the in-memory model and of
    the saved files store the same pair statistics."""
    from composition import ScanOptions, run_scan

    model, directory = saved["gpt2"]
    opts = ScanOptions(writers="0.0", responders="1.1")
    a = run_scan(load_weights(model.state_dict(), config=model.config.to_dict()), tmp_path / "a.h5", opts)
    b = run_scan(directory, tmp_path / "b.h5", opts)
    assert a.attrs["weights_fingerprint"] == b.attrs["weights_fingerprint"]
    for name in ("mean_percentile", "top_share", "label"):
        np.testing.assert_array_equal(a.arrays[name], b.arrays[name])


@pytest.mark.parametrize("case, config, message", [
    ("no config", None, "needs its config"),
    ("config not a mapping", 3, "must be a mapping"),
    ("unknown family", {"model_type": "nothing-known"}, "not one this tool reads"),
    ("integer tensor", "int", "not a floating-point type"),
    ("NaN", "nan", "NaN or Inf"),
    ("wrong shape", "shape", "but the config implies"),
])
def test_bad_state_dicts_are_one_sentence(saved, case, config, message):
    """Common practice, no source: bad input is refused with one plain sentence naming the tensor or key."""
    model, _ = saved["gpt2"]
    sd = dict(model.state_dict())
    cfg = model.config.to_dict()
    if config == "int":
        sd["transformer.wte.weight"] = sd["transformer.wte.weight"].long()
    elif config == "nan":
        t = sd["transformer.h.0.attn.c_attn.weight"].clone()
        t[0, 0] = float("nan")
        sd["transformer.h.0.attn.c_attn.weight"] = t
    elif config == "shape":
        sd["transformer.ln_f.weight"] = torch.ones(3)
    else:
        cfg = config
    with pytest.raises(CompositionError, match=message) as err:
        load_weights(sd, config=cfg)
    assert "\n" not in str(err.value)


def test_config_with_a_path_is_refused(saved):
    """Common practice, no source: ``config=`` belongs to a state dict; with a path it is an error."""
    model, directory = saved["gpt2"]
    with pytest.raises(CompositionError, match="config= goes with a state dict"):
        load_weights(directory, config=model.config.to_dict())
