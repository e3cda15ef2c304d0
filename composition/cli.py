"""The ``composition`` command: parse, call the library, print. Nothing else lives here."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import click
import numpy as np

from .errors import CompositionError
from .factors import ORIENTATIONS
from .scan import ScanOptions, run_scan
from .scanfile import CAUTION
from .stats import DEFAULT_FDR, DEFAULT_MIN_EFFECT, LABEL_NOT_COMPUTED
from .tables import TABLES

_LABEL_WORDS = {1: "attention-raising", -1: "attention-lowering", 0: "neutral"}


class _Group(click.Group):
    """Turn a CompositionError into one sentence on stderr and exit status 2."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except CompositionError as exc:
            click.echo(f"composition: {exc}", err=True)
            sys.exit(2)


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


def scan_options(f):
    """The options shared by every command that computes token matrices."""
    for opt in reversed([
        click.option("--writers", metavar="SPEC", help="Writer heads: layers and layer.head labels, e.g. 1,2.3 (default: all)."),
        click.option("--responders", metavar="SPEC", help="Responder heads, same form (default: all)."),
        click.option("--table", type=click.Choice(TABLES), default="attn0-mlp0", show_default=True,
                     help="Token table standing for the residual stream at a token."),
        click.option("--position", default="none", show_default=True, metavar="none|mean|N",
                     help="Position embedding added to the token table: none, the mean row, or row N."),
        click.option("--orientation", type=click.Choice(ORIENTATIONS), default="row", show_default=True,
                     help="Rank the diagonal within its row (fixed written token) or its column (fixed key token)."),
        click.option("--k", "ks", default="1,5,10", show_default=True, metavar="K1,K2,..",
                     help="The k of the top-k and bottom-k shares."),
        click.option("--fdr", type=float, default=DEFAULT_FDR, show_default=True,
                     help="False discovery rate for labels, Benjamini-Hochberg over all pairs."),
        click.option("--min-effect", type=float, default=DEFAULT_MIN_EFFECT, show_default=True,
                     help="Smallest |mean percentile - 0.5| that earns a label."),
    ]):
        f = opt(f)
    return f


def run_options(f):
    """How ranks are computed and which rows are evaluated (scan, plan)."""
    from .ranks import DEVICES, PRECISIONS

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


def _make_options(writers, responders, table, position, orientation, ks, fdr, min_effect, precision="fp32",
                  device="cpu", rows=None, seed=0, until_ci=None) -> ScanOptions:
    return ScanOptions(table=table, position=_position(position), orientation=orientation, k=_ks(ks),
                       fdr=fdr, min_effect=min_effect, writers=writers, responders=responders,
                       precision=precision, device=device, rows=rows, seed=seed, until_ci=until_ci)


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--out", "-o", required=True, type=click.Path(), help="Scan file to write (HDF5).")
@click.option("--overwrite", is_flag=True, help="Replace an existing scan file.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
@scan_options
@run_options
def scan(checkpoint, out, overwrite, quiet, **kw):
    """Scan every writer -> responder pair of CHECKPOINT and write a scan file.

    CHECKPOINT is a directory with config.json and a .safetensors file, or the
    .safetensors file itself with config.json beside it.
    """
    options = _make_options(**kw)
    result = _run(checkpoint, out, options, overwrite, quiet)
    _print_findings(result)


def _run(checkpoint, out, options, overwrite, quiet):
    start = time.monotonic()
    show = (not quiet) and sys.stderr.isatty()

    def progress(done, total):
        if show:
            click.echo(f"\r  pairs {done}/{total}  {time.monotonic() - start:6.1f} s", err=True, nl=False)

    result = run_scan(checkpoint, out, options, overwrite=overwrite, progress=progress)
    if show:
        click.echo("", err=True)
    if not quiet:
        click.echo(f"scanned {int(result.done.sum())} pairs in {time.monotonic() - start:.1f} s; "
                   f"wrote {result.path}")
    return result


def _print_findings(result) -> None:
    lab = result.label
    found = [tuple(int(i) for i in ix) for ix in np.argwhere((lab != 0) & (lab != LABEL_NOT_COMPUTED))]
    ks = list(result.k)
    click.echo(f"labelled responders (FDR {result.attrs['fdr']}, |mean percentile - 0.5| >= "
               f"{result.attrs['min_effect']}): {len(found)} of {int(result.done.sum())} pairs")
    if found:
        click.echo(f"  {'writer':>7} {'responder':>9}  {'label':<19} {'mean pct':>8} {f'top-{ks[0]}':>7} "
                   f"{f'bottom-{ks[0]}':>9} {'q-value':>9}")
    for ix in sorted(found, key=lambda i: -abs(result.mean_percentile[i] - 0.5)):
        click.echo(f"  {ix[0]}.{ix[1]:<5} {ix[2]}.{ix[3]:<7}  {_LABEL_WORDS[int(lab[ix])]:<19} "
                   f"{result.mean_percentile[ix]:8.3f} {result.top_share[ix][0]:7.3f} "
                   f"{result.bottom_share[ix][0]:9.3f} {result.q_value[ix]:9.1e}")
    click.echo(f"note: {CAUTION}")


@main.command()
@click.argument("checkpoint", type=click.Path())
@click.option("--calibrate", type=float, default=3.0, show_default=True, metavar="SECONDS",
              help="How long to time the ranks kernel on this machine.")
@scan_options
@run_options
def plan(checkpoint, calibrate, **kw):
    """Before a long scan: pairs, rows, entries, estimated wall time and peak memory."""
    from .plan import plan_scan

    click.echo(plan_scan(checkpoint, _make_options(**kw), calibrate_seconds=calibrate).describe())


@main.command()
@click.argument("checkpoint", type=click.Path())
def inspect(checkpoint):
    """Show what was read from CHECKPOINT: family, sizes, norms, tensors, fingerprint."""
    from .checkpoints import load_weights

    w = load_weights(checkpoint)
    layer = w.layers[0]
    rows = [
        ("source", w.source),
        ("family", w.family),
        ("vocabulary", w.vocab_size),
        ("layers x heads", f"{w.n_layers} x {w.n_heads}"),
        ("model width / head width", f"{w.d_model} / {w.d_head}"),
        ("key/value heads", f"{layer.attn.kv_heads}" + (" (grouped-query)" if layer.attn.kv_heads < w.n_heads else "")),
        ("norm", f"{layer.attn_norm.kind}, {w.placement}-norm placement, eps {layer.attn_norm.eps:g}"),
        ("MLP", f"{layer.mlp.activation}{', gated' if layer.mlp.W_gate is not None else ''}, width {layer.mlp.W_in.shape[1]}"),
        ("positions", "learned" if w.W_pos is not None else "none learned"),
        ("rotary", "none" if w.rotary is None else f"{w.rotary.dims} dims, {w.rotary.style}"),
        ("unembedding", {"tied": "tied to the input embedding", "lm-head": "separate LM head",
                         "input-embedding": "input embedding used as readout (no LM head in the checkpoint)"}[w.readout]),
        ("attention scale", f"{w.scale:.6g}"),
        ("tensors used", f"{len(w.tensors_used)}"),
        ("tensors ignored", ", ".join(w.tensors_ignored) if w.tensors_ignored else "none"),
        ("fingerprint", w.fingerprint()),
    ]
    width = max(len(k) for k, _ in rows)
    for key, value in rows:
        click.echo(f"{key:<{width}}  {value}")


@main.command()
@click.option("--dir", "directory", default="demo-output", show_default=True, type=click.Path(),
              help="Where to write the demo checkpoint and its scan file.")
@click.option("--quiet", "-q", is_flag=True, help="No progress output.")
def demo(directory, quiet):
    """Build the invented demo model, scan it, and print what was found."""
    from .demo import PLANTED_CIRCUITS, build_demo

    root = Path(directory)
    model = build_demo(root / "demo-model")
    click.echo(f"built the invented demo checkpoint in {model}")
    result = _run(model, root / "demo-scan.h5", ScanOptions(), overwrite=True, quiet=quiet)
    _print_findings(result)
    click.echo("planted (invented scenario, data_cards/demo-model.md):")
    for name, (u, r, _, _, qk, ov) in PLANTED_CIRCUITS.items():
        click.echo(f"  {name:<11} writer {u[0]}.{u[1]} -> responder {r[0]}.{r[1]}: "
                   f"{_LABEL_WORDS[qk]}, responder {'copies' if ov > 0 else 'suppresses'}")
