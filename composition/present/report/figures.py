"""Figures of a scan: heatmaps (an overview and zoomed layer blocks), per-head bars, head
views, histograms. Written as PNG (for the page) and SVG (text kept as text, for papers).

Every heatmap has writer heads down the side and responder heads across with layer
boundaries drawn. An axis of at most ``LABEL_ALL_HEADS`` heads labels every head
``layer.head``; a longer one labels layers, and ``blocks`` cuts the heatmap into zoomed
blocks of whole layers that label every head. Continuous statistics use one diverging scale
centred on the statistic's null value, drawn near-white: a cell that looks neutral is what
the null model expects. Colour limits are robust (``colour_scale``): cells beyond them are
drawn in the end colour, marked with a dot, and the colour bar gets an arrow at that end.
Cells without a value are hatched; cells whose sampling interval contains the null are grey.

Palette (the project's own; checked for deuteranopia in tests/present/test_report_scale.py):
blue below the null, vermillion above it, near-white at the null; compensating purple,
reinforcing amber.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ...interpret.heads import HEAD_LABEL_WORDS

# --- palette -------------------------------------------------------------------------------
NULL_COLOUR = "#f7f7f5"
LOW_COLOURS = ("#173f7a", "#3c6fb6", "#a9c4e6")  # blue, dark to light
HIGH_COLOURS = ("#f2b89b", "#d9581e", "#8a2a06")  # vermillion, light to dark
UNDECIDED_COLOUR = "#c9ced6"  # the share's interval contains its null value
NEUTRAL_COLOUR = "#e4e7eb"
NOT_COMPUTED_COLOUR = "#ffffff"
# Category colours are keyed by code, never by word: a side's words (compose/sides) and the head
# words (interpret/heads.py HEAD_LABEL_WORDS) live in their own homes and may change freely.
LABEL_COLOURS = {1: HIGH_COLOURS[1], -1: LOW_COLOURS[1], 0: NEUTRAL_COLOUR}  # pair and head labels: +1, -1, 0
PREDICTION_COLOURS = {-1: "#5b2c83", 1: "#e3a300", 0: NEUTRAL_COLOUR}  # compensating, reinforcing, none


def _dark_text(colour: str) -> bool:
    """Whether text on a cell of ``colour`` is drawn dark (a light cell) rather than white."""
    from matplotlib.colors import to_rgb

    r, g, b = to_rgb(colour)
    return 0.2126 * r + 0.7152 * g + 0.0722 * b > 0.5


ACCENT = "#0b7a75"  # the page's accent (links, rules)
EMPTY_FACE = "#ffffff"
HATCH_COLOUR = "#c3cad4"
GRID_COLOUR = "#2f3a48"
TEXT_COLOUR = "#1d2733"
PNG_DPI = 120  # a 9-inch figure is about 1080 px: shown near 1:1 in the report page
LABEL_ALL_HEADS = 72  # label every head when an axis has at most this many (6 layers of 12); else layers and zoom blocks
CLIP_PERCENTILE = 99.0  # colour limits: this percentile of |value - null| over the drawn cells


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


def diverging_colours() -> list[str]:
    """The diverging scale's anchor colours, low to high, the null in the middle."""
    return [*LOW_COLOURS, NULL_COLOUR, *HIGH_COLOURS]


def diverging_colormap():
    """The report's diverging scale: blue (below null) - near-white (null) - vermillion (above)."""
    _mpl()
    from matplotlib.colors import LinearSegmentedColormap

    cmap = LinearSegmentedColormap.from_list("composition-diverging", diverging_colours(), N=256)
    return cmap.with_extremes(bad=(0, 0, 0, 0), under=LOW_COLOURS[0], over=HIGH_COLOURS[-1])


def colour_table(n: int = 256) -> list[str]:
    """The diverging scale as ``n`` hex colours (the interactive view draws with the same scale)."""
    from matplotlib.colors import to_hex

    cmap = diverging_colormap()
    return [to_hex(cmap(i / (n - 1))) for i in range(n)]


# --- colour limits ----------------------------------------------------------------------------

@dataclass(frozen=True)
class Scale:
    """A diverging colour scale: centre (the null), symmetric half width, drawn range [lo, hi].

    ``log2``: values are ratios to the null, drawn as log2 (centre 0). ``clipped``: how many
    drawn cells lie beyond [lo, hi] (drawn in the end colour, marked with a dot).
    """

    centre: float
    half_width: float
    lo: float
    hi: float
    log2: bool
    unit: str
    clipped: int = 0
    how: str = ""  # one sentence: how the range was chosen

    def shown(self, values: np.ndarray) -> np.ndarray:
        """Values on the drawn axis (log2 for ratios). # [...] -> [...]"""
        v = np.asarray(values, dtype=np.float64)
        if not self.log2:
            return v
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log2(v)

    def value_text(self, x: float) -> str:
        return _multiple(x) if self.log2 else f"{x:.4g}"

    def range_text(self) -> str:
        lo, hi = self.value_text(self.lo), self.value_text(self.hi)
        text = f"colour range {lo} to {hi} ({self.how})"
        if self.clipped:
            text += (f"; {self.clipped} cell{'s' if self.clipped != 1 else ''} beyond it "
                     "drawn in the end colour and marked with a dot")
        return text


def colour_scale(values: np.ndarray, centre: float, unit: str, log2: bool = False, min_half_width: float = 0.0,
                 bounds: tuple[float, float] | None = None, percentile: float = CLIP_PERCENTILE) -> Scale:
    """Robust colour limits: the ``percentile`` of ``|value - centre|`` over the drawn cells,
    at least ``min_half_width`` (so sampling noise near the null stays pale).

    # values [...] (NaN: no value). ``log2``: ratios to the null ``centre`` (=1), drawn as log2.
    ``bounds``: the statistic's possible range; the drawn range never leaves it.
    """
    probe = Scale(0.0 if log2 else centre, 1.0, 0, 0, log2, unit)
    shown = probe.shown(values)
    c = probe.centre
    dev = np.abs(shown[~np.isnan(shown)] - c)
    dev_f = dev[np.isfinite(dev)]
    hw = float(np.percentile(dev_f, percentile)) if dev_f.size else 1.0
    how = f"the {percentile:g}th percentile of the distance from the null"
    if hw < min_half_width:
        hw = min_half_width
        how = f"at least {_multiple(min_half_width) if log2 else f'{min_half_width:.3g}'} from the null"
    if log2:
        hw = float(np.ceil(hw * 2) / 2)
    hw = hw if hw > 0 else 1.0
    lo, hi = c - hw, c + hw
    if bounds is not None and not log2:
        lo, hi = max(lo, bounds[0]), min(hi, bounds[1])
        span = bounds[1] - bounds[0]
        if lo <= bounds[0] + 0.05 * span and hi >= bounds[1] - 0.05 * span:  # nearly the whole range: all of it
            lo, hi, hw = bounds[0], bounds[1], max(c - bounds[0], bounds[1] - c)
            how = "the statistic's whole range"
    clipped = int(((shown < lo) | (shown > hi))[~np.isnan(shown)].sum())
    return Scale(c, hw, lo, hi, log2, unit, clipped, how)


# --- which cells a heatmap shows --------------------------------------------------------------

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

    @property
    def labels_every_head(self) -> bool:
        H = self.n_heads
        return len(self.writer_layers) * H <= LABEL_ALL_HEADS and len(self.responder_layers) * H <= LABEL_ALL_HEADS

    def blocks(self, mask: np.ndarray) -> list["Axes"]:
        """Zoomed blocks of whole layers, each at most ``LABEL_ALL_HEADS`` heads a side, that
        hold at least one value of ``mask`` ``[L, H, L, H]``; none when this heatmap labels every head."""
        if self.labels_every_head:
            return []
        per = max(1, LABEL_ALL_HEADS // self.n_heads)
        cut = lambda layers: [layers[i:i + per] for i in range(0, len(layers), per)]  # noqa: E731
        out = []
        for wl in cut(self.writer_layers):
            for rl in cut(self.responder_layers):
                block = Axes(tuple(wl), tuple(rl), self.n_heads)
                if block.grid(mask).any():
                    out.append(block)
        return out

    def name(self) -> str:
        span = lambda ls: f"{ls[0]}" if len(ls) == 1 else f"{ls[0]}-{ls[-1]}"  # noqa: E731
        return f"writer layers {span(self.writer_layers)} \u00d7 responder layers {span(self.responder_layers)}"

    def stem(self) -> str:
        return f"w{self.writer_layers[0]}-{self.writer_layers[-1]}_r{self.responder_layers[0]}-{self.responder_layers[-1]}"


# --- drawing ------------------------------------------------------------------------------------

@dataclass
class Drawn:
    """What a heatmap file shows, for its caption."""

    files: dict[str, Path]
    heads_labelled: bool
    cell_text: bool = False
    extent: tuple[float, float, float, float] = (0, 0, 1, 1)  # data area in the PNG: left, top, right, bottom (fractions)
    rows: list = field(default_factory=list)  # [(layer, head)] down
    cols: list = field(default_factory=list)  # [(layer, head)] across


def _cell_inches(n_rows: int, n_cols: int) -> float:
    return float(np.clip(7.5 / max(n_rows, n_cols), 0.06, 0.26))


@dataclass(frozen=True)
class _Layout:
    """A heatmap figure laid out in inches (no tight bounding box: one draw per file)."""

    width: float
    height: float
    left: float
    bottom: float
    axes_w: float
    axes_h: float

    def axes_rect(self) -> list[float]:
        return [self.left / self.width, self.bottom / self.height, self.axes_w / self.width, self.axes_h / self.height]

    def extent(self) -> tuple[float, float, float, float]:
        """The data area in the image: left, top, right, bottom as fractions (top-left origin)."""
        top = self.height - self.bottom - self.axes_h
        return (self.left / self.width, top / self.height, (self.left + self.axes_w) / self.width,
                (top + self.axes_h) / self.height)


def _layout(n_rows: int, n_cols: int, title: str, right: float) -> _Layout:
    """Margins for tick labels ``10.11`` or ``layer 10`` and the axis label (left, bottom), the
    title (top) and the colour bar or legend (``right``), in inches."""
    cell = _cell_inches(n_rows, n_cols)
    left = bottom = 0.95
    top = 0.45
    aw, ah = n_cols * cell, n_rows * cell
    width = max(left + aw + right, 0.2 + 0.092 * len(title), 4.8)
    return _Layout(width, bottom + ah + top, left, bottom, aw, ah)


def _head_ticks(ax, axis: str, layers: tuple[int, ...], H: int) -> None:
    n = len(layers) * H
    set_ticks = ax.set_xticks if axis == "x" else ax.set_yticks
    set_labels = ax.set_xticklabels if axis == "x" else ax.set_yticklabels
    if n <= LABEL_ALL_HEADS:
        set_ticks(np.arange(n))
        labels = [f"{l}.{h}" for l in layers for h in range(H)]
        fs = 7 if n <= 32 else (6 if n <= 56 else 5.5)
        set_labels(labels, fontsize=fs, rotation=90 if axis == "x" else 0, family="DejaVu Sans Mono")
    else:
        set_ticks([i * H + (H - 1) / 2 for i in range(len(layers))])
        set_labels([f"layer {l}" for l in layers], fontsize=7, rotation=90 if axis == "x" else 0)
    ax.tick_params(axis=axis, length=2, which="both")


def _frame(ax, axes: Axes, title: str) -> None:
    H = axes.n_heads
    _head_ticks(ax, "x", axes.responder_layers, H)
    _head_ticks(ax, "y", axes.writer_layers, H)
    for i in range(1, len(axes.writer_layers)):
        ax.axhline(i * H - 0.5, color=GRID_COLOUR, lw=0.9)
    for j in range(1, len(axes.responder_layers)):
        ax.axvline(j * H - 0.5, color=GRID_COLOUR, lw=0.9)
    every = lambda layers: len(layers) * H <= LABEL_ALL_HEADS  # noqa: E731
    ax.set_xlabel("responder head (layer.head)" if every(axes.responder_layers)
                  else f"responder head (by layer, {H} heads each; zoomed blocks label every head)")
    ax.set_ylabel("writer head (layer.head)" if every(axes.writer_layers)
                  else f"writer head (by layer, {H} heads each)")
    ax.set_title(title, loc="left")


def _empty_background(ax, n_rows: int, n_cols: int) -> None:
    from matplotlib.patches import Rectangle

    ax.add_patch(Rectangle((-0.5, -0.5), n_cols, n_rows, facecolor=EMPTY_FACE, edgecolor="none",
                           hatch="////", zorder=0))


def _save_fixed(fig, layout: "_Layout", out_dir: Path, stem: str, svg: bool = True) -> tuple[dict[str, Path], tuple]:
    """Write a fixed-layout figure: PNG (palette-quantised, small) and SVG, one draw each; and its extent."""
    return _save(fig, out_dir, stem, svg), layout.extent()


def _quantise(path: Path) -> None:
    """Rewrite a PNG with a 256-colour palette (a third of the bytes; the page inlines every figure)."""
    from PIL import Image

    with Image.open(path) as im:
        small = im.convert("RGB").quantize(colors=256, method=Image.Quantize.FASTOCTREE, dither=Image.Dither.NONE)
    palette = np.array(small.getpalette(), dtype=np.uint8).reshape(-1, 3)
    palette[(palette >= 250).all(axis=1)] = 255  # the octree bins white with 250-254: keep the page's white white
    small.putpalette(palette.ravel().tolist())
    small.save(path, optimize=True)


def _save(fig, out_dir: Path, stem: str, svg: bool = True) -> dict[str, Path]:
    """Write a figure laid out by tight_layout as PNG (palette-quantised) and SVG."""
    paths = {}
    for ext in ("png", "svg") if svg else ("png",):
        p = out_dir / f"{stem}.{ext}"
        fig.savefig(p, dpi=PNG_DPI if ext == "png" else None, facecolor="white")
        paths[ext] = p
    _quantise(paths["png"])
    _, plt = _mpl()
    plt.close(fig)
    return paths


def _cell_text(ax, grid_text: np.ndarray, cells, colours_dark, cell_in: float) -> bool:
    """Write text into cells when it fits at a readable size (>= 4.5 pt); return whether it did."""
    if not len(cells):
        return False
    width = max(len(str(grid_text[i, j])) for i, j in cells)
    size = min(9.0, cell_in * 72 * 0.92 / (0.62 * max(width, 1)))
    if size < 4.5:
        return False
    for (i, j), dark in zip(cells, colours_dark):
        ax.text(j, i, grid_text[i, j], ha="center", va="center", fontsize=size, zorder=4,
                color=TEXT_COLOUR if dark else "white", family="DejaVu Sans Mono", fontweight="bold")
    return True


def heatmap(values: np.ndarray, axes: Axes, scale: Scale, out_dir: Path, stem: str, title: str,
            undecided: np.ndarray | None = None, svg: bool = True) -> Drawn:
    """A writer x responder heatmap of a continuous statistic on the diverging ``scale``.

    # values [L, H, L, H] (NaN: no value, hatched); undecided [L, H, L, H] bool: drawn grey
    (the cell's interval contains the null: sampled noise is not painted as a finding).
    """
    _, plt = _mpl()
    from matplotlib.colors import ListedColormap, Normalize

    shown = scale.shown(axes.grid(values))  # [rows, cols]
    c, hw = scale.centre, scale.half_width
    lay = _layout(*shown.shape, title, right=1.75)
    fig = plt.figure(figsize=(lay.width, lay.height))
    ax = fig.add_axes(lay.axes_rect())
    _empty_background(ax, *shown.shape)
    draw = np.where(np.isnan(shown), np.nan, np.clip(shown, scale.lo - 1e-9 * hw, scale.hi + 1e-9 * hw))
    grey = np.zeros(shown.shape, bool) if undecided is None else axes.grid(undecided) & ~np.isnan(shown)
    draw[grey] = np.nan
    im = ax.imshow(np.ma.masked_invalid(draw), cmap=diverging_colormap(), norm=Normalize(c - hw, c + hw),
                   interpolation="nearest", aspect="equal", zorder=1)
    if grey.any():
        ax.imshow(np.ma.masked_where(~grey, np.ones(shown.shape)), cmap=ListedColormap([UNDECIDED_COLOUR]),
                  interpolation="nearest", aspect="equal", zorder=2, vmin=0, vmax=2)
    out = (shown < scale.lo) | (shown > scale.hi)
    out &= ~np.isnan(shown) & ~grey
    if out.any():
        ii, jj = np.nonzero(out)
        cell_pt = _cell_inches(*shown.shape) * 72
        ax.scatter(jj, ii, s=max(1.0, (cell_pt * 0.28) ** 2), c="white", edgecolors=GRID_COLOUR,
                   linewidths=0.3, zorder=3)
    _frame(ax, axes, title)
    below, above = bool((shown < scale.lo).any()), bool((shown > scale.hi).any())
    extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get((below, above), "neither")
    bar_h = min(lay.axes_h * 0.9, 4.5)
    cax = fig.add_axes([(lay.left + lay.axes_w + 0.18) / lay.width,
                        (lay.bottom + (lay.axes_h - bar_h) / 2) / lay.height, 0.14 / lay.width, bar_h / lay.height])
    cb = fig.colorbar(im, cax=cax, extend=extend, boundaries=np.linspace(scale.lo, scale.hi, 257))
    cb.set_label(scale.unit, fontsize=8)
    lo, hi = scale.lo, scale.hi
    if scale.log2:
        step = max(0.5, np.ceil((hi - lo) / 8 * 2) / 2)
        ticks = [t for t in np.arange(np.ceil(lo / step) * step, hi + 1e-9, step)]
    else:
        from matplotlib.ticker import MaxNLocator

        ticks = [t for t in MaxNLocator(6).tick_values(lo, hi) if lo - 1e-12 <= t <= hi + 1e-12]
    ticks = sorted([t for t in ticks if abs(t - c) > 0.06 * (hi - lo)] + [c])
    cb.set_ticks(ticks)
    cb.set_ticklabels([scale.value_text(t) + (" null" if t == c else "") for t in ticks])
    cb.ax.axhline(c, color=TEXT_COLOUR, lw=1.2)
    cb.ax.tick_params(labelsize=7)
    files, extent = _save_fixed(fig, lay, out_dir, stem, svg)
    return Drawn(files, axes.labels_every_head, False, extent, axes.rows(), axes.cols())


def category_map(codes: np.ndarray, axes: Axes, out_dir: Path, stem: str, title: str,
                 categories: dict[int, str], colours: dict[int, str], annotations: np.ndarray | None = None,
                 annotation_note: str = "", svg: bool = True) -> Drawn:
    """A writer x responder map of categories (labels, predictions).

    # codes [L, H, L, H] int; codes not in ``categories`` are drawn empty. ``categories``: code -> word
    (the legend), ``colours``: code -> colour (``LABEL_COLOURS`` or ``PREDICTION_COLOURS``).
    ``annotations`` [L, H, L, H] of strings, written into non-empty cells when the cells are
    big enough for readable text (``Drawn.cell_text`` says whether they were).
    """
    _, plt = _mpl()
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    grid = axes.grid(codes)  # [rows, cols]
    keys = list(categories)
    faces = [colours.get(k, NOT_COMPUTED_COLOUR) for k in keys]
    index = np.full(grid.shape, np.nan)
    for i, k in enumerate(keys):
        index[grid == k] = i
    cmap = ListedColormap(faces).with_extremes(bad=(0, 0, 0, 0))
    lay = _layout(*grid.shape, title, right=2.3)
    fig = plt.figure(figsize=(lay.width, lay.height))
    ax = fig.add_axes(lay.axes_rect())
    _empty_background(ax, *grid.shape)
    ax.imshow(np.ma.masked_invalid(index), cmap=cmap, norm=BoundaryNorm(np.arange(len(keys) + 1) - 0.5, len(keys)),
              interpolation="nearest", aspect="equal", zorder=1)
    _frame(ax, axes, title)
    handles = [Patch(facecolor=c, edgecolor=GRID_COLOUR, lw=0.5, label=categories[k]) for k, c in zip(keys, faces)]
    handles.append(Patch(facecolor=EMPTY_FACE, edgecolor=GRID_COLOUR, hatch="////", lw=0.5,
                         label="no value (not a pair / not scanned)"))
    wrote = False
    if annotations is not None:
        ann = axes.grid(annotations)
        cells = [(int(i), int(j)) for i, j in zip(*np.nonzero(ann != "")) if np.isfinite(index[i, j])]
        dark = [_dark_text(faces[int(index[i, j])]) for i, j in cells]
        wrote = _cell_text(ax, ann, cells, dark, _cell_inches(*grid.shape))
        if wrote:
            handles.append(Patch(facecolor="none", edgecolor="none", label=annotation_note))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=7, frameon=False)
    files, extent = _save_fixed(fig, lay, out_dir, stem, svg)
    return Drawn(files, axes.labels_every_head, wrote, extent, axes.rows(), axes.cols())


def head_bars(copying_score: np.ndarray, ov_mean_percentile: np.ndarray, ov_label: np.ndarray,
              out_dir: Path, stem: str, svg: bool = True) -> dict[str, Path]:
    """Per-head bars: the eigenvalue copying score and the OV diagonal's mean percentile.

    # copying_score [L, H], ov_mean_percentile [L, H], ov_label [L, H] (+1/-1/0)
    """
    _, plt = _mpl()
    from matplotlib.patches import Patch

    L, H = copying_score.shape
    x = np.array([l * (H + 1) + h for l in range(L) for h in range(H)], dtype=float)  # a gap between layers
    colours = [LABEL_COLOURS.get(int(v), NOT_COMPUTED_COLOUR) for v in ov_label.ravel()]
    width = float(np.clip(0.16 * L * (H + 1), 7.0, 22.0))
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
    a2.set_xticks(x)
    a2.set_xticklabels([f"{l}.{h}" for l in range(L) for h in range(H)], rotation=90,
                       fontsize=6 if L * H <= 96 else 5, family="DejaVu Sans Mono")
    a2.set_xlabel("head (layer.head)")
    fig.suptitle("Each head's own write: copying or suppressing the attended token", x=0.01, ha="left",
                 fontsize=11, fontweight="bold")
    missing = not bool(np.isin(ov_label, (1, 0, -1)).all())
    shown = [(LABEL_COLOURS[code], f"OV label: {HEAD_LABEL_WORDS[code]}") for code in (1, -1, 0)]
    if missing:
        shown.append((NOT_COMPUTED_COLOUR, "no profile (head not in the scan)"))
    a1.legend(handles=[Patch(facecolor=colour, edgecolor=GRID_COLOUR, lw=0.4, label=label) for colour, label in shown],
              loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=len(shown), fontsize=7, frameon=False)
    fig.tight_layout()
    return _save(fig, out_dir, stem, svg)


def head_views(views: list[dict], out_dir: Path, stem: str, min_effect: float, svg: bool = True) -> dict[str, Path]:
    """For each chosen head, its pairs' mean percentile with 95 % intervals, one panel per view.

    ``views``: dicts with ``title``, ``labels`` (other head of each pair), ``mean``, ``low``,
    ``high``, ``label`` (+1/-1/0 per pair), all 1-D of one length.
    """
    _, plt = _mpl()
    n = max(1, len(views))
    widest = max([len(v["labels"]) for v in views] + [8])
    fig, axs = plt.subplots(n, 1, figsize=(float(np.clip(0.09 * widest + 2.0, 6.0, 15.0)), 2.3 * n + 0.4),
                            squeeze=False)
    for ax, v in zip(axs[:, 0], views):
        x = np.arange(len(v["labels"]))
        ax.axhspan(0.5 - min_effect, 0.5 + min_effect, color="#eef0f3", zorder=0)
        ax.axhline(0.5, color=TEXT_COLOUR, lw=0.8, zorder=1)
        c = [LABEL_COLOURS[int(l)] if int(l) in (1, -1) else "#8a94a3" for l in v["label"]]
        lo = np.asarray(v["mean"]) - np.asarray(v["low"])
        hi = np.asarray(v["high"]) - np.asarray(v["mean"])
        ax.errorbar(x, v["mean"], yerr=np.nan_to_num(np.vstack([lo, hi])), fmt="none", ecolor="#5b6675", lw=0.8,
                    capsize=1.5, zorder=2)
        ax.scatter(x, v["mean"], c=c, s=14, zorder=3, edgecolors=GRID_COLOUR, linewidths=0.3)
        ax.set_xlim(-0.8, len(x) - 0.2)
        ax.set_ylim(0, 1)
        ax.set_xticks(x)
        ax.set_xticklabels(v["labels"], rotation=90, fontsize=6 if len(x) <= 96 else 5, family="DejaVu Sans Mono")
        ax.set_ylabel("mean percentile", fontsize=7)
        ax.set_title(v["title"], fontsize=9, loc="left")
        ax.tick_params(labelsize=6)
        ax.spines[["top", "right"]].set_visible(False)
    fig.tight_layout()
    return _save(fig, out_dir, stem, svg)


def histograms(hists: list[np.ndarray], titles: list[str], out_dir: Path, stem: str,
               suptitle: str = "Percentile of the diagonal, pair by pair", svg: bool = True) -> dict[str, Path]:
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
    return _save(fig, out_dir, stem, svg)


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


def _multiple(log2_value: float) -> str:
    if not np.isfinite(log2_value):
        return "\u00d70" if log2_value < 0 else "\u00d7\u221e"
    v = 2.0 ** log2_value
    if abs(log2_value) < 1e-9:
        return "\u00d71"
    return f"\u00d7{v:.3g}" if v >= 1 else f"\u00d71/{1 / v:.3g}"
