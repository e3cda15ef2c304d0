"""Checkpoint readers: files in, canonical :class:`~composition.extract.weights.Weights` out.

Each family is one module with ``matches(config)`` and ``read(source, config)``; a user's
layout file (``layout.read_layout``) stands in for a family the tool does not know.
"""

from __future__ import annotations

import dataclasses
import os
import re
from collections.abc import Mapping

from ..errors import CompositionError
from .weights import Weights
from . import bert, gpt2, layout, llama, neox
from ._build import check_config
from .files import TensorSource, locate

FAMILIES = {"gpt2": gpt2, "gpt-neox": neox, "llama": llama, "bert": bert}
FAMILY_NAMES = {"gpt2": "GPT-2-style", "gpt-neox": "GPT-NeoX-style", "llama": "Llama-style", "bert": "BERT-style"}


def detect_family(config: dict) -> str | None:
    """The family whose reader claims ``config`` (``model_type``/``architectures``), or None."""
    found = [name for name, mod in FAMILIES.items() if mod.matches(config)]
    return found[0] if found else None


def load_weights(checkpoint: str | os.PathLike | Mapping, family: str | None = None,
                 layout_file: str | os.PathLike | None = None, *, config: Mapping | None = None) -> Weights:
    """Read a checkpoint (directory, weights file or shard index) into canonical weights.

    ``checkpoint`` may also be a state dict in memory (torch tensors or NumPy arrays under
    the family's usual names) with its ``config`` mapping (composition.extract.memory).
    ``family`` overrides detection from ``config.json``; ``layout_file`` names a layout
    file for a family the tool does not know. Every tensor is read once here, its shape,
    dtype and finiteness checked; layers are then kept or re-read as memory allows.
    """
    if family is not None and layout_file is not None:
        raise CompositionError("give either --family or --layout, not both.")
    spec = layout.read_layout(layout_file) if layout_file is not None else None
    if isinstance(checkpoint, Mapping):  # a model in memory
        from .memory import memory_source

        src, config = memory_source(checkpoint, config)
        check_config(config, "the config mapping given with the state dict")
    else:
        if config is not None:
            raise CompositionError("config= goes with a state dict in memory; a checkpoint path reads its own config.json.")
        weights_file, config = locate(checkpoint, need_config=spec is None)
        config_file = weights_file.parent / "config.json"
        check_config(config, config_file if config_file.is_file() else weights_file)
        src = TensorSource(weights_file)
    if spec is not None:
        weights = layout.read(src, config, spec)
    else:
        if family is None:
            family = detect_family(config)
            if family is None:
                kind = config.get("model_type") or config.get("architectures") or "unknown"
                raise CompositionError(
                    f"the checkpoint's family ({kind}) is not one this tool reads; pass --family "
                    f"({', '.join(FAMILIES)}) or describe its tensors with --layout FILE.json."
                )
        elif family not in FAMILIES:
            raise CompositionError(f"--family {family!r} is not one of: {', '.join(FAMILIES)}.")
        weights = FAMILIES[family].read(src, config)
    for i in range(weights.n_layers):  # read and check every layer once
        weights.layers[i]
    _check_sizes(weights)
    _check_layer_count(weights, src)
    return dataclasses.replace(weights, tensors_used=tuple(src.used()), tensors_ignored=tuple(src.ignored()))


_LAYER_INDEX = re.compile(r"(?:^|\.)(?:h|layers?|blocks?|block)\.(\d+)\.")


def _check_layer_count(w: Weights, src: TensorSource) -> None:
    """Refuse a config that gives fewer layers than the checkpoint's tensors hold."""
    for name in src.ignored():
        m = _LAYER_INDEX.search(name)
        if m and int(m.group(1)) >= w.n_layers:
            raise CompositionError(f"the config gives {w.n_layers} layers, but {src.file_of(name)} holds tensor "
                                   f"{name} of layer {m.group(1)}; fix the layer count in the config.")


def _check_sizes(w: Weights) -> None:
    """Shapes that no single tensor check sees: heads against widths across the model."""
    H, d = w.n_heads, w.d_model
    for i in range(w.n_layers):
        a = w.layers[i].attn
        if a.W_Q.shape[0] != H or a.W_Q.shape[1] != d or a.W_O.shape != (H, w.d_head, d):
            raise CompositionError(f"layer {i} of {w.source} does not have the sizes of layer 0.")
    if w.W_U.shape != (d, w.vocab_size):
        raise CompositionError(f"the unembedding of {w.source} has shape {tuple(w.W_U.shape)}, not {(d, w.vocab_size)}.")


def describe_weights(w: Weights, rotary_offsets: tuple[int, int] | None = None) -> list[tuple[str, str]]:
    """What ``inspect`` shows: ``(label, text)`` rows for every fact the reader settled."""
    from .rotary import describe as describe_rotary
    from .rotary import offsets_rotation

    offsets_rotation(w, rotary_offsets)  # refuses offsets for non-rotary models
    layer = w.layers[0]
    a = layer.attn
    kind = w.config.get("model_type") or ", ".join(w.config.get("architectures") or []) or "none given"
    placement = {"pre": "pre-norm placement", "post": "post-norm placement (norm after each residual add)",
                 "parallel": "pre-norm placement, parallel residual (attention and MLP read the same residual)"}
    norms = f"{layer.attn_norm.kind} (eps {layer.attn_norm.eps:g}), {placement.get(w.placement, w.placement)}"
    norms += f"; final norm {w.final_norm.kind}"
    if w.embed_norm is not None:
        norms += f"; embedding norm {w.embed_norm.kind}"
    if a.kv_heads < w.n_heads:
        g = w.n_heads // a.kv_heads
        gqa = (f"{a.kv_heads} key/value heads for {w.n_heads} query heads (grouped-query: query heads "
               f"{g}j..{g}j+{g - 1} share key head j; every query head is scanned)")
    else:
        gqa = f"{a.kv_heads} key/value heads, one per query head"
    if w.rotary is None:
        offsets = "not applicable (no rotary positions)"
    elif rotary_offsets is None or tuple(rotary_offsets) == (0, 0):
        offsets = "0 (default: no rotation, destination and source at the same position)"
    elif rotary_offsets[0] == rotary_offsets[1]:
        offsets = f"{rotary_offsets[0]} (rotation M(delta) folded into the query side)"
    else:
        offsets = f"{rotary_offsets[0]}:{rotary_offsets[1]} (uniform average of M(delta) folded into the query side)"
    positions = "learned, " + f"{w.W_pos.shape[0]} rows" if w.W_pos is not None else "none learned"
    if w.W_type is not None:
        positions += "; token-type 0 row added to every embedding"
    readout = {"tied": "tied to the input embedding", "lm-head": "separate LM head (untied)",
               "input-embedding": "input embedding used as readout (no LM head in the checkpoint)"}[w.readout]
    mlp = layer.mlp
    rows = [
        ("source", w.source),
        ("family", f"{FAMILY_NAMES.get(w.family, w.family)} ({w.family}; config model type: {kind})"),
        ("vocabulary", str(w.vocab_size)),
        ("layers x heads", f"{w.n_layers} x {w.n_heads}"),
        ("model width / head width", f"{w.d_model} / {w.d_head}"),
        ("key/value heads", gqa),
        ("norm", norms),
        ("MLP", f"{mlp.activation}{', gated' if mlp.W_gate is not None else ''}, width {mlp.W_in.shape[1]}"),
        ("positions", positions),
        ("rotary", describe_rotary(w.rotary, w.d_head)),
        ("rotary offset", offsets),
        ("unembedding", readout),
        ("attention scale", f"{w.scale:.6g}"),
    ]
    rows += [("note", n) for n in w.notes]
    rows += [
        (f"tensors used ({len(w.tensors_used)})", _grouped(w.tensors_used)),
        (f"tensors ignored ({len(w.tensors_ignored)})", _grouped(w.tensors_ignored) or "none"),
        ("fingerprint", w.fingerprint()),
        ("fingerprint covers", "every tensor above and " + "; ".join(f"{k} {v}" for k, v in w.settings().items()
                                                                   if k != "rotary frequencies")),
    ]
    return rows


def _grouped(names) -> str:
    """Tensor names with layer numbers folded: ``layers.{i}.q.weight x12``."""
    import re

    counts: dict[str, int] = {}
    for n in names:
        key = re.sub(r"\.\d+\.", ".{i}.", n)
        counts[key] = counts.get(key, 0) + 1
    return ", ".join(k if c == 1 else f"{k} x{c}" for k, c in counts.items())


__all__ = ["load_weights", "detect_family", "describe_weights", "FAMILIES", "TensorSource", "locate"]
