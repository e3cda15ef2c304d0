"""The ``composition`` command: parse, call the library, print. Nothing else lives here."""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import click
import numpy as np

from ..errors import CompositionError
from ..compose.factors import ORIENTATIONS, QUERY_PARTS, SIDES
from ..run.interrupts import ScanInterrupted
from ..run.progress import ProgressPrinter
from ..run.scan import ScanOptions, run_scan
from ..store.scanfile import CAUTION, load_scan
from ..score.stats import DEFAULT_FDR, DEFAULT_MIN_EFFECT, LABEL_NOT_COMPUTED
from ..extract.tables import TABLES

_LABEL_WORDS = {1: "attention-raising", -1: "attention-lowering", 0: "neutral"}
_VALUE_WORDS = {1: "copies through", -1: "suppresses", 0: "neutral"}  # --side value: diagonal high / low


class _Group(click.Group):
    """Turn a CompositionError into one sentence on stderr and exit status 2; an interrupted
    scan exits 128 + the signal number (130 SIGINT, 143 SIGTERM) after saying how to resume."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except ScanInterrupted as exc:
            click.echo(f"composition: {exc}", err=True)
            if ctx.invoked_subcommand == "scan":
                click.echo(f"to resume: {_resume_command()}", err=True)
            sys.exit(exc.exit_code)
        except CompositionError as exc:
            click.echo(f"composition: {exc}", err=True)
            sys.exit(2)


def _resume_command() -> str:
    """The command line that was run, less --overwrite (which would start afresh)."""
    import shlex

    return shlex.join(["composition"] + [a for a in sys.argv[1:] if a != "--overwrite"])


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="composition", message="composition %(version)s")
def main():
    """Weight-space analysis of head-to-head composition in transformer checkpoints.

    For every pair of attention heads, an earlier writer and a later responder, rank how
    the responder's attention to a token changes once the writer has written it, over the
    whole vocabulary. Predictions from weights alone, for choosing causal experiments.
    """


def _position(value: str):
    if value in (None, "none"):
        return None
    if value == "mean":
        return "mean"
    try:
        return int(value)
    except ValueError:
        raise CompositionError(f"--position {value!r} is neither none, mean nor a position index.") from None


def _ks(value: str) -> tuple[int, ...]:
    try:
        ks = tuple(sorted({int(v) for v in value.split(",") if v.strip()}))
    except ValueError:
        raise CompositionError(f"--k {value!r} is not a comma-separated list of integers.") from None
    return ks


def _offsets(single, span) -> tuple[int, int] | None:
    """``--rotary-offset N`` -> (N, N); ``--rotary-offsets A:B`` -> (A, B); neither -> None."""
    if single is not None and span is not None:
        raise CompositionError("give either --rotary-offset or --rotary-offsets, not both.")
    if single is not None:
        return (single, single)
    if span is None:
        return None
    parts = span.split(":")
    try:
        first, last = (int(p) for p in parts)
    except ValueError:
        raise CompositionError(f"--rotary-offsets {span!r} is not of the form A:B with integers A <= B.") from None
    return (first, last)


def checkpoint_options(f):
    """How to read the checkpoint and which rotary offsets to fold into the query side."""
    for opt in reversed([
        click.option("--family", default=None, metavar="NAME",
                     help="Read the checkpoint as this family instead of detecting it: gpt2, gpt-neox, llama, bert."),
        click.option("--layout", default=None, type=click.Path(), metavar="FILE.json",
                     help="A layout file mapping tensor names to the canonical weights (docs/families.md)."),
        click.option("--rotary-offset", type=click.IntRange(min=0), default=None, metavar="N",
                     help="Rotary models: score at relative offset N = destination - source (default 0: no rotation)."),
        click.option("--rotary-offsets", default=None, metavar="A:B",
                     help="Rotary models: average the rotation uniformly over offsets A..B."),
    ]):
        f = opt(f)
    return f


def scan_options(f):
    """The options shared by every command that computes token matrices."""
    f = checkpoint_options(f)
    for opt in reversed([
        click.option("--writers", metavar="SPEC", help="Writer heads: layers and layer.head labels, e.g. 1,2.3 (default: all)."),
        click.option("--responders", metavar="SPEC", help="Responder heads, same form (default: all)."),
        click.option("--table", type=click.Choice(TABLES), default="attn0-mlp0", show_default=True,
                     help="Token table standing for the residual stream at a token."),
        click.option("--position", default="none", show_default=True, metavar="none|mean|N",
                     help="Position embedding added to the token table: none, the mean row, or row N."),
        click.option("--orientation", type=click.Choice(ORIENTATIONS), default="row", show_default=True,
                     help="Rank the diagonal within its row or its column; rows are written tokens on the query "
                          "and value sides, query tokens on the key side."),
        click.option("--k", "ks", default="1,5,10", show_default=True, metavar="K1,K2,..",
                     help="The k of the top-k and bottom-k shares."),
        click.option("--fdr", type=float, default=DEFAULT_FDR, show_default=True,
                     help="False discovery rate for labels, Benjamini-Hochberg over all pairs."),
        click.option("--min-effect", type=float, default=DEFAULT_MIN_EFFECT, show_default=True,
                     help="Smallest |mean percentile - 0.5| that earns a label."),
        click.option("--side", type=click.Choice(SIDES), default="query", show_default=True,
                     help="Which path the writer feeds: the responder's query, its key, or its value (moved on to the logits)."),
        click.option("--query-part", type=click.Choice(QUERY_PARTS), default="full", show_default=True,
                     help="Query side only: the whole write, its projection on the token's unembedding direction, or the rest."),
    ]):
        f = opt(f)
    return f


def run_options(f):
    """How ranks are computed and which rows are evaluated (scan, plan)."""
    from ..score.ranks import DEVICES, PRECISIONS

    for opt in reversed([
        click.option("--precision", type=click.Choice(PRECISIONS), default="fp32", show_default=True,
                     help="Fast-pass arithmetic; both give the exact float64 midranks (bf16-checked rechecks "
                          "a proven band)."),
        click.option("--device", type=click.Choice(DEVICES), default="cpu", show_default=True,
                     help="Where the fast pass runs."),
        click.option("--rows", type=int, default=None, metavar="N",
                     help="Evaluate a uniform sample of N rows per pair (without replacement, seeded)."),
        click.option("--seed", type=int, default=0, show_default=True, help="Seed of the row sample."),
        click.option("--until-ci", type=float, default=None, metavar="W",
                     help="Sample rows in growing batches until every share's 95% interval is narrower "
                          "than W or the pair's label is decided."),
    ]):
        f = opt(f)
    return f


def _make_options(writers, responders, table, position, orientation, ks, fdr, min_effect,
                  family=None, layout=None, rotary_offset=None, rotary_offsets=None, precision="fp32",
                  device="cpu", rows=None, seed=0, until_ci=None, side="query", query_part="full") -> ScanOptions:
    return ScanOptions(table=table, position=_position(position), orientation=orientation, k=_ks(ks),
                       fdr=fdr, min_effect=min_effect, writers=writers, responders=responders,
                       rotary_offsets=_offsets(rotary_offset, rotary_offsets), family=family, layout=layout,
                       precision=precision, device=device, rows=rows, seed=seed, until_ci=until_ci,
                       side=side, query_part=query_part)


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--out", "-o", required=True, type=click.Path(), help="Scan file to write (HDF5); if it holds an unfinished scan, it is resumed.")
@click.option("--overwrite", is_flag=True, help="Replace an existing scan file and start afresh.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
@scan_options
@run_options
@click.option("--cluster", metavar="ADDRESS", help="Run the work units on this Dask scheduler, e.g. tcp://host:8786 (needs the cluster extra).")
@click.option("--workers", type=click.IntRange(min=1), metavar="N", help="Run the work units on a local Dask cluster of N processes (needs the cluster extra).")
@click.option("--worker-checkpoint", metavar="PATH", help="The checkpoint's path as the workers see it (default: CHECKPOINT's absolute path).")
def scan(checkpoint, out, overwrite, quiet, cluster, workers, worker_checkpoint, **kw):
    """Scan every writer -> responder pair of CHECKPOINT and write a scan file.

    CHECKPOINT is a directory with config.json and a .safetensors file, or the
    .safetensors file itself with config.json beside it. Each work unit is committed as
    soon as it is computed: after a crash, a reboot or Ctrl-C, run the same command again
    to continue where it stopped.
    """
    options = _make_options(**kw)
    result = _run(checkpoint, out, options, overwrite, quiet, cluster=cluster, workers=workers,
                  worker_checkpoint=worker_checkpoint)
    for note in json.loads(result.attrs.get("reader_notes", "[]")):
        click.echo(f"reader: {note}")
    _print_findings(result)


def _run(checkpoint, out, options, overwrite, quiet, **execution):
    start = time.monotonic()
    printer = None if quiet else ProgressPrinter(sys.stderr)
    computed = []

    def progress(event):
        computed.append(event.kind)
        if printer is not None:
            printer(event)

    try:
        result = run_scan(checkpoint, out, options, overwrite=overwrite, progress=progress, **execution)
    finally:
        if printer is not None:
            printer.close()
    if not quiet:
        if computed:
            click.echo(f"scanned {int(result.done.sum())} pairs in {time.monotonic() - start:.1f} s; "
                       f"wrote {result.path}")
        else:
            click.echo(f"{result.path} holds this scan complete already; nothing to compute")
    return result


_SHOW_AT_MOST = 20


def _q(value: float) -> str:
    """A q-value for the terminal; those below the float range print as <1e-300."""
    return "<1e-300" if value == 0 else f"{value:.1e}"


def _print_findings(result, note: bool = True) -> None:
    lab = result.label
    found = [tuple(int(i) for i in ix) for ix in np.argwhere((lab != 0) & (lab != LABEL_NOT_COMPUTED))]
    found.sort(key=lambda i: -abs(result.mean_percentile[i] - 0.5))
    k = int(result.k[0])
    side, part = result.attrs.get("side", "query"), result.attrs.get("query_part", "full")
    words = _VALUE_WORDS if side == "value" else _LABEL_WORDS
    click.echo(f"side {side}" + (f", query part {part}" if part != "full" else ""))
    click.echo(f"labelled responders (FDR {result.attrs['fdr']}, |mean percentile - 0.5| >= "
               f"{result.attrs['min_effect']}): {len(found)} of {int(result.done.sum())} pairs")
    fraction = part != "full" and "write_fraction" in result.arrays  # METHODS §3b: show it beside the shares
    if found:
        click.echo(f"  {'writer':<7} {'responder':<9}  {'label':<19} {'mean pct':>8} {f'top-{k}':>7} "
                   f"{f'bottom-{k}':>9} {'q-value':>9}" + (f" {'write fraction':>14}" if fraction else ""))
    for ix in found[:_SHOW_AT_MOST]:
        q = result.q_value[ix]
        click.echo(f"  {f'{ix[0]}.{ix[1]}':<7} {f'{ix[2]}.{ix[3]}':<9}  {words[int(lab[ix])]:<19} "
                   f"{result.mean_percentile[ix]:8.3f} {result.top_share[ix][0]:7.3f} "
                   f"{result.bottom_share[ix][0]:9.3f} {_q(q):>9}"
                   + (f" {result.write_fraction[ix]:14.3f}" if fraction else ""))
    if len(found) > _SHOW_AT_MOST:
        click.echo(f"  ... and {len(found) - _SHOW_AT_MOST} more, strongest first above; all are in {result.path}")
    if note:
        click.echo(f"note: {CAUTION}")


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--calibrate", type=float, default=3.0, show_default=True, metavar="SECONDS",
              help="How long to time the ranks kernel on this machine.")
@scan_options
@run_options
def plan(checkpoint, calibrate, **kw):
    """Before a long scan: pairs, rows, entries, estimated wall time and peak memory."""
    from ..run.plan import plan_scan

    click.echo(plan_scan(checkpoint, _make_options(**kw), calibrate_seconds=calibrate).describe())


@main.command()
@click.argument("checkpoint", type=click.Path())
@checkpoint_options
def inspect(checkpoint, family, layout, rotary_offset, rotary_offsets):
    """Show what was read from CHECKPOINT: family, sizes, norms, rotary, tensors, fingerprint."""
    from ..extract import describe_weights, load_weights

    w = load_weights(checkpoint, family=family, layout_file=layout)
    for key, value in describe_weights(w, _offsets(rotary_offset, rotary_offsets)):
        click.echo(f"{key:<26}  {value}")


@main.command()
@click.option("--dir", "directory", default="demo-output", show_default=True, type=click.Path(),
              help="Where to write the demo checkpoint and its scan file.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
def demo(directory, quiet):
    """Build the invented demo model, scan it, and print what was found."""
    from ..demo import PLANTED_CIRCUITS, build_demo

    root = Path(directory)
    model = build_demo(root / "demo-model")
    click.echo(f"built the invented demo checkpoint in {model}")
    result = _run(model, root / "demo-scan.h5", ScanOptions(), overwrite=True, quiet=quiet)
    _print_findings(result)
    click.echo("planted (invented scenario, data_cards/demo-model.md):")
    for name, (u, r, _, _, qk, ov) in PLANTED_CIRCUITS.items():
        click.echo(f"  {name:<11} writer {u[0]}.{u[1]} -> responder {r[0]}.{r[1]}: "
                   f"{_LABEL_WORDS[qk]}, responder {'copies' if ov > 0 else 'suppresses'}")
    part_files = _demo_sides(root, model, quiet)
    from ..interpret.predict import shortlist as make_shortlist
    from .report import load_report_inputs, write_report

    index = write_report(root / "demo-scan.h5", root / "demo-report", part_paths=part_files)
    click.echo(f"report: {index}")
    _print_shortlist(make_shortlist(*load_report_inputs(root / "demo-scan.h5")))
    click.echo(f"note: {CAUTION}")


def _demo_sides(root: Path, model, quiet) -> list:
    """The demo's other sides and query parts (docs/sides.md), for the writers of layer 1."""
    from ..demo import SIDE_CIRCUITS

    click.echo("\nother sides and query parts, writers of layer 1 (where the demo's writers are):")
    parts = {}
    for side, part in (("key", "full"), ("value", "full"), ("query", "unembed"), ("query", "rest")):
        name = f"demo-scan-{side}.h5" if part == "full" else f"demo-scan-{side}-{part}.h5"
        options = ScanOptions(side=side, query_part=part, writers="1", responders="2,3")
        result = _run(model, root / name, options, overwrite=True, quiet=quiet)
        if side == "query":  # parts are read pair by pair against the full write: the table below
            parts[part] = result
        else:
            _print_findings(result, note=False)
    part_files = [parts["unembed"].path, parts["rest"].path]
    _print_mediation(load_scan(root / "demo-scan.h5"), part_files)
    click.echo("planted for the other sides and parts (invented scenario):")
    for name, (u, r, what) in SIDE_CIRCUITS.items():
        click.echo(f"  {name:<15} writer {u[0]}.{u[1]} -> responder {r[0]}.{r[1]}: {what}")
    return part_files


# ---------------------------------------------------------------------------
# Head profiles, shortlist, report, one pair (composition/heads.py, predict.py, report/)
# ---------------------------------------------------------------------------

@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--out", "-o", type=click.Path(), help="Write a separate heads file (HDF5).")
@click.option("--into", "into", type=click.Path(), metavar="SCAN.h5",
              help="Add /heads and /model_space to this scan file instead (uses the scan's table, k and thresholds).")
@click.option("--table", type=click.Choice(TABLES), default="attn0-mlp0", show_default=True,
              help="Token table for the OV token matrices (with --out).")
@click.option("--position", default="none", show_default=True, metavar="none|mean|N",
              help="Position embedding added to the token table (with --out).")
@click.option("--k", "ks", default="1,5,10", show_default=True, metavar="K1,K2,..", help="The k of the shares (with --out).")
@click.option("--fdr", type=float, default=DEFAULT_FDR, show_default=True,
              help="False discovery rate for head labels, Benjamini-Hochberg over all heads (with --out).")
@click.option("--min-effect", type=float, default=DEFAULT_MIN_EFFECT, show_default=True,
              help="Smallest |OV mean percentile - 0.5| that earns a head label (with --out).")
@click.option("--baseline-draws", type=int, default=200, show_default=True,
              help="Gaussian draws for the composition-score baseline.")
@click.option("--all-heads", is_flag=True,
              help="With --into: profile every head, not only the heads of the scanned pairs.")
@click.option("--overwrite", is_flag=True, help="Replace an existing heads file.")
def heads(checkpoint, out, into, table, position, ks, fdr, min_effect, baseline_draws, all_heads, overwrite):
    """Head profiles (copying / suppressing) and model-space scores of every pair of CHECKPOINT."""
    from ..extract import load_weights
    from ..interpret.heads import add_to_scan, load_heads, write_heads_file
    from ..extract.tables import TableOptions, token_table

    if (out is None) == (into is None):
        raise CompositionError("give exactly one of --out FILE.h5 (a heads file) and --into SCAN.h5.")
    start = time.monotonic()
    show = sys.stderr.isatty()

    def progress(done, total):
        if show:
            click.echo(f"\r  heads {done}/{total}  {time.monotonic() - start:6.1f} s", err=True, nl=False)

    w = load_weights(checkpoint)
    if into is not None:
        path = add_to_scan(into, w, draws=baseline_draws, progress=progress, all_heads=all_heads)
    else:
        options = TableOptions(table, _position(position))
        if not 0 < fdr < 1 or not 0 <= min_effect < 0.5:
            raise CompositionError("--fdr must lie in (0, 1) and --min-effect in [0, 0.5).")
        path = write_heads_file(out, w, token_table(w, options), options, _ks(ks), fdr, min_effect,
                                baseline_draws, overwrite=overwrite, progress=progress)
    if show:
        click.echo("", err=True)
    data = load_heads(path)
    profiled = int((data.heads["label"] != LABEL_NOT_COMPUTED).sum())
    click.echo(f"head profiles of {profiled} heads and model-space scores of every pair in "
               f"{time.monotonic() - start:.1f} s; wrote {path}")
    _print_heads(data)


def _print_heads(data) -> None:
    from ..interpret.heads import HEAD_LABEL_WORDS, KINDS

    hp, a = data.heads, data.heads_attrs
    labelled = [tuple(int(v) for v in ix) for ix in np.argwhere(np.isin(hp["label"], (1, -1)))]
    computed = int((hp["label"] != LABEL_NOT_COMPUTED).sum())
    click.echo(f"labelled heads (FDR {a['fdr']}, |OV mean percentile - 0.5| >= {a['min_effect']}): "
               f"{len(labelled)} of {computed} profiled")
    if labelled:
        click.echo(f"  {'head':>5}  {'OV label':<11} {'mean pct':>8} {'q-value':>9} {'copying score':>13}")
    for l, h in sorted(labelled, key=lambda i: -abs(hp["mean_percentile"][i] - 0.5)):
        click.echo(f"  {l:>3}.{h:<1}  {HEAD_LABEL_WORDS[int(hp['label'][l, h])]:<11} {hp['mean_percentile'][l, h]:8.3f} "
                   f"{_q(hp['q_value'][l, h]):>9} {hp['eigen_copying_score'][l, h]:13.3f}")
    draws = data.model_space_attrs["baseline_draws"]
    for kind in KINDS:
        mean, sd = data.baseline(kind)
        click.echo(f"{kind.upper()}-composition baseline: {mean:.4f} +- {sd:.4f} (Gaussian factors, {draws} draws)")
    click.echo(f"note: {CAUTION}")


@main.command()
@click.argument("scan_file", type=click.Path())
@click.option("--heads", "heads_file", type=click.Path(), help="Heads file, if the scan file has no /heads group.")
@click.option("--csv", "csv_file", type=click.Path(), help="Also write the shortlist as CSV, one row per (head, writer).")
@click.option("--parts", metavar="UNEMBED.h5,REST.h5",
              help="Query-part scans of the same model (--query-part unembed / rest): show how much of each "
                   "labelled pair survives in each part.")
def shortlist(scan_file, heads_file, csv_file, parts):
    """Candidate suppressor and back-up heads of a scan, with the writers each responds to."""
    from ..interpret.predict import shortlist as make_shortlist
    from ..interpret.predict import shortlist_rows
    from .report import load_report_inputs
    from .report.csvfiles import write_csv

    scan_data, head_data = load_report_inputs(scan_file, heads_file)
    candidates = make_shortlist(scan_data, head_data)
    _print_shortlist(candidates)
    if parts:
        _print_mediation(scan_data, [p for p in parts.split(",") if p.strip()])
    if csv_file:
        try:
            write_csv(csv_file, shortlist_rows(candidates))
        except OSError as exc:
            raise CompositionError(f"cannot write {csv_file} ({exc.strerror}).") from None
        click.echo(f"wrote {csv_file}")


def _print_mediation(full, part_files) -> None:
    """The mediation table: each labelled pair's share in the full write and in each part."""
    from ..interpret.predict import mediation_rows

    parts = {}
    for f in part_files:
        part = load_scan(f)
        parts[str(part.attrs.get("query_part"))] = part
    rows = [r for r in mediation_rows(full, parts) if not all(np.isnan(r[p]) for p in parts)]
    names = sorted(parts, key=lambda p: ("unembed", "rest").index(p) if p in ("unembed", "rest") else 2)
    click.echo(f"mediation of the query side's labelled pairs: share (and write fraction) per part")
    click.echo(f"  {'writer':<7} {'responder':<9}  {'share':<10} {'full':>6}" + "".join(f" {p:>16}" for p in names))
    for r in rows:
        cells = "".join(" " + _share_cell(r[p], r[f"{p}_write_fraction"]).rjust(16) for p in names)
        click.echo(f"  {r['writer']:<7} {r['responder']:<9}  {r['share']:<10} {r['full']:6.3f}{cells}")
    click.echo("  (bottom-k share for attention-lowering pairs; rank statistics are blind to magnitude, so read"
               " each part beside the fraction of the write it carries; for pairs neutral on the full write the"
               " two parts can carry opposite labels that cancel: see docs/sides.md)")


def _share_cell(share: float, fraction: float) -> str:
    return "not scanned" if np.isnan(share) else f"{share:6.3f} ({fraction:.3f})"


def _print_shortlist(candidates) -> None:
    click.echo(f"shortlist: {sum(c.kind == 'suppressor' for c in candidates)} candidate suppressor heads "
               f"(suppressing, attention-raising), {sum(c.kind == 'back-up' for c in candidates)} candidate "
               f"back-up heads (copying, attention-lowering)")
    if not candidates:
        return
    click.echo(f"  {'#':>2} {'kind':<10} {'head':>5} {'OV pct':>6} {'OV q':>8} {'copy':>6}  "
               f"{'writer':>6} {'pair pct':>8} {'pair q':>8} {'Q-comp z':>8}  prediction")
    for rank, c in enumerate(candidates, 1):
        for j, r in enumerate(c.writers):
            head = (f"{rank:>2} {c.kind:<10} {c.label:>5} {c.ov_mean_percentile:6.3f} {_q(c.ov_q_value):>8} "
                    f"{c.copying_score:6.2f}" if j == 0 else " " * 43)
            click.echo(f"  {head}  {r['writer']:>6} {r['mean_percentile']:8.3f} {_q(r['q_value']):>8} "
                       f"{r['q_composition_z']:8.1f}  {r['prediction']}")


@main.command()
@click.argument("scan_file", type=click.Path())
@click.option("--out", "-o", required=True, type=click.Path(), help="Report directory to write.")
@click.option("--heads", "heads_file", type=click.Path(), help="Heads file, if the scan file has no /heads group.")
@click.option("--parts", metavar="UNEMBED.h5,REST.h5",
              help="Query-part scans of the same model (--query-part unembed / rest): add a mediation table.")
def report(scan_file, out, heads_file, parts):
    """Heatmaps, per-head bars, compensation map, CSV tables and index.html of a scan."""
    from .report import write_report

    index = write_report(scan_file, out, heads_file, [p for p in (parts or "").split(",") if p.strip()])
    click.echo(f"wrote the report {index}")


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.argument("writer")
@click.argument("responder")
@click.option("--tokens", metavar="T1,T2,..", help="Tokens to place: vocabulary pieces or their text, or ids.")
@click.option("--top", type=int, default=15, show_default=True, help="How many highest and lowest tokens to list.")
@click.option("--table", type=click.Choice(TABLES), default="attn0-mlp0", show_default=True,
              help="Token table standing for the residual stream at a token.")
@click.option("--position", default="none", show_default=True, metavar="none|mean|N",
              help="Position embedding added to the token table.")
@click.option("--orientation", type=click.Choice(ORIENTATIONS), default="row", show_default=True,
              help="Rank the diagonal within its row or its column.")
@click.option("--k", "ks", default="1,5,10", show_default=True, metavar="K1,K2,..", help="The k of the shares.")
@click.option("--scan", "scan_file", type=click.Path(), help="Scan file with this pair: print its label and prediction.")
@click.option("--csv", "csv_file", type=click.Path(), help="Write every token's rank and percentile as CSV.")
@click.option("--figure", "figure_file", type=click.Path(), help="Write the percentile histogram (.png or .svg).")
def pair(checkpoint, writer, responder, tokens, top, table, position, orientation, ks, scan_file, csv_file,
         figure_file):
    """One pair in depth: WRITER and RESPONDER are head labels layer.head, e.g. 1.0 2.3."""
    from ..extract import load_weights
    from ..interpret.pair import pair_detail, parse_head, resolve_tokens
    from ..extract.vocabulary import checkpoint_directory, load_vocabulary
    from ..extract.tables import TableOptions

    u, r = parse_head(writer, "WRITER"), parse_head(responder, "RESPONDER")
    w = load_weights(checkpoint)
    vocab = load_vocabulary(checkpoint_directory(checkpoint), w.vocab_size)
    chosen = resolve_tokens([t for t in (tokens or "").split(",") if t != ""], vocab, w.vocab_size)
    detail = pair_detail(w, u, r, TableOptions(table, _position(position)), orientation, _ks(ks), vocab)
    s = detail.stats
    click.echo(f"pair {writer} -> {responder}: {s.rows} rows, {detail.n_keys} keys per row, "
               f"{orientation} orientation, token table {table}; tokens "
               f"{'from ' + vocab.source if vocab else 'as ids (no tokenizer.json)'}")
    shares = "  ".join(f"top-{k} {t:.4f} / bottom-{k} {b:.4f} (null {k / detail.n_keys:.4f})"
                       for k, t, b in zip(_ks(ks), s.top_share, s.bottom_share))
    click.echo(f"mean percentile {s.mean_percentile:.4f} (null 0.5), p = {s.p_value:.1e} for this pair alone")
    click.echo(f"shares: {shares}")
    for name, hw in (("writer", detail.writer_write), ("responder", detail.responder_write)):
        click.echo(f"{name} OV token matrix: diagonal mean percentile {hw.mean_percentile:.3f} "
                   f"(p = {hw.p_value:.1e} alone), eigenvalue copying score {hw.copying_score:.3f}")
    if scan_file:
        from ..interpret.predict import pair_prediction
        from .report import load_report_inputs

        scan_data, head_data = load_report_inputs(scan_file)
        pp = pair_prediction(scan_data, head_data, u, r)
        click.echo(f"in {scan_file}: {pp['response']} (q = {pp['q_value']:.1e}); signs s_U {pp['s_writer']:+d}, "
                   f"s_QK {pp['s_response']:+d}, s_R {pp['s_responder']:+d} -> {pp['prediction']}")
    click.echo("percentile histogram (fraction of rows per bin; | marks the uniform null):")
    for line in _text_histogram(s.histogram):
        click.echo(line)
    for which, title in (("highest", "writing the token most raises the responder's attention to it"),
                         ("lowest", "writing the token most lowers the responder's attention to it")):
        click.echo(f"{which}-ranked diagonals ({title}):")
        for row in detail.extremes(top, which):
            click.echo(f"  {row['token']:>7} {row['text']!r:<24} rank {row['rank']:>9.1f}  percentile {row['percentile']:.4f}")
    if chosen:
        click.echo("chosen tokens:")
        for t in chosen:
            row = detail.row(t)
            click.echo(f"  {row['token']:>7} {row['text']!r:<24} rank {row['rank']:>9.1f}  percentile {row['percentile']:.4f}")
    if csv_file:
        from .report.csvfiles import write_csv

        try:
            write_csv(csv_file, detail.table())
        except OSError as exc:
            raise CompositionError(f"cannot write {csv_file} ({exc.strerror}).") from None
        click.echo(f"wrote {csv_file}")
    if figure_file:
        from .report.figures import pair_histogram

        if not str(figure_file).lower().endswith((".png", ".svg")):
            raise CompositionError(f"--figure {figure_file} must end in .png or .svg.")
        try:
            pair_histogram(s.histogram, f"{writer} \u2192 {responder}: percentile of the diagonal", Path(figure_file))
        except OSError as exc:
            raise CompositionError(f"cannot write {figure_file} ({exc.strerror}).") from None
        click.echo(f"wrote {figure_file}")
    click.echo(f"note: {CAUTION}")


def _text_histogram(counts, width: int = 50) -> list[str]:
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
