"""The ``composition`` command: parse, call the library, print. Nothing else lives here.

Options are declared, parsed and checked once, in ``composition.options``; the tables printed
are built in ``composition.present.terminal``; sides and their words come from
``composition.compose.sides``.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import click

from .. import options as opt
from ..compose import sides
from ..errors import CompositionError
from ..options import ScanOptions
from ..run.interrupts import ScanInterrupted
from ..run.progress import ProgressPrinter, counter
from ..run.scan import run_scan
from ..store.scanfile import CAUTION, load_scan
from . import terminal


class _Group(click.Group):
    """Turn a CompositionError (or a malformed command line) into one sentence on stderr and exit
    status 2; an interrupted scan exits 128 + the signal number (130 SIGINT, 143 SIGTERM) after
    saying how to resume."""

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
        except click.UsageError as exc:
            click.echo(f"composition: {' '.join(exc.format_message().split())}", err=True)
            sys.exit(2)


def _resume_command() -> str:
    """The command line that was run, less --overwrite (which would start afresh)."""
    import shlex

    return shlex.join(["composition"] + [a for a in sys.argv[1:] if a != "--overwrite"])


def _echo(lines) -> None:
    for line in lines:
        click.echo(line)


def _load(checkpoint, kw: dict):
    """The checkpoint's weights, read with ``--family``/``--layout``; the rotary offsets checked against it."""
    from ..extract import load_weights
    from ..extract.rotary import offsets_rotation

    offsets = opt.pop_offsets(kw)
    w = load_weights(checkpoint, kw.pop("family", None), kw.pop("layout", None))
    offsets_rotation(w, offsets)  # refuse rotary options the model cannot take
    return w, offsets


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="composition", message="composition %(version)s")
def main():
    """Weight-space analysis of head-to-head composition in transformer checkpoints.

    For every pair of attention heads, an earlier writer and a later responder, rank how
    the responder's attention to a token changes once the writer has written it, over the
    whole vocabulary. Predictions from weights alone, for choosing causal experiments.
    """


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--out", "-o", required=True, type=click.Path(), help="Scan file to write (HDF5); if it holds an unfinished scan, it is resumed.")
@click.option("--overwrite", is_flag=True, help="Replace an existing scan file and start afresh.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
@opt.use("checkpoint", "selection", "matrix", "labels", "run", "beyond")
@click.option("--cluster", metavar="ADDRESS", help="Run the work units on this Dask scheduler, e.g. tcp://host:8786 (needs the cluster extra).")
@click.option("--workers", type=click.IntRange(min=1, max=opt.MAX_COUNT), metavar="N", help="Run the work units on a local Dask cluster of N processes (needs the cluster extra).")
@click.option("--worker-checkpoint", metavar="PATH", help="The checkpoint's path as the workers see it (default: CHECKPOINT's absolute path).")
def scan(checkpoint, out, overwrite, quiet, cluster, workers, worker_checkpoint, **kw):
    """Scan every writer -> responder pair of CHECKPOINT and write a scan file.

    CHECKPOINT is a directory with config.json and a .safetensors file, or the
    .safetensors file itself with config.json beside it. Each work unit is committed as
    soon as it is computed: after a crash, a reboot or Ctrl-C, run the same command again
    to continue where it stopped.
    """
    result = _run(checkpoint, out, opt.scan_options(kw), overwrite, quiet, cluster=cluster, workers=workers,
                  worker_checkpoint=worker_checkpoint)
    for note in json.loads(result.attrs.get("reader_notes", "[]")):
        click.echo(f"reader: {note}")
    _echo(terminal.findings(result))


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


@main.command()
@click.argument("checkpoint", type=click.Path())
@opt.use("calibrate", "checkpoint", "selection", "matrix", "labels", "run")
def plan(checkpoint, calibrate, **kw):
    """Before a long scan: pairs, rows, entries, estimated wall time and peak memory, on any side."""
    from ..run.plan import plan_scan

    click.echo(plan_scan(checkpoint, opt.scan_options(kw), calibrate_seconds=calibrate).describe())


@main.command()
@click.argument("checkpoint", type=click.Path())
@opt.use("checkpoint")
def inspect(checkpoint, **kw):
    """Show what was read from CHECKPOINT: family, sizes, norms, rotary, tensors, fingerprint."""
    from ..extract import describe_weights, load_weights

    offsets = opt.pop_offsets(kw)
    w = load_weights(checkpoint, family=kw["family"], layout_file=kw["layout"])
    for key, value in describe_weights(w, offsets):
        click.echo(f"{key:<26}  {value}")


@main.command()
@click.option("--dir", "directory", default="demo-output", show_default=True, type=click.Path(),
              help="Where to write the demo checkpoint and its scan file.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
def demo(directory, quiet):
    """Build the invented demo model, scan it, and print what was found."""
    from ..demo import PLANTED_CIRCUITS, build_demo
    from ..interpret.predict import shortlist as make_shortlist
    from .report import load_report_inputs, write_report

    root = Path(directory)
    model = build_demo(root / "demo-model")
    click.echo(f"built the invented demo checkpoint in {model}")
    result = _run(model, root / "demo-scan.h5", ScanOptions(), overwrite=True, quiet=quiet)
    _echo(terminal.findings(result))
    click.echo("planted (invented scenario, data_cards/demo-model.md):")
    words = sides.get("query").words
    for name, (u, r, _, _, qk, ov) in PLANTED_CIRCUITS.items():
        click.echo(f"  {name:<11} writer {u[0]}.{u[1]} -> responder {r[0]}.{r[1]}: "
                   f"{words[qk]}, responder {'copies' if ov > 0 else 'suppresses'}")
    part_files = _demo_sides(root, model, quiet)
    index = write_report(root / "demo-scan.h5", root / "demo-report", part_paths=part_files)
    click.echo(f"report: {index}")
    scan_data, head_data = load_report_inputs(root / "demo-scan.h5")
    _echo(terminal.shortlist(make_shortlist(scan_data, head_data), scan_data))
    from ..demo import beyond_single_heads

    click.echo("")
    _echo(beyond_single_heads(root, demo_model=model))
    click.echo(f"note: {CAUTION}")


def _demo_sides(root: Path, model, quiet) -> list:
    """The demo's other sides and query parts (docs/sides.md), for the writers of layer 1."""
    from ..demo import SIDE_CIRCUITS

    click.echo("\nother sides and query parts, writers of layer 1 (where the demo's writers are):")
    parts = {}
    for side in sides.every():
        if side.feeds_prediction:  # the query side's full write is the main scan above
            continue
        name = f"demo-scan-{side.name}.h5" if side.part == "full" else f"demo-scan-{side.name}-{side.part}.h5"
        options = ScanOptions(side=side.name, query_part=side.part, writers="1", responders="2,3")
        result = _run(model, root / name, options, overwrite=True, quiet=quiet)
        if side.part != "full":  # parts are read pair by pair against the full write: the table below
            parts[side.part] = result
        else:
            _echo(terminal.findings(result, note=False))
    part_files = [parts["unembed"].path, parts["rest"].path]
    _print_mediation(load_scan(root / "demo-scan.h5"), part_files)
    click.echo("planted for the other sides and parts (invented scenario):")
    for name, (u, r, what) in SIDE_CIRCUITS.items():
        click.echo(f"  {name:<15} writer {u[0]}.{u[1]} -> responder {r[0]}.{r[1]}: {what}")
    return part_files


# ---------------------------------------------------------------------------
# Head profiles, shortlist, report, one pair (composition.interpret, composition.present.report)
# ---------------------------------------------------------------------------

@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--out", "-o", type=click.Path(), help="Write a separate heads file (HDF5).")
@click.option("--into", "into", type=click.Path(), metavar="SCAN.h5",
              help="Add /heads and /model_space to this scan file instead (uses the scan's table, k and thresholds).")
@opt.use("checkpoint", "table", "position", "ks", "labels")
@click.option("--baseline-draws", type=click.IntRange(min=2, max=10**6), default=200, show_default=True,
              help="Gaussian draws for the composition-score baseline (2 to 10^6).")
@click.option("--all-heads", is_flag=True,
              help="With --into: profile every head, not only the heads of the scanned pairs.")
@click.option("--overwrite", is_flag=True, help="Replace an existing heads file.")
def heads(checkpoint, out, into, baseline_draws, all_heads, overwrite, **kw):
    """Head profiles (copying / suppressing) and model-space scores of every pair of CHECKPOINT.

    The table, position, k and thresholds apply with --out; with --into the scan's own are used.
    Rotary offsets do not enter head profiles (an OV circuit has no positions); they are checked
    against the model like every command's.
    """
    from ..extract.tables import TableOptions, token_table
    from ..interpret.heads import add_to_scan, load_heads, write_heads_file

    if (out is None) == (into is None):
        raise CompositionError("give exactly one of --out FILE.h5 (a heads file) and --into SCAN.h5.")
    start = time.monotonic()
    w, _ = _load(checkpoint, kw)
    printer = ProgressPrinter(sys.stderr)  # one status line with rate and ETA, as the scan's final phase
    progress = counter(printer, "heads", float(w.vocab_size) ** 2)  # a head profile ranks V x V entries
    try:
        if into is not None:
            path = add_to_scan(into, w, draws=baseline_draws, progress=progress, all_heads=all_heads)
        else:
            opt.check_for_model(ScanOptions(k=kw["ks"]), w.vocab_size)
            table = TableOptions(kw["table"], kw["position"])
            path = write_heads_file(out, w, token_table(w, table), table, kw["ks"], kw["fdr"], kw["min_effect"],
                                    baseline_draws, overwrite=overwrite, progress=progress)
    finally:
        printer.close()
    data = load_heads(path)
    profiled = terminal.head_profiles(data, w.readout)
    click.echo(f"head profiles and model-space scores of every pair in {time.monotonic() - start:.1f} s; wrote {path}")
    _echo(profiled)


@main.command()
@click.argument("scan_file", type=click.Path())
@click.option("--heads", "heads_file", type=click.Path(), help="Heads file, if the scan file has no /heads group.")
@click.option("--csv", "csv_file", type=click.Path(), help="Also write the shortlist as CSV, one row per (head, writer).")
@click.option("--parts", metavar="UNEMBED.h5,REST.h5",
              help="Query-part scans of the same model (--query-part unembed / rest): show how much of each "
                   "labelled pair survives in each part.")
def shortlist(scan_file, heads_file, csv_file, parts):
    """Candidate suppressor and back-up heads of a query-side scan, with the writers each responds to.

    Other sides' labels do not feed the compensation prediction: for their scans the command says so.
    """
    from ..interpret.predict import shortlist as make_shortlist
    from ..interpret.predict import shortlist_rows
    from .report import load_report_inputs
    from .report.csvfiles import write_csv

    scan_data, head_data = load_report_inputs(scan_file, heads_file, "shortlist")
    candidates = make_shortlist(scan_data, head_data)
    _echo(terminal.shortlist(candidates, scan_data))
    if parts:
        _print_mediation(scan_data, [p for p in parts.split(",") if p.strip()])
    if csv_file:
        write_csv(csv_file, shortlist_rows(candidates))  # an unwritable path: one sentence (store.atomic)
        click.echo(f"wrote {csv_file}")


def _print_mediation(full, part_files) -> None:
    """The mediation table: each labelled pair's share in the full write and in each part."""
    from ..interpret.predict import mediation_rows

    parts = {}
    for f in part_files:
        part = load_scan(f)
        parts[str(part.attrs.get("query_part"))] = part
    _echo(terminal.mediation(mediation_rows(full, parts), list(parts)))


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
@click.option("--top", type=click.IntRange(min=0, max=opt.MAX_COUNT), default=15, show_default=True,
              help="How many highest and lowest tokens to list.")
@opt.use("checkpoint", "matrix")
@click.option("--scan", "scan_file", type=click.Path(),
              help="Scan file with this pair (same side and query part): print its label and, on the query side, "
                   "the prediction.")
@click.option("--csv", "csv_file", type=click.Path(), help="Write every token's rank and percentile as CSV.")
@click.option("--figure", "figure_file", type=click.Path(), help="Write the percentile histogram (.png or .svg).")
def pair(checkpoint, writer, responder, tokens, top, scan_file, csv_file, figure_file, **kw):
    """One pair in depth: WRITER and RESPONDER are head labels layer.head, e.g. 1.0 2.3."""
    from ..extract.tables import TableOptions
    from ..extract.vocabulary import checkpoint_directory, load_vocabulary
    from ..interpret.pair import check_scan, pair_detail, resolve_tokens

    u, r = opt.head_label(writer, "WRITER"), opt.head_label(responder, "RESPONDER")
    if figure_file and not str(figure_file).lower().endswith((".png", ".svg")):
        raise CompositionError(f"--figure {figure_file} must end in .png or .svg.")
    w, offsets = _load(checkpoint, kw)
    if scan_file:  # refuse a scan of another model (or an unfinished one) before computing anything
        from ..store.scanfile import check_matches
        from .report import load_report_inputs

        scan_data, head_data = load_report_inputs(scan_file, command="pair --scan")
        check_matches(scan_data, w)
    opt.check_for_model(ScanOptions(k=kw["ks"]), w.vocab_size)
    vocab = load_vocabulary(checkpoint_directory(checkpoint), w.vocab_size)
    chosen = resolve_tokens([t for t in (tokens or "").split(",") if t != ""], vocab, w.vocab_size)
    detail = pair_detail(w, u, r, TableOptions(kw["table"], kw["position"]), kw["orientation"], kw["ks"], vocab,
                         kw["side"], kw["query_part"], offsets)
    scan_lines = []
    if scan_file:
        from ..interpret.predict import pair_prediction

        check_scan(scan_data, detail)
        scan_lines = terminal.scan_prediction(scan_file, pair_prediction(scan_data, head_data, u, r), scan_data)
    _echo(terminal.pair(detail, kw["ks"], kw["table"], kw["orientation"], top, chosen, w.readout, scan_lines))
    if csv_file:
        from .report.csvfiles import write_csv

        try:
            write_csv(csv_file, detail.table())
        except OSError as exc:
            raise CompositionError(f"cannot write {csv_file} ({exc.strerror}).") from None
        click.echo(f"wrote {csv_file}")
    if figure_file:
        from .report.figures import pair_histogram

        try:
            pair_histogram(detail.stats.histogram, f"{writer} \u2192 {responder}: percentile of the diagonal",
                           Path(figure_file))
        except OSError as exc:
            raise CompositionError(f"cannot write {figure_file} ({exc.strerror}).") from None
        click.echo(f"wrote {figure_file}")
    click.echo(f"note: {CAUTION}")


from .compare_command import compare  # noqa: E402  (its own module: the command is long)

main.add_command(compare)
