"""CSV tables of a report: plain comma-separated text, one header row, floats as ``%.6g``."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np

from ...store.atomic import write_bytes


def _cell(value) -> str:
    if isinstance(value, (float, np.floating)):
        return "" if not np.isfinite(value) else f"{float(value):.6g}"
    if isinstance(value, (np.integer,)):
        return str(int(value))
    if isinstance(value, np.bool_):
        return str(bool(value)).lower()
    return str(value)


def columns_to_rows(table: dict[str, np.ndarray]) -> list[dict]:
    """A dict of equal-length columns -> a list of row dicts."""
    names = list(table)
    n = len(table[names[0]]) if names else 0
    return [{name: table[name][i] for name in names} for i in range(n)]


def write_csv(path: str | Path, rows: list[dict] | dict[str, np.ndarray], header: list[str] | None = None) -> Path:
    """Write ``rows`` (a list of dicts or a dict of columns) to ``path``, through the atomic writer
    (store.atomic: never through a symlink or over anything but a regular file)."""
    if isinstance(rows, dict):
        header = header or list(rows)
        rows = columns_to_rows(rows)
    header = header or (list(rows[0]) if rows else [])
    text = io.StringIO(newline="")
    out = csv.writer(text)
    out.writerow(header)
    for row in rows:
        out.writerow([_cell(row.get(name, "")) for name in header])
    return write_bytes(Path(path), text.getvalue().encode("utf-8"), what="CSV file")
