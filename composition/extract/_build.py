"""Pieces every family reader shares: config lookups, prefixed tensor names, LayerNorms,
nn.Linear MLPs, the unembedding, weight re-orientation, grouped-query expansion, lazily
loaded layers and the assembled ``Weights``."""

from __future__ import annotations

import math
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import fields

import torch

from ..errors import CompositionError
from .weights import MLP, Layer, Norm, Weights

ACTIVATIONS = {"gelu_new": "gelu-tanh", "gelu_pytorch_tanh": "gelu-tanh", "gelu_fast": "gelu-tanh",
               "gelu": "gelu", "relu": "relu", "silu": "silu", "swish": "silu"}
CACHE_BYTES = 2 << 30  # layers kept in memory at once (float32 bytes)


def family_matches(config: dict, model_types: tuple[str, ...], architectures: tuple[str, ...],
                   excluded: tuple[str, ...] = ()) -> bool:
    """Whether the config's ``model_type`` is one of ``model_types``, or one of its ``architectures``
    starts with one of ``architectures`` but with none of ``excluded``."""
    return config.get("model_type") in model_types or any(
        str(a).startswith(architectures) and not (excluded and str(a).startswith(excluded))
        for a in config.get("architectures", []) or []
    )


def config_int(config: dict, family: str, *keys: str, default=None) -> int:
    """The first of ``keys`` present in the config, as a positive int (an integral number only)."""
    for key in keys:
        if config.get(key) is not None:
            return _positive_int(config[key], f"the {family} config's {key}")
    if default is not None:
        return default
    raise CompositionError(f"the {family} config lacks a usable {keys[0]!r} entry.")


def _positive_int(value, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise CompositionError(f"{what} = {value!r} is not an integer.")
    if isinstance(value, float) and not (math.isfinite(value) and value.is_integer()):
        raise CompositionError(f"{what} = {value!r} is not an integer.")
    if not 0 < value <= 1 << 40:
        raise CompositionError(f"{what} = {value!r} is not a positive integer of a usable size.")
    return int(value)


# configuration keys read by some reader, by the kind of value they must hold
_INT_KEYS = ("n_embd", "n_head", "n_layer", "n_inner", "n_positions", "n_ctx", "vocab_size", "hidden_size",
             "num_attention_heads", "num_hidden_layers", "num_key_value_heads", "intermediate_size", "head_dim",
             "rotary_dim", "max_position_embeddings", "type_vocab_size")
_POSITIVE_FLOAT_KEYS = ("layer_norm_epsilon", "layer_norm_eps", "rms_norm_eps", "rope_theta", "rotary_emb_base")
_FRACTION_KEYS = ("partial_rotary_factor", "rotary_pct")
_STRING_KEYS = ("activation_function", "hidden_act", "position_embedding_type", "model_type")
_BOOL_KEYS = ("tie_word_embeddings", "attention_bias", "mlp_bias", "use_parallel_residual", "scale_attn_weights",
              "scale_attn_by_inverse_layer_idx")
_SCALING_FLOAT_KEYS = ("factor", "low_freq_factor", "high_freq_factor", "rope_theta", "partial_rotary_factor")


def check_config(config: dict, source) -> None:
    """Check every config value a reader uses for its type, range and finiteness, before any
    tensor is read: one sentence naming the file and key for the first bad one."""
    where = f"the config of {source}"
    for key in _INT_KEYS:
        if config.get(key) is not None:
            _positive_int(config[key], f"{where}: {key}")
    for key in _POSITIVE_FLOAT_KEYS:
        if key in config:
            positive_float(config[key], f"{where}: {key}")
    for key in _FRACTION_KEYS:
        if config.get(key) is not None:
            v = positive_float(config[key], f"{where}: {key}")
            if v > 1:
                raise CompositionError(f"{where}: {key} = {v!r} is not a fraction in (0, 1].")
    for key in _STRING_KEYS:
        if config.get(key) is not None and not isinstance(config[key], str):
            raise CompositionError(f"{where}: {key} = {config[key]!r} is not a string.")
    for key in _BOOL_KEYS:
        if config.get(key) is not None and not isinstance(config[key], bool):
            raise CompositionError(f"{where}: {key} = {config[key]!r} is not true or false.")
    for key in ("rope_scaling", "rope_parameters"):
        value = config.get(key)
        if value is None:
            continue
        if not isinstance(value, dict):
            raise CompositionError(f"{where}: {key} = {value!r} is not a JSON object.")
        for sub in _SCALING_FLOAT_KEYS:
            if sub in value:
                positive_float(value[sub], f"{where}: {key}.{sub}")
        for sub in ("rope_type", "type"):
            if value.get(sub) is not None and not isinstance(value[sub], str):
                raise CompositionError(f"{where}: {key}.{sub} = {value[sub]!r} is not a string.")
        if value.get("original_max_position_embeddings") is not None:
            _positive_int(value["original_max_position_embeddings"], f"{where}: {key}.original_max_position_embeddings")


def positive_float(value, what: str) -> float:
    """A finite, positive number, or a sentence naming ``what``."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise CompositionError(f"{what} = {value!r} is not a number.")
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise CompositionError(f"{what} = {value!r} is not a finite positive number.")
    return v


def config_sizes(config: dict, family: str) -> tuple[int, int, int, int, int, int]:
    """``(d, H, L, V, dh, m)`` from the usual config names (``hidden_size``, ``num_attention_heads``,
    ``num_hidden_layers``, ``vocab_size``, ``intermediate_size``), with the head width ``d / H`` and
    the MLP width ``4 d`` by default."""
    d = config_int(config, family, "hidden_size")
    H = config_int(config, family, "num_attention_heads")
    L = config_int(config, family, "num_hidden_layers")
    V = config_int(config, family, "vocab_size")
    if d % H:
        raise CompositionError(f"the config's hidden_size={d} is not divisible by num_attention_heads={H}.")
    return d, H, L, V, d // H, config_int(config, family, "intermediate_size", default=4 * d)


def activation(config: dict, key: str, default: str) -> str:
    name = config.get(key, default)
    if not isinstance(name, str) or name not in ACTIVATIONS:
        raise CompositionError(f"the config's {key} {name!r} is not supported (supported: {', '.join(ACTIVATIONS)}).")
    return ACTIVATIONS[name]


def prefixed(src, prefix: str, probe: str) -> tuple[str, Callable[[str, tuple], torch.Tensor]]:
    """``(pre, get)``: ``pre`` is ``prefix`` when the checkpoint has ``prefix + probe``, else empty
    (exports with and without the model's prefix read the same); ``get(name, shape)`` is ``src.get``
    of ``pre + name``."""
    pre = prefix if src.has(prefix + probe) else ""

    def get(name: str, shape: tuple) -> torch.Tensor:
        return src.get(pre + name, shape)

    return pre, get


def layernorm(get, name: str, d: int, eps: float) -> Norm:
    """The LayerNorm ``name`` (``name.weight``, ``name.bias``, both ``[d]``)."""
    return Norm("layernorm", get(f"{name}.weight", (d,)), get(f"{name}.bias", (d,)), eps)


def linear_mlp(get, up: str, down: str, d: int, m: int, act: str, gate: str | None = None,
               bias: bool = True) -> MLP:
    """An MLP of ``nn.Linear`` layers (weights out x in) named ``up``, ``down`` and, when gated,
    ``gate``; without ``bias`` the biases are zero (and the gate has none).

    # up.weight [m, d], down.weight [d, m], gate.weight [m, d] -> W_in [d, m], W_out [m, d], W_gate [d, m]
    """
    def b(name: str, n: int) -> torch.Tensor:
        return get(name + ".bias", (n,)) if bias else torch.zeros(n)

    return MLP(
        W_in=get(up + ".weight", (m, d)).T.contiguous(),  # [d, m]
        b_in=b(up, m),
        W_out=get(down + ".weight", (d, m)).T.contiguous(),  # [m, d]
        b_out=b(down, d),
        activation=act,
        W_gate=get(gate + ".weight", (m, d)).T.contiguous() if gate else None,  # [d, m]
        b_gate=b(gate, m) if gate and bias else None,
    )


def unembedding(src, names: Sequence[str], W_E: torch.Tensor, tie: bool, missing: str | None = None):
    """``(W_U, readout)`` from the first of ``names`` the checkpoint holds (``tied`` when it equals the
    embedding, else ``lm-head``); else the embedding (``tied``) when ``tie``; else a CompositionError
    saying ``missing``, or None when ``missing`` is None.

    # W_E [V, d] -> W_U [d, V]
    """
    V, d = W_E.shape
    name = next((n for n in names if src.has(n)), None)
    if name is not None:
        W_U = src.get(name, (V, d)).T.contiguous()  # [d, V]
        return W_U, "tied" if torch.equal(W_U.T, W_E) else "lm-head"
    if tie:
        return W_E.T.contiguous(), "tied"  # [d, V]
    if missing is not None:
        raise CompositionError(missing)
    return None


def assemble(family: str, src, config: dict, W_E: torch.Tensor, unembed: tuple, final_norm: Norm, n_layers: int,
             load_layer: Callable[[int], Layer], **rest) -> Weights:
    """The reader's ``Weights``: layers loaded lazily, the source and config recorded; ``unembed`` is
    ``(W_U, readout)``; ``rest``: any other field of ``Weights`` (``W_pos`` defaults to None)."""
    W_U, readout = unembed
    rest.setdefault("W_pos", None)
    return Weights(family=family, W_E=W_E, W_U=W_U, readout=readout, final_norm=final_norm,
                   layers=LazyLayers(n_layers, load_layer), source=str(src.path), config=dict(config), **rest)


def linear_heads(w: torch.Tensor, n: int) -> torch.Tensor:
    """An ``nn.Linear`` weight ``[n*dh, d]`` (out x in) -> per-head ``[n, d, dh]``."""
    out, d = w.shape
    return w.reshape(n, out // n, d).permute(0, 2, 1).contiguous()


def expand_kv(w: torch.Tensor, n_heads: int) -> torch.Tensor:
    """Grouped-query expansion: key/value head ``j`` serves query heads ``j*g .. j*g+g-1``.

    # w [kv, ...] -> [n_heads, ...]  (the reference implementation's ``repeat_kv`` order)
    """
    kv = w.shape[0]
    if n_heads % kv:
        raise CompositionError(f"{n_heads} query heads cannot share {kv} key/value heads evenly.")
    return w.repeat_interleave(n_heads // kv, dim=0)


class LazyLayers(Sequence):
    """Layers loaded on first use and kept while they fit ``CACHE_BYTES``; layer 0 stays.

    A scan that touches a few layers of a large model reads only those layers' tensors.
    """

    def __init__(self, n: int, load: Callable[[int], Layer], budget: int | None = None):
        self._n, self._load = n, load
        self._budget = CACHE_BYTES if budget is None else budget
        self._cache: OrderedDict[int, Layer] = OrderedDict()
        self._bytes: dict[int, int] = {}

    def __len__(self) -> int:
        return self._n

    def __getitem__(self, i):
        if isinstance(i, slice):
            return tuple(self[j] for j in range(*i.indices(self._n)))
        i = int(i)
        if i < 0:
            i += self._n
        if not 0 <= i < self._n:
            raise IndexError(i)
        if i in self._cache:
            self._cache.move_to_end(i)
            return self._cache[i]
        layer = self._load(i)
        self._cache[i] = layer
        self._bytes[i] = _layer_bytes(layer)
        while sum(self._bytes.values()) > self._budget and len(self._cache) > 2:
            victim = next(j for j in self._cache if j != 0 and j != i)
            del self._cache[victim], self._bytes[victim]
        return layer

    def cached(self) -> list[int]:
        """Indices of the layers held in memory now."""
        return list(self._cache)


def _layer_bytes(layer: Layer) -> int:
    total = 0
    for part in (layer.attn, layer.mlp, layer.attn_norm, layer.mlp_norm):
        for f in fields(part):
            t = getattr(part, f.name)
            if isinstance(t, torch.Tensor):
                total += t.numel() * t.element_size()
    return total
