"""Terminal tables: each function turns a result into the lines ``composition`` prints.

Nothing here computes; every number comes from a scan, a heads file, a shortlist or a pair
detail. Label words and notes come from the side registry (``composition.compose.sides``) and
``composition.interpret.predict``; numbers print through ``number`` and ``pvalue`` everywhere.
"""

from __future__ import annotations

import numpy as np

from ..compose import sides
from ..interpret.heads import HEAD_LABEL_WORDS, KINDS
from ..interpret.predict import readout_note, side_notes
from ..score.stats import LABEL_NOT_COMPUTED
from ..store.scanfile import CAUTION

SHOW_AT_MOST = 20


def number(x: float) -> str:
    """A share, percentile or null value: four decimals, or three significant digits below 0.001."""
    x = float(x)
    if np.isnan(x):
        return "nan"
    return f"{x:.4f}" if x == 0 or abs(x) >= 1e-3 else f"{x:.2e}"


def pvalue(x: float) -> str:
    """A p- or q-value; those below the float range print as <1e-300."""
    x = float(x)
    if np.isnan(x):
        return "nan"
    return "<1e-300" if x == 0 else f"{x:.1e}"


def findings(result, note: bool = True) -> list[str]:
    """A scan's labelled pairs, strongest first, in its side's words; writer groups are writers named by
    their NAME (docs/groups.md), and a scan with references adds each pair's standing above a generic
    write of the token (``above generic``, docs/groups.md §3)."""
    side = sides.for_scan(result.attrs)
    tables = [result.pairs()] + ([result.group_pairs()] if result.groups.get("groups") is not None else [])
    rows = [dict(zip(t, values)) for t in tables for values in zip(*t.values())]
    computed = len(rows)
    rows = [r for r in rows if int(r["label"]) in (1, -1)]
    rows.sort(key=lambda r: -abs(r["mean_percentile"] - 0.5))
    k = int(result.k[0])
    lines = [f"side {side.name}" + (f", query part {side.part}" if side.part != "full" else ""),
             f"labelled responders (FDR {result.attrs['fdr']}, |mean percentile - 0.5| >= "
             f"{result.attrs['min_effect']}): {len(rows)} of {computed} pairs"
             + (f" (writer groups: {', '.join(result.group_names)})" if result.group_names else "")]
    fraction = side.part != "full" and "write_fraction" in result.arrays  # docs/methods.md §3b: beside the shares
    standing = "above_generic" in tables[0]
    width = max([7] + [len(str(r["writer"])) for r in rows[:SHOW_AT_MOST]])
    if rows:
        lines.append(f"  {'writer':<{width}} {'responder':<9}  {'label':<19} {'mean pct':>8} {f'top-{k}':>7} "
                     f"{f'bottom-{k}':>9} {'q-value':>9}" + (f" {'write fraction':>14}" if fraction else "")
                     + (f" {'above generic':>13}" if standing else ""))
    for r in rows[:SHOW_AT_MOST]:
        lines.append(f"  {str(r['writer']):<{width}} {str(r['responder']):<9}  {side.words[int(r['label'])]:<19} "
                     f"{r['mean_percentile']:8.3f} {r[f'top_share_{k}']:7.3f} "
                     f"{r[f'bottom_share_{k}']:9.3f} {pvalue(r['q_value']):>9}"
                     + (f" {r['write_fraction']:14.3f}" if fraction else "")
                     + (f" {r['above_generic']:+13.3f}" if standing else ""))
    if len(rows) > SHOW_AT_MOST:
        lines.append(f"  ... and {len(rows) - SHOW_AT_MOST} more, strongest first above; all are in {result.path}")
    if standing:
        lines.append("  above generic: how far the pair's mean percentile goes beyond both the identity and the "
                     "unembedding reference write of the token (0: a generic write goes as far; docs/groups.md §3)")
    if not side.feeds_prediction:
        lines += [f"note: {n}" for n in side_notes(result)[:2]]
    if note:
        lines.append(f"note: {CAUTION}")
    return lines


def head_profiles(data, readout: str | None) -> list[str]:
    """Labelled heads (copying / suppressing) and the composition-score baselines."""
    hp, a = data.heads, data.heads_attrs
    labelled = [tuple(int(v) for v in ix) for ix in np.argwhere(np.isin(hp["label"], (1, -1)))]
    computed = int((hp["label"] != LABEL_NOT_COMPUTED).sum())
    lines = [f"labelled heads (FDR {a['fdr']}, |OV mean percentile - 0.5| >= {a['min_effect']}): "
             f"{len(labelled)} of {computed} profiled"]
    if labelled:
        lines.append(f"  {'head':>5}  {'OV label':<11} {'mean pct':>8} {'q-value':>9} {'copying score':>13}")
    for l, h in sorted(labelled, key=lambda i: -abs(hp["mean_percentile"][i] - 0.5)):
        lines.append(f"  {l:>3}.{h:<1}  {HEAD_LABEL_WORDS[int(hp['label'][l, h])]:<11} "
                     f"{hp['mean_percentile'][l, h]:8.3f} {pvalue(hp['q_value'][l, h]):>9} "
                     f"{hp['eigen_copying_score'][l, h]:13.3f}")
    draws = data.model_space_attrs["baseline_draws"]
    for kind in KINDS:
        mean, sd = data.baseline(kind)
        lines.append(f"{kind.upper()}-composition baseline: {mean:.4f} +- {sd:.4f} (Gaussian factors, {draws} draws)")
    lines += _readout(readout)
    lines.append(f"note: {CAUTION}")
    return lines


def shortlist(candidates, scan=None) -> list[str]:
    """The shortlist table; for a scan whose side does not feed the prediction, why there is none."""
    if scan is not None and not sides.for_scan(scan.attrs).feeds_prediction:
        return ["shortlist: none; " + side_notes(scan)[1]] + [f"note: {n}" for n in side_notes(scan)[:1]]
    words = sides.for_scan(scan.attrs).words if scan is not None else sides.get("query").words
    lines = [f"shortlist: {sum(c.kind == 'suppressor' for c in candidates)} candidate suppressor heads "
             f"({HEAD_LABEL_WORDS[-1]}, {words.raising}), {sum(c.kind == 'back-up' for c in candidates)} candidate "
             f"back-up heads ({HEAD_LABEL_WORDS[1]}, {words.lowering})"]
    standing = any("above_generic" in r for c in candidates for r in c.writers)
    width = max([6] + [len(r["writer"]) for c in candidates for r in c.writers])
    if candidates:
        lines.append(f"  {'#':>2} {'kind':<10} {'head':>5} {'OV pct':>6} {'OV q':>8} {'copy':>6}  "
                     f"{'writer':>{width}} {'pair pct':>8} {'pair q':>8} {'Q-comp z':>8}"
                     + (f" {'above generic':>13} {'random z':>8}" if standing else "") + "  prediction")
    for rank, c in enumerate(candidates, 1):
        for j, r in enumerate(c.writers):
            head = (f"{rank:>2} {c.kind:<10} {c.label:>5} {c.ov_mean_percentile:6.3f} {pvalue(c.ov_q_value):>8} "
                    f"{c.copying_score:6.2f}" if j == 0 else " " * 43)
            z = "" if np.isnan(r["q_composition_z"]) else f"{r['q_composition_z']:8.1f}"
            lines.append(f"  {head}  {r['writer']:>{width}} {r['mean_percentile']:8.3f} {pvalue(r['q_value']):>8} "
                         f"{z:>8}" + (f" {r['above_generic']:+13.3f} {r['random_z']:8.1f}" if standing else "")
                         + f"  {r['prediction']}")
    if standing:
        lines.append("  ranked by above generic: the pair's mean percentile beyond both generic writes of the token "
                     "(identity, unembedding); random z: against the random band's draws (docs/groups.md §3)")
    return lines + (_readout(scan.attrs.get("readout")) if scan is not None else [])


def mediation(rows: list[dict], names: list[str]) -> list[str]:
    """The mediation table: each labelled pair's share in the full write and in each part (parts in
    registry order; pairs scanned in no part are left out)."""
    order = [s.part for s in sides.every()]
    names = sorted(names, key=lambda p: order.index(p) if p in order else len(order))
    rows = [r for r in rows if not all(np.isnan(r[p]) for p in names)]
    lines = ["mediation of the query side's labelled pairs: share (and write fraction) per part",
             f"  {'writer':<7} {'responder':<9}  {'share':<10} {'full':>6}" + "".join(f" {p:>16}" for p in names)]
    for r in rows:
        cells = "".join(" " + _share_cell(r[p], r[f"{p}_write_fraction"]).rjust(16) for p in names)
        lines.append(f"  {r['writer']:<7} {r['responder']:<9}  {r['share']:<10} {r['full']:6.3f}{cells}")
    lines.append(f"  (bottom-k share for {sides.get('query').words.lowering} pairs; rank statistics are blind to magnitude, so read"
                 " each part beside the fraction of the write it carries; for pairs neutral on the full write the"
                 " two parts can carry opposite labels that cancel: see docs/sides.md)")
    return lines


def _share_cell(share: float, fraction: float) -> str:
    return "not scanned" if np.isnan(share) else f"{share:6.3f} ({fraction:.3f})"


def _readout(readout: str | None) -> list[str]:
    note = readout_note(readout)
    return [f"note: {note}"] if note else []


def pair(detail, ks, table: str, orientation: str, top: int, chosen, readout: str | None,
         scan_lines=()) -> list[str]:
    """One pair in depth (``composition pair``); ``scan_lines`` (``scan_prediction``) after the heads' writes."""
    s, side, n = detail.stats, detail.side, detail.n_keys
    source = detail.vocabulary.source if detail.vocabulary else None
    lines = [f"pair {detail.writer[0]}.{detail.writer[1]} -> {detail.responder[0]}.{detail.responder[1]}, "
             f"{side.title}: {s.rows} rows ({side.rows_are if orientation == 'row' else 'columns'}), {n} keys per "
             f"row, {orientation} orientation, token table {table}; tokens "
             f"{'from ' + source if source else 'as ids (no tokenizer.json)'}",
             f"labels on this side: {side.words.meaning}",
             f"mean percentile {number(s.mean_percentile)} (null 0.5), p = {pvalue(s.p_value)} for this pair alone",
             "shares: " + "  ".join(f"top-{k} {number(t)} / bottom-{k} {number(b)} (null {number(k / n)})"
                                    for k, t, b in zip(ks, s.top_share, s.bottom_share))]
    for name, hw in (("writer", detail.writer_write), ("responder", detail.responder_write)):
        lines.append(f"{name} OV token matrix: diagonal mean percentile {hw.mean_percentile:.3f} "
                     f"(p = {pvalue(hw.p_value)} alone), eigenvalue copying score {hw.copying_score:.3f}")
    lines += _readout(readout) + list(scan_lines)
    lines.append("percentile histogram (fraction of rows per bin; | marks the uniform null):")
    lines += histogram(s.histogram)
    for which, word in (("highest", side.words.raising), ("lowest", side.words.lowering)):
        tied = detail.ties(which)
        how = (f"{tied} tokens tie at this end; listed: the first {min(top, tied)} by token id" if tied > 1
               else f"ranked by the diagonal's rank, ties by token id")
        lines.append(f"{which}-ranked diagonals (toward '{word}'; {how}):")
        lines += [_token_line(row) for row in detail.extremes(top, which)]
    if chosen:
        lines.append("chosen tokens:")
        lines += [_token_line(detail.row(t)) for t in chosen]
    return lines


def _token_line(row: dict) -> str:
    return f"  {row['token']:>7} {row['text']!r:<24} rank {row['rank']:>9.1f}  percentile {number(row['percentile'])}"


def scan_prediction(scan_file, pp: dict, scan) -> list[str]:
    """The scan's label of one pair and, where its side feeds it, the prediction (``pair --scan``)."""
    line = f"in {scan_file}: {pp['response']} (q = {pvalue(pp['q_value'])})"
    if not sides.for_scan(scan.attrs).feeds_prediction:
        return [line, f"note: {side_notes(scan)[1]}"]
    return [f"{line}; signs s_U {pp['s_writer']:+d}, s_QK {pp['s_response']:+d}, s_R {pp['s_responder']:+d} "
            f"-> {pp['prediction']}"]


def histogram(counts, width: int = 50) -> list[str]:
    """One line per bin: range, fraction, a bar of '#', and '|' at the uniform null."""
    frac = counts / max(1, counts.sum())
    bins = frac.shape[0]
    scale = width / max(float(frac.max()), 2.0 / bins)
    null = int(round(scale / bins))
    lines = []
    for i, f in enumerate(frac):
        bar = list("#" * int(round(f * scale)))
        bar += [" "] * max(0, null + 1 - len(bar))
        if bar[null] == " ":
            bar[null] = "|"
        lines.append(f"  {i / bins:4.2f}-{(i + 1) / bins:4.2f} {f:6.3f} {''.join(bar).rstrip()}")
    return lines
