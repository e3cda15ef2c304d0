"""``composition compare SCAN SCAN [SCAN ...]``: scans of one architecture lined up across checkpoints.

Registered in ``composition.present.cli`` with ``main.add_command(compare)``; the group there
turns a CompositionError into one sentence and exit status 2.
"""

from __future__ import annotations

import click


@click.command("compare")
@click.argument("scans", nargs=-1, required=True, type=click.Path(dir_okay=False))
@click.option("--out", "out_dir", type=click.Path(file_okay=False), default=None,
              help="Write difference heatmaps, label changes, the tidy table and (three or more scans) "
                   "the trajectory figure into this directory.")
@click.option("--names", default=None,
              help="Comma-separated short names for the scans, in order (default: the file names).")
def compare(scans, out_dir, names):
    """Compare scans of the same architecture and options, in the order given (e.g. training steps).

    Prints the pairs compared, the number of label changes and the largest changes of mean
    percentile. Scans of other shapes or options are refused.
    """
    from ..interpret.compare import compare_scans

    result = compare_scans(scans, names=None if names is None else [n.strip() for n in names.split(",")])
    click.echo(result.summary())
    if out_dir is not None:
        files = result.write(out_dir)
        click.echo(f"wrote {len(files)} files into {out_dir}: " + ", ".join(sorted(p.name for p in files.values())))
