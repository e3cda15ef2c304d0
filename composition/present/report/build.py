"""``composition report``: figures, CSV tables and one self-contained ``index.html``.

Layout of the report directory::

    index.html          the page: every figure inlined as a PNG data URI, the interactive
                        view's data as inline JSON and its script inline; no network access
    figures/NAME.png    each overview figure as PNG (120 dpi) ...
    figures/NAME.svg    ... and as SVG (text kept as text), for papers
    figures/zoom/*.png  zoomed layer blocks of the heatmaps too large to label every head
    tables/*.csv        pairs, heads, model-space scores, shortlist, compensation, sampling

Modules: ``build`` (this: what is drawn, with which scale and caption), ``figures``
(matplotlib), ``tables`` (CSV), ``interactive`` (the inline explorer), ``page`` (HTML).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ...errors import CompositionError
from ...interpret.heads import KINDS, HeadData, load_heads
from ...compose import sides
from ...interpret.predict import PREDICTION_WORDS, scan_compensation, shortlist, side_notes
from ...store.atomic import write_bytes
from ...store.scanfile import Scan, load_scan, require_complete
from . import figures as fg
from .csvfiles import write_csv
from .tables import with_pair_ids, write_tables

MAX_HISTOGRAMS = 12
MAX_HEAD_VIEWS = 4


@dataclass
class Figure:
    key: str
    kind: str  # "heatmap", "bars", "histograms", "head-views"
    title: str
    caption: str
    files: dict[str, Path]
    zooms: list = field(default_factory=list)  # [(block name, Drawn)]
    drawn: object = None  # fg.Drawn of a heatmap overview


@dataclass
class Heatmap:
    """One statistic drawn writer x responder: the static figures and the interactive view share it."""

    key: str
    title: str
    caption: str
    values: np.ndarray  # [L, H, L, H]; NaN (or codes outside ``categories``): no value
    axes: fg.Axes
    scale: fg.Scale | None = None  # continuous statistics
    categories: dict | None = None  # category maps: code -> word
    colours: dict | None = None  # category maps: code -> colour (fg.LABEL_COLOURS, fg.PREDICTION_COLOURS)
    undecided: np.ndarray | None = None  # [L, H, L, H] bool: interval contains the null (drawn grey)
    annotations: np.ndarray | None = None  # [L, H, L, H] str
    annotation_note: str = ""
    source: str = "scan"  # "scan": token space (scanned pairs); "model": model space (every pair)


@dataclass(frozen=True)
class SideWords:
    """What the report calls a side's labels, whether they feed the compensation prediction, and
    the notes every page showing them carries (the side's meaning, the prediction note, the readout)."""

    name: str  # "query side", "key side", "query side, unembed part of the write"
    labels: dict  # label code -> word (+1, -1, 0, -128)
    feeds_compensation: bool
    notes: tuple[str, ...] = ()


def side_words(scan: Scan) -> SideWords:
    """The one place the report looks up a side's words: the sides registry (composition.compose.sides)."""
    side = sides.for_scan(scan.attrs)
    labels = {code: side.words[code] for code in (1, -1, 0, -128)}
    return SideWords(side.title, labels, side.feeds_prediction, tuple(side_notes(scan)))


@dataclass(frozen=True)
class SamplingInfo:
    """Which rows the scan evaluated (from the scan's attributes and rows_evaluated)."""

    sampled: bool
    vocab: int
    rows: int | None
    seed: int | None
    looks: tuple[int, ...]
    until_ci: float | None
    evaluated_min: int
    evaluated_max: int

    def sentence(self) -> str:
        if not self.sampled:
            return (f"Every one of the {self.vocab:,} rows was evaluated for every pair; "
                    "the intervals have zero width.")
        ev = (f"{self.evaluated_min:,}" if self.evaluated_min == self.evaluated_max
              else f"{self.evaluated_min:,}\u2013{self.evaluated_max:,}")
        looks = ", ".join(f"{n:,}" for n in self.looks)
        how = (f"sequential looks at {looks} rows, stopping when every interval is narrower than {self.until_ci}"
               if self.until_ci is not None else f"one look of {looks} rows")
        return (f"{ev} of {self.vocab:,} rows evaluated per pair (a uniform sample without "
                f"replacement, seed {self.seed}; {how}). Statistics carry sampling noise: read each value with "
                "its 95 % interval; intervals and labels allow for the number of looks.")

    def short(self) -> str:
        if not self.sampled:
            return f"exact: all {self.vocab:,} rows per pair"
        ev = (f"{self.evaluated_min:,}" if self.evaluated_min == self.evaluated_max
              else f"{self.evaluated_min:,}\u2013{self.evaluated_max:,}")
        return f"sampled: {ev} of {self.vocab:,} rows per pair, seed {self.seed}, looks {'/'.join(map(str, self.looks))}"

    def row(self) -> dict:
        return {"sampled": self.sampled, "vocabulary": self.vocab, "rows": self.rows if self.rows else self.vocab,
                "seed": self.seed if self.sampled else "", "looks": " ".join(map(str, self.looks)),
                "until_ci": self.until_ci if self.until_ci is not None else "",
                "rows_evaluated_min": self.evaluated_min, "rows_evaluated_max": self.evaluated_max}


def sampling_info(scan: Scan) -> SamplingInfo:
    from ...score.sampling import DEFAULT_FIRST_ROWS, Sampling

    a = scan.attrs
    V = int(a.get("keys_per_row", a.get("vocab_size", 0)))
    try:
        opts = json.loads(a.get("options", "{}"))
    except (TypeError, ValueError):
        opts = {}
    rows, until = opts.get("rows"), opts.get("until_ci")
    sampled = rows is not None or until is not None
    ev = scan.rows_evaluated[scan.done]
    lo, hi = (int(ev.min()), int(ev.max())) if ev.size else (0, 0)
    if sampled:
        plan = Sampling(rows, int(opts.get("seed", 0)), until, int(opts.get("first_rows") or DEFAULT_FIRST_ROWS))
        looks = tuple(plan.schedule(V))
    else:
        looks = (V,)
    return SamplingInfo(sampled, V, rows, int(opts.get("seed", 0)) if sampled else None, looks, until, lo, hi)


def load_report_inputs(scan_path: str | os.PathLike, heads_path: str | os.PathLike | None = None,
                       command: str | None = None) -> tuple[Scan, HeadData]:
    """The scan and its head data (from the scan file, or from a separate heads file).

    An in-progress scan is refused with a sentence naming ``command`` (labels, head profiles and
    model-space scores exist only once the whole scan is done).
    """
    scan = require_complete(load_scan(scan_path), command)
    source = heads_path or scan_path
    heads = load_heads(source)
    if heads is None:
        raise CompositionError(
            f"{source} has no head profiles (/heads, /model_space); add them with "
            f"'composition heads CHECKPOINT --into {scan_path}' or pass --heads FILE.h5.")
    fp_scan = scan.attrs.get("weights_fingerprint")
    fp_heads = heads.heads_attrs.get("weights_fingerprint")
    if fp_scan and fp_heads and fp_scan != fp_heads:
        raise CompositionError(f"the head profiles in {source} were computed from other weights than {scan_path}.")
    if heads.heads["label"].shape != scan.label.shape[:2]:
        raise CompositionError(f"the head profiles in {source} do not match the model of {scan_path}.")
    return scan, heads


def write_report(scan_path: str | os.PathLike, out_dir: str | os.PathLike,
                 heads_path: str | os.PathLike | None = None, part_paths=(), svg: bool = True) -> Path:
    """Write the report of a scan into ``out_dir``; return the path of ``index.html``.

    ``svg``: also write each overview figure as SVG (for papers; about a third of the build time).
    ``part_paths``: query-part scans (``unembed``, ``rest``) of the same model; the report then
    has a mediation table of the labelled pairs (``composition.interpret.predict.mediation_rows``).
    """
    from ...interpret.predict import mediation_rows
    from . import interactive, page

    scan, heads = load_report_inputs(scan_path, heads_path, "report")
    parts = {}
    for path in part_paths:
        part = load_scan(path)
        parts[str(part.attrs.get("query_part"))] = part
    mediation = mediation_rows(scan, parts) if parts else []
    out = Path(out_dir)
    try:
        for sub in ("figures", "figures/zoom", "tables"):
            (out / sub).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CompositionError(f"cannot create the report directory {out} ({exc.strerror}).") from None
    try:
        words = side_words(scan)
        sampling = sampling_info(scan)
        candidates = shortlist(scan, heads)
        comp = scan_compensation(scan, heads)  # not computed unless the scan's side feeds the prediction
        maps = heatmaps(scan, heads, comp, words, sampling)
        figs = ([_draw(m, out / "figures", svg) for m in maps]
                + _other_figures(scan, heads, candidates, words, out / "figures", svg))
        tables = write_tables(scan, heads, candidates, out / "tables", sampling.row())
        if mediation:
            tables["mediation"] = write_csv(out / "tables" / "mediation.csv", with_pair_ids(mediation))
        if scan.group_names:
            tables["group_pairs"] = write_csv(out / "tables" / "group_pairs.csv", scan.group_pairs())
        if "references" in scan.groups:
            tables["references"] = write_csv(out / "tables" / "references.csv", page.references_rows(scan))
        explorer = interactive.section(scan, comp, maps, words, sampling)
        html = page.render(scan, heads, candidates, comp, figs, tables, out, words, sampling, explorer, mediation)
        html = html.replace('<h2 id="pairs">', page.beyond_html(scan, words) + '<h2 id="pairs">', 1)
        index = write_bytes(out / "index.html", html.encode("utf-8"), what="report page")
    except OSError as exc:
        raise CompositionError(f"cannot write the report into {out} ({exc.strerror or exc}).") from None
    return index


# ---------------------------------------------------------------------------
# What is drawn
# ---------------------------------------------------------------------------

def heatmaps(scan: Scan, heads: HeadData, comp: dict, words: SideWords, sampling: SamplingInfo) -> list[Heatmap]:
    """Every writer x responder statistic of the report, with its scale and caption."""
    a = scan.attrs
    n = int(a["keys_per_row"])
    ks = [int(k) for k in scan.k]
    k, j = ks[-1], len(ks) - 1
    done = scan.done
    scan_axes = fg.Axes.from_mask(done)
    L, H = scan.label.shape[:2]
    pair_mask = np.zeros((L, H, L, H), bool)
    for lU in range(L):
        pair_mask[lU, :, lU + 1:, :] = True
    ms_axes = fg.Axes.from_mask(pair_mask)
    raising, lowering = words.labels[1], words.labels[-1]
    min_effect = float(a.get("min_effect", 0.05))
    maps: list[Heatmap] = []

    mp = np.where(done, scan.mean_percentile, np.nan)
    maps.append(Heatmap(
        "mean_percentile", f"Mean percentile of the diagonal ({words.name})",
        f"Vermillion: writing a token makes the responder attend to that token more than to other tokens "
        f"({raising}); blue: less ({lowering}); near-white: what the null model expects (0.5). The scale "
        f"never spans less than \u00b1{2 * min_effect:g} (twice the label threshold), so effects below the "
        "threshold stay pale.",
        mp, scan_axes, fg.colour_scale(mp, 0.5, "mean percentile of the diagonal (1 = top, 0 = bottom)",
                                       min_half_width=min(0.5, 2 * min_effect), bounds=(0.0, 1.0))))
    for which, word, lo_name, hi_name in (("top", "highest", "ci_low", "ci_high"),
                                          ("bottom", "lowest", "bottom_ci_low", "bottom_ci_high")):
        share = (scan.top_share if which == "top" else scan.bottom_share)[..., j]
        e = np.where(done, share / (k / n), np.nan)
        low, high = scan.arrays[lo_name][..., j], scan.arrays[hi_name][..., j]
        undecided = done & (low <= k / n) & (k / n <= high) & (low < high)  # exact: a point, drawn as it is
        n_grey = int(undecided.sum())
        grey = (f"Grey: the share's 95 % interval contains the null {k}/n = {k / n:.3g}, so the cell is not told "
                f"apart from chance ({n_grey:,} of {int(done.sum()):,} pairs; {sampling.short()})."
                if sampling.sampled else "Exact scan: the intervals are points, so no cell is greyed.")
        maps.append(Heatmap(
            f"{which}_{k}_enrichment", f"{which.capitalize()}-{k} enrichment",
            f"How much more often than chance the written token is among the {k} {word}-scoring keys of its "
            f"own row: the {which}-{k} share divided by its null value {k}/n, on a log scale. {grey}",
            e, scan_axes, fg.colour_scale(np.where(undecided, np.nan, e), 1.0,
                                          f"{which}-{k} share \u00f7 null {k}/n (log scale)", log2=True,
                                          min_half_width=1.0),
            undecided=undecided))
    maps.append(Heatmap(
        "pair_labels", "Pair labels",
        f"Labelled pairs: Benjamini-Hochberg q \u2264 {a['fdr']} over all scanned pairs and "
        f"|mean percentile \u2212 0.5| \u2265 {a['min_effect']}.",
        scan.label, scan_axes, categories={code: words.labels[code] for code in (1, -1, 0)},
        colours=fg.LABEL_COLOURS))
    if words.feeds_compensation:
        signs = np.vectorize(lambda u, q, r: "".join("+" if s > 0 else ("\u2212" if s < 0 else "0")
                                                     for s in (u, q, r)))
        ann = np.where(np.isin(comp["prediction"], (-1, 1)),
                       signs(comp["s_writer"], comp["s_response"], comp["s_responder"]), "")
        maps.append(Heatmap(
            "compensation", "Compensation predictions",
            "Prediction from the three signs (writer's own write s_U, responder's response s_QK, responder's "
            "write s_R): purple compensating (product < 0, predicts self-repair), amber reinforcing "
            "(product > 0), light grey none (a neutral sign).",
            comp["prediction"], scan_axes, categories={code: PREDICTION_WORDS[code] for code in (-1, 1, 0)},
            colours=fg.PREDICTION_COLOURS,
            annotations=ann, annotation_note="cell text: signs s_U s_QK s_R"))
    ms = heads.model_space
    draws = heads.model_space_attrs["baseline_draws"]
    for kind in KINDS:
        mean, sd = heads.baseline(kind)
        v = ms[f"{kind}_composition"]
        maps.append(Heatmap(
            f"{kind}_composition", f"{kind.upper()}-composition score (model space)",
            f"Model-space {kind.upper()}-composition score of every pair; near-white is the mean score of Gaussian "
            f"factors of the same shapes ({mean:.4f} \u00b1 {sd:.4f} sd over {draws} draws).",
            v, ms_axes, fg.colour_scale(v, mean, f"{kind.upper()}-composition score; null: Gaussian baseline",
                                        min_half_width=3 * sd, bounds=(0.0, 1.0)), source="model"))
    for kind, side in (("q", "query"), ("k", "key"), ("v", "value")):
        rm = ms[f"kernel_random_mean_{kind}"]
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = ms[f"projection_kernel_{kind}"] / rm
        const = np.unique(rm[np.isfinite(rm)])
        note = f" (ab/d = {const[0]:.3g} for every pair)" if const.size == 1 else ""
        maps.append(Heatmap(
            f"projection_kernel_{kind}", f"Projection kernel, {side} side",
            f"Sum of squared cosines of the principal angles between the writer's write subspace and the "
            f"responder's {side} read subspace, divided by its mean ab/d for random subspaces{note}.",
            ratio, ms_axes, fg.colour_scale(ratio, 1.0, "projection kernel \u00f7 random mean ab/d (log scale)",
                                            log2=True, min_half_width=1.0), source="model"))
    return maps


def _draw(m: Heatmap, out: Path, svg: bool = True) -> Figure:
    """The overview of a heatmap, and its zoomed blocks when the overview cannot label every head."""
    def one(axes: fg.Axes, stem: str, title: str, svg: bool) -> fg.Drawn:
        if m.categories is not None:
            return fg.category_map(m.values, axes, out, stem, title, m.categories, m.colours, m.annotations,
                                   m.annotation_note, svg=svg)
        return fg.heatmap(m.values, axes, m.scale, out, stem, title, m.undecided, svg=svg)

    overview = one(m.axes, m.key, m.title, svg)
    present = (np.isin(m.values, list(m.categories)) if m.categories is not None else ~np.isnan(m.values))
    zooms = [(b.name(), one(b, f"zoom/{m.key}_{b.stem()}", f"{m.title}: {b.name()}", False))
             for b in m.axes.blocks(present)]
    parts = [m.caption]
    if m.scale is not None:
        text = m.scale.range_text()
        parts.append(text[0].upper() + text[1:] + ".")
    if m.annotations is not None:
        texted = [overview.cell_text] + [d.cell_text for _, d in zooms]
        if all(texted):
            parts.append("Cell text: the three signs s_U s_QK s_R of each predicting pair.")
        elif any(texted):
            parts.append("The three signs s_U s_QK s_R are printed in the cells of the zoomed blocks only "
                         "(the overview's cells are too small); hover in the explorer for any cell.")
        else:
            parts.append("The cells are too small for text at this size: the signs are in compensation.csv, "
                         "the table below and the explorer's hover.")
    parts.append("Every head is labelled layer.head." if overview.heads_labelled else
                 f"The overview labels layers; the {len(zooms)} zoomed blocks below label every head.")
    return Figure(m.key, "heatmap", m.title, " ".join(parts), overview.files, zooms, overview)


def _other_figures(scan: Scan, heads: HeadData, candidates, words: SideWords, out: Path,
                   svg: bool = True) -> list[Figure]:
    figs = []
    hp = heads.heads
    figs.append(Figure(
        "head_copying", "bars", "Per-head copying",
        "Top: eigenvalue copying score of each head's OV circuit (1: pure copying, \u22121: pure suppression). "
        "Bottom: mean percentile of the OV token matrix's diagonal, whose label (bar colour) uses the "
        "same null and FDR rule as the pairs.",
        fg.head_bars(hp["eigen_copying_score"], hp["mean_percentile"], hp["label"], out, "head_copying", svg)))
    views = []
    for c in candidates[:MAX_HEAD_VIEWS]:
        for role in ("responder", "writer"):
            v = head_view(scan, c.head, role)
            if v["labels"]:
                v["title"] = f"{c.label} ({c.kind}) as {role}: mean percentile against every {v['other']}"
                views.append(v)
    if views:
        figs.append(Figure(
            "head_views", "head-views", "Responder and writer views of the shortlisted heads",
            "Each shortlisted head's mean percentile against every writer it was scanned with (as responder) and "
            "every responder (as writer), with 95 % intervals (zero width in an exact scan); vermillion "
            f"{words.labels[1]}, blue {words.labels[-1]}, grey neutral; the band marks |mean percentile \u2212 0.5| "
            "below the effect threshold. The explorer above draws the same view for any head.",
            fg.head_views(views, out, "head_views", float(scan.attrs.get("min_effect", 0.05)), svg)))
    labelled = np.argwhere(np.isin(scan.label, (-1, 1)))
    if labelled.size:
        order = sorted(map(tuple, labelled), key=lambda i: -abs(scan.mean_percentile[i] - 0.5))[:MAX_HISTOGRAMS]
        titles = [f"{i[0]}.{i[1]} \u2192 {i[2]}.{i[3]}  ({words.labels[int(scan.label[i])]})" for i in order]
        figs.append(Figure(
            "pair_histograms", "histograms", "Percentile histograms of the labelled pairs",
            "Fraction of evaluated rows per percentile bin; the dashed line is the uniform null. "
            f"The {len(order)} labelled pairs with the largest effect; the explorer shows any pair's histogram.",
            fg.histograms([scan.histogram[i] for i in order], titles, out, "pair_histograms", svg=svg)))
    return figs


def head_view(scan: Scan, head: tuple[int, int], role: str) -> dict:
    """One head's scanned pairs as ``role`` ("responder": against every writer; "writer": against
    every responder): other head labels, mean percentile, its 95 % interval and the label."""
    l, h = head
    if role == "responder":
        done, sel = scan.done[:, :, l, h], (slice(None), slice(None), l, h)
    else:
        done, sel = scan.done[l, h], (l, h)
    idx = np.argwhere(done)  # [n, 2]
    pick = lambda name: scan.arrays[name][sel][tuple(idx.T)] if idx.size else np.zeros(0)  # noqa: E731
    return {"other": "writer" if role == "responder" else "responder",
            "labels": [f"{a}.{b}" for a, b in idx], "mean": pick("mean_percentile"),
            "low": pick("mean_ci_low"), "high": pick("mean_ci_high"), "label": pick("label")}
