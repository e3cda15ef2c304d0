"""Scans of one architecture compared across checkpoints (training steps, before and after fine-tuning).

``compare_scans(paths)`` lines up complete scans, in the order given, that were made with the
same result options on models of the same shape; it refuses any other set with one sentence
naming the difference. It compares the pairs computed in every scan:

* the mean percentile difference of each pair between consecutive scans (and, for three or
  more scans, between the last and the first): ``later - earlier``;
* the pairs whose label changed between consecutive scans, with both values and q-values;
* a tidy table, one row per pair and scan.

``Comparison.write(out_dir)`` writes the figures and CSV tables; ``Comparison.summary()`` is
the terminal text. Every number is the scans' own: nothing is recomputed. Differences are
between weight-space predictions; what they mean is limited as each scan's are
(``CAUTION``): a pair that changes label is a candidate for a causal check at both
checkpoints, not evidence of a change in behaviour.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..compose import sides
from ..compose.sides import Words
from ..errors import CompositionError
from ..store.atomic import write_bytes
from ..store.scanfile import CAUTION, Scan, load_scan, require_complete

# scan-file attributes that must agree (attribute -> words for the sentence)
_SHAPE_ATTRS = {"n_layers": "number of layers", "n_heads": "heads per layer", "d_model": "model width",
                "d_head": "head width", "vocab_size": "vocabulary size", "keys_per_row": "keys per row",
                "family": "model family"}
_OPTION_ATTRS = {"side": "--side", "query_part": "--query-part", "table": "--table", "position": "--position",
                 "orientation": "--orientation", "rotary_offsets": "--rotary-offsets", "k": "--k", "fdr": "--fdr",
                 "min_effect": "--min-effect", "histogram_bins": "histogram bins"}
TRAJECTORY_PAIRS = 8  # pairs drawn in each panel of the trajectory figure


@dataclass
class Comparison:
    """Several scans lined up on the pairs computed in all of them.

    # index [P, 4] (writer layer, writer head, responder layer, responder head);
    # mean_percentile, q_value [S, P]; label [S, P] int8; top_share, bottom_share [S, P, nk]
    """

    names: list[str]
    paths: list[Path]
    k: list[int]
    index: np.ndarray
    mean_percentile: np.ndarray
    q_value: np.ndarray
    label: np.ndarray
    top_share: np.ndarray
    bottom_share: np.ndarray
    shortlisted: list[tuple[int, int, int, int]] = field(default_factory=list)  # pairs of shortlisted heads
    n_layers: int = 0
    n_heads: int = 0
    words: Words = field(default_factory=lambda: sides.get("query").words)  # the scans' side's label words

    @property
    def steps(self) -> list[tuple[int, int]]:
        """The compared scan pairs: consecutive ones, and (last, first) for three or more scans."""
        n = len(self.names)
        out = [(i, i + 1) for i in range(n - 1)]
        if n >= 3:
            out.append((0, n - 1))
        return out

    def difference(self, a: int, b: int) -> np.ndarray:
        """Mean percentile of scan ``b`` minus scan ``a`` for every compared pair. # -> [P]"""
        return self.mean_percentile[b] - self.mean_percentile[a]

    def grid(self, values: np.ndarray) -> np.ndarray:
        """Per-pair values on the scan layout, NaN where not compared. # [P] -> [L, H, L, H]"""
        out = np.full((self.n_layers, self.n_heads, self.n_layers, self.n_heads), np.nan)
        out[tuple(self.index.T)] = values
        return out

    def label_changes(self) -> list[dict]:
        """One row per pair and consecutive scan step whose label differs, largest difference first."""
        rows = []
        for a in range(len(self.names) - 1):
            b = a + 1
            diff = self.difference(a, b)
            for p in np.flatnonzero(self.label[a] != self.label[b]):
                rows.append({**_pair_columns(self.index[p]), "scan_before": self.names[a], "scan_after": self.names[b],
                             "label_before": self.words[self.label[a, p]],
                             "label_after": self.words[self.label[b, p]],
                             "mean_percentile_before": float(self.mean_percentile[a, p]),
                             "mean_percentile_after": float(self.mean_percentile[b, p]),
                             "q_value_before": float(self.q_value[a, p]), "q_value_after": float(self.q_value[b, p]),
                             "mean_percentile_difference": float(diff[p])})
        rows.sort(key=lambda r: -abs(r["mean_percentile_difference"]))
        return rows

    def tidy_rows(self) -> list[dict]:
        """One row per pair and scan."""
        rows = []
        for s, name in enumerate(self.names):
            for p in range(len(self.index)):
                row = {"scan_order": s, "scan": name, **_pair_columns(self.index[p]),
                       "mean_percentile": float(self.mean_percentile[s, p]),
                       "q_value": float(self.q_value[s, p]), "label": self.words[self.label[s, p]]}
                for j, k in enumerate(self.k):
                    row[f"top_share_{k}"] = float(self.top_share[s, p, j])
                for j, k in enumerate(self.k):
                    row[f"bottom_share_{k}"] = float(self.bottom_share[s, p, j])
                rows.append(row)
        return rows

    def largest_changes(self, n: int = 5) -> list[tuple[str, str, str, float, float]]:
        """``(writer, responder, step, before, after)`` of the ``n`` largest mean percentile changes
        between consecutive scans (pairs with no change left out)."""
        found = []
        for a in range(len(self.names) - 1):
            diff = self.difference(a, a + 1)
            for p in np.flatnonzero(diff != 0):
                found.append((abs(float(diff[p])), p, a))
        found.sort(key=lambda x: -x[0])
        out = []
        for _, p, a in found[:n]:
            c = _pair_columns(self.index[p])
            out.append((c["writer"], c["responder"], f"{self.names[a]} -> {self.names[a + 1]}",
                        float(self.mean_percentile[a, p]), float(self.mean_percentile[a + 1, p])))
        return out

    def summary(self) -> str:
        """The terminal text: pairs compared, label changes, the largest changes."""
        changes = self.label_changes()
        changed_pairs = {(r["writer"], r["responder"]) for r in changes}
        lines = [f"compared {len(self.names)} scans ({', '.join(self.names)}) on {len(self.index)} pairs "
                 "computed in all of them",
                 f"label changes between consecutive scans: {len(changes)} "
                 f"({len(changed_pairs)} distinct pair{'' if len(changed_pairs) == 1 else 's'})"]
        largest = self.largest_changes()
        if not largest:
            lines.append("no pair's mean percentile differs between consecutive scans")
        else:
            lines.append("largest mean percentile changes:")
            for writer, responder, step, before, after in largest:
                lines.append(f"  {writer} -> {responder}  ({step}): {before:.3f} -> {after:.3f} ({after - before:+.3f})")
        lines.append(CAUTION)
        return "\n".join(lines)

    def write(self, out_dir: str | os.PathLike) -> dict[str, Path]:
        """Write the figures and tables into ``out_dir`` (created if missing); return them by name."""
        out = Path(out_dir)
        try:
            out.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise CompositionError(f"cannot create the output directory {out} ({exc.strerror or exc}).") from None
        files: dict[str, Path] = {}
        for a, b in self.steps:
            stem = f"difference_{a + 1}_{b + 1}"
            title = f"Mean percentile difference: {self.names[b]} minus {self.names[a]}"
            files[stem] = difference_heatmap(self.grid(self.difference(a, b)), out / f"{stem}.png", title)
        files["label_changes"] = _write_csv(out / "label_changes.csv", self.label_changes(), _CHANGE_HEADER)
        tidy_header = (["scan_order", "scan", *_PAIR_HEADER, "mean_percentile", "q_value", "label"]
                       + [f"top_share_{k}" for k in self.k] + [f"bottom_share_{k}" for k in self.k])
        files["pairs"] = _write_csv(out / "pairs_by_scan.csv", self.tidy_rows(), tidy_header)
        if len(self.names) >= 3:
            files["trajectories"] = trajectory_figure(self, out / "trajectories.png")
        files["summary"] = write_bytes(out / "compare.txt", (self.summary() + "\n").encode("utf-8"), what="summary")
        return files

    def strongest_pairs(self, n: int = TRAJECTORY_PAIRS) -> list[int]:
        """Indices of the ``n`` pairs whose mean percentile lies farthest from 1/2 in any scan."""
        effect = np.nanmax(np.abs(self.mean_percentile - 0.5), axis=0)  # [P]
        return [int(p) for p in np.argsort(-effect, kind="stable")[:n]]


_PAIR_HEADER = ["writer_layer", "writer_head", "responder_layer", "responder_head", "writer", "responder"]
_CHANGE_HEADER = [*_PAIR_HEADER, "scan_before", "scan_after", "label_before", "label_after",
                  "mean_percentile_before", "mean_percentile_after", "q_value_before", "q_value_after",
                  "mean_percentile_difference"]


def _write_csv(path: Path, rows: list[dict], header: list[str]) -> Path:
    """Rows of dicts as CSV; floats with repr precision, integers as integers; through the atomic writer."""
    import csv
    import io

    text = io.StringIO(newline="")
    out = csv.writer(text)
    out.writerow(header)
    for row in rows:
        out.writerow([row.get(name, "") for name in header])
    return write_bytes(path, text.getvalue().encode("utf-8"), what="CSV file")


def _pair_columns(idx) -> dict:
    lU, hU, lR, hR = (int(x) for x in idx)
    return {"writer_layer": lU, "writer_head": hU, "responder_layer": lR, "responder_head": hR,
            "writer": f"{lU}.{hU}", "responder": f"{lR}.{hR}"}


def compare_scans(paths, names: list[str] | None = None) -> Comparison:
    """Line up complete scans of one architecture and one set of result options, in the order given.

    ``names``: one short name per scan for tables and figures (default: the file names,
    made unique by their position when two are alike).
    """
    paths = [Path(p) for p in paths]
    if len(paths) < 2:
        raise CompositionError("compare needs two or more scan files.")
    scans = [require_complete(load_scan(p), "compare") for p in paths]
    _check_alike(scans)
    if names is None:
        names = [p.stem for p in paths]
        if len(set(names)) < len(names):
            names = [f"{i + 1}:{n}" for i, n in enumerate(names)]
    elif len(names) != len(paths):
        raise CompositionError(f"compare got {len(names)} names for {len(paths)} scan files.")
    done = np.logical_and.reduce([s.arrays["done"] for s in scans])  # [L, H, L, H]
    if not done.any():
        raise CompositionError("the scans have no pair in common: their --writers/--responders selections do not overlap.")
    index = np.argwhere(done)  # [P, 4]
    sel = tuple(index.T)
    stack = lambda name: np.stack([s.arrays[name][sel] for s in scans])  # noqa: E731
    comp = Comparison(names=list(names), paths=paths, k=[int(k) for k in scans[0].k], index=index,
                      mean_percentile=stack("mean_percentile"), q_value=stack("q_value"), label=stack("label"),
                      top_share=stack("top_share"), bottom_share=stack("bottom_share"),
                      n_layers=int(scans[0].attrs["n_layers"]), n_heads=int(scans[0].attrs["n_heads"]),
                      words=sides.for_scan(scans[0].attrs).words)  # _check_alike: every scan has this side
    comp.shortlisted = _shortlisted_pairs(scans, done)
    return comp


def _check_alike(scans: list[Scan]) -> None:
    """Refuse scans of different shapes or result options, naming the first difference."""
    first = scans[0]
    for other in scans[1:]:
        for key, words in _SHAPE_ATTRS.items():
            a, b = first.attrs.get(key), other.attrs.get(key)
            if _norm(a) != _norm(b):
                raise CompositionError(f"{other.path} has another {words} than {first.path} ({_show(b)}, not "
                                       f"{_show(a)}): compare lines up scans of one architecture only.")
        for key, option in _OPTION_ATTRS.items():
            a, b = first.attrs.get(key), other.attrs.get(key)
            if _norm(a) != _norm(b):
                raise CompositionError(f"{other.path} was scanned with {option} {_show(b)}, {first.path} with "
                                       f"{option} {_show(a)}: compare needs scans made with the same options.")
        a, b = _options(first), _options(other)
        for key in sorted(set(a) | set(b), key=lambda k: (k == "row_order", k)):  # the options users type first
            if a.get(key) != b.get(key):
                option = f"--{key.replace('_', '-')}"
                raise CompositionError(f"{other.path} was scanned with {option} {_show(b.get(key))}, {first.path} "
                                       f"with {option} {_show(a.get(key))}: compare needs scans made with the "
                                       "same options.")


def _options(scan: Scan) -> dict:
    try:
        return json.loads(scan.attrs.get("options", "{}"))
    except (TypeError, ValueError):
        return {}


def _norm(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.integer, np.floating)):
        return value.item()
    return value


def _show(value) -> str:
    value = _norm(value)
    if value is None:
        return "not set"
    if isinstance(value, list):
        return ",".join(str(v) for v in value)
    return str(value)


def _shortlisted_pairs(scans: list[Scan], done: np.ndarray) -> list[tuple[int, int, int, int]]:
    """The (writer, responder) pairs of heads shortlisted in any scan (composition.interpret.predict),
    when the scan files hold head profiles; empty otherwise. Writer groups on the shortlist are left
    out: compare lines up pairs of single heads only."""
    from ..options import head_label
    from .heads import load_heads
    from .predict import shortlist

    found: list[tuple[int, int, int, int]] = []
    for scan in scans:
        heads = load_heads(scan.path)
        if heads is None or heads.heads["label"].shape != scan.arrays["label"].shape[:2]:
            continue
        for cand in shortlist(scan, heads):
            for row in cand.writers:
                if row["writer"] in scan.group_names:
                    continue
                pair = (*head_label(row["writer"], "writer"), *cand.head)
                if done[pair] and pair not in found:
                    found.append(pair)
    return found


# --- figures -----------------------------------------------------------------------------
# A diverging scale centred on 0 in white: purple below (the later scan lower), orange above.
# The end colours are ColorBrewer's PuOr ends (Brewer 2003), readable with the common colour
# vision deficiencies.
_BELOW, _ZERO, _ABOVE = "#5e3c99", "#ffffff", "#e66101"
_LINE_COLOURS = ["#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7"]
# (Okabe & Ito 2008, colour-universal design: eight colours told apart with colour vision deficiencies)


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def difference_heatmap(values: np.ndarray, path: Path, title: str) -> Path:
    """Writers down the rows, responders across, layer boundaries drawn, 0 in white. # values [L, H, L, H]"""
    plt = _pyplot()
    from matplotlib.colors import LinearSegmentedColormap, TwoSlopeNorm

    L, H = values.shape[:2]
    rows = [l for l in range(L) if np.isfinite(values[l]).any()]  # writer layers with a compared pair
    cols = [l for l in range(L) if np.isfinite(values[:, :, l]).any()]  # responder layers
    grid = values[rows][:, :, cols].reshape(len(rows) * H, len(cols) * H)  # [rows*H, cols*H]
    finite = np.abs(grid[np.isfinite(grid)])
    span = float(finite.max()) if finite.size and finite.max() > 0 else 0.05
    cmap = LinearSegmentedColormap.from_list("compare-difference", [_BELOW, _ZERO, _ABOVE], N=255)
    cmap = cmap.with_extremes(bad="#d9d9d9")
    size = (2.0 + 0.22 * grid.shape[1], 1.6 + 0.22 * grid.shape[0])
    fig, ax = plt.subplots(figsize=(max(5.0, min(size[0], 16.0)), max(4.0, min(size[1], 16.0))))
    im = ax.imshow(np.ma.masked_invalid(grid), cmap=cmap, norm=TwoSlopeNorm(0.0, -span, span),
                   interpolation="nearest", aspect="auto")
    for i in range(1, len(rows)):
        ax.axhline(i * H - 0.5, color="#404040", lw=0.8)
    for j in range(1, len(cols)):
        ax.axvline(j * H - 0.5, color="#404040", lw=0.8)
    ax.set_yticks([i * H + (H - 1) / 2 for i in range(len(rows))], [f"layer {l}" for l in rows])
    ax.set_xticks([j * H + (H - 1) / 2 for j in range(len(cols))], [f"layer {l}" for l in cols])
    ax.set_ylabel(f"writer (layer, heads 0-{H - 1} downwards)")
    ax.set_xlabel(f"responder (layer, heads 0-{H - 1} across)")
    ax.set_title(title, fontsize=10)
    bar = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03)
    bar.set_label("mean percentile difference (grey: not compared)", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def trajectory_figure(comp: Comparison, path: Path) -> Path:
    """Mean percentile across scans of the strongest pairs (left) and of the shortlisted heads' pairs (right)."""
    plt = _pyplot()
    lookup = {tuple(int(x) for x in comp.index[p]): p for p in range(len(comp.index))}
    panels = [("strongest pairs (farthest from 1/2 in any scan)", comp.strongest_pairs()),
              ("pairs of shortlisted heads", [lookup[p] for p in comp.shortlisted[:TRAJECTORY_PAIRS]])]
    fig, axes = plt.subplots(1, 2, figsize=(11, 4.2), sharey=True)
    x = np.arange(len(comp.names))
    for ax, (title, chosen) in zip(axes, panels):
        ax.axhline(0.5, color="#808080", lw=0.8, ls=":")
        for colour, p in zip(_LINE_COLOURS, chosen):
            c = _pair_columns(comp.index[p])
            ax.plot(x, comp.mean_percentile[:, p], marker="o", ms=3.5, lw=1.4, color=colour,
                    label=f"{c['writer']} -> {c['responder']}")
        if not chosen:
            ax.text(0.5, 0.5, "no shortlisted head in these scans\n(or no head profiles in the files)",
                    ha="center", va="center", transform=ax.transAxes, fontsize=8, color="#404040")
        else:
            ax.legend(fontsize=7, loc="best", frameon=False)
        ax.set_title(title, fontsize=9)
        ax.set_xticks(x, comp.names, rotation=30, ha="right", fontsize=7)
        ax.set_ylim(0, 1)
    axes[0].set_ylabel("mean percentile (1/2: null)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


__all__ = ["Comparison", "compare_scans", "difference_heatmap", "trajectory_figure"]
