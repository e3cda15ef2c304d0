"""Small random-initialised `transformers` models as external references (docs/testing.md,
"checkpoint families"). Nothing is downloaded: every model is built from a config here.

* :func:`build` makes a model of one family, re-draws its weights so attention scores are
  of order one (the library's own initialisation makes them ~1e-3, too flat to test
  logits against), saves it with ``save_pretrained`` and returns ``(model, directory)``.
* :func:`reference_logprobs` runs the model in float64 with eager attention and returns
  its own attention log-probabilities and hidden states.
* :func:`our_logprobs` recomputes the same log-probabilities from our canonical weights
  (norm, per-head q/k, rotary ``M(delta)``), for comparison.
"""

from __future__ import annotations

import os

os.environ.setdefault("HF_HUB_OFFLINE", "1")

import torch  # noqa: E402

SIZES = dict(vocab_size=300, hidden_size=64, num_hidden_layers=2, num_attention_heads=4,
             intermediate_size=128, max_position_embeddings=64)
# A fixed, real token sequence (ids into the 300-token vocabulary).
TOKENS = [17, 3, 250, 99, 3, 142, 7, 288, 64, 17, 5, 201]


def config(kind: str, **overrides):
    import transformers as T

    s = dict(SIZES)
    if kind == "gpt2":
        cfg = T.GPT2Config(n_embd=64, n_head=4, n_layer=2, vocab_size=300, n_positions=64, n_inner=128)
    elif kind == "neox":
        cfg = T.GPTNeoXConfig(**s, rotary_pct=0.5, use_parallel_residual=True, tie_word_embeddings=False)
    elif kind == "llama":
        cfg = T.LlamaConfig(**s, num_key_value_heads=2, rope_scaling={"rope_type": "linear", "factor": 2.0},
                            tie_word_embeddings=False)
    elif kind == "qwen2":
        cfg = T.Qwen2Config(**s, num_key_value_heads=2, tie_word_embeddings=True)
    elif kind == "bert":
        cfg = T.BertConfig(**s)
    else:
        raise ValueError(kind)
    for k, v in overrides.items():
        setattr(cfg, k, v)
    return cfg


MODEL_CLASSES = {"gpt2": "GPT2LMHeadModel", "neox": "GPTNeoXForCausalLM", "llama": "LlamaForCausalLM",
                 "qwen2": "Qwen2ForCausalLM", "bert": "BertForMaskedLM", "bert-base": "BertModel"}


def build(kind: str, directory, seed: int = 0, cls: str | None = None, save_kwargs=None, **overrides):
    """A random model of ``kind`` saved to ``directory``; returns ``(model in float64, directory)``."""
    import transformers as T

    cfg = config("bert" if kind.startswith("bert") else kind, **overrides)
    cfg._attn_implementation = "eager"
    torch.manual_seed(seed)
    model = getattr(T, cls or MODEL_CLASSES[kind])(cfg)
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for name, p in model.named_parameters():
            if p.ndim == 1 and ("norm" in name.lower() or "ln_" in name):
                if name.endswith("weight"):
                    p.copy_(1.0 + 0.2 * torch.randn(p.shape, generator=g))
                else:
                    p.copy_(0.1 * torch.randn(p.shape, generator=g))
            elif p.ndim == 1:
                p.copy_(0.1 * torch.randn(p.shape, generator=g))
            else:
                p.copy_(0.15 * torch.randn(p.shape, generator=g))
    model.tie_weights() if getattr(cfg, "tie_word_embeddings", False) else None
    model.eval()
    model.save_pretrained(str(directory), **(save_kwargs or {}))
    return model.double(), directory


@torch.no_grad()
def reference_logprobs(model, tokens=TOKENS):
    """The library's own attention log-probabilities ``[L, H, T, T]`` and hidden states."""
    ids = torch.tensor([tokens])
    out = model(ids, output_attentions=True, output_hidden_states=True)
    probs = torch.stack([a[0] for a in out.attentions])  # [L, H, T, T]
    return torch.log(probs), [h[0] for h in out.hidden_states]


def our_logprobs(w, hidden_states, causal: bool):
    """Log-probabilities recomputed from canonical weights and the layer inputs. # -> [L, H, T, T]"""
    from composition.compose.factors import input_norm
    from composition.extract.rotary import rotation
    from composition.extract.tables import apply_norm

    out = []
    for layer in range(w.n_layers):
        x = apply_norm(input_norm(w, layer), hidden_states[layer].double())  # [T, d]
        a = w.layers[layer].attn
        q = torch.einsum("td,hde->hte", x, a.W_Q.double()) + a.b_Q.double()[:, None]  # [H, T, dh]
        k = torch.einsum("td,hde->hte", x, a.W_K.double()) + a.b_K.double()[:, None]  # [H, T, dh]
        T = x.shape[0]
        s = torch.full((w.n_heads, T, T), float("-inf"), dtype=torch.float64)
        for i in range(T):
            for j in range(T if not causal else i + 1):
                M = rotation(w.rotary, w.d_head, i - j) if (w.rotary is not None) else None
                qi = q[:, i] @ M if M is not None else q[:, i]  # [H, dh]
                s[:, i, j] = (qi * k[:, j]).sum(-1) * w.scale
        out.append(torch.log_softmax(s, dim=-1))
    return torch.stack(out)


def max_relative(ours, ref) -> float:
    """Largest |difference| over the finite entries, relative to the largest |reference|."""
    mask = torch.isfinite(ref)
    return float((ours[mask] - ref[mask]).abs().max() / ref[mask].abs().max())
