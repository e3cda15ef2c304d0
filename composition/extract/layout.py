"""A user's layout file (``--layout FILE.json``): tensor names of any family that fits the
canonical structure. The format is documented in docs/families.md; in short::

    {
      "family": "my-decoder",                 # name shown by inspect
      "layers": 2, "heads": 4,                # required
      "kv_heads": 2, "head_dim": 16,          # optional (defaults: heads, d_model / heads)
      "placement": "pre",                     # pre | parallel | post
      "norm": "layernorm", "norm_eps": 1e-5,  # layernorm | rmsnorm
      "activation": "gelu",                   # gelu | gelu-tanh | relu | silu
      "matrix_order": "out-in",               # out-in (as nn.Linear stores it) | in-out (x @ W)
      "attention_scale": null,                # null: 1/sqrt(head_dim)
      "rotary": {"dims": 16, "style": "split-half", "base": 10000.0, "scaling": null},
      "tensors": {"embed": "tok.weight", "q": "blocks.{i}.attn.q.weight", ...}
    }

Per-layer tensor names carry ``{i}`` for the layer index. Every named tensor must exist
in the checkpoint; every tensor key not listed is absent (biases: zero; unembedding: tied).
"""

from __future__ import annotations

import json
from pathlib import Path

import torch

from ..errors import CompositionError
from .rotary import STYLES, inverse_frequencies
from .weights import MLP, Attention, Layer, Norm, Rotary, Weights
from ._build import LazyLayers, expand_kv
from .files import TensorSource

TOP_KEYS = {"format", "family", "layers", "heads", "kv_heads", "head_dim", "placement", "norm", "norm_eps",
            "activation", "matrix_order", "qkv_order", "attention_scale", "rotary", "tensors", "comment"}
GLOBAL_TENSORS = {"embed", "positions", "unembed", "final_norm_weight", "final_norm_bias", "embed_norm_weight",
                  "embed_norm_bias", "token_type"}
LAYER_TENSORS = {"attn_norm_weight", "attn_norm_bias", "mlp_norm_weight", "mlp_norm_bias", "q", "k", "v", "qkv",
                 "o", "q_bias", "k_bias", "v_bias", "qkv_bias", "o_bias", "mlp_in", "mlp_in_bias", "mlp_gate",
                 "mlp_gate_bias", "mlp_out", "mlp_out_bias"}
REQUIRED = {"embed", "attn_norm_weight", "mlp_norm_weight", "o", "mlp_in", "mlp_out"}
_ACTS = ("gelu", "gelu-tanh", "relu", "silu")


def read_layout(path: str | Path) -> dict:
    """Parse and check a layout file; every fault is one sentence naming the file and key."""
    from .files import _check_regular

    path = Path(path)
    _check_regular(path, "the layout file")
    try:
        spec = json.loads(path.read_text())
    except OSError as exc:
        raise CompositionError(f"the layout file {path} cannot be read ({exc.strerror}).") from None
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CompositionError(f"the layout file {path} is not valid JSON ({str(exc).splitlines()[0]}).") from None
    if not isinstance(spec, dict):
        raise CompositionError(f"the layout file {path} does not hold a JSON object.")
    bad = sorted(set(spec) - TOP_KEYS)
    if bad:
        raise CompositionError(f"the layout file {path} has unknown key {bad[0]!r}.")
    tensors = spec.get("tensors")
    if not isinstance(tensors, dict) or not all(isinstance(v, str) for v in tensors.values()):
        raise CompositionError(f"the layout file {path} needs a 'tensors' object of tensor names.")
    bad = sorted(set(tensors) - GLOBAL_TENSORS - LAYER_TENSORS)
    if bad:
        raise CompositionError(f"the layout file {path} has unknown tensor key {bad[0]!r}.")
    missing = sorted(REQUIRED - set(tensors))
    if missing:
        raise CompositionError(f"the layout file {path} does not name the tensor for {missing[0]!r}.")
    if "qkv" in tensors and ({"q", "k", "v"} & set(tensors)):
        raise CompositionError(f"the layout file {path} names both a fused 'qkv' and separate q/k/v tensors.")
    if "qkv" not in tensors and not {"q", "k", "v"} <= set(tensors):
        raise CompositionError(f"the layout file {path} needs either 'qkv' or all of 'q', 'k', 'v'.")
    for key in ("layers", "heads"):
        if not isinstance(spec.get(key), int) or spec[key] < 1:
            raise CompositionError(f"the layout file {path} needs a positive integer {key!r}.")
    checks = {"placement": ("pre", "parallel", "post"), "norm": ("layernorm", "rmsnorm"), "activation": _ACTS,
              "matrix_order": ("out-in", "in-out"), "qkv_order": ("blocks", "per-head")}
    for key, allowed in checks.items():
        if key in spec and spec[key] not in allowed:
            raise CompositionError(f"the layout file {path} gives {key} {spec[key]!r}; allowed: {', '.join(allowed)}.")
    rot = spec.get("rotary")
    if rot is not None and (not isinstance(rot, dict) or not isinstance(rot.get("dims"), int)
                            or rot.get("style", "split-half") not in STYLES):
        raise CompositionError(f"the layout file {path} needs rotary as {{\"dims\": N, \"style\": "
                               f"\"split-half\"|\"interleaved\", \"base\": B}}.")
    from ._build import _positive_int, positive_float

    for key in ("kv_heads", "head_dim"):
        if spec.get(key) is not None:
            _positive_int(spec[key], f"the layout file {path}: {key}")
    for key in ("norm_eps", "attention_scale"):
        if spec.get(key) is not None or key in spec:
            positive_float(spec[key], f"the layout file {path}: {key}")
    if rot is not None:
        _positive_int(rot["dims"], f"the layout file {path}: rotary.dims")
        if "base" in rot:
            positive_float(rot["base"], f"the layout file {path}: rotary.base")
    if isinstance(spec.get("family"), (dict, list)):
        raise CompositionError(f"the layout file {path}: family = {spec['family']!r} is not a string.")
    spec["_path"] = str(path)
    return spec


def read(src: TensorSource, config: dict, spec: dict) -> Weights:
    """Canonical weights from a checked layout ``spec`` (see :func:`read_layout`)."""
    path = spec["_path"]
    t = spec["tensors"]
    L, H = spec["layers"], spec["heads"]
    kv = int(spec.get("kv_heads") or H)
    for key, template in t.items():
        for name in ([template.format(i=i) for i in range(L)] if "{i}" in template else [template]):
            if not src.has(name):
                raise CompositionError(f"the layout file {path} names tensor {name} ({key}), which {src.path} does not hold.")
    V, d = src.shape(t["embed"])
    dh = int(spec.get("head_dim") or (d // H))
    if H % kv or dh * H <= 0:
        raise CompositionError(f"the layout file {path} gives {H} heads and {kv} key/value heads, which do not fit.")
    out_in = spec.get("matrix_order", "out-in") == "out-in"
    eps = float(spec.get("norm_eps", 1e-5))
    kind = spec.get("norm", "layernorm")
    act = spec.get("activation", "gelu")

    def mat(name, n_in, n_out):  # -> [n_in, n_out] in x @ W orientation
        w = src.get(name, (n_out, n_in) if out_in else (n_in, n_out))
        return w.T.contiguous() if out_in else w

    def vec(key, i, n):
        return src.get(t[key].format(i=i), (n,)) if key in t else torch.zeros(n)

    def norm(wkey, bkey, i=0):
        weight = src.get(t[wkey].format(i=i), (d,))
        bias = src.get(t[bkey].format(i=i), (d,)) if (bkey in t and kind == "layernorm") else None
        return Norm(kind, weight, bias, eps)

    def heads(w, n):  # [d, n*dh] -> [n, d, dh]
        return w.reshape(d, n, dh).permute(1, 0, 2).contiguous()

    def load_layer(i: int) -> Layer:
        if "qkv" in t:
            w = mat(t["qkv"].format(i=i), d, (H + 2 * kv) * dh)  # [d, (H+2kv) dh]
            b = vec("qkv_bias", i, (H + 2 * kv) * dh)  # [(H+2kv) dh]
            if spec.get("qkv_order", "blocks") == "per-head":
                if kv != H:
                    raise CompositionError(f"the layout file {path} asks for per-head fused QKV with grouped keys.")
                w4 = w.reshape(d, H, 3, dh)  # [d, H, 3, dh]
                b3 = b.reshape(H, 3, dh)
                Wq, Wk, Wv = (w4[:, :, j].permute(1, 0, 2).contiguous() for j in range(3))  # [H, d, dh]
                bq, bk, bv = (b3[:, j].contiguous() for j in range(3))  # [H, dh]
            else:
                cuts = (0, H * dh, (H + kv) * dh, (H + 2 * kv) * dh)
                Wq, Wk, Wv = (heads(w[:, cuts[j]:cuts[j + 1]], n) for j, n in enumerate((H, kv, kv)))
                bq, bk, bv = (b[cuts[j]:cuts[j + 1]].reshape(n, dh) for j, n in enumerate((H, kv, kv)))
        else:
            Wq = heads(mat(t["q"].format(i=i), d, H * dh), H)  # [H, d, dh]
            Wk = heads(mat(t["k"].format(i=i), d, kv * dh), kv)  # [kv, d, dh]
            Wv = heads(mat(t["v"].format(i=i), d, kv * dh), kv)
            bq = vec("q_bias", i, H * dh).reshape(H, dh)
            bk = vec("k_bias", i, kv * dh).reshape(kv, dh)
            bv = vec("v_bias", i, kv * dh).reshape(kv, dh)
        Wk, Wv, bk, bv = (expand_kv(x, H) for x in (Wk, Wv, bk, bv))  # [H, ...]
        W_O = mat(t["o"].format(i=i), H * dh, d).reshape(H, dh, d).contiguous()  # [H, dh, d]
        attn = Attention(Wq, Wk, Wv, W_O, bq, bk, bv, vec("o_bias", i, d), kv_heads=kv)
        m = src.shape(t["mlp_in"].format(i=i))[0 if out_in else 1]
        mlp = MLP(
            W_in=mat(t["mlp_in"].format(i=i), d, m), b_in=vec("mlp_in_bias", i, m),
            W_out=mat(t["mlp_out"].format(i=i), m, d), b_out=vec("mlp_out_bias", i, d),
            activation=act,
            W_gate=mat(t["mlp_gate"].format(i=i), d, m) if "mlp_gate" in t else None,
            b_gate=vec("mlp_gate_bias", i, m) if "mlp_gate_bias" in t else None,
        )
        return Layer(norm("attn_norm_weight", "attn_norm_bias", i), attn,
                     norm("mlp_norm_weight", "mlp_norm_bias", i), mlp)

    W_E = src.get(t["embed"], (V, d))  # [V, d]
    W_pos = None
    if "positions" in t:
        W_pos = src.get(t["positions"], (src.shape(t["positions"])[0], d))  # [P, d]
    if "unembed" in t:
        W_U = mat(t["unembed"], d, V)  # [d, V]
        readout = "tied" if torch.equal(W_U.T, W_E) else "lm-head"
    else:
        W_U, readout = W_E.T.contiguous(), "tied"  # [d, V]
    final = norm("final_norm_weight", "final_norm_bias") if "final_norm_weight" in t else Norm("identity", None, None)
    embed_norm = norm("embed_norm_weight", "embed_norm_bias") if "embed_norm_weight" in t else None
    W_type = src.get(t["token_type"], (src.shape(t["token_type"])[0], d))[0].contiguous() if "token_type" in t else None
    rotary = None
    if spec.get("rotary"):
        r = spec["rotary"]
        if not 2 <= r["dims"] <= dh:
            raise CompositionError(f"the layout file {path} gives rotary dims {r['dims']}, outside 2..{dh}.")
        rotary = Rotary(dims=r["dims"], style=r.get("style", "split-half"),
                        inv_freq=inverse_frequencies(r["dims"], float(r.get("base", 10000.0)), r.get("scaling")),
                        scaling=str((r.get("scaling") or {}).get("rope_type", "default")))
    return Weights(
        family=str(spec.get("family", "custom layout")),
        W_E=W_E, W_pos=W_pos, W_U=W_U, final_norm=final,
        layers=LazyLayers(L, load_layer),
        placement=spec.get("placement", "pre"),
        attn_scale=spec.get("attention_scale"),
        rotary=rotary,
        embed_norm=embed_norm,
        W_type=W_type,
        readout=readout,
        notes=(f"tensor names from the layout file {path}.",),
        source=str(src.path),
        config=dict(config),
    )
