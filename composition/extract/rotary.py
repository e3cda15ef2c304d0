"""Rotary position embeddings as row-vector matrices (docs/methods.md §3, "Rotary positions").

Rotary position embedding: Su et al. 2021, "RoFormer: Enhanced Transformer with Rotary
Position Embedding", §3.4. A rotary head rotates each pair ``(a, b)`` of its first ``dims``
query and key dimensions by the angle ``pos * theta_i``; in row-vector form
``rot(x, p) = x R(p)`` with, on the pair,

    R(p)[a, a] = cos(p theta)   R(p)[a, b] = sin(p theta)
    R(p)[b, a] = -sin(p theta)  R(p)[b, b] = cos(p theta)

and the identity on the other dimensions. Because ``R(i) R(j)^T = R(i - j)``, the score of a
destination at position ``i`` against a source at ``j`` is ``q M(delta) k^T`` with
``M(delta) = R(delta)`` and ``delta = i - j >= 0``. Pairs are ``(i, i + dims/2)``
(``split-half``: the GPT-NeoX and Llama convention) or ``(2i, 2i + 1)`` (``interleaved``:
the GPT-J convention).

``mean_rotation(A, B)`` is the uniform average of ``M(delta)`` over ``delta`` in ``[A, B]``: on
every pair a 2x2 block ``[[c, s], [-s, c]]`` with ``c, s`` the mean cosine and sine, a
scaled rotation, folded into the query side's middle factor.

Frequencies follow the config: ``theta_i = base^(-2i/dims)`` computed in float32 as the
reference implementation does, then the config's scaling: ``linear`` (divide by the
factor) or ``llama3`` (divide the low frequencies by the factor, keep the high ones, blend
between; Meta 2024, "The Llama 3 Herd of Models", §3.2 and its released code). Other
scalings are recorded but refused as soon as an offset other than 0 is asked for.
"""

from __future__ import annotations

import math

import torch

from ..errors import CompositionError
from .weights import Rotary

STYLES = ("split-half", "interleaved")
SCALINGS = ("default", "linear", "llama3")
_CHUNK = 1 << 16  # offsets summed per step when averaging


def inverse_frequencies(dims: int, base: float, scaling: dict | None = None) -> torch.Tensor:
    """``theta_i`` for the ``dims // 2`` pairs, scaling applied. # -> [dims // 2] float32"""
    from ._build import positive_float

    positive_float(base, "the config's rotary base (rope_theta / rotary_emb_base)")
    if dims < 2 or dims % 2:
        raise CompositionError(f"the rotary width {dims} is not a positive even number.")
    inv = 1.0 / (base ** (torch.arange(0, dims, 2, dtype=torch.int64).to(torch.float32) / dims))  # [dims/2]
    kind = _scaling_kind(scaling)
    if kind == "linear":
        inv = inv / float(_need(scaling, "factor"))
    elif kind == "llama3":
        inv = _llama3(inv, scaling)
    if not torch.isfinite(inv).all() or not (inv > 0).all():
        raise CompositionError(f"the rotary base {base!r} (with its scaling) gives frequencies that are not finite "
                               "and positive; check the config's rope_theta / rotary_emb_base and rope_scaling.")
    return inv


def rotary_from_config(config: dict, head_dim: int, style: str = "split-half",
                       default_fraction: float = 1.0) -> Rotary:
    """The rotary settings a config describes, in either its nested or its older flat form.

    Reads ``rope_parameters`` (``rope_theta``, ``rope_type``, ``partial_rotary_factor``,
    scaling keys) or the flat keys ``rope_theta``/``rotary_emb_base``, ``rope_scaling``,
    ``partial_rotary_factor``/``rotary_pct``, ``rotary_dim``.
    """
    if style not in STYLES:
        raise CompositionError(f"rotary style {style!r} is not one of: {', '.join(STYLES)}.")
    params = config.get("rope_parameters")
    if params is not None and not isinstance(params, dict):
        raise CompositionError("the config's rope_parameters is not a JSON object.")
    params = dict(params or {})
    if params and all(isinstance(v, dict) for v in params.values()):
        raise CompositionError("the config gives different rotary settings per layer type, which this tool does not read.")
    scaling = config.get("rope_scaling")
    if isinstance(scaling, dict):
        params = {**scaling, **params}
    base = params.get("rope_theta", config.get("rope_theta", config.get("rotary_emb_base", 10000.0)))
    fraction = params.get("partial_rotary_factor", config.get("partial_rotary_factor", config.get("rotary_pct")))
    from ._build import positive_float

    base = positive_float(base, "the config's rotary base (rope_theta / rotary_emb_base)")
    if fraction is not None:
        fraction = positive_float(fraction, "the config's partial_rotary_factor / rotary_pct")
    if config.get("rotary_dim") is not None:
        dims = int(config["rotary_dim"])
    else:
        dims = int(head_dim * float(default_fraction if fraction is None else fraction))
    if not 2 <= dims <= head_dim:
        raise CompositionError(f"the config's rotary width {dims} does not fit the head width {head_dim}.")
    kind = str(params.get("rope_type", params.get("type", "default")) or "default")
    unsupported = None
    if kind not in SCALINGS:
        unsupported = (f"the config's rotary scaling {kind!r} is not supported (supported: linear, llama3), "
                       "so only --rotary-offset 0 can be computed.")
        inv = inverse_frequencies(dims, float(base))
    else:
        if kind == "llama3":
            params.setdefault("original_max_position_embeddings", config.get("max_position_embeddings"))
        inv = inverse_frequencies(dims, float(base), {**params, "rope_type": kind})
    return Rotary(dims=dims, style=style, inv_freq=inv, scaling=kind, unsupported=unsupported)


def pair_indices(rotary: Rotary) -> tuple[torch.Tensor, torch.Tensor]:
    """The two index lists ``a``, ``b`` of the rotated pairs. # -> [dims/2], [dims/2]"""
    half = rotary.dims // 2
    i = torch.arange(half)
    if rotary.style == "split-half":
        return i, i + half
    if rotary.style == "interleaved":
        return 2 * i, 2 * i + 1
    raise CompositionError(f"rotary style {rotary.style!r} is not one of: {', '.join(STYLES)}.")


def rotation(rotary: Rotary, d_head: int, delta: int) -> torch.Tensor:
    """``M(delta)``, the row-vector rotation of a relative offset. # -> [dh, dh] float64"""
    return mean_rotation(rotary, d_head, delta, delta)


def mean_rotation(rotary: Rotary, d_head: int, first: int, last: int) -> torch.Tensor:
    """The uniform average of ``M(delta)`` over ``delta`` in ``[first, last]``. # -> [dh, dh] float64"""
    first, last = int(first), int(last)
    if first < 0 or last < first:
        raise CompositionError(f"rotary offsets {first}:{last} must satisfy 0 <= A <= B.")
    if (first, last) != (0, 0) and rotary.unsupported:
        raise CompositionError(rotary.unsupported)
    theta = rotary.inv_freq.double()  # [dims/2]
    c = torch.zeros_like(theta)
    s = torch.zeros_like(theta)
    for start in range(first, last + 1, _CHUNK):
        delta = torch.arange(start, min(start + _CHUNK, last + 1), dtype=torch.float64)  # [n]
        angle = delta[:, None] * theta[None, :]  # [n, dims/2]
        c += torch.cos(angle).sum(0)
        s += torch.sin(angle).sum(0)
    n = last - first + 1
    c, s = c / n, s / n
    a, b = pair_indices(rotary)
    M = torch.eye(d_head, dtype=torch.float64)
    M[a, a] = c
    M[b, b] = c
    M[a, b] = s
    M[b, a] = -s
    return M


def describe(rotary: Rotary | None, d_head: int) -> str:
    """One line for ``inspect``: width, style, base frequency and scaling."""
    if rotary is None:
        return "none"
    text = (f"{rotary.dims} of {d_head} head dimensions, {rotary.style} pairs, "
            f"theta_0 {float(rotary.inv_freq[0]):.6g} .. theta_last {float(rotary.inv_freq[-1]):.6g}, "
            f"scaling {rotary.scaling}")
    if rotary.unsupported:
        text += " (unsupported: only offset 0)"
    return text


def _scaling_kind(scaling: dict | None) -> str:
    if not scaling:
        return "default"
    kind = str(scaling.get("rope_type", scaling.get("type", "default")) or "default")
    if kind not in SCALINGS:
        raise CompositionError(f"rotary scaling {kind!r} is not supported (supported: linear, llama3).")
    return kind


def _need(scaling: dict, key: str):
    if scaling.get(key) is None:
        raise CompositionError(f"the config's rotary scaling lacks its {key!r} entry.")
    return scaling[key]


def _llama3(inv: torch.Tensor, scaling: dict) -> torch.Tensor:
    """Llama 3.1 frequency scaling. # inv [dims/2] -> [dims/2]"""
    factor = float(_need(scaling, "factor"))
    low = float(_need(scaling, "low_freq_factor"))
    high = float(_need(scaling, "high_freq_factor"))
    old = float(_need(scaling, "original_max_position_embeddings"))
    low_wavelen, high_wavelen = old / low, old / high
    wavelen = 2 * math.pi / inv
    out = torch.where(wavelen > low_wavelen, inv / factor, inv)
    smooth = (old / wavelen - low) / (high - low)
    smoothed = (1 - smooth) * out / factor + smooth * out
    medium = ~(wavelen < high_wavelen) & ~(wavelen > low_wavelen)
    return torch.where(medium, smoothed, out)


def offsets_rotation(w, offsets: tuple[int, int] | None) -> torch.Tensor | None:
    """The matrix folded into the query side for ``--rotary-offset(s)``. # -> [dh, dh] or None

    Non-rotary models refuse offsets. Rotary models default to ``delta = 0`` (no rotation):
    None is returned for ``0:0`` so the numbers equal those of an unrotated query.
    """
    if w.rotary is None:
        if offsets is not None:
            raise CompositionError(
                f"--rotary-offset/--rotary-offsets apply only to models with rotary positions; "
                f"{w.source or 'this checkpoint'} ({w.family}) has none."
            )
        return None
    first, last = (0, 0) if offsets is None else (int(offsets[0]), int(offsets[1]))
    if first < 0 or last < first:
        raise CompositionError(f"--rotary-offsets {first}:{last} must satisfy 0 <= A <= B.")
    if (first, last) == (0, 0):
        return None
    return mean_rotation(w.rotary, w.d_head, first, last)
