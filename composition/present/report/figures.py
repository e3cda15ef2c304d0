"""Figures of a scan: heatmaps, per-head bars, the compensation map, histograms.

Every heatmap has writer heads down the side and responder heads across, labelled
``layer.head``, with layer boundaries drawn. Continuous statistics use one diverging scale
centred on the statistic's null value, which is drawn in a neutral cream colour: a cell
that looks neutral is what the null model expects. Cells without a value (responder not
in a later layer, or pair not scanned) are hatched. Figures are written as PNG and SVG.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

# Colours: cream at the null, slate teal below it, brick above it.
NULL_COLOUR = "#f1ede4"
LOW_COLOURS = ("#123f52", "#2f7287", "#8fb8c2")
HIGH_COLOURS = ("#e0a77f", "#b9582a", "#6e2410")
CATEGORY_COLOURS = {
    "attention-raising": "#b9582a", "attention-lowering": "#2f7287", "neutral": NULL_COLOUR,
    "copying": "#b9582a", "suppressing": "#2f7287",
    "compensating": "#6a4c93", "reinforcing": "#d9a21b", "none": NULL_COLOUR,
    "not computed": "#ffffff",
}
SIGN_COLOURS = {1: CATEGORY_COLOURS["attention-raising"], -1: CATEGORY_COLOURS["attention-lowering"], 0: NULL_COLOUR}
EMPTY_FACE = "#ffffff"
HATCH_COLOUR = "#cfc8ba"
GRID_COLOUR = "#3b3b3b"
TEXT_COLOUR = "#222222"
PNG_DPI = 120  # a 9-inch figure is about 1080 px: shown near 1:1 in the report page
LABEL_ALL_HEADS = 48  # label every head when an axis has at most this many; else layers only


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({
        "font.family": "DejaVu Sans", "font.size": 9, "axes.titlesize": 11, "axes.titleweight": "bold",
        "axes.edgecolor": GRID_COLOUR, "axes.labelcolor": TEXT_COLOUR, "xtick.color": TEXT_COLOUR,
        "ytick.color": TEXT_COLOUR, "svg.fonttype": "none", "hatch.color": HATCH_COLOUR,
        "hatch.linewidth": 0.6,
    })
    return matplotlib, plt


def diverging_colormap():
    """The report's diverging scale: teal (below null) - cream (null) - brick (above null)."""
    matplotlib, _ = _mpl()
    from matplotlib.colors import LinearSegmentedColormap

    cmap = LinearSegmentedColormap.from_list(
        "composition-diverging", [*LOW_COLOURS, NULL_COLOUR, *HIGH_COLOURS], N=256)
    return cmap.with_extremes(bad=(0, 0, 0, 0))  # transparent: the hatched background shows through


@dataclass(frozen=True)
class Axes:
    """Which layers a heatmap shows: writer layers down, responder layers across."""

    writer_layers: tuple[int, ...]
    responder_layers: tuple[int, ...]
    n_heads: int

    @classmethod
    def from_mask(cls, mask: np.ndarray) -> "Axes":
        """The layers that hold at least one value in ``mask`` ``[L, H, L, H]``."""
        L, H = mask.shape[:2]
        wl = tuple(int(l) for l in range(L) if mask[l].any())
        rl = tuple(int(l) for l in range(L) if mask[:, :, l].any())
        return cls(wl or (0,), rl or (min(1, L - 1),), H)

    def rows(self) -> list[tuple[int, int]]:
        return [(l, h) for l in self.writer_layers for h in range(self.n_heads)]

    def cols(self) -> list[tuple[int, int]]:
        return [(l, h) for l in self.responder_layers for h in range(self.n_heads)]

    def grid(self, values: np.ndarray) -> np.ndarray:
        """``values`` ``[L, H, L, H]`` -> ``[rows, cols]`` in display order."""
        sub = values[list(self.writer_layers)][:, :, list(self.responder_layers)]  # [lw, H, lr, H]
        return sub.reshape(len(self.writer_layers) * self.n_heads, len(self.responder_layers) * self.n_heads)


def _figure_size(n_rows: int, n_cols: int, extra_width: float = 1.6) -> tuple[float, float]:
    cell = float(np.clip(7.5 / max(n_rows, n_cols), 0.075, 0.26))
    return max(4.8, n_cols * cell + extra_width + 1.2), max(3.6, n_rows * cell + 1.6)


def _head_ticks(ax, axis: str, layers: tuple[int, ...], H: int) -> None:
    n = len(layers) * H
    set_ticks = ax.set_xticks if axis == "x" else ax.set_yticks
    set_labels = ax.set_xticklabels if axis == "x" else ax.set_yticklabels
    if n <= LABEL_ALL_HEADS:
        set_ticks(np.arange(n))
        labels = [f"{l}.{h}" for l in layers for h in range(H)]
        fs = 7 if n <= 32 else 6
        set_labels(labels, fontsize=fs, rotation=90 if axis == "x" else 0, family="DejaVu Sans Mono")
    else:
        set_ticks([i * H + (H - 1) / 2 for i in range(len(layers))])
        set_labels([f"layer {l}" for l in layers], fontsize=7, rotation=90 if axis == "x" else 0)
        minor = ax.set_xticks if axis == "x" else ax.set_yticks
        minor(np.arange(n), minor=True)
    ax.tick_params(axis=axis, length=2, which="both")


def _layer_lines(ax, n_rows_layers: int, n_cols_layers: int, H: int) -> None:
    for i in range(1, n_rows_layers):
        ax.axhline(i * H - 0.5, color=GRID_COLOUR, lw=0.9)
    for j in range(1, n_cols_layers):
        ax.axvline(j * H - 0.5, color=GRID_COLOUR, lw=0.9)


def _empty_background(ax, n_rows: int, n_cols: int) -> None:
    from matplotlib.patches import Rectangle

    ax.add_patch(Rectangle((-0.5, -0.5), n_cols, n_rows, facecolor=EMPTY_FACE, edgecolor="none",
                           hatch="////", zorder=0))


def _frame(ax, axes: Axes, title: str) -> None:
    H = axes.n_heads
    _head_ticks(ax, "x", axes.responder_layers, H)
    _head_ticks(ax, "y", axes.writer_layers, H)
    _layer_lines(ax, len(axes.writer_layers), len(axes.responder_layers), H)
    every = lambda layers: len(layers) * H <= LABEL_ALL_HEADS  # noqa: E731
    ax.set_xlabel("responder head (layer.head)" if every(axes.responder_layers)
                  else f"responder head (by layer; minor ticks mark heads 0-{H - 1})")
    ax.set_ylabel("writer head (layer.head)" if every(axes.writer_layers)
                  else f"writer head (by layer; minor ticks mark heads 0-{H - 1})")
    ax.set_title(title, loc="left")


def _save(fig, out_dir: Path, stem: str) -> dict[str, Path]:
    paths = {}
    for ext in ("png", "svg"):
        p = out_dir / f"{stem}.{ext}"
        fig.savefig(p, dpi=PNG_DPI if ext == "png" else None, bbox_inches="tight", facecolor="white")
        paths[ext] = p
    _, plt = _mpl()
    plt.close(fig)
    return paths


def heatmap(values: np.ndarray, axes: Axes, out_dir: Path, stem: str, title: str, unit: str,
            null: float, half_width: float | None = None, log2: bool = False,
            bounds: tuple[float, float] | None = None) -> dict[str, Path]:
    """A writer x responder heatmap of a continuous statistic on a diverging scale.

    # values [L, H, L, H]; NaN cells are drawn as empty (hatched).
    ``log2``: the values are ratios to the null (null = 1) shown on a log2 scale with tick
    labels as multiples (x1/4, x1, x4). ``half_width``: the scale spans null +- half_width
    (default: the largest distance from the null in the data), so equal distances from the
    null get equally strong colours. ``bounds``: the statistic's possible range; the colour
    bar shows only the part of the scale inside it.
    """
    _, plt = _mpl()
    from matplotlib.colors import Normalize
    from matplotlib.ticker import MaxNLocator

    grid = axes.grid(values).astype(np.float64)  # [rows, cols]
    centre = null
    shown = grid
    if log2:
        with np.errstate(divide="ignore", invalid="ignore"):
            shown = np.log2(grid)
        centre = 0.0
    finite = shown[np.isfinite(shown)]
    if half_width is None:
        half_width = float(np.max(np.abs(finite - centre))) if finite.size else 1.0
        half_width = half_width if half_width > 0 else 1.0
        if log2:
            half_width = float(max(1.0, np.ceil(half_width)))
    lo, hi = centre - half_width, centre + half_width
    if bounds is not None:
        lo, hi = max(lo, bounds[0]), min(hi, bounds[1])
    norm = Normalize(centre - half_width, centre + half_width)
    fig, ax = plt.subplots(figsize=_figure_size(*grid.shape))
    _empty_background(ax, *grid.shape)
    clipped = np.where(np.isnan(shown), np.nan, np.clip(shown, lo, hi))
    im = ax.imshow(np.ma.masked_invalid(clipped), cmap=diverging_colormap(), norm=norm,
                   interpolation="nearest", aspect="equal", zorder=1)
    _frame(ax, axes, title)
    cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.03, shrink=0.9, boundaries=np.linspace(lo, hi, 257))
    cb.set_label(unit, fontsize=8)
    if log2:
        step = max(1.0, np.ceil((hi - lo) / 8))
        ticks = [t for t in np.arange(np.ceil(lo), np.floor(hi) + 0.5, step)]
        if 0.0 not in ticks:
            ticks.append(0.0)
    else:
        ticks = [t for t in MaxNLocator(6).tick_values(lo, hi) if lo - 1e-12 <= t <= hi + 1e-12]
        ticks = [t for t in ticks if abs(t - centre) > 0.06 * (hi - lo)] + [centre]
    ticks = sorted(ticks)
    cb.set_ticks(ticks)
    cb.set_ticklabels([(_multiple(t) if log2 else f"{t:.4g}") + (" null" if t == centre else "") for t in ticks])
    cb.ax.axhline(centre, color=TEXT_COLOUR, lw=1.2)
    cb.ax.tick_params(labelsize=7)
    return _save(fig, out_dir, stem)


def _multiple(log2_value: float) -> str:
    v = 2.0 ** log2_value
    if abs(log2_value) < 1e-9:
        return "\u00d71"
    return f"\u00d7{v:g}" if v >= 1 else f"\u00d71/{1 / v:g}"


def category_map(codes: np.ndarray, axes: Axes, out_dir: Path, stem: str, title: str,
                 categories: dict[int, str], annotations: np.ndarray | None = None,
                 max_annotations: int = 60, annotation_note: str = "") -> dict[str, Path]:
    """A writer x responder map of categories (labels, predictions).

    # codes [L, H, L, H] int; codes not in ``categories`` are drawn empty.
    ``annotations`` [L, H, L, H] of strings written into non-empty, non-neutral cells when
    there are at most ``max_annotations`` of them.
    """
    _, plt = _mpl()
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    grid = axes.grid(codes)  # [rows, cols]
    keys = list(categories)
    colours = [CATEGORY_COLOURS.get(categories[k], SIGN_COLOURS.get(k, EMPTY_FACE)) for k in keys]  # any side's words
    index = np.full(grid.shape, np.nan)
    for i, k in enumerate(keys):
        index[grid == k] = i
    cmap = ListedColormap(colours).with_extremes(bad=(0, 0, 0, 0))
    fig, ax = plt.subplots(figsize=_figure_size(*grid.shape, extra_width=2.4))
    _empty_background(ax, *grid.shape)
    ax.imshow(np.ma.masked_invalid(index), cmap=cmap, norm=BoundaryNorm(np.arange(len(keys) + 1) - 0.5, len(keys)),
              interpolation="nearest", aspect="equal", zorder=1)
    _frame(ax, axes, title)
    handles = [Patch(facecolor=c, edgecolor=GRID_COLOUR, lw=0.5, label=categories[k]) for k, c in zip(keys, colours)]
    handles.append(Patch(facecolor=EMPTY_FACE, edgecolor=GRID_COLOUR, hatch="////", lw=0.5,
                         label="no value (not a pair / not scanned)"))
    if annotations is not None:
        ann = axes.grid(annotations)
        cells = [(i, j) for i, j in zip(*np.nonzero(ann != "")) if np.isfinite(index[i, j])]
        if len(cells) <= max_annotations:
            cell_points = 72 * _figure_size(*grid.shape)[0] / (grid.shape[1] + 8)
            size = float(np.clip(cell_points * 0.36, 3.5, 9.0))
            for i, j in cells:
                dark = categories[keys[int(index[i, j])]] in ("reinforcing", "neutral", "none")
                ax.text(j, i, ann[i, j], ha="center", va="center", fontsize=size, zorder=3,
                        color=TEXT_COLOUR if dark else "white", family="DejaVu Sans Mono", fontweight="bold")
            handles.append(Patch(facecolor="none", edgecolor="none", label=annotation_note))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=7, frameon=False)
    return _save(fig, out_dir, stem)


def head_bars(copying_score: np.ndarray, ov_mean_percentile: np.ndarray, ov_label: np.ndarray,
              out_dir: Path, stem: str) -> dict[str, Path]:
    """Per-head bars: the eigenvalue copying score and the OV diagonal's mean percentile.

    # copying_score [L, H], ov_mean_percentile [L, H], ov_label [L, H] (+1/-1/0)
    """
    _, plt = _mpl()
    from matplotlib.patches import Patch

    L, H = copying_score.shape
    x = np.array([l * (H + 1) + h for l in range(L) for h in range(H)], dtype=float)  # a gap between layers
    words = {1: "copying", -1: "suppressing", 0: "neutral"}
    colours = [CATEGORY_COLOURS[words.get(int(v), "not computed")] for v in ov_label.ravel()]
    width = float(np.clip(0.16 * L * (H + 1), 7.0, 18.0))
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(width, 5.6), sharex=True)
    for ax, values, null, lim, ylabel in (
        (a1, copying_score.ravel(), 0.0, (-1.05, 1.05), "eigenvalue copying score\nΣ Re λ / Σ |λ|  (null 0)"),
        (a2, ov_mean_percentile.ravel(), 0.5, (0.0, 1.0), "OV diagonal mean percentile\n(1 = top; null 0.5)"),
    ):
        ax.bar(x, np.nan_to_num(values - null), bottom=null, width=0.8, color=colours, edgecolor=GRID_COLOUR, lw=0.4)
        ax.axhline(null, color=TEXT_COLOUR, lw=0.8)
        ax.set_ylim(*lim)
        ax.set_ylabel(ylabel, fontsize=8)
        for l in range(1, L):
            ax.axvline(l * (H + 1) - 1, color=HATCH_COLOUR, lw=0.8)
        ax.spines[["top", "right"]].set_visible(False)
    if L * H <= 96:
        a2.set_xticks(x)
        a2.set_xticklabels([f"{l}.{h}" for l in range(L) for h in range(H)], rotation=90, fontsize=6,
                           family="DejaVu Sans Mono")
    else:
        a2.set_xticks([l * (H + 1) + (H - 1) / 2 for l in range(L)])
        a2.set_xticklabels([f"layer {l}" for l in range(L)], fontsize=7, rotation=90)
    a2.set_xlabel("head (layer.head)")
    fig.suptitle("Each head's own write: copying or suppressing the attended token", x=0.01, ha="left",
                 fontsize=11, fontweight="bold")
    missing = not bool(np.isin(ov_label, (1, 0, -1)).all())
    shown = ["copying", "suppressing", "neutral"] + (["not computed"] if missing else [])
    a1.legend(handles=[Patch(facecolor=CATEGORY_COLOURS[w], edgecolor=GRID_COLOUR, lw=0.4,
                             label=f"OV label: {w}" if w != "not computed" else "no profile (head not in the scan)")
                       for w in shown],
              loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=len(shown), fontsize=7, frameon=False)
    fig.tight_layout()
    return _save(fig, out_dir, stem)


def histograms(hists: list[np.ndarray], titles: list[str], out_dir: Path, stem: str,
               suptitle: str = "Percentile of the diagonal, pair by pair") -> dict[str, Path]:
    """Small multiples of percentile histograms. # hists: n x [bins] counts"""
    _, plt = _mpl()

    n = max(1, len(hists))
    cols = min(4, n)
    rows = int(np.ceil(n / cols))
    fig, axs = plt.subplots(rows, cols, figsize=(2.7 * cols + 0.4, 2.1 * rows + 0.6), squeeze=False)
    for ax in axs.ravel()[len(hists):]:
        ax.axis("off")
    for ax, hist, title in zip(axs.ravel(), hists, titles):
        _histogram_axes(ax, np.asarray(hist), title)
    fig.suptitle(suptitle, x=0.01, ha="left", fontsize=11, fontweight="bold")
    fig.tight_layout()
    return _save(fig, out_dir, stem)


def _histogram_axes(ax, hist: np.ndarray, title: str) -> None:
    bins = hist.shape[0]
    edges = np.linspace(0, 1, bins + 1)
    frac = hist / max(1, hist.sum())
    centres = (edges[:-1] + edges[1:]) / 2
    colours = [LOW_COLOURS[1] if c < 0.5 else HIGH_COLOURS[1] for c in centres]
    ax.bar(edges[:-1], frac, width=1 / bins, align="edge", color=colours, edgecolor="white", lw=0.4)
    ax.axhline(1 / bins, color=TEXT_COLOUR, lw=0.8, ls=(0, (3, 2)))
    ax.set_xlim(0, 1)
    ax.set_title(title, fontsize=8, loc="left")
    ax.set_xlabel("percentile (1 = top)", fontsize=7)
    ax.set_ylabel("fraction of rows", fontsize=7)
    ax.tick_params(labelsize=6)
    ax.spines[["top", "right"]].set_visible(False)


def pair_histogram(hist: np.ndarray, title: str, path: Path) -> Path:
    """One pair's percentile histogram, dashed line at the uniform null. Suffix picks the format."""
    _, plt = _mpl()
    fig, ax = plt.subplots(figsize=(5.2, 3.0))
    _histogram_axes(ax, np.asarray(hist), title)
    fig.tight_layout()
    fig.savefig(path, dpi=PNG_DPI, bbox_inches="tight", facecolor="white")
    plt.close(fig)
    return path
