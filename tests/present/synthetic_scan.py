"""A synthetic sampled scan file of an L x H model, written through composition's store API
(not collected by pytest): random statistics with a few labelled pairs and heads, for the
report's scale tests and screenshots. Invented numbers, no model behind them.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from composition.store import schema
from composition.store.scanfile import CAUTION, FORMAT_NAME, FORMAT_VERSION, empty_pairs, write_scan

K = (1, 10)
BINS = 20


def write_synthetic_scan(path: Path, L: int = 12, H: int = 12, V: int = 4096, rows: int = 2000,
                         seed: int = 0) -> Path:
    """A complete sampled (``--rows rows --seed 7``) scan of every pair, with /heads and /model_space."""
    import h5py

    from composition.interpret.heads import _write_groups

    rng = np.random.default_rng(seed)
    arrays = empty_pairs(L, H, len(K), BINS)
    done = np.zeros((L, H, L, H), bool)
    for l in range(L - 1):
        done[l, :, l + 1:, :] = True
    idx = tuple(np.argwhere(done).T)
    P = int(done.sum())
    mean = 0.5 + rng.normal(0, 0.01, P)
    planted = rng.choice(P, 40, replace=False)
    mean[planted] = rng.choice([0.2, 0.8], 40) + rng.normal(0, 0.05, 40)
    mean[planted[0]] = 0.999  # one outlier
    half = 0.5 * 1.96 * np.sqrt(1 / 12 / rows)
    top = np.empty((P, len(K)))
    bottom = np.empty((P, len(K)))
    for j, k in enumerate(K):
        p_top = np.clip(k / V * np.exp(6 * (mean - 0.5)), 0, 1)
        p_bot = np.clip(k / V * np.exp(-6 * (mean - 0.5)), 0, 1)
        top[:, j] = rng.binomial(rows, p_top) / rows
        bottom[:, j] = rng.binomial(rows, p_bot) / rows
    arrays["done"][...] = done
    arrays["mean_percentile"][idx] = mean
    mean = np.clip(mean, 0.0, 1.0)
    arrays["mean_percentile"][idx] = mean
    arrays["mean_ci_low"][idx] = np.clip(mean - half, 0.0, 1.0)
    arrays["mean_ci_high"][idx] = np.clip(mean + half, 0.0, 1.0)
    arrays["top_share"][idx] = top
    arrays["bottom_share"][idx] = bottom
    for name, share in (("ci", top), ("bottom_ci", bottom)):  # Wilson-like width, invented
        w = 1.96 * np.sqrt((share * (1 - share) + 1 / rows) / rows)
        arrays[f"{name}_low"][idx] = np.clip(share - w, 0, 1)
        arrays[f"{name}_high"][idx] = np.clip(share + w + 2 / rows, 0, 1)
    centres = (np.arange(BINS) + 0.5) / BINS
    weights = np.exp(8 * (mean[:, None] - 0.5) * (centres[None, :] - 0.5))  # [P, bins]
    arrays["histogram"][idx] = np.stack([rng.multinomial(rows, w / w.sum()) for w in weights])
    arrays["rows_evaluated"][idx] = rows
    p = np.clip(np.exp(-((mean - 0.5) / 0.005) ** 2 / 2), 1e-300, 1)
    arrays["p_value"][idx] = p
    arrays["q_value"][idx] = np.clip(p * P / (np.argsort(np.argsort(p)) + 1), 0, 1)
    arrays["label"][idx] = np.where(arrays["q_value"][idx] <= 0.05,
                                    np.sign(mean - 0.5) * (np.abs(mean - 0.5) >= 0.05), 0).astype(np.int8)
    arrays["write_fraction"][idx] = 1.0
    options = {"table": "attn0-mlp0", "k": list(K), "fdr": 0.05, "min_effect": 0.05, "rows": rows, "seed": 7,
               "until_ci": None, "row_order": "numpy.random.default_rng(seed).permutation(V)"}
    attrs = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "tool_version": "synthetic",
             "created": "2026-01-01T00:00:00+00:00", "checkpoint": f"synthetic-{L}x{H}", "family": "synthetic",
             "vocab_size": V, "keys_per_row": V, "n_layers": L, "n_heads": H, "d_model": 64 * H, "d_head": 64,
             "side": "query", "query_part": "full", "table": "attn0-mlp0", "position": "none",
             "orientation": "row", "k": list(K), "fdr": 0.05, "min_effect": 0.05, "histogram_bins": BINS,
             "writers": "all", "responders": "all", "pairs_selected": P, "options": json.dumps(options),
             "weights_fingerprint": "synthetic", "fingerprint": "synthetic", "label_fill": -128,
             "caution": CAUTION, "status": "complete"}
    write_scan(path, attrs, arrays)

    heads = schema.empty("heads", L, H, len(K), BINS)  # every dataset the store's schema declares
    heads.update({"mean_percentile": 0.5 + rng.normal(0, 0.05, (L, H)),
             "top_share": rng.uniform(0, 0.01, (L, H, len(K))), "bottom_share": rng.uniform(0, 0.01, (L, H, len(K))),
             "histogram": rng.integers(0, 100, (L, H, BINS)), "rows_evaluated": np.full((L, H), V),
             "p_value": rng.uniform(0, 1, (L, H)), "eigen_copying_score": rng.uniform(-1, 1, (L, H)),
             "done": np.ones((L, H), bool)})
    heads["mean_percentile"][rng.random((L, H)) < 0.3] = 0.85
    heads["mean_percentile"][rng.random((L, H)) < 0.2] = 0.15
    heads["q_value"] = np.where(np.abs(heads["mean_percentile"] - 0.5) > 0.2, 1e-5, 0.5)
    heads["label"] = np.where(heads["q_value"] < 0.05, np.sign(heads["mean_percentile"] - 0.5), 0).astype(np.int8)
    heads_attrs = {"table": "attn0-mlp0", "position": "none", "k": json.dumps(list(K)), "fdr": 0.05,
                   "min_effect": 0.05, "keys_per_row": V, "histogram_bins": BINS, "weights_fingerprint": "synthetic",
                   "label_fill": -128}
    ms = schema.empty("model_space", L, H, len(K), BINS)
    ms.update(write_dim=np.full((L, H), 64), done=np.ones(L, bool))
    for kind in ("q", "k", "v"):
        ms[f"read_dim_{kind}"] = np.full((L, H), 64)
        c = np.full((L, H, L, H), np.nan)
        c[idx] = np.abs(rng.normal(0.125, 0.02, P))
        c[idx[0][5], idx[1][5], idx[2][5], idx[3][5]] = 0.9  # one outlier washes out a linear scale
        ms[f"{kind}_composition"] = c
        r = np.full((L, H, L, H), np.nan)
        r[idx] = 64 * 64 / (64 * H)
        ms[f"kernel_random_mean_{kind}"] = r
        pk = np.full((L, H, L, H), np.nan)
        pk[idx] = r[idx] * np.exp(rng.normal(0, 0.3, P))
        ms[f"projection_kernel_{kind}"] = pk
    ms_attrs = {"baseline_draws": 200, "baseline_seed": 0}
    for kind in ("q", "k", "v"):
        ms_attrs[f"baseline_{kind}_mean"] = 0.125
        ms_attrs[f"baseline_{kind}_sd"] = 0.01
    with h5py.File(path, "a") as f:
        _write_groups(f, heads, heads_attrs, ms, ms_attrs)
    return Path(path)
