"""Inputs shared by tests/test_heads.py and tests/test_report.py (not collected by pytest).

* ``random_gpt2``: a small random GPT-2-layout checkpoint written as real safetensors files,
  a test input for reference comparisons (no planted structure).
* ``demo_scan``: the invented demo model, scanned once per test session over the planted
  writers and the layers of the planted responders, for the recovery tests.
"""

from __future__ import annotations

import atexit
import functools
import json
import shutil
import tempfile
from pathlib import Path

import numpy as np


def random_gpt2(directory, seed=0, V=300, d=64, H=4, L=3, P=32, init_std=0.3):
    """Write a random GPT-2-layout checkpoint; return (directory, float64 state dict, config)."""
    from safetensors.numpy import save_file

    rng = np.random.default_rng(seed)
    m = 4 * d
    sd = {"wte.weight": rng.normal(0, 1.0, (V, d)), "wpe.weight": rng.normal(0, 0.3, (P, d)),
          "ln_f.weight": 1 + rng.normal(0, 0.1, d), "ln_f.bias": rng.normal(0, 0.1, d)}
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
    sd32 = {"transformer." + k: v.astype(np.float32) for k, v in sd.items()}
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    save_file(sd32, str(directory / "model.safetensors"))
    cfg = {"model_type": "gpt2", "n_embd": d, "n_head": H, "n_layer": L, "vocab_size": V, "n_positions": P,
           "layer_norm_epsilon": 1e-5, "activation_function": "gelu_new", "n_inner": None}
    (directory / "config.json").write_text(json.dumps(cfg))
    return directory, {k: v.astype(np.float64) for k, v in sd32.items()}, cfg


def planted_selection() -> tuple[str, str]:
    """(--writers, --responders) covering every planted circuit: the planted writer heads (and
    every other planted head of layer 1), and every head of the planted responders' layers."""
    from composition.demo import PLANTED_CIRCUITS, PLANTED_HEADS

    writers = sorted({c[0] for c in PLANTED_CIRCUITS.values()} | {h for h in PLANTED_HEADS if h[0] == 1})
    layers = sorted({c[1][0] for c in PLANTED_CIRCUITS.values()})
    return ",".join(f"{l}.{h}" for l, h in writers), ",".join(str(l) for l in layers)


@functools.lru_cache(maxsize=None)
def demo_scan() -> Path:
    """Directory holding ``model/`` (the demo checkpoint) and ``scan.h5`` (with /heads)."""
    from composition.demo import build_demo
    from composition.scan import ScanOptions, run_scan

    root = Path(tempfile.mkdtemp(prefix="composition-demo-scan-"))
    atexit.register(shutil.rmtree, root, True)
    model = build_demo(root / "model")
    writers, responders = planted_selection()
    run_scan(model, root / "scan.h5", ScanOptions(writers=writers, responders=responders))
    return root
