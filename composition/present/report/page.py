"""The report page: one self-contained HTML file (inline CSS, figures as PNG data URIs, the
explorer's data and script inline; no network access)."""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

from ...compose import sides
from ...interpret.heads import HEAD_LABEL_WORDS, HeadData
from ...interpret.predict import PREDICTION_WORDS, Candidate
from ...score.stats import LABEL_NOT_COMPUTED
from ...store.scanfile import CAUTION, Scan
from . import figures as fg

MAX_TABLE_ROWS = 60

_CSS = """
:root { --ink:#1d2733; --muted:#566273; --rule:#d5dbe3; --paper:#f3f5f8; --card:#ffffff;
        --accent:%(accent)s; --high:%(high)s; --low:%(low)s; --neutral:#e4e7eb;
        --comp:%(comp)s; --reinf:%(reinf)s; --head:#233044; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.5 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif; }
header { background: var(--head); color: #eef2f7; padding: 20px 32px 16px; border-bottom: 4px solid var(--accent); }
header h1 { margin: 0 0 4px; font-size: 22px; font-weight: 600; letter-spacing: .2px; }
header p { margin: 0; color: #b8c4d4; font-size: 13px; }
main { max-width: 1180px; margin: 0 auto; padding: 8px 28px 60px; }
nav { margin: 14px 0 8px; font-size: 13px; }
nav a { margin-right: 14px; color: var(--accent); }
a { color: var(--accent); }
h2 { font-size: 18px; margin: 34px 0 8px; padding-bottom: 4px; border-bottom: 2px solid var(--rule); }
h3 { font-size: 15px; margin: 18px 0 6px; }
.caution { background: #fff; border: 1px solid var(--rule); border-left: 5px solid var(--accent);
           padding: 10px 16px; margin: 16px 0; }
.sampling { background: #eef6f5; border: 1px solid #b9dcd9; border-left: 5px solid var(--accent);
            padding: 8px 16px; margin: 12px 0; }
.sampling.sampled { background: #fff8e6; border-color: #ecd9a4; border-left-color: #b07d00; }
.summary { display: flex; flex-wrap: wrap; gap: 10px; margin: 12px 0; }
.summary div { background: var(--card); border: 1px solid var(--rule); border-radius: 6px; padding: 8px 14px; min-width: 150px; }
.summary b { display: block; font-size: 20px; }
.summary span { color: var(--muted); font-size: 12px; }
figure { background: var(--card); border: 1px solid var(--rule); border-radius: 6px; margin: 16px 0; padding: 12px 14px; }
figure img { display: block; max-width: 100%%; height: auto; margin: 0 auto; }
figcaption { color: var(--muted); font-size: 13px; margin-top: 8px; }
figure.missing::after { content: "This figure could not be displayed: its image is missing or broken."; color: #a00; }
.zooms img { margin: 10px auto; }
.hoverable { position: relative; }
table { border-collapse: collapse; margin: 8px 0 4px; font-size: 13px; background: var(--card); }
th, td { border: 1px solid var(--rule); padding: 3px 8px; text-align: right; vertical-align: top; }
th { background: #e9edf2; font-weight: 600; }
td.t, th.t { text-align: left; }
tbody tr:nth-child(even) { background: #f7f9fb; }
.tnote { color: var(--muted); font-size: 12px; margin: 2px 0 10px; }
.chip { display: inline-block; padding: 0 6px; border-radius: 3px; font-size: 12px; color: #fff; }
.chip.raising, .chip.copying { background: var(--high); }
.chip.lowering, .chip.suppressing { background: var(--low); }
.chip.compensating { background: var(--comp); }
.chip.reinforcing { background: var(--reinf); color: #1d2733; }
.chip.not { background: #fff; color: #777; border: 1px dashed var(--rule); }
.chip.neutral, .chip.none { background: var(--neutral); color: #333; border: 1px solid var(--rule); }
code, .mono { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 12.5px; }
details { margin: 8px 0; } summary { cursor: pointer; color: var(--accent); }
dl.defs dt { font-weight: 600; margin-top: 10px; }
dl.defs dd { margin: 2px 0 0 18px; }
.muted { color: var(--muted); font-size: 13px; }
.files a { margin-right: 12px; }
#tip { position: fixed; pointer-events: none; background: #1d2733; color: #f3f5f8; font-size: 12px;
       padding: 6px 9px; border-radius: 4px; display: none; z-index: 10; max-width: 420px; line-height: 1.4; }
.explorer { display: flex; flex-wrap: wrap; gap: 16px; align-items: flex-start; }
.explorer .map { flex: 1 1 640px; min-width: 0; overflow: auto; }
.explorer .panel { flex: 0 1 360px; background: #f7f9fb; border: 1px solid var(--rule); border-radius: 6px;
                   padding: 8px 12px; font-size: 13px; }
.explorer svg rect.c:hover { stroke: #000; stroke-width: 1; }
.controls { margin: 6px 0 10px; font-size: 13px; }
.controls select { font-size: 13px; margin-right: 14px; }
""" % {"accent": fg.ACCENT, "high": fg.LABEL_COLOURS[1], "low": fg.LABEL_COLOURS[-1],
       "comp": fg.PREDICTION_COLOURS[-1], "reinf": fg.PREDICTION_COLOURS[1]}

_SCRIPT = """
window.addEventListener('load', function () {
  var figures = document.querySelectorAll('figure[data-kind]');
  var loaded = 0, heatmaps = 0, heatmapsLoaded = 0;
  figures.forEach(function (fig) {
    var imgs = fig.querySelectorAll('img');
    var ok = imgs.length > 0;
    imgs.forEach(function (img) { ok = ok && img.complete && img.naturalWidth > 0; });
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


def _interval(x, lo, hi, digits: int = 3) -> str:
    """A value with its 95 % interval: ``0.812 [0.79, 0.83]``; the value alone when the interval is a point."""
    if not np.isfinite(float(lo)) or float(lo) == float(hi):
        return _fmt(x, digits)
    return f"{_fmt(x, digits)} <span class=\"muted\">[{_fmt(lo, digits)}, {_fmt(hi, digits)}]</span>"


def _chip(word: str, code: int | None = None) -> str:
    """A coloured word; a pair label's colour comes from its code (+1 raising, -1 lowering), whatever the side's words."""
    cls = {1: "raising", -1: "lowering", 0: "neutral"}.get(code, word.replace("attention-", ""))
    return f'<span class="chip {_e(cls)}">{_e(word)}</span>'


def _sign(s: int) -> str:
    return {1: "+1", -1: "\u22121", 0: "0"}.get(int(s), "\u2013")


def _table(header: list[str], rows: list[list[str]], text_cols: int = 1, left_last: bool = False,
           note: str = "") -> str:
    def cls(i):
        return "t" if i < text_cols or (left_last and i == len(header) - 1) else ""

    th = "".join(f'<th class="{cls(i)}">{_e(h)}</th>' for i, h in enumerate(header))
    body = "".join("<tr>" + "".join(f'<td class="{cls(i)}">{c}</td>' for i, c in enumerate(r)) + "</tr>"
                   for r in rows)
    head = f"<thead><tr>{th}</tr></thead>" if any(header) else ""
    foot = f'<p class="tnote">{note}</p>' if note else ""
    return f"<table>{head}<tbody>{body}</tbody></table>{foot}"


def _img(path: Path, alt: str, key: str = "", drawn=None) -> str:
    """An inlined PNG; a heatmap's carries where its cells are, for the page's hover."""
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    hover = ""
    if drawn is not None:
        layers = lambda heads: ",".join(str(l) for l in dict.fromkeys(l for l, _ in heads))  # noqa: E731
        hover = (f' data-hover="{_e(key)}" data-extent="{",".join(f"{x:.5f}" for x in drawn.extent)}"'
                 f' data-wl="{layers(drawn.rows)}" data-rl="{layers(drawn.cols)}"')
    return f'<img src="data:image/png;base64,{data}" alt="{_e(alt)}"{hover}>'


def _figure_html(fig, out: Path) -> str:
    rel = {ext: p.relative_to(out).as_posix() for ext, p in fig.files.items()}
    links = " \u00b7 ".join(f'<a href="{_e(r)}">{ext.upper()}</a>' for ext, r in rel.items())
    labelled = "all" if fig.drawn is not None and fig.drawn.heads_labelled else "layers"
    attrs = f'data-kind="{_e(fig.kind)}"'
    if fig.kind == "heatmap":
        attrs += f' data-heads-labelled="{labelled}" data-zooms="{len(fig.zooms)}" data-key="{_e(fig.key)}"'
    zooms = ""
    if fig.zooms:
        imgs = "".join(f'<div class="zoom" data-block="{_e(name)}">{_img(d.files["png"], f"{fig.title}: {name}", fig.key, d)}'
                       f'<p class="tnote">{_e(name)} \u00b7 <a href="{_e(d.files["png"].relative_to(out).as_posix())}">'
                       f'PNG</a></p></div>' for name, d in fig.zooms)
        zooms = (f'<details class="zooms"><summary>{len(fig.zooms)} zoomed blocks, every head labelled '
                 f'layer.head</summary>{imgs}</details>')
    return (f'<figure id="fig-{_e(fig.key)}" {attrs}>{_img(fig.files["png"], fig.title, fig.key, fig.drawn)}'
            f'<figcaption><b>{_e(fig.title)}.</b> {_e(fig.caption)} {links}</figcaption>{zooms}</figure>')


def _mediation_html(rows: list[dict], note: str) -> str:
    """The mediation section: each labelled pair's share in the full write and in each part."""
    if not rows:
        return ""
    names = [p for p in ("unembed", "rest") if p in rows[0]]

    def cell(r, p):
        return "not scanned" if np.isnan(r[p]) else f"{r[p]:.3f} ({r[p + '_write_fraction']:.3f})"

    body = [[_e(r["writer"]), _e(r["responder"]), _e(r["response"]), _e(r["share"]), f"{r['full']:.3f}"]
            + [cell(r, p) for p in names] for r in rows]
    table = _table(["writer", "responder", "response", "share", "full write"]
                   + [f"{p} part (write fraction)" for p in names], body, text_cols=4, note=note)
    return f"""<h2 id="mediation">Mediation: through which direction the responder reads the writer</h2>
<p class="muted">For every pair labelled on the full write: its top-k share (bottom-k for {_e(sides.get("query").words.lowering)}
pairs) when the write is replaced by its projection on the written token's own unembedding direction
(<b>unembed</b>) or by the remainder (<b>rest</b>), with the mean fraction of the write's squared norm each
part carries. Rank statistics are blind to magnitude: a part that carries 1&nbsp;% of the write can still rank
perfectly, so never call a pair mediated by a part with a small fraction.</p>
{table}
"""


def references_rows(scan: Scan) -> list[dict]:
    """One row per responder with references: identity, unembedding, the random band and its draws' mean."""
    from ...compose.references import band

    ref = scan.groups["references"]
    rows = []
    for l, h in np.argwhere(ref["done"]):
        lo, hi = band(ref["random_mean_percentile"][l, h])
        rows.append({"responder": f"{l}.{h}", "responder_layer": int(l), "responder_head": int(h),
                     "identity_mean_percentile": float(ref["identity_mean_percentile"][l, h]),
                     "unembedding_mean_percentile": float(ref["unembedding_mean_percentile"][l, h]),
                     "random_band_low": float(lo), "random_band_high": float(hi),
                     "random_mean": float(ref["random_mean_percentile"][l, h].mean())})
    return rows


def beyond_html(scan: Scan, words) -> str:
    """The sections "Writer groups" and "Reference writers" (docs/groups.md), when the scan has them."""
    from ...interpret.heads import HEAD_LABEL_WORDS

    parts = []
    referenced = "references" in scan.groups
    if scan.group_names:
        table = scan.group_pairs()
        ov = scan.groups.get("group_heads", {})
        members = scan.group_members
        order = np.lexsort((-np.abs(table["mean_percentile"] - 0.5), table["group"]))
        body = []
        for i in order:
            g = int(table["group"][i])
            row = [_e(table["writer"][i]), _e("+".join(f"{l}.{h}" for l, h in members[table["writer"][i]])),
                   _e(HEAD_LABEL_WORDS.get(int(ov["label"][g]), "not computed")) if ov else "",
                   _e(table["responder"][i]), _chip(words.labels.get(int(table["label"][i]), "not computed"), int(table["label"][i])),
                   _fmt(table["mean_percentile"][i]), _fmt_q(table["q_value"][i])]
            if referenced:
                row += [f"{table['above_generic'][i]:+.3f}", _fmt(table["random_z"][i], 1)]
            body.append(row)
        header = ["group", "members", "group OV", "responder", "label", "mean pct", "q-value"]
        header += ["above generic", "random z"] if referenced else []
        parts.append(f"""<h2 id="writer-groups">Writer groups</h2>
<p class="muted">Each group is scanned as one writer whose write is the sum of its members' writes, each through
its own path, against every selected responder in a later layer than all members; its labels and q-values are
in the same Benjamini&ndash;Hochberg family as the pairs. Its OV label is that of the sum of its members' OV
token matrices. A group labelled when no member is says the members' writes add coherently along what the
responder reads, under the assumption that each member attends fully to the token; it does not say the members
act together on real text (docs/groups.md).</p>
{_table(header, body, text_cols=4)}
""")
    if referenced:
        attrs = scan.group_attrs.get("references", {})
        body = [[_e(r["responder"]), _fmt(r["identity_mean_percentile"]), _fmt(r["unembedding_mean_percentile"]),
                 f"{_fmt(r['random_band_low'])}&ndash;{_fmt(r['random_band_high'])}"] for r in references_rows(scan)]
        parts.append(f"""<h2 id="references">Reference writers</h2>
<p class="muted">What each responder does with a generic write of the token: the token table row itself
(identity), the token's unit unembedding direction (unembedding), and a band of {_e(attrs.get("draws"))} random
writers with the spectrum of the model's own heads (seed {_e(attrs.get("seed"))}; 5th&ndash;95th percentile).
A pair's <b>above generic</b> is how far its mean percentile goes beyond both generic writes (0 when one goes as
far); a pair inside the random band is not told apart from a random head's write (docs/groups.md §3).</p>
{_table(["responder", "identity", "unembedding", "random band"], body)}
""")
    return "".join(parts)


def render(scan: Scan, heads: HeadData, candidates: list[Candidate], comp: dict, figs: list, tables: dict,
           out: Path, words, sampling, explorer: str, mediation=()) -> str:
    a = scan.attrs
    ks = [int(k) for k in scan.k]
    k0, kl = ks[0], ks[-1]
    done = scan.done
    lab = scan.label
    hl = heads.heads["label"]
    pred = comp["prediction"]
    by_key = {f.key: f for f in figs}
    raising, lowering = words.labels[1], words.labels[-1]
    note = _e(f"Rows evaluated per pair: {sampling.short()}. Bracketed: 95 % intervals.")

    def figs_of(*keys):
        return "".join(_figure_html(by_key[k], out) for k in keys if k in by_key)

    counts = [
        (f"{int(done.sum()):,}", "pairs scanned"),
        (f"{sampling.evaluated_max:,}" if sampling.evaluated_min == sampling.evaluated_max
         else f"{sampling.evaluated_min:,}\u2013{sampling.evaluated_max:,}", f"rows per pair of {sampling.vocab:,}"),
        (str(int((lab == 1).sum())), f"{raising} pairs"),
        (str(int((lab == -1).sum())), f"{lowering} pairs"),
        (str(int((hl != LABEL_NOT_COMPUTED).sum())), "heads profiled"),
        (str(int((hl == 1).sum())), "copying heads"),
        (str(int((hl == -1).sum())), "suppressing heads"),
        (str(len(candidates)), "shortlisted heads"),
    ]
    if words.feeds_compensation:
        counts[-1:-1] = [(str(int((pred == -1).sum())), "compensating pairs"),
                         (str(int((pred == 1).sum())), "reinforcing pairs")]
    summary = "".join(f"<div><b>{c}</b><span>{_e(t)}</span></div>" for c, t in counts)
    samp_cls = "sampling sampled" if sampling.sampled else "sampling"
    sampling_html = (f'<div class="{samp_cls}" id="sampling-notice" data-sampled="{str(sampling.sampled).lower()}">'
                     f'<b>{"Sampled scan." if sampling.sampled else "Exact scan."}</b> {_e(sampling.sentence())}</div>')

    # shortlist
    rows = []
    for rank, c in enumerate(candidates, 1):
        verbs = {HEAD_LABEL_WORDS[1]: "copies", HEAD_LABEL_WORDS[-1]: "suppresses"}
        lines = []
        for r in c.writers[:8]:
            if r["writer"] in scan.group_names:  # a writer group (docs/groups.md): its own arrays
                arrays, i = scan.groups["groups"], (scan.group_names.index(r["writer"]), *c.head)
            else:
                arrays, i = scan.arrays, (*map(int, r["writer"].split(".")), *c.head)
            lines.append(
                f'<span class="mono">{_e(r["writer"])}</span> &middot; mean pct '
                f'{_interval(r["mean_percentile"], arrays["mean_ci_low"][i], arrays["mean_ci_high"][i])} &middot; '
                f'q {_fmt_q(r["q_value"])} &middot; rows {int(arrays["rows_evaluated"][i]):,} &middot; writer '
                f'{verbs.get(r["writer_ov"], r["writer_ov"])} &middot; {_chip(r["prediction"])} '
                f'&middot; Q-comp {_fmt(r["q_composition"])} (z {_fmt(r["q_composition_z"], 1)})'
                + (f' &middot; above generic {r["above_generic"]:+.3f}' if "above_generic" in r else ""))
        writers = "<br>".join(lines)
        if len(c.writers) > 8:
            writers += f"<br>\u2026 and {len(c.writers) - 8} more (shortlist.csv)"
        rows.append([str(rank), _e(c.kind), f'<span class="mono">{_e(c.label)}</span>',
                     _chip(HEAD_LABEL_WORDS[-1 if c.kind == "suppressor" else 1]), _fmt(c.ov_mean_percentile),
                     _fmt_q(c.ov_q_value), _fmt(c.copying_score), writers])
    shortlist_html = (_table(["rank", "kind", "head", "own write", "OV mean pct", "OV q", "copying score",
                              "writers it responds to (strongest first)"], rows, text_cols=4, left_last=True,
                             note=note)
                      if rows else '<p class="muted">No head is both labelled and responding in the required '
                                   'direction: the shortlist is empty.</p>')

    # compensation
    crow = []
    for i in sorted(map(tuple, np.argwhere(np.isin(pred, (-1, 1)))),
                    key=lambda i: (pred[i], -abs(scan.mean_percentile[i] - 0.5)))[:MAX_TABLE_ROWS]:
        crow.append([f'<span class="mono">{i[0]}.{i[1]}</span>', f'<span class="mono">{i[2]}.{i[3]}</span>',
                     _chip(PREDICTION_WORDS[int(pred[i])]), _sign(comp["s_writer"][i]), _sign(comp["s_response"][i]),
                     _sign(comp["s_responder"][i]),
                     _interval(scan.mean_percentile[i], scan.mean_ci_low[i], scan.mean_ci_high[i]),
                     _fmt_q(scan.q_value[i]), f"{int(scan.rows_evaluated[i]):,}",
                     _fmt(heads.model_space["q_composition"][i])])
    n_pred = int(np.isin(pred, (-1, 1)).sum())
    more = f" Showing {len(crow)} of {n_pred}; all in compensation.csv." if n_pred > len(crow) else ""
    comp_html = (_table(["writer", "responder", "prediction", "s_U (writer write)", "s_QK (response)",
                         "s_R (responder write)", "pair mean pct", "pair q", "rows", "Q-comp"], crow, text_cols=3,
                        note=note + _e(more))
                 if crow else '<p class="muted">No pair has three non-neutral signs.</p>')

    # labelled pairs, with share intervals
    prow = []
    labelled = sorted(map(tuple, np.argwhere(np.isin(lab, (-1, 1)))), key=lambda i: -abs(scan.mean_percentile[i] - 0.5))
    for i in labelled[:MAX_TABLE_ROWS]:
        prow.append([f'<span class="mono">{i[0]}.{i[1]}</span>', f'<span class="mono">{i[2]}.{i[3]}</span>',
                     _chip(words.labels[int(lab[i])], int(lab[i])),
                     _interval(scan.mean_percentile[i], scan.mean_ci_low[i], scan.mean_ci_high[i]),
                     _interval(scan.top_share[i][-1], scan.ci_low[i][-1], scan.ci_high[i][-1], 4),
                     _interval(scan.bottom_share[i][-1], scan.bottom_ci_low[i][-1], scan.bottom_ci_high[i][-1], 4),
                     _fmt_q(scan.q_value[i]), f"{int(scan.rows_evaluated[i]):,}"])
    more = f" Showing {len(prow)} of {len(labelled)}; all in pairs.csv." if len(labelled) > len(prow) else ""
    pairs_html = (_table(["writer", "responder", "label", "mean pct", f"top-{kl} share", f"bottom-{kl} share",
                          "q-value", "rows"], prow, text_cols=3, note=note + _e(more))
                  if prow else '<p class="muted">No pair is labelled.</p>')

    # heads: labelled ones first, every head in a folded table
    hp = heads.heads
    L, H = hl.shape
    hrows = hp.get("rows_evaluated", np.zeros((L, H), int))

    def head_row(l, h):
        return [f'<span class="mono">{l}.{h}</span>', _chip(HEAD_LABEL_WORDS.get(int(hl[l, h]), "not computed")),
                _fmt(hp["mean_percentile"][l, h]), _fmt(hp["top_share"][l, h][0], 4),
                _fmt(hp["bottom_share"][l, h][0], 4), _fmt_q(hp["q_value"][l, h]),
                _fmt(hp["eigen_copying_score"][l, h]), f"{int(hrows[l, h]):,}"]

    head_header = ["head", "OV label", "OV mean pct", f"top-{k0} share", f"bottom-{k0} share", "q-value",
                   "copying score", "rows"]
    hnote = "Head profiles rank every row of the OV token matrix (no sampling)."
    labelled_heads = [head_row(l, h) for l in range(L) for h in range(H) if hl[l, h] in (1, -1)]
    heads_html = (_table(head_header, labelled_heads, text_cols=2, note=hnote) if labelled_heads
                  else '<p class="muted">No head is labelled copying or suppressing.</p>')
    heads_html += (f"<details><summary>All {L * H} heads</summary>"
                   + _table(head_header, [head_row(l, h) for l in range(L) for h in range(H)], text_cols=2,
                            note=hnote)
                   + "</details>")

    info = [
        ("checkpoint", a.get("checkpoint", "")), ("family", a.get("family", "")),
        ("model", f"{a.get('n_layers')} layers \u00d7 {a.get('n_heads')} heads, width {a.get('d_model')}, "
                  f"head width {a.get('d_head')}, vocabulary {a.get('vocab_size')}"),
        ("token table", f"{a.get('table')} (position {a.get('position')})"),
        ("side / orientation", f"{words.name} / {a.get('orientation')}"),
        ("writers / responders scanned", f"{a.get('writers')} / {a.get('responders')}"),
        ("rows evaluated", sampling.sentence()),
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
               + "".join(f'<p class="caution">{_e(n)}</p>' for n in words.notes))
    if not words.feeds_compensation:
        compensation_section = (f'<h2 id="compensation">Compensation predictions</h2><p class="muted">The labels of '
                                f'a {_e(words.name)} scan do not feed the compensation prediction; see the query-side '
                                'scan\'s report.</p>')
    else:
        compensation_section = f"""
<h2 id="compensation">Compensation predictions</h2>
<p class="muted">Three signs per pair: s_U, the writer's own effect on the written token's logit (+1 copying,
&minus;1 suppressing); s_QK, the responder's response (+1 raising, &minus;1 lowering); s_R, the responder's own
write. A negative product predicts that the responder works against what the writer does to the token's logit
(self-repair when the writer is removed): <b>compensating</b>. A positive product: <b>reinforcing</b>.
A neutral sign anywhere: no prediction.</p>
{figs_of("compensation")}
{comp_html}"""

    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Composition report: {_e(Path(str(a.get('checkpoint', ''))).name or 'scan')}</title>
<style>{_CSS}</style>
</head>
<body>
<div id="tip"></div>
<header>
<h1>Head-to-head composition, from the weights alone</h1>
<p>{_e(a.get('checkpoint', ''))} &middot; {_e(a.get('family', ''))} &middot; {_e(words.name)} &middot;
scan file {_e(scan.path.name)}</p>
</header>
<main>
<nav><a href="#summary">Summary</a><a href="#explorer">Explorer</a><a href="#shortlist">Shortlist</a>
<a href="#compensation">Compensation</a><a href="#token-space">Token-space heatmaps</a><a href="#heads">Heads</a>
<a href="#model-space">Model space</a><a href="#pairs">Labelled pairs</a><a href="#definitions">Definitions</a>
<a href="#files">Files</a></nav>
{caution}
<h2 id="summary">Summary</h2>
{sampling_html}
<div class="summary">{summary}</div>
<p class="muted">Every heatmap puts writer heads down the side and responder heads across, with dark lines at
layer boundaries; heads are labelled <span class="mono">layer.head</span> where they fit, and larger heatmaps
come with zoomed blocks of whole layers that label every head. Continuous statistics share one diverging scale
whose near-white middle is the statistic's null value: vermillion above the null, blue below it. Colour limits
are robust (stated in each caption); cells beyond them are drawn in the end colour and marked with a dot.
Hatched cells have no value (the responder is not in a later layer, or the pair was not scanned); grey cells in
the enrichment maps have a sampling interval that contains the null. The explorer below shows any cell's
numbers on hover and its histogram on click.</p>

{explorer}

<h2 id="shortlist">Shortlist: candidate suppressor and back-up heads</h2>
<p class="muted"><b>Suppressor</b> candidates suppress the token they attend to (OV label suppressing) and are
{_e(raising)} towards at least one writer; <b>back-up</b> candidates copy (OV label copying) and are
{_e(lowering)} towards at least one writer. Ranked by the smaller of the two effect sizes, the head's own
|OV mean percentile &minus; 0.5| and the pair |mean percentile &minus; 0.5| of its strongest writer.</p>
{shortlist_html}
{figs_of("head_views")}
{compensation_section}

<h2 id="token-space">Token-space statistics of the scanned pairs</h2>
{figs_of("mean_percentile", f"top_{kl}_enrichment", f"bottom_{kl}_enrichment", "pair_labels")}

<h2 id="heads">Heads: copying or suppressing</h2>
{figs_of("head_copying")}
{heads_html}

<h2 id="model-space">Model-space scores of every pair</h2>
<p class="muted">Computed from the weight matrices alone (norms folded), for every pair, whatever the scan's
selection. They say how much two heads' subspaces overlap, not which tokens are involved.</p>
{figs_of("q_composition", "k_composition", "v_composition", "projection_kernel_q", "projection_kernel_k",
         "projection_kernel_v")}

{_mediation_html(list(mediation), note)}
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
<dt>Rows evaluated and intervals</dt><dd>An exact scan ranks every row; a sampled scan ranks a seeded uniform
sample of rows (the same rows for every pair), possibly in sequential looks. The 95 % intervals (exact
hypergeometric for shares, Serfling for the mean) say how far the full-vocabulary value may lie.</dd>
<dt>Labels</dt><dd>{_e(raising.capitalize())} ({_e(lowering)}): a two-sided test of the mean percentile against
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
<p class="files">CSV tables (integer writer_layer, writer_head, responder_layer, responder_head or layer, head
columns beside the layer.head labels): {files_html}</p>
{info_html}
</main>
<script>{_SCRIPT}</script>
</body>
</html>
"""
