"""The demo model: an invented GPT-2-layout checkpoint with planted heads.

Everything here is made up for demonstration and for recovery tests (see
``data_cards/demo-model.md``). The generator is deterministic: the same seed writes the
same bytes. Token embeddings are random; orthonormal 32-dimensional subspaces, all
orthogonal to each other and to the all-ones direction, carry the planted circuits:

* writers in layer 1 copy their token's component in one subspace into the residual;
* responders in layers 2-3 read a writer's subspace with their query and key (the sign
  of the key decides attention-raising or attention-lowering) and write into a subspace
  of their own, copying (+) or suppressing (-) the attended token.

Every planted weight carries a small random perturbation; all other heads are random.
"""

from __future__ import annotations

import json
from pathlib import Path

import torch

SIZES = dict(vocab_size=4096, n_embd=256, n_head=8, n_layer=4, n_positions=128)
SUB = 32  # width of a planted subspace (= head width)

# name: (writer head, responder head, writer subspace, responder subspace,
#        QK sign (+1 raising, -1 lowering), responder OV sign (+1 copying, -1 suppressing))
PLANTED_CIRCUITS = {
    "suppressor": ((1, 0), (2, 3), 0, 1, +1, -1),
    "back-up": ((1, 2), (3, 1), 2, 3, -1, +1),
    "reinforcer": ((1, 5), (3, 6), 4, 5, +1, +1),
}

# (writer, responder) -> expected query-side label, for the recovery tests
PLANTED_PAIRS = {(c[0], c[1]): c[4] for c in PLANTED_CIRCUITS.values()}
# head -> expected OV sign (+1 copying, -1 suppressing); writers all copy
PLANTED_HEADS = {**{c[0]: +1 for c in PLANTED_CIRCUITS.values()},
                 **{c[1]: c[5] for c in PLANTED_CIRCUITS.values()}}


def build_demo(directory: str | Path, seed: int = 0) -> Path:
    """Write ``model.safetensors`` and ``config.json`` of the demo model into ``directory``."""
    from safetensors.torch import save_file

    g = torch.Generator().manual_seed(seed)
    V, d, H, L, P = (SIZES[k] for k in ("vocab_size", "n_embd", "n_head", "n_layer", "n_positions"))
    dh, m = d // H, 4 * d

    def randn(*shape, std=1.0):
        return torch.randn(*shape, generator=g, dtype=torch.float64) * std

    basis = _subspaces(randn(d, d), d)  # [d, d-1] orthonormal, orthogonal to ones

    def sub(i):
        return basis[:, i * SUB:(i + 1) * SUB]  # [d, SUB]

    W_Q, W_K, W_V = (randn(L, H, d, dh, std=d**-0.5) for _ in range(3))  # [L, H, d, dh]
    W_O = randn(L, H, dh, d, std=dh**-0.5)  # [L, H, dh, d]
    W_O[0] *= 0.01  # layer 0 stays small so the token table keeps each token's identity

    def plant(tensor, layer, head, value, noise=0.1):
        tensor[layer, head] = value + noise * randn(*value.shape, std=float(value.norm()) / value.numel() ** 0.5)

    for (lu, hu), (lr, hr), s_w, s_r, qk, ov in PLANTED_CIRCUITS.values():
        plant(W_V, lu, hu, sub(s_w))
        plant(W_O, lu, hu, sub(s_w).T)
        plant(W_Q, lr, hr, sub(s_w))
        plant(W_K, lr, hr, qk * sub(s_w))
        plant(W_V, lr, hr, sub(s_r))
        plant(W_O, lr, hr, ov * sub(s_r).T)

    t = {"wte.weight": randn(V, d), "wpe.weight": randn(P, d, std=0.01)}
    for i in range(L):
        p = f"h.{i}."
        per_head = lambda W: W[i].permute(1, 0, 2).reshape(d, d)  # noqa: E731  [H, d, dh] -> [d, H*dh]
        t[p + "attn.c_attn.weight"] = torch.cat([per_head(W_Q), per_head(W_K), per_head(W_V)], 1)  # [d, 3d]
        t[p + "attn.c_attn.bias"] = randn(3 * d, std=0.02)
        t[p + "attn.c_proj.weight"] = W_O[i].reshape(d, d)  # [H*dh, d]
        t[p + "attn.c_proj.bias"] = randn(d, std=0.02)
        for ln in ("ln_1", "ln_2"):
            t[p + ln + ".weight"] = 1.0 + randn(d, std=0.02)
            t[p + ln + ".bias"] = randn(d, std=0.02)
        t[p + "mlp.c_fc.weight"] = randn(d, m, std=d**-0.5)
        t[p + "mlp.c_fc.bias"] = randn(m, std=0.02)
        t[p + "mlp.c_proj.weight"] = randn(m, d, std=m**-0.5) * (0.01 if i == 0 else 1.0)
        t[p + "mlp.c_proj.bias"] = randn(d, std=0.02)
    t["ln_f.weight"] = 1.0 + randn(d, std=0.02)
    t["ln_f.bias"] = randn(d, std=0.02)

    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    tensors = {"transformer." + k: v.to(torch.float32).contiguous() for k, v in t.items()}
    save_file(tensors, str(out / "model.safetensors"), metadata={"format": "pt"})
    config = {
        "model_type": "gpt2",
        "architectures": ["GPT2LMHeadModel"],
        **SIZES,
        "n_ctx": P,
        "n_inner": None,
        "activation_function": "gelu_new",
        "layer_norm_epsilon": 1e-5,
        "tie_word_embeddings": True,
        "note": "invented demo model of the composition project; see data_cards/demo-model.md",
    }
    (out / "config.json").write_text(json.dumps(config, indent=2) + "\n")
    # An invented vocabulary, so reports can show token text (plain-JSON tokenizer.json).
    vocab = {text: i for i, text in enumerate(_invented_words(V))}
    (out / "tokenizer.json").write_text(json.dumps({"model": {"type": "WordLevel", "vocab": vocab}}) + "\n")
    return out


def _subspaces(gauss: torch.Tensor, d: int) -> torch.Tensor:
    """Orthonormal columns spanning the complement of the all-ones direction. # [d, d] -> [d, d-1]"""
    ones = torch.ones(d, 1, dtype=torch.float64) / d**0.5
    q, _ = torch.linalg.qr(torch.cat([ones, gauss[:, : d - 1]], 1))
    return q[:, 1:]


def _invented_words(n: int) -> list[str]:
    """``n`` distinct made-up words of two or three syllables, in a fixed order."""
    onsets, vowels = "bdfgklmnprstvz", "aeiou"
    syllables = [c + v for c in onsets for v in vowels]  # 70
    words = [a + b for a in syllables for b in syllables]  # 4900
    words += [a + b + c for a in syllables[:20] for b in syllables for c in syllables]
    return words[:n]
