"""Reference writers: what a responder does with a generic write of the token (docs/groups.md).

A pair's statistic says how the responder ranks the written token when *this* writer writes it.
A responder whose own query-key circuit prefers a token's own key ranks the diagonal high under
almost any write that carries the token. Three reference writes, each put through the same
query side as a real writer (docs/methods.md §3, row-vector form, factors never held whole), tell a
specific composition from a generic one:

* ``identity``: the token table row itself, ``q(t) = T[t] Lin(N_lR) W_Q^R [M]`` (docs/methods.md §3 with
  ``o_U(t)`` replaced by ``T[t]``): the responder's own preference for the token's key. In a
  post-norm model the table is the residual the layer reads and ``N_lR`` is the identity there.
* ``unembedding``: the token's effective unembedding direction, normalised, written into the
  query: ``q(t) = u_t Lin(path) W_Q^R [M]`` with ``u_t = Lin(N_f) W_U[:, t] / |.|`` (docs/methods.md §3b):
  does the responder attend to a token the residual stream predicts? The path is that of a write
  from layer ``l_R - 1`` (it matters only for post-norm models).
* ``random``: a null band. Each draw takes a donor head of an earlier layer, the SVD of its OV
  matrix ``W_V W_O = U S V^T`` (``U, V`` ``[d, dh]``), and replaces ``U`` and ``V`` by
  independent Haar-random orthonormal ``[d, dh]`` frames, keeping the singular values ``S``:
  a writer with the spectrum of the model's own heads and no relation to any token. Its
  factors are ``A = N_l(T) U~`` ``[V, dh]`` and ``C = S V~^T Lin(path) W_Q^R [M]``. The band is
  the 5th-95th percentile of the statistic over the draws; the draw count and seed are recorded.

The keys are the responder's own, ``K_R = N_lR(T) W_K^R``, as for every pair. How a pair's
statistic is set against these references (:func:`standing`) is defined in docs/groups.md.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

from ..errors import CompositionError
from ..extract.tables import apply_norm, norm_linear_part
from ..extract.weights import Weights
from .factors import input_norm, residual_path, unembed_directions, unembed_queries

REFERENCES = ("identity", "unembedding", "random")
DEFAULT_DRAWS = 39  # with 39 draws the 2nd and 38th order statistics bound a 90 % band: (38 - 2) / 40
DEFAULT_SEED = 0
BAND = (0.05, 0.95)  # quantiles of the draws that bound the random band

Head = tuple[int, int]


def identity_queries(w: Weights, table: torch.Tensor, layer: int, rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``T Lin(N_l) W_Q [M]`` for every head of ``layer``: the table row itself as the write. # table [V, d] -> [H, V, dh]"""
    lin = norm_linear_part(input_norm(w, layer), w.d_model)  # [d, d]
    W_Q = w.layers[layer].attn.W_Q.double()  # [H, d, dh]
    out = torch.einsum("vd,hde->hve", table.double() @ lin, W_Q)  # [H, V, dh]
    return out @ rotation.double() if rotation is not None else out


def unembedding_queries(w: Weights, layer: int, rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``u_t Lin(path) W_Q [M]`` for every head of ``layer``: a unit write along each token's unembedding direction.

    # -> [H, V, dh]; the path is that of a write from layer ``layer - 1``.
    """
    if layer < 1:
        raise CompositionError("a responder in layer 0 has no earlier write to compare with.")
    return unembed_queries(w, unembed_directions(w, layer - 1), layer - 1, layer, rotation=rotation)


@dataclass(frozen=True)
class RandomWriter:
    """One draw of the random band: a donor head's singular values on random singular vectors."""

    donor: Head  # the head whose singular values the draw keeps
    read: torch.Tensor  # U~               [d, dh] random left singular vectors
    values: torch.Tensor  # A = N_l(T) U~   [V, dh]
    out: torch.Tensor  # S V~^T            [dh, d]: the write is ``values @ out``


def haar_frame(d: int, k: int, rng: np.random.Generator) -> np.ndarray:
    """A Haar-random ``[d, k]`` orthonormal frame (QR of a Gaussian matrix, signs fixed by R's diagonal).

    Mezzadri 2007, "How to generate random matrices from the classical compact groups". # -> [d, k]
    """
    q, r = np.linalg.qr(rng.standard_normal((d, k)))
    return q * np.sign(np.diag(r))[None, :]


def random_writers(w: Weights, table: torch.Tensor, responder_layer: int, draws: int = DEFAULT_DRAWS,
                   seed: int = DEFAULT_SEED) -> list[RandomWriter]:
    """The random band's writers for responders of ``responder_layer``: draws ``0 .. draws-1``. # table [V, d]"""
    if draws < 2:
        raise CompositionError("the random band needs at least 2 draws.")
    return [random_writer(w, table, responder_layer, i, seed) for i in range(int(draws))]


def random_writer(w: Weights, table: torch.Tensor, responder_layer: int, draw: int,
                  seed: int = DEFAULT_SEED) -> RandomWriter:
    """Draw number ``draw`` of the random band for ``responder_layer``, reproducible on its own from
    ``(seed, responder_layer, draw)`` (a work unit can recompute one draw). The donor is drawn uniformly
    from the heads of earlier layers. # table [V, d] -> values [V, dh], out [dh, d]"""
    if responder_layer < 1:
        raise CompositionError("a responder in layer 0 has no earlier head to draw a random writer from.")
    rng = np.random.default_rng([int(seed), int(responder_layer), int(draw)])
    donor = (int(rng.integers(responder_layer)), int(rng.integers(w.n_heads)))
    attn = w.layers[donor[0]].attn
    S = torch.linalg.svdvals(attn.W_V[donor[1]].double() @ attn.W_O[donor[1]].double())[: w.d_head]  # [dh]
    U, V = (torch.from_numpy(haar_frame(w.d_model, w.d_head, rng)) for _ in range(2))  # [d, dh] each
    values = _normed(w, table, donor[0]) @ U  # [V, dh]
    return RandomWriter(donor, U, values, S[:, None] * V.T)  # [V, dh], [dh, d]


def _normed(w: Weights, table: torch.Tensor, layer: int) -> torch.Tensor:
    """``N_l(T)`` as the writer values see it. # [V, d] -> [V, d]"""
    return apply_norm(input_norm(w, layer), table.double())


def random_middles(w: Weights, writer: RandomWriter, responder_layer: int,
                   rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``S V~^T Lin(path) W_Q^R [M]`` for every responder head of a layer. # -> [H_R, dh, dh]"""
    lin = residual_path(w, writer.donor[0], responder_layer)  # [d, d]
    W_Q = w.layers[responder_layer].attn.W_Q.double()  # [H, d, dh]
    out = torch.einsum("ed,df,hfg->heg", writer.out, lin, W_Q)  # [H, dh, dh]
    return out @ rotation.double() if rotation is not None else out


def band(draw_values: np.ndarray, quantiles=BAND) -> tuple[np.ndarray, np.ndarray]:
    """The random band: the given quantiles of a statistic over the draws (last axis). # [..., draws] -> [...], [...]

    Quantiles at plotting positions ``p (n + 1)`` (NumPy's ``weibull`` method): with n = 39 draws the band
    is the 2nd to 38th order statistic, and a new draw falls inside it with probability exactly
    ``(38 - 2) / (n + 1) = 0.9`` (the order statistics of n exchangeable draws cut the line into n + 1
    equally likely gaps). Linear interpolation would cover only ``0.9 (n - 1) / (n + 1)``.
    """
    lo, hi = np.quantile(np.asarray(draw_values, dtype=np.float64), quantiles, axis=-1, method="weibull")
    return lo, hi


def standing(pair_value, identity, unembedding, draw_values) -> dict[str, np.ndarray]:
    """How far a pair stands above (or below) what its responder does with a generic write (docs/groups.md).

    # pair_value [...] (a pair's mean percentile), identity, unembedding [...] (its responder's reference
    # values), draw_values [..., draws] (the responder's random draws) -> dict of [...]
    * ``above_identity = pair - identity``, ``above_unembedding = pair - unembedding``;
    * ``random_z = (pair - mean(draws)) / sd(draws)`` (sd with ddof=1);
    * ``band_low``, ``band_high``: the random band; ``outside_band``: +1 above it, -1 below, 0 inside;
    * ``above_generic``: the pair minus the larger of its identity and unembedding references when it lies
      above 1/2, minus the smaller when below: the part of its distance from the null that no generic write
      of the token explains (0 when a generic write goes as far).
    """
    pair = np.asarray(pair_value, dtype=np.float64)
    ident, unemb = np.asarray(identity, dtype=np.float64), np.asarray(unembedding, dtype=np.float64)
    draws = np.asarray(draw_values, dtype=np.float64)
    lo, hi = band(draws)
    sd = draws.std(axis=-1, ddof=1)
    z = (pair - draws.mean(axis=-1)) / np.where(sd > 0, sd, np.nan)
    up = np.maximum(ident, unemb)
    down = np.minimum(ident, unemb)
    generic = np.where(pair >= 0.5, np.maximum(pair - np.maximum(up, 0.5), 0.0),
                       np.minimum(pair - np.minimum(down, 0.5), 0.0))
    return {"above_identity": pair - ident, "above_unembedding": pair - unemb, "random_z": z,
            "band_low": lo, "band_high": hi, "outside_band": np.where(pair > hi, 1, np.where(pair < lo, -1, 0)),
            "above_generic": generic}


def reference_statistics(w: Weights, table: torch.Tensor, responder_layer: int, ks=(1, 5, 10),
                         draws: int = DEFAULT_DRAWS, seed: int = DEFAULT_SEED,
                         rotation: torch.Tensor | None = None, precision: str = "fp32") -> dict:
    """Every reference of every head of ``responder_layer``, query side, row orientation, all rows.

    # -> {"identity": [H] PairStats, "unembedding": [H] PairStats, "random": [draws][H] PairStats,
    #     "donors": [draws] heads, "draws": int, "seed": int}
    The maths reference for the scan driver, which computes the same factors in work units.
    """
    from ..score.ranks import diagonal_midranks, prepare_right
    from ..score.stats import summarise_many
    from .factors import responder_keys

    K = responder_keys(w, table, responder_layer)  # [H, V, dh]
    H, V = K.shape[0], K.shape[1]
    rights = [prepare_right(K[h], precision) for h in range(H)]

    def stats(lefts):
        return summarise_many([diagonal_midranks(l, r, precision=precision).numpy() for l, r in zip(lefts, rights)],
                              V, ks)

    ident = stats(list(identity_queries(w, table, responder_layer, rotation)))
    unemb = stats(list(unembedding_queries(w, responder_layer, rotation)))
    writers = random_writers(w, table, responder_layer, draws, seed)
    rand = [stats([rw.values @ m for m in random_middles(w, rw, responder_layer, rotation)]) for rw in writers]
    return {"identity": ident, "unembedding": unemb, "random": rand, "donors": [rw.donor for rw in writers],
            "draws": int(draws), "seed": int(seed)}


__all__ = ["REFERENCES", "DEFAULT_DRAWS", "DEFAULT_SEED", "BAND", "identity_queries", "unembedding_queries",
           "RandomWriter", "haar_frame", "random_writer", "random_writers", "random_middles", "band", "standing",
           "reference_statistics"]
