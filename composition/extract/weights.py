"""Canonical per-layer weights: the one structure every checkpoint family is read into.

Conventions (docs/methods.md, "Notation"): row vectors, ``x W``. ``V`` vocabulary, ``d`` model
width, ``H`` query heads per layer, ``dh`` head width. Grouped-query checkpoints are
expanded on reading: ``W_K``/``W_V`` always hold one slice per *query* head, and
``Attention.kv_heads`` records how many distinct key/value heads the checkpoint had.

Nothing downstream of this module knows which family a model came from.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, fields

import torch



@dataclass(frozen=True)
class Norm:
    """A normalisation layer. ``kind`` is ``layernorm``, ``rmsnorm`` or ``identity``."""

    kind: str
    weight: torch.Tensor | None  # [d] gamma (None: ones)
    bias: torch.Tensor | None  # [d] beta (None: zeros; RMSNorm has none)
    eps: float = 1e-5


@dataclass(frozen=True)
class Rotary:
    """Rotary position embedding on the first ``dims`` dimensions of each head.

    ``style`` is ``split-half`` (pairs ``(i, i + dims/2)``) or ``interleaved``
    (pairs ``(2i, 2i+1)``). ``inv_freq`` holds one frequency per pair, scaling included.
    """

    dims: int
    style: str
    inv_freq: torch.Tensor  # [dims // 2]
    scaling: str = "default"  # frequency scaling from the config: default | linear | llama3 | other
    unsupported: str | None = None  # why offsets other than 0 cannot be computed (unknown scaling)


@dataclass(frozen=True)
class Attention:
    W_Q: torch.Tensor  # [H, d, dh]
    W_K: torch.Tensor  # [H, d, dh]  (expanded per query head)
    W_V: torch.Tensor  # [H, d, dh]  (expanded per query head)
    W_O: torch.Tensor  # [H, dh, d]
    b_Q: torch.Tensor  # [H, dh]
    b_K: torch.Tensor  # [H, dh]
    b_V: torch.Tensor  # [H, dh]
    b_O: torch.Tensor  # [d]
    kv_heads: int  # distinct key/value heads in the checkpoint (== H without grouping)


@dataclass(frozen=True)
class MLP:
    """``out = act(x W_in + b_in) W_out + b_out``; gated when ``W_gate`` is set:
    ``out = (act(x W_gate + b_gate) * (x W_in + b_in)) W_out + b_out``."""

    W_in: torch.Tensor  # [d, m]
    b_in: torch.Tensor  # [m]
    W_out: torch.Tensor  # [m, d]
    b_out: torch.Tensor  # [d]
    activation: str  # gelu | gelu-tanh | relu | silu
    W_gate: torch.Tensor | None = None  # [d, m]; gated MLP: act(x W_gate + b_gate) * (x W_in + b_in)
    b_gate: torch.Tensor | None = None  # [m]


@dataclass(frozen=True)
class Layer:
    attn_norm: Norm  # N_l: the norm in front of attention (post-norm: after it)
    attn: Attention
    mlp_norm: Norm  # N_2l: the norm in front of the MLP (post-norm: after it)
    mlp: MLP


@dataclass(frozen=True)
class Weights:
    """A whole model in canonical form.

    ``placement``: ``pre`` (pre-norm decoder), ``parallel`` (pre-norm, attention and MLP
    read the same residual), ``post`` (post-norm encoder: ``x = N(x + sublayer(x))``).
    """

    family: str
    W_E: torch.Tensor  # [V, d]
    W_pos: torch.Tensor | None  # [P, d] learned positions, None for rotary families
    W_U: torch.Tensor  # [d, V] unembedding (readout)
    final_norm: Norm  # N_f (identity for post-norm encoders)
    layers: tuple[Layer, ...]  # or any sequence of Layer (readers may load layers lazily)
    placement: str = "pre"
    attn_scale: float | None = None  # None: 1/sqrt(dh)
    rotary: Rotary | None = None
    embed_norm: Norm | None = None  # post-norm encoders: LayerNorm of the embeddings
    W_type: torch.Tensor | None = None  # [d] token-type 0 row, added to every embedding
    readout: str = "tied"  # tied | lm-head | input-embedding (no LM head in checkpoint)
    notes: tuple[str, ...] = ()  # plain sentences on what the reader assumed or left out
    tensors_used: tuple[str, ...] = ()
    tensors_ignored: tuple[str, ...] = ()
    source: str = ""
    config: dict = field(default_factory=dict)

    # sizes (ints), read off the tensors: W_E [V, d], layer 0's W_Q [H, d, dh]
    n_layers = property(lambda self: len(self.layers))
    n_heads = property(lambda self: self.layers[0].attn.W_Q.shape[0])
    d_model = property(lambda self: self.W_E.shape[1])
    d_head = property(lambda self: self.layers[0].attn.W_Q.shape[2])
    vocab_size = property(lambda self: self.W_E.shape[0])

    @property
    def scale(self) -> float:
        return self.attn_scale if self.attn_scale is not None else self.d_head**-0.5

    def tensor_fingerprint(self) -> str:
        """SHA-256 over every canonical tensor (name, shape, dtype, bytes) and the structure
        (the fingerprint of scan files of format 1)."""
        h = hashlib.sha256()
        h.update(f"{self.placement}|{self.attn_scale}|{self.readout}".encode())
        for name, t in _named_tensors(self):
            t = t.detach().contiguous().cpu()
            h.update(f"{name}|{tuple(t.shape)}|{t.dtype}".encode())
            h.update(t.view(torch.uint8).numpy() if t.numel() else b"")  # the bytes, read in place (no copy)
        if self.rotary is not None:
            h.update(f"rotary|{self.rotary.dims}|{self.rotary.style}".encode())
        return h.hexdigest()

    def settings(self) -> dict:
        """Every configuration value the computation reads besides the tensors, by a plain name
        (``activation``, ``attention norm epsilon``, ``rotary scaling``, ...). A value that differs
        between layers is a list, one entry per layer."""
        def per_layer(get):
            values = [get(layer) for layer in self.layers]
            return values[0] if all(v == values[0] for v in values) else values

        def norm(n):
            return (None, None) if n is None else (n.kind, float(n.eps))

        s = {
            "placement": self.placement,
            "attention scale": float(self.scale),
            "readout": self.readout,
            "activation": per_layer(lambda l: l.mlp.activation),
            "gated MLP": per_layer(lambda l: l.mlp.W_gate is not None),
            "key/value heads": per_layer(lambda l: int(l.attn.kv_heads)),
            "attention norm": per_layer(lambda l: l.attn_norm.kind),
            "attention norm epsilon": per_layer(lambda l: float(l.attn_norm.eps)),
            "MLP norm": per_layer(lambda l: l.mlp_norm.kind),
            "MLP norm epsilon": per_layer(lambda l: float(l.mlp_norm.eps)),
            "final norm": norm(self.final_norm)[0],
            "final norm epsilon": norm(self.final_norm)[1],
            "embedding norm": norm(self.embed_norm)[0] or "none",
            "embedding norm epsilon": norm(self.embed_norm)[1],
            "token-type row": self.W_type is not None,
            "learned positions": self.W_pos is not None,
        }
        r = self.rotary
        s["rotary"] = "none" if r is None else f"{r.dims} dims, {r.style}"
        s["rotary scaling"] = "none" if r is None else str(r.scaling)
        s["rotary frequencies"] = "none" if r is None else ",".join(f"{v:.9g}" for v in r.inv_freq.double().tolist())
        return s

    def fingerprint(self) -> str:
        """The model fingerprint: SHA-256 over every canonical tensor and every configuration
        value the computation reads (:meth:`settings`). Any change to either changes it."""
        import json

        h = hashlib.sha256(self.tensor_fingerprint().encode())
        h.update(json.dumps(self.settings(), sort_keys=True).encode())
        return h.hexdigest()


def _named_tensors(w: Weights):
    """Yield ``(name, tensor)`` for every tensor of ``w`` in a fixed order."""
    for f in ("W_E", "W_pos", "W_U", "W_type"):
        t = getattr(w, f)
        if t is not None:
            yield f, t
    yield from _norm_tensors("final_norm", w.final_norm)
    if w.embed_norm is not None:
        yield from _norm_tensors("embed_norm", w.embed_norm)
    if w.rotary is not None:
        yield "rotary.inv_freq", w.rotary.inv_freq
    for i, layer in enumerate(w.layers):
        yield from _norm_tensors(f"layers.{i}.attn_norm", layer.attn_norm)
        yield from _norm_tensors(f"layers.{i}.mlp_norm", layer.mlp_norm)
        for part in (layer.attn, layer.mlp):
            for f in fields(part):
                t = getattr(part, f.name)
                if isinstance(t, torch.Tensor):
                    yield f"layers.{i}.{f.name}", t


def _norm_tensors(prefix: str, n: Norm):
    if n.weight is not None:
        yield f"{prefix}.weight", n.weight
    if n.bias is not None:
        yield f"{prefix}.bias", n.bias
