"""The report's CSV tables: every pair table carries integer ``writer_layer, writer_head,
responder_layer, responder_head`` and every head table integer ``layer, head`` beside the
``layer.head`` label strings (a label like ``1.10`` reads as the float 1.1 in pandas), and
every pair table carries ``rows_evaluated`` and the share intervals.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ...interpret.heads import MODEL_SPACE_SCORES, HeadData
from ...interpret.predict import Candidate, pair_table, shortlist_rows
from ...store.scanfile import Scan
from .csvfiles import write_csv

PAIR_IDS = ("writer_layer", "writer_head", "responder_layer", "responder_head")
INTERVALS = ("ci_low", "ci_high", "bottom_ci_low", "bottom_ci_high")  # [..., nk] share intervals


def _split(label: str) -> tuple[int, int]:
    """A head label ``L.H`` as integers; a writer group's NAME as ``(-1, -1)`` (docs/groups.md)."""
    layer, _, head = str(label).partition(".")
    if not (layer.isdigit() and head.isdigit()):
        return -1, -1
    return int(layer), int(head)


def with_pair_ids(rows: list[dict], writer: str = "writer", responder: str = "responder") -> list[dict]:
    """Rows with integer writer/responder layer and head columns first (from the label strings)."""
    out = []
    for r in rows:
        (wl, wh), (rl, rh) = _split(r[writer]), _split(r[responder])
        ids = dict(zip(PAIR_IDS, (wl, wh, rl, rh)))
        out.append({**ids, **{k: v for k, v in r.items() if k not in ids}})
    return out


def _ids_first(table: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {**{k: table[k] for k in PAIR_IDS}, **{k: v for k, v in table.items() if k not in PAIR_IDS}}


def pairs_columns(scan: Scan, heads: HeadData) -> dict[str, np.ndarray]:
    """``pair_table`` plus the share intervals per k (``ci_low_10`` ...) when it lacks them."""
    table = pair_table(scan, heads)
    sel = tuple(np.argwhere(scan.done).T)
    for name in INTERVALS:
        for j, k in enumerate(scan.k):
            col = f"{name}_{int(k)}"
            if col not in table and name in scan.arrays:
                table[col] = scan.arrays[name][sel][:, j]
    return _ids_first(table)


def write_tables(scan: Scan, heads: HeadData, candidates: list[Candidate], out: Path,
                 sampling_row: dict) -> dict[str, Path]:
    """Write every CSV table of the report into ``out``; return {name: path}."""
    tables = {}
    pt = pairs_columns(scan, heads)
    tables["pairs"] = write_csv(out / "pairs.csv", pt)
    tables["heads"] = write_csv(out / "heads.csv", heads.table())
    ms = heads.model_space
    idx = np.argwhere(np.isfinite(ms["q_composition"]))  # [P, 4]
    sel = tuple(idx.T)
    mst = dict(zip(PAIR_IDS, idx.T))
    mst["writer"] = np.array([f"{a}.{b}" for a, b in idx[:, :2]])
    mst["responder"] = np.array([f"{a}.{b}" for a, b in idx[:, 2:]])
    for name in MODEL_SPACE_SCORES:
        mst[name] = ms[name][sel]
    tables["model_space"] = write_csv(out / "model_space.csv", mst)
    rows = with_pair_ids([{**r, "responder": r["head"]} for r in shortlist_rows(candidates)])
    for r in rows:
        i = (r["writer_layer"], r["writer_head"], r["responder_layer"], r["responder_head"])
        r["rows_evaluated"] = int(scan.rows_evaluated[i])
        r["mean_ci_low"], r["mean_ci_high"] = float(scan.mean_ci_low[i]), float(scan.mean_ci_high[i])
    shares = [c for c in (rows[0] if rows else {}) if c.startswith(("top_share", "bottom_share"))]
    header = [*PAIR_IDS, "rank", "kind", "responder", "head_ov", "ov_mean_percentile", "ov_q_value", "copying_score",
              "writer", "mean_percentile", "mean_ci_low", "mean_ci_high", *shares, "q_value", "rows_evaluated",
              "writer_ov", "prediction", "q_composition", "q_composition_z", "projection_kernel_q",
              "kernel_random_mean_q"]
    tables["shortlist"] = write_csv(out / "shortlist.csv", rows, header)
    keep = np.isin(pt["prediction"], (-1, 1))
    names = [*PAIR_IDS, "writer", "responder", "s_writer", "s_response", "s_responder", "prediction_word",
             "mean_percentile", "mean_ci_low", "mean_ci_high", "q_value", "rows_evaluated", "q_composition"]
    tables["compensation"] = write_csv(out / "compensation.csv", {name: pt[name][keep] for name in names})
    tables["sampling"] = write_csv(out / "sampling.csv", [sampling_row])
    return tables
