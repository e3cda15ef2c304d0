"""The scan file: an HDF5 file with one dataset per statistic under ``/pairs``.

Every dataset under ``/pairs`` is indexed ``[writer_layer, writer_head, responder_layer,
responder_head, ...]``; pairs not computed hold the fill values below and ``done = False``.
The layout is documented in the README ("The scan file"). Files are written to a
temporary name beside the target and renamed into place only when complete, so a failed
or interrupted write never leaves a partial file under the requested name.
"""

from __future__ import annotations

import json
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import CompositionError
from .stats import LABEL_NOT_COMPUTED

FORMAT_NAME = "composition-scan"
FORMAT_VERSION = 1

CAUTION = (
    "Weight-space predictions under the token-table assumption: they ignore what other "
    "components add to the residual stream, the norm's real scale and the data distribution. "
    "They rank candidates for causal experiments; they are not causal evidence."
)

# name -> (dtype, fill value, trailing axis: None, "k" or "bins")
PAIR_DATASETS = {
    "top_share": ("f8", np.nan, "k"),
    "bottom_share": ("f8", np.nan, "k"),
    "mean_percentile": ("f8", np.nan, None),
    "histogram": ("i8", 0, "bins"),
    "rows_evaluated": ("i8", 0, None),
    "p_value": ("f8", np.nan, None),
    "q_value": ("f8", np.nan, None),
    "label": ("i1", LABEL_NOT_COMPUTED, None),
    # 95 % intervals (exact hypergeometric for shares, Serfling for the mean; zero width
    # when every row was evaluated); see composition.stats
    "ci_low": ("f8", np.nan, "k"),  # top-k share
    "ci_high": ("f8", np.nan, "k"),
    "bottom_ci_low": ("f8", np.nan, "k"),  # bottom-k share
    "bottom_ci_high": ("f8", np.nan, "k"),
    "mean_ci_low": ("f8", np.nan, None),  # mean percentile
    "mean_ci_high": ("f8", np.nan, None),
    "done": ("?", False, None),
}


def empty_pairs(n_layers: int, n_heads: int, n_k: int, n_bins: int) -> dict[str, np.ndarray]:
    """Arrays for every ``/pairs`` dataset, filled with their not-computed values."""
    base = (n_layers, n_heads, n_layers, n_heads)
    extra = {None: (), "k": (n_k,), "bins": (n_bins,)}
    return {name: np.full(base + extra[axis], fill, dtype=dtype)
            for name, (dtype, fill, axis) in PAIR_DATASETS.items()}


def write_scan(path: str | os.PathLike, attrs: dict, pairs: dict[str, np.ndarray]) -> Path:
    """Write a complete scan file atomically (temporary file, then rename)."""
    import h5py

    path = Path(path)
    directory = path.parent if str(path.parent) else Path(".")
    if not directory.is_dir():
        raise CompositionError(f"output directory {directory} does not exist.")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=directory)
        os.close(fd)
    except OSError as exc:
        raise CompositionError(f"cannot write the scan file {path} ({exc.strerror}).") from None
    try:
        with h5py.File(tmp, "w") as f:
            for key, value in attrs.items():
                f.attrs[key] = _attr(value)
            group = f.create_group("pairs")
            for name, data in pairs.items():
                group.create_dataset(name, data=data)
        os.replace(tmp, path)
    except OSError as exc:
        _remove(tmp)
        raise CompositionError(f"cannot write the scan file {path} ({exc.strerror or exc}).") from None
    except BaseException:
        _remove(tmp)
        raise
    return path


@dataclass
class Scan:
    """A scan file in memory: ``attrs`` (dict) and one NumPy array per ``/pairs`` dataset."""

    path: Path
    attrs: dict
    arrays: dict[str, np.ndarray]

    def __getattr__(self, name):
        arrays = self.__dict__.get("arrays", {})
        if name in arrays:
            return arrays[name]
        raise AttributeError(name)

    @property
    def k(self) -> np.ndarray:
        return np.asarray(self.attrs["k"])

    def enrichment(self, which: str = "top") -> np.ndarray:
        """A share divided by its null value ``k/n``. # -> [L, H, L, H, nk]"""
        share = self.arrays[f"{which}_share"]
        return share / (self.k / self.attrs["keys_per_row"])

    def pairs(self) -> dict[str, np.ndarray]:
        """A tidy table of the computed pairs: one 1-D array per column (pandas-ready)."""
        idx = np.argwhere(self.arrays["done"])  # [P, 4]
        table = {"writer_layer": idx[:, 0], "writer_head": idx[:, 1],
                 "responder_layer": idx[:, 2], "responder_head": idx[:, 3]}
        sel = tuple(idx.T)
        for name, data in self.arrays.items():
            if name == "done":
                continue
            values = data[sel]
            if values.ndim == 1:
                table[name] = values
            elif name in ("top_share", "bottom_share"):
                for j, k in enumerate(self.k):
                    table[f"{name}_{k}"] = values[:, j]
        table["writer"] = np.array([f"{a}.{b}" for a, b in idx[:, :2]])
        table["responder"] = np.array([f"{a}.{b}" for a, b in idx[:, 2:]])
        return table


def load_scan(path: str | os.PathLike) -> Scan:
    """Read a scan file into plain NumPy arrays."""
    import h5py

    path = Path(path)
    if not path.is_file():
        raise CompositionError(f"scan file {path} does not exist.")
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != FORMAT_NAME:
                raise CompositionError(f"{path} is not a scan file of this tool.")
            attrs = {k: _unattr(v) for k, v in f.attrs.items()}
            arrays = {name: f["pairs"][name][()] for name in f["pairs"]}
    except OSError as exc:
        raise CompositionError(f"{path} is not a readable HDF5 file ({exc}).") from None
    return Scan(path, attrs, arrays)


def _attr(value):
    if isinstance(value, (dict, list, tuple)) and not (
        isinstance(value, (list, tuple)) and value and all(isinstance(v, (int, float)) for v in value)
    ):
        return json.dumps(value)
    if value is None:
        return "none"
    return value


def _unattr(value):
    if isinstance(value, bytes):
        value = value.decode()
    if isinstance(value, np.generic):
        value = value.item()
    return value


def _remove(path) -> None:
    try:
        os.remove(path)
    except OSError:
        pass
