"""``composition report``: figures, CSV tables and one self-contained ``index.html``.

Layout of the report directory::

    index.html          the page; every figure inlined as a PNG data URI, no network access
    figures/NAME.png    each figure as PNG (120 dpi) ...
    figures/NAME.svg    ... and as SVG (text kept as text)
    tables/*.csv        pairs, heads, model-space scores, shortlist, compensation predictions
"""

from __future__ import annotations

import base64
import html
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ...errors import CompositionError
from ...interpret.heads import HEAD_LABEL_WORDS, KINDS, HeadData, load_heads
from ...compose import sides
from ...interpret.predict import (PREDICTION_WORDS, Candidate, pair_table, scan_compensation, shortlist,
                       shortlist_rows, side_notes)
from ...store.scanfile import CAUTION, Scan, load_scan
from ...score.stats import LABEL_NOT_COMPUTED
from . import figures as fg
from .csvfiles import write_csv

MAX_HISTOGRAMS = 12
MAX_TABLE_ROWS = 60


@dataclass
class Figure:
    key: str
    kind: str  # "heatmap", "bars", "histograms"
    title: str
    caption: str
    files: dict[str, Path]


def load_report_inputs(scan_path: str | os.PathLike, heads_path: str | os.PathLike | None = None
                       ) -> tuple[Scan, HeadData]:
    """The scan and its head data (from the scan file, or from a separate heads file)."""
    scan = load_scan(scan_path)
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
                 heads_path: str | os.PathLike | None = None, part_paths=()) -> Path:
    """Write the report of a scan into ``out_dir``; return the path of ``index.html``.

    ``part_paths``: query-part scans (``unembed``, ``rest``) of the same model; the report then
    has a mediation table of the labelled pairs (``composition.interpret.predict.mediation_rows``).
    """
    from ...interpret.predict import mediation_rows
    from ...store.scanfile import load_scan

    scan, heads = load_report_inputs(scan_path, heads_path)
    parts = {}
    for path in part_paths:
        part = load_scan(path)
        parts[str(part.attrs.get("query_part"))] = part
    mediation = mediation_rows(scan, parts) if parts else []
    out = Path(out_dir)
    try:
        (out / "figures").mkdir(parents=True, exist_ok=True)
        (out / "tables").mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CompositionError(f"cannot create the report directory {out} ({exc.strerror}).") from None
    try:
        candidates = shortlist(scan, heads)
        comp = scan_compensation(scan, heads)  # "not computed" unless the scan's side feeds the prediction
        figs = _figures(scan, heads, comp, out / "figures")
        tables = _tables(scan, heads, candidates, comp, out / "tables")
        if mediation:
            tables["mediation"] = write_csv(out / "tables" / "mediation.csv", mediation)
        page = _page(scan, heads, candidates, comp, figs, tables, out, mediation)
        index = out / "index.html"
        index.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise CompositionError(f"cannot write the report into {out} ({exc.strerror or exc}).") from None
    return index


# ---------------------------------------------------------------------------
# Figures
# ---------------------------------------------------------------------------

def smoothed_enrichment(share: np.ndarray, rows: np.ndarray, k: int, n: int) -> np.ndarray:
    """``(count + 1/2) / (expected + 1/2)`` with ``count = share * rows``, ``expected = k rows / n``.

    # share [...], rows [...] -> [...]; the half count keeps a zero count from looking like a
    strong depletion when the null expects well under one row.
    """
    rows = rows.astype(np.float64)
    with np.errstate(invalid="ignore"):
        return (share * rows + 0.5) / (k * rows / n + 0.5)


def _side_words(attrs: dict) -> str:
    """``query side``, ``key side``, ``value side``; with the query part when it is not the full write."""
    side, part = attrs.get("side", "query"), attrs.get("query_part", "full")
    return f"{side} side" + ("" if part in (None, "full", "none") else f", {part} part of the write")


def _figures(scan: Scan, heads: HeadData, comp: dict, out: Path) -> list[Figure]:
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
    figs: list[Figure] = []

    def add(key, kind, title, caption, files):
        figs.append(Figure(key, kind, title, caption, files))

    mp = np.where(done, scan.mean_percentile, np.nan)
    add("mean_percentile", "heatmap", "Mean percentile of the diagonal",
        "Brick: writing a token makes the responder attend to that token more than to other tokens "
        "(attention-raising); teal: less (attention-lowering); cream: what the null model expects (0.5).",
        fg.heatmap(mp, scan_axes, out, "mean_percentile", f"Mean percentile of the diagonal ({_side_words(a)})",
                   "mean percentile of the diagonal (1 = top, 0 = bottom)", 0.5, half_width=0.5))
    for which, word in (("top", "highest"), ("bottom", "lowest")):
        share = scan.top_share[..., j] if which == "top" else scan.bottom_share[..., j]
        e = np.where(done, smoothed_enrichment(share, scan.rows_evaluated, k, n), np.nan)
        add(f"{which}_{k}_enrichment", "heatmap", f"{which.capitalize()}-{k} enrichment",
            f"How much more often than chance the written token is among the {k} {word}-scoring keys "
            f"of its own row: the {which}-{k} share divided by its null value {k}/n, on a log scale, "
            f"with half a count added to the observed and expected counts.",
            fg.heatmap(e, scan_axes, out, f"{which}_{k}_enrichment", f"{which.capitalize()}-{k} enrichment",
                       f"{which}-{k} share \u00f7 null {k}/n (log scale, \u00bd-count smoothed)", 1.0, log2=True))
    add("pair_labels", "heatmap", "Pair labels",
        f"Labelled pairs: Benjamini-Hochberg q \u2264 {a['fdr']} over all scanned pairs and "
        f"|mean percentile \u2212 0.5| \u2265 {a['min_effect']}.",
        fg.category_map(scan.label, scan_axes, out, "pair_labels", "Responder labels per pair",
                        {v: sides.for_scan(a).words[v] for v in (1, -1, 0)}))
    signs = np.vectorize(lambda u, q, r: "".join("+" if s > 0 else ("\u2212" if s < 0 else "0") for s in (u, q, r)))
    ann = np.where(np.isin(comp["prediction"], (-1, 1)),
                   signs(comp["s_writer"], comp["s_response"], comp["s_responder"]), "")
    add("compensation", "heatmap", "Compensation map",
        "Prediction from the three signs (writer's own write s_U, responder's response s_QK, responder's "
        "write s_R; printed in the cell in that order): violet compensating (product < 0, predicts "
        "self-repair), gold reinforcing (product > 0), cream none (a neutral sign).",
        fg.category_map(comp["prediction"], scan_axes, out, "compensation", "Compensation predictions",
                        {-1: "compensating", 1: "reinforcing", 0: "none"}, annotations=ann,
                        annotation_note="cell text: signs s_U s_QK s_R"))
    ms = heads.model_space
    draws = heads.model_space_attrs["baseline_draws"]
    for kind in KINDS:
        mean, sd = heads.baseline(kind)
        add(f"{kind}_composition", "heatmap", f"{kind.upper()}-composition score",
            f"Model-space {kind.upper()}-composition score of every pair; cream is the mean score of Gaussian "
            f"factors of the same shapes ({mean:.4f} \u00b1 {sd:.4f} sd over {draws} draws).",
            fg.heatmap(ms[f"{kind}_composition"], ms_axes, out, f"{kind}_composition",
                       f"{kind.upper()}-composition score (model space)",
                       f"{kind.upper()}-composition score (dimensionless); null: Gaussian baseline", mean,
                       bounds=(0.0, 1.0)))
    for kind, side in (("q", "query"), ("k", "key"), ("v", "value")):
        rm = ms[f"kernel_random_mean_{kind}"]
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = ms[f"projection_kernel_{kind}"] / rm
        const = np.unique(rm[np.isfinite(rm)])
        note = f" (ab/d = {const[0]:.3g} for every pair)" if const.size == 1 else ""
        add(f"projection_kernel_{kind}", "heatmap", f"Projection kernel, {side} side",
            f"Sum of squared cosines of the principal angles between the writer's write subspace and "
            f"the responder's {side} read subspace, divided by its mean ab/d for random subspaces{note}.",
            fg.heatmap(ratio, ms_axes, out, f"projection_kernel_{kind}", f"Projection kernel, {side} side",
                       "projection kernel \u00f7 random mean ab/d (log scale)", 1.0, log2=True))
    hp = heads.heads
    add("head_copying", "bars", "Per-head copying",
        "Top: eigenvalue copying score of each head's OV circuit (1: pure copying, \u22121: pure suppression). "
        "Bottom: mean percentile of the OV token matrix's diagonal, whose label (bar colour) uses the "
        "same null and FDR rule as the pairs.",
        fg.head_bars(hp["eigen_copying_score"], hp["mean_percentile"], hp["label"], out, "head_copying"))
    labelled = np.argwhere(np.isin(scan.label, (-1, 1)))
    if labelled.size:
        order = sorted(map(tuple, labelled), key=lambda i: -abs(scan.mean_percentile[i] - 0.5))[:MAX_HISTOGRAMS]
        titles = [f"{i[0]}.{i[1]} \u2192 {i[2]}.{i[3]}  ({sides.for_scan(scan.attrs).words[int(scan.label[i])]})" for i in order]
        add("pair_histograms", "histograms", "Percentile histograms of the labelled pairs",
            "Fraction of evaluated rows per percentile bin; the dashed line is the uniform null. "
            f"The {len(order)} labelled pairs with the largest effect.",
            fg.histograms([scan.histogram[i] for i in order], titles, out, "pair_histograms"))
    return figs


# ---------------------------------------------------------------------------
# CSV tables
# ---------------------------------------------------------------------------

def _tables(scan: Scan, heads: HeadData, candidates: list[Candidate], comp: dict, out: Path) -> dict[str, Path]:
    tables = {}
    pt = pair_table(scan, heads)
    tables["pairs"] = write_csv(out / "pairs.csv", pt)
    tables["heads"] = write_csv(out / "heads.csv", heads.table())
    ms = heads.model_space
    idx = np.argwhere(np.isfinite(ms["q_composition"]))  # [P, 4]
    sel = tuple(idx.T)
    mst = {"writer": np.array([f"{a}.{b}" for a, b in idx[:, :2]]),
           "responder": np.array([f"{a}.{b}" for a, b in idx[:, 2:]])}
    for name in ("q_composition", "k_composition", "v_composition", "projection_kernel_q", "projection_kernel_k",
                 "projection_kernel_v", "kernel_random_mean_q", "kernel_random_mean_k", "kernel_random_mean_v"):
        mst[name] = ms[name][sel]
    tables["model_space"] = write_csv(out / "model_space.csv", mst)
    rows = shortlist_rows(candidates)
    header = ["rank", "kind", "head", "head_ov", "ov_mean_percentile", "ov_q_value", "copying_score", "writer",
              "mean_percentile"] + [c for c in (rows[0] if rows else {}) if c.startswith(("top_share", "bottom_share"))] + [
        "q_value", "writer_ov", "prediction", "q_composition", "q_composition_z", "projection_kernel_q",
        "kernel_random_mean_q"]
    tables["shortlist"] = write_csv(out / "shortlist.csv", rows, header)
    keep = np.isin(pt["prediction"], (-1, 1))
    ct = {name: pt[name][keep] for name in ("writer", "responder", "s_writer", "s_response", "s_responder",
                                             "prediction_word", "mean_percentile", "q_value", "q_composition")}
    tables["compensation"] = write_csv(out / "compensation.csv", ct)
    return tables


# ---------------------------------------------------------------------------
# HTML
# ---------------------------------------------------------------------------

_CSS = """
:root { --ink:#222; --muted:#5f5a52; --rule:#d9d3c7; --paper:#fbfaf7; --card:#ffffff;
        --brick:#b9582a; --teal:#2f7287; --cream:#f1ede4; --violet:#6a4c93; --gold:#d9a21b; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.5 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif; }
header { background: #2b2925; color: #f4f1ea; padding: 22px 32px 18px; }
header h1 { margin: 0 0 4px; font-size: 22px; font-weight: 600; letter-spacing: .2px; }
header p { margin: 0; color: #cfc8ba; font-size: 13px; }
main { max-width: 1180px; margin: 0 auto; padding: 8px 28px 60px; }
nav { margin: 14px 0 8px; font-size: 13px; }
nav a { margin-right: 14px; color: var(--teal); }
h2 { font-size: 18px; margin: 34px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--rule); }
h3 { font-size: 15px; margin: 18px 0 6px; }
.caution { background: #fff4e5; border-left: 5px solid var(--brick); padding: 10px 16px; margin: 16px 0; }
.caution strong { color: #7a2f10; }
.summary { display: flex; flex-wrap: wrap; gap: 10px; margin: 12px 0; }
.summary div { background: var(--card); border: 1px solid var(--rule); border-radius: 6px; padding: 8px 14px; min-width: 150px; }
.summary b { display: block; font-size: 20px; }
.summary span { color: var(--muted); font-size: 12px; }
figure { background: var(--card); border: 1px solid var(--rule); border-radius: 6px; margin: 16px 0; padding: 12px 14px; }
figure img { display: block; max-width: 100%; height: auto; margin: 0 auto; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 8px; }
figcaption a { color: var(--teal); }
figure.missing::after { content: "This figure could not be displayed: its image is missing or broken."; color: #a00; }
table { border-collapse: collapse; margin: 8px 0 4px; font-size: 13px; background: var(--card); }
th, td { border: 1px solid var(--rule); padding: 3px 8px; text-align: right; vertical-align: top; }
th { background: #efebe2; font-weight: 600; }
td.t, th.t { text-align: left; }
tbody tr:nth-child(even) { background: #faf8f3; }
.chip { display: inline-block; padding: 0 6px; border-radius: 3px; font-size: 12px; color: #fff; }
.chip.raising, .chip.copying { background: var(--brick); }
.chip.lowering, .chip.suppressing { background: var(--teal); }
.chip.compensating { background: var(--violet); }
.chip.reinforcing { background: var(--gold); color: #222; }
.chip.not { background: #fff; color: #777; border: 1px dashed var(--rule); }
.chip.neutral, .chip.none { background: var(--cream); color: #444; border: 1px solid var(--rule); }
code, .mono { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 12.5px; }
details { margin: 8px 0; } summary { cursor: pointer; color: var(--teal); }
dl.defs dt { font-weight: 600; margin-top: 10px; }
dl.defs dd { margin: 2px 0 0 18px; }
.muted { color: var(--muted); font-size: 13px; }
.files a { margin-right: 12px; }
"""

_SCRIPT = """
window.addEventListener('load', function () {
  var figures = document.querySelectorAll('figure[data-kind]');
  var loaded = 0, heatmaps = 0, heatmapsLoaded = 0;
  figures.forEach(function (fig) {
    var img = fig.querySelector('img');
    var ok = img && img.complete && img.naturalWidth > 0;
    if (ok) { loaded += 1; } else { fig.classList.add('missing'); }
    if (fig.dataset.kind === 'heatmap') { heatmaps += 1; if (ok) { heatmapsLoaded += 1; } }
  });
  var root = document.documentElement;
  root.setAttribute('data-figures-total', figures.length);
  root.setAttribute('data-figures-loaded', loaded);
  root.setAttribute('data-heatmaps-total', heatmaps);
  root.setAttribute('data-heatmaps-loaded', heatmapsLoaded);
});
"""


def _e(x) -> str:
    return html.escape(str(x))


def _fmt(x, digits: int = 3) -> str:
    """A fixed-point number (percentiles, shares, scores)."""
    if x is None:
        return ""
    x = float(x)
    return f"{x:.{digits}f}" if np.isfinite(x) else "\u2013"


def _fmt_q(q) -> str:
    """A p- or q-value: two decimals down to 0.01, then scientific; exact zeros are underflow."""
    q = float(q)
    if not np.isfinite(q):
        return "\u2013"
    if q == 0.0:
        return "&lt;1e-300"
    return f"{q:.2f}" if q >= 0.01 else f"{q:.1e}"


def _chip(word: str) -> str:
    cls = word.replace("attention-", "")
    return f'<span class="chip {_e(cls)}">{_e(word)}</span>'


def _sign(s: int) -> str:
    return {1: "+1", -1: "\u22121", 0: "0"}.get(int(s), "\u2013")


def _table(header: list[str], rows: list[list[str]], text_cols: int = 1, left_last: bool = False) -> str:
    def cls(i):
        return "t" if i < text_cols or (left_last and i == len(header) - 1) else ""

    th = "".join(f'<th class="{cls(i)}">{_e(h)}</th>' for i, h in enumerate(header))
    body = "".join("<tr>" + "".join(f'<td class="{cls(i)}">{c}</td>' for i, c in enumerate(r)) + "</tr>"
                   for r in rows)
    head = f"<thead><tr>{th}</tr></thead>" if any(header) else ""
    return f"<table>{head}<tbody>{body}</tbody></table>"


def _figure_html(fig: Figure, out: Path) -> str:
    data = base64.b64encode(fig.files["png"].read_bytes()).decode("ascii")
    rel = {ext: p.relative_to(out).as_posix() for ext, p in fig.files.items()}
    return (f'<figure id="fig-{_e(fig.key)}" data-kind="{_e(fig.kind)}">'
            f'<img src="data:image/png;base64,{data}" alt="{_e(fig.title)}">'
            f'<figcaption><b>{_e(fig.title)}.</b> {_e(fig.caption)} '
            f'<a href="{_e(rel["png"])}">PNG</a> \u00b7 <a href="{_e(rel["svg"])}">SVG</a></figcaption></figure>')


def _mediation_html(rows: list[dict]) -> str:
    """The mediation section: each labelled pair's share in the full write and in each part."""
    if not rows:
        return ""
    names = [p for p in ("unembed", "rest") if p in rows[0]]

    def cell(r, p):
        return "not scanned" if np.isnan(r[p]) else f"{r[p]:.3f} ({r[p + '_write_fraction']:.3f})"

    body = [[_e(r["writer"]), _e(r["responder"]), _e(r["response"]), _e(r["share"]), f"{r['full']:.3f}"]
            + [cell(r, p) for p in names] for r in rows]
    table = _table(["writer", "responder", "response", "share", "full write"]
                   + [f"{p} part (write fraction)" for p in names], body, text_cols=4)
    return f"""<h2 id="mediation">Mediation: through which direction the responder reads the writer</h2>
<p class="muted">For every pair labelled on the full write: its top-k share (bottom-k for attention-lowering
pairs) when the write is replaced by its projection on the written token's own unembedding direction
(<b>unembed</b>) or by the remainder (<b>rest</b>), with the mean fraction of the write's squared norm each
part carries. Rank statistics are blind to magnitude: a part that carries 1&nbsp;% of the write can still rank
perfectly, so never call a pair mediated by a part with a small fraction.</p>
{table}
"""


def _page(scan: Scan, heads: HeadData, candidates: list[Candidate], comp: dict, figs: list[Figure],
          tables: dict[str, Path], out: Path, mediation: list[dict] = ()) -> str:
    a = scan.attrs
    ks = [int(k) for k in scan.k]
    k0 = ks[0]
    done = scan.done
    lab = scan.label
    hl = heads.heads["label"]
    pred = comp["prediction"]
    by_key = {f.key: f for f in figs}

    def figs_of(*keys):
        return "".join(_figure_html(by_key[k], out) for k in keys if k in by_key)

    counts = [
        (int(done.sum()), "pairs scanned"),
        (int((lab == 1).sum()), f"{sides.for_scan(a).words.raising} pairs"),
        (int((lab == -1).sum()), f"{sides.for_scan(a).words.lowering} pairs"),
        (int((hl != LABEL_NOT_COMPUTED).sum()), "heads profiled"),
        (int((hl == 1).sum()), "copying heads"),
        (int((hl == -1).sum()), "suppressing heads"),
        (int((pred == -1).sum()), "compensating pairs"),
        (int((pred == 1).sum()), "reinforcing pairs"),
        (len(candidates), "shortlisted heads"),
    ]
    summary = "".join(f"<div><b>{c}</b><span>{_e(t)}</span></div>" for c, t in counts)

    # shortlist
    rows = []
    for rank, c in enumerate(candidates, 1):
        verbs = {"copying": "copies", "suppressing": "suppresses", "neutral": "neutral"}
        writers = "<br>".join(
            f'<span class="mono">{_e(r["writer"])}</span> &middot; mean pct {_fmt(r["mean_percentile"])} &middot; '
            f'q {_fmt_q(r["q_value"])} &middot; writer {verbs[r["writer_ov"]]} &middot; {_chip(r["prediction"])} '
            f'&middot; Q-comp {_fmt(r["q_composition"])} (z {_fmt(r["q_composition_z"], 1)})' for r in c.writers[:8])
        if len(c.writers) > 8:
            writers += f"<br>\u2026 and {len(c.writers) - 8} more (shortlist.csv)"
        rows.append([str(rank), _e(c.kind), f'<span class="mono">{_e(c.label)}</span>',
                     _chip("suppressing" if c.kind == "suppressor" else "copying"), _fmt(c.ov_mean_percentile),
                     _fmt_q(c.ov_q_value), _fmt(c.copying_score), writers])
    shortlist_html = (_table(["rank", "kind", "head", "own write", "OV mean pct", "OV q", "copying score",
                              "writers it responds to (strongest first)"], rows, text_cols=4, left_last=True)
                      if rows else '<p class="muted">No head is both labelled and responding in the required '
                                   'direction: the shortlist is empty.</p>')

    # compensation
    crow = []
    for i in sorted(map(tuple, np.argwhere(np.isin(pred, (-1, 1)))),
                    key=lambda i: (pred[i], -abs(scan.mean_percentile[i] - 0.5)))[:MAX_TABLE_ROWS]:
        crow.append([f'<span class="mono">{i[0]}.{i[1]}</span>', f'<span class="mono">{i[2]}.{i[3]}</span>',
                     _chip(PREDICTION_WORDS[int(pred[i])]), _sign(comp["s_writer"][i]), _sign(comp["s_response"][i]),
                     _sign(comp["s_responder"][i]), _fmt(scan.mean_percentile[i]), _fmt_q(scan.q_value[i]),
                     _fmt(heads.model_space["q_composition"][i])])
    comp_html = (_table(["writer", "responder", "prediction", "s_U (writer write)", "s_QK (response)",
                         "s_R (responder write)", "pair mean pct", "pair q", "Q-comp"], crow, text_cols=3)
                 if crow else '<p class="muted">No pair has three non-neutral signs.</p>')

    # labelled pairs
    prow = []
    for i in sorted(map(tuple, np.argwhere(np.isin(lab, (-1, 1)))),
                    key=lambda i: -abs(scan.mean_percentile[i] - 0.5))[:MAX_TABLE_ROWS]:
        prow.append([f'<span class="mono">{i[0]}.{i[1]}</span>', f'<span class="mono">{i[2]}.{i[3]}</span>',
                     _chip(sides.for_scan(a).words[int(lab[i])]), _fmt(scan.mean_percentile[i]),
                     _fmt(scan.top_share[i][0], 4), _fmt(scan.bottom_share[i][0], 4), _fmt_q(scan.q_value[i]),
                     str(int(scan.rows_evaluated[i]))])
    pairs_html = (_table(["writer", "responder", "label", "mean pct", f"top-{k0} share", f"bottom-{k0} share",
                          "q-value", "rows"], prow, text_cols=3)
                  if prow else '<p class="muted">No pair is labelled.</p>')

    # heads: labelled ones first, every head in a folded table
    hp = heads.heads
    L, H = hl.shape

    def head_row(l, h):
        return [f'<span class="mono">{l}.{h}</span>', _chip(HEAD_LABEL_WORDS.get(int(hl[l, h]), "not computed")),
                _fmt(hp["mean_percentile"][l, h]), _fmt(hp["top_share"][l, h][0], 4),
                _fmt(hp["bottom_share"][l, h][0], 4), _fmt_q(hp["q_value"][l, h]),
                _fmt(hp["eigen_copying_score"][l, h])]

    head_header = ["head", "OV label", "OV mean pct", f"top-{k0} share", f"bottom-{k0} share", "q-value",
                   "copying score"]
    labelled_heads = [head_row(l, h) for l in range(L) for h in range(H) if hl[l, h] in (1, -1)]
    heads_html = (_table(head_header, labelled_heads, text_cols=2) if labelled_heads
                  else '<p class="muted">No head is labelled copying or suppressing.</p>')
    heads_html += (f"<details><summary>All {L * H} heads</summary>"
                   + _table(head_header, [head_row(l, h) for l in range(L) for h in range(H)], text_cols=2)
                   + "</details>")

    info = [
        ("checkpoint", a.get("checkpoint", "")), ("family", a.get("family", "")),
        ("model", f"{a.get('n_layers')} layers \u00d7 {a.get('n_heads')} heads, width {a.get('d_model')}, "
                  f"head width {a.get('d_head')}, vocabulary {a.get('vocab_size')}"),
        ("token table", f"{a.get('table')} (position {a.get('position')})"),
        ("side / orientation", f"{a.get('side', 'query')} / {a.get('orientation')}"),
        ("writers / responders scanned", f"{a.get('writers')} / {a.get('responders')}"),
        ("keys per row n", a.get("keys_per_row")), ("k", ", ".join(map(str, ks))),
        ("label thresholds", f"FDR {a.get('fdr')} (Benjamini-Hochberg over all scanned pairs), "
                             f"|mean percentile \u2212 0.5| \u2265 {a.get('min_effect')}"),
        ("head labels", f"FDR {heads.heads_attrs.get('fdr')} over all {L * H} heads, "
                        f"|mean percentile \u2212 0.5| \u2265 {heads.heads_attrs.get('min_effect')}; "
                        f"token table {heads.heads_attrs.get('table')}"),
        ("composition baseline", f"{heads.model_space_attrs.get('baseline_draws')} Gaussian draws, "
                                 f"seed {heads.model_space_attrs.get('baseline_seed')}"),
        ("scan created", a.get("created", "")), ("tool version", a.get("tool_version", "")),
        ("weights fingerprint", f'<span class="mono">{_e(a.get("weights_fingerprint", ""))}</span>'),
    ]
    info_html = _table(["", ""], [[_e(k), v if k == "weights fingerprint" else _e(v)] for k, v in info], text_cols=2)
    files_html = " ".join(f'<a href="{_e(p.relative_to(out).as_posix())}">{_e(p.name)}</a>' for p in tables.values())

    caution = (f'<div class="caution"><strong>Read these as predictions, not findings.</strong> {_e(CAUTION)} '
               "Rank statistics are blind to magnitude: a pair can rank its diagonal perfectly with a write "
               "too small to matter. Near-duplicate tokens create near-ties in real vocabularies; the midrank "
               "rule counts ties as half, so they pull shares towards the null rather than inventing effects.</div>"
               + "".join(f'<p class="caution">{_e(n)}</p>' for n in side_notes(scan)))

    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Composition report: {_e(Path(str(a.get('checkpoint', ''))).name or 'scan')}</title>
<style>{_CSS}</style>
</head>
<body>
<header>
<h1>Head-to-head composition, from the weights alone</h1>
<p>{_e(a.get('checkpoint', ''))} &middot; {_e(a.get('family', ''))} &middot; scan file {_e(scan.path.name)}</p>
</header>
<main>
<nav><a href="#summary">Summary</a><a href="#shortlist">Shortlist</a><a href="#compensation">Compensation</a>
<a href="#token-space">Token-space heatmaps</a><a href="#heads">Heads</a><a href="#model-space">Model space</a>
<a href="#pairs">Labelled pairs</a><a href="#definitions">Definitions</a><a href="#files">Files</a></nav>
{caution}
<h2 id="summary">Summary</h2>
<div class="summary">{summary}</div>
<p class="muted">Every heatmap puts writer heads down the side and responder heads across, labelled
<span class="mono">layer.head</span>, with dark lines at layer boundaries. Continuous statistics share one
diverging scale whose cream middle is the statistic's null value: cream means "what chance gives",
brick means above the null, teal below it. Hatched cells have no value (the responder is not in a later
layer, or the pair was not scanned).</p>

<h2 id="shortlist">Shortlist: candidate suppressor and back-up heads</h2>
<p class="muted"><b>Suppressor</b> candidates suppress the token they attend to (OV label suppressing) and are
attention-raising towards at least one writer; <b>back-up</b> candidates copy (OV label copying) and are
attention-lowering towards at least one writer. Ranked by the smaller of the two effect sizes, the head's own
|OV mean percentile &minus; 0.5| and the pair |mean percentile &minus; 0.5| of its strongest writer.</p>
{shortlist_html}

<h2 id="compensation">Compensation predictions</h2>
<p class="muted">Three signs per pair: s_U, the writer's own effect on the written token's logit (+1 copying,
&minus;1 suppressing); s_QK, the responder's response (+1 raising, &minus;1 lowering); s_R, the responder's own
write. A negative product predicts that the responder works against what the writer does to the token's logit
(self-repair when the writer is removed): <b>compensating</b>. A positive product: <b>reinforcing</b>.
A neutral sign anywhere: no prediction.</p>
{figs_of("compensation")}
{comp_html}

<h2 id="token-space">Token-space statistics of the scanned pairs</h2>
{figs_of("mean_percentile", f"top_{ks[-1]}_enrichment", f"bottom_{ks[-1]}_enrichment", "pair_labels")}

<h2 id="heads">Heads: copying or suppressing</h2>
{figs_of("head_copying")}
{heads_html}

<h2 id="model-space">Model-space scores of every pair</h2>
<p class="muted">Computed from the weight matrices alone (norms folded), for every pair, whatever the scan's
selection. They say how much two heads' subspaces overlap, not which tokens are involved.</p>
{figs_of("q_composition", "k_composition", "v_composition", "projection_kernel_q", "projection_kernel_k",
         "projection_kernel_v")}

{_mediation_html(list(mediation))}
<h2 id="pairs">Labelled pairs</h2>
{figs_of("pair_histograms")}
{pairs_html}

<h2 id="definitions">What the statistics mean</h2>
<dl class="defs">
<dt>Token matrix and diagonal rank</dt>
<dd>For a writer head U and a later responder head R, row t of the token matrix holds R's attention score
from a query on which U has written token t (U attending fully to t) to every key token j, under the
token-table assumption ({_e(a.get('table'))}). The diagonal rank of row t counts the keys that score higher
than t itself, ties counted half (midrank); 0 is the top. The percentile is 1 &minus; rank/(n &minus; 1):
1 means the responder prefers the very token that was written.</dd>
<dt>Mean percentile</dt><dd>The average percentile over the evaluated rows. Null value 0.5: for
exchangeable continuous scores the diagonal's rank is uniform.</dd>
<dt>Top-k and bottom-k share, enrichment</dt><dd>The fraction of rows whose diagonal is among the k highest
(lowest) of its row; null value k/n. Enrichment is the share divided by k/n.</dd>
<dt>Labels</dt><dd>Attention-raising (attention-lowering): a two-sided test of the mean percentile against
0.5 whose Benjamini-Hochberg q-value over all scanned pairs is at most the FDR, and an effect
|mean percentile &minus; 0.5| of at least the threshold. With thousands of rows a tiny effect is significant;
the effect threshold keeps such pairs neutral.</dd>
<dt>Copying and suppressing heads</dt><dd>The OV token matrix F[t,u] says how much attending to t raises
the logit of u. Its diagonal is ranked within rows with the same exact kernel, and labelled with the same
rule over all heads: copying raises the attended token's own logit above the others, suppressing lowers it.
The eigenvalue copying score &Sigma; Re &lambda; / &Sigma; |&lambda;| over the eigenvalues of the
head-width matrix B<sup>T</sup>A (Elhage et al. 2021) is a second, weight-only view in [&minus;1, 1].</dd>
<dt>Composition scores</dt><dd>Q-, K- and V-composition: the Frobenius norm of the product of the writer's
OV matrix with the responder's QK matrix (query or key side) or OV matrix, divided by the product of their
norms (Elhage et al. 2021). The baseline is the same score for Gaussian matrices of the same shapes
(about 1/&radic;d).</dd>
<dt>Projection kernel</dt><dd>The sum of squared cosines of the principal angles between the writer's write
subspace and the responder's read subspace (Hamm &amp; Lee 2008; Yamagiwa, Takase &amp; Shimodaira 2026):
its dimension for identical subspaces, 0 for orthogonal ones, ab/d on average for random ones.</dd>
</dl>
{caution}

<h2 id="files">Files and provenance</h2>
<p class="files">CSV tables: {files_html}</p>
{info_html}
</main>
<script>{_SCRIPT}</script>
</body>
</html>
"""
