"""A small random checkpoint in the GPT-2 layout, written with safetensors, for tests of
long-run machinery (resume, interrupts, cluster) that need a scan of a few seconds."""

from __future__ import annotations

import json
from pathlib import Path

import torch


def build_small_gpt2(directory, vocab=1024, width=64, heads=4, layers=3, seed=0) -> Path:
    """Write ``model.safetensors`` and ``config.json`` of a random GPT-2-layout model."""
    from safetensors.torch import save_file

    g = torch.Generator().manual_seed(seed)
    V, d, H, L, P, m = vocab, width, heads, layers, 16, 4 * width

    def randn(*shape, std=1.0):
        return (torch.randn(*shape, generator=g, dtype=torch.float64) * std).float()

    t = {"wte.weight": randn(V, d), "wpe.weight": randn(P, d, std=0.01),
         "ln_f.weight": 1.0 + randn(d, std=0.02), "ln_f.bias": randn(d, std=0.02)}
    for i in range(L):
        p = f"h.{i}."
        t[p + "attn.c_attn.weight"] = randn(d, 3 * d, std=d**-0.5)  # [d, 3d]
        t[p + "attn.c_attn.bias"] = randn(3 * d, std=0.02)
        t[p + "attn.c_proj.weight"] = randn(d, d, std=(d // H) ** -0.5)  # [H*dh, d]
        t[p + "attn.c_proj.bias"] = randn(d, std=0.02)
        for ln in ("ln_1", "ln_2"):
            t[p + ln + ".weight"] = 1.0 + randn(d, std=0.02)
            t[p + ln + ".bias"] = randn(d, std=0.02)
        t[p + "mlp.c_fc.weight"] = randn(d, m, std=d**-0.5)
        t[p + "mlp.c_fc.bias"] = randn(m, std=0.02)
        t[p + "mlp.c_proj.weight"] = randn(m, d, std=0.1 * m**-0.5)
        t[p + "mlp.c_proj.bias"] = randn(d, std=0.02)
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    save_file({k: v.contiguous() for k, v in t.items()}, str(out / "model.safetensors"), metadata={"format": "pt"})
    config = {"model_type": "gpt2", "vocab_size": V, "n_embd": d, "n_head": H, "n_layer": L,
              "n_positions": P, "n_ctx": P, "n_inner": None, "activation_function": "gelu_new",
              "layer_norm_epsilon": 1e-5, "tie_word_embeddings": True}
    (out / "config.json").write_text(json.dumps(config) + "\n")
    return out
