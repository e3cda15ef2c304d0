"""Small random checkpoints in the GPT-2 layout, written as real safetensors files: the one
place tests build them. Random-initialised models are test inputs for reference comparisons
(docs/testing.md); they are not demo data and carry no planted structure."""

from __future__ import annotations

import json
import os
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pytest


def random_gpt2(directory, seed=0, V=300, d=64, H=4, L=3, P=32, activation="gelu_new",
                prefix="transformer.", duplicate_tokens=0, init_std=0.3):
    """Write a random GPT-2-layout checkpoint; return (path, float64 state dict, config).

    ``duplicate_tokens`` copies the first embedding row onto that many further rows, so the
    token table has exact duplicates (and the token matrices exact ties).
    """
    from safetensors.numpy import save_file

    rng = np.random.default_rng(seed)
    m = 4 * d
    sd = {"wte.weight": rng.normal(0, 1.0, (V, d)), "wpe.weight": rng.normal(0, 0.3, (P, d)),
          "ln_f.weight": 1 + rng.normal(0, 0.1, d), "ln_f.bias": rng.normal(0, 0.1, d)}
    if duplicate_tokens:
        sd["wte.weight"][1:1 + duplicate_tokens] = sd["wte.weight"][0]
    for i in range(L):
        p = f"h.{i}."
        for ln in ("ln_1", "ln_2"):
            sd[p + ln + ".weight"] = 1 + rng.normal(0, 0.1, d)
            sd[p + ln + ".bias"] = rng.normal(0, 0.1, d)
        sd[p + "attn.c_attn.weight"] = rng.normal(0, init_std, (d, 3 * d))
        sd[p + "attn.c_attn.bias"] = rng.normal(0, 0.1, 3 * d)
        sd[p + "attn.c_proj.weight"] = rng.normal(0, init_std, (d, d))
        sd[p + "attn.c_proj.bias"] = rng.normal(0, 0.1, d)
        sd[p + "mlp.c_fc.weight"] = rng.normal(0, init_std, (d, m))
        sd[p + "mlp.c_fc.bias"] = rng.normal(0, 0.1, m)
        sd[p + "mlp.c_proj.weight"] = rng.normal(0, init_std, (m, d))
        sd[p + "mlp.c_proj.bias"] = rng.normal(0, 0.1, d)
    sd32 = {prefix + k: v.astype(np.float32) for k, v in sd.items()}
    os.makedirs(directory, exist_ok=True)
    save_file(sd32, os.path.join(directory, "model.safetensors"))
    cfg = {"model_type": "gpt2", "n_embd": d, "n_head": H, "n_layer": L, "vocab_size": V,
           "n_positions": P, "layer_norm_epsilon": 1e-5, "activation_function": activation, "n_inner": None}
    with open(os.path.join(directory, "config.json"), "w") as f:
        json.dump(cfg, f)
    return directory, {k: v.astype(np.float64) for k, v in sd32.items()}, cfg


def build_small_gpt2(directory, vocab=1024, width=64, heads=4, layers=3, seed=0) -> Path:
    """A model whose whole scan takes a few seconds (48 pairs in 12 work units), for the tests
    of long-run machinery (resume, interrupts, cluster)."""
    return Path(random_gpt2(directory, seed=seed, V=vocab, d=width, H=heads, L=layers, P=16,
                            init_std=width**-0.5)[0])


def assert_same_pairs(scan, ref) -> None:
    """Every ``/pairs`` array of two scans is byte for byte the same."""
    assert sorted(scan.arrays) == sorted(ref.arrays)
    for name, data in ref.arrays.items():
        assert scan.arrays[name].dtype == data.dtype, name
        assert scan.arrays[name].tobytes() == data.tobytes(), f"/pairs/{name} differs"


@contextmanager
def one_torch_thread():
    """One torch thread in this process (scans of a few seconds, several processes at once)."""
    import torch

    before = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(before)


# --- module fixtures: a module that scans the small model imports them by name ---------------
# (``from ..small_checkpoint import model, one_thread``); pytest then uses them in that module only.

@pytest.fixture(scope="module", autouse=True)
def one_thread():
    """One torch thread for every test of a module that imports this fixture."""
    with one_torch_thread():
        yield


@pytest.fixture(scope="module")
def model(tmp_path_factory):
    """The small model of ``build_small_gpt2`` (seed 0), built once per module."""
    return build_small_gpt2(tmp_path_factory.mktemp("small-model"), seed=0)


def plant(path: Path, kind: str, victim: Path) -> None:
    """Put a ``symlink`` (to ``victim``), ``fifo``, ``directory`` or ``device`` node (a character device,
    /dev/null's numbers) at ``path``, as an adversary would at an output path; a device node needs root,
    so without it the test is skipped."""
    import stat

    if kind == "symlink":
        path.symlink_to(victim)
    elif kind == "fifo":
        os.mkfifo(path)
    elif kind == "directory":
        path.mkdir()
    else:
        if os.geteuid() != 0:
            pytest.skip("making a device node needs root")
        os.mknod(path, 0o600 | stat.S_IFCHR, os.makedev(1, 3))


def random_numpy_sd(cfg, seed=0, prefix="", qkv_bias_std=0.1, untied=False):
    """A random GPT-2-layout state dict (float32 NumPy arrays) with non-trivial biases and norms;
    ``qkv_bias_std``: the spread of the fused query/key/value bias; ``untied``: with its own
    ``lm_head.weight`` (no prefix), drawn last."""
    rng = np.random.default_rng(seed)
    d, L, V, P = cfg["n_embd"], cfg["n_layer"], cfg["vocab_size"], cfg["n_positions"]
    m = cfg.get("n_inner") or 4 * d
    sd = {"wte.weight": rng.normal(0, 0.5, (V, d)),
          "wpe.weight": rng.normal(0, 0.3, (P, d)),
          "ln_f.weight": 1 + rng.normal(0, 0.2, d),
          "ln_f.bias": rng.normal(0, 0.1, d)}
    for i in range(L):
        for ln in ("ln_1", "ln_2"):
            sd[f"h.{i}.{ln}.weight"] = 1 + rng.normal(0, 0.2, d)
            sd[f"h.{i}.{ln}.bias"] = rng.normal(0, 0.1, d)
        sd[f"h.{i}.attn.c_attn.weight"] = rng.normal(0, 0.3, (d, 3 * d))
        sd[f"h.{i}.attn.c_attn.bias"] = rng.normal(0, qkv_bias_std, 3 * d)
        sd[f"h.{i}.attn.c_proj.weight"] = rng.normal(0, 0.1, (d, d))
        sd[f"h.{i}.attn.c_proj.bias"] = rng.normal(0, 0.1, d)
        sd[f"h.{i}.mlp.c_fc.weight"] = rng.normal(0, 0.2, (d, m))
        sd[f"h.{i}.mlp.c_fc.bias"] = rng.normal(0, 0.1, m)
        sd[f"h.{i}.mlp.c_proj.weight"] = rng.normal(0, 0.1, (m, d))
        sd[f"h.{i}.mlp.c_proj.bias"] = rng.normal(0, 0.1, d)
    out = {prefix + k: v.astype(np.float32) for k, v in sd.items()}
    if untied:
        out["lm_head.weight"] = rng.normal(0, 0.5, (V, d)).astype(np.float32)
    return out
