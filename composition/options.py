"""Every command-line option, defined once: its click declaration, its parser and its check.

Each check raises :class:`~composition.errors.CompositionError` with one sentence naming the
option; the command line parses through the same functions (a click type that calls them), and
``ScanOptions.validate`` (the Python API) calls them too, so each message exists once. Checks
that need the model (``--k`` at most the keys per row) run once it is read, before any file is
created (``check_for_model``).

A command picks its options by name: ``@use("checkpoint", "table", "k")``.
"""

from __future__ import annotations

import math
import re
from dataclasses import asdict, dataclass

import click

from .compose import sides
from .errors import CompositionError
from .extract import FAMILIES
from .extract.tables import TABLES, TableOptions
from .score.ranks import DEVICES, PRECISIONS, check_device, check_precision
from .score.sampling import DEFAULT_FIRST_ROWS, Sampling
from .score.stats import DEFAULT_FDR, DEFAULT_K, DEFAULT_MIN_EFFECT

MAX_OFFSET = 10**7  # rotary offsets: far beyond any trained context length
MAX_OFFSET_SPAN = 10**5  # the averaged rotation costs one [dh, dh] rotation per offset
MAX_SEED = 2**63 - 1
MAX_COUNT = 2**31 - 1  # rows, tokens listed, draws: far beyond any vocabulary


# ---------------------------------------------------------------------------
# parsers and checks: one sentence per failure, naming the option
# ---------------------------------------------------------------------------

def _integer(option: str, text) -> int:
    if isinstance(text, bool):
        raise CompositionError(f"{option} {text!r} is not an integer.")
    if isinstance(text, int):
        return text
    try:
        return int(str(text).strip())
    except ValueError:  # also Python's limit on the digits of an int
        raise CompositionError(f"{option} {str(text)[:40]!r} is not an integer.") from None


def _number(option: str, text) -> float:
    try:
        value = float(text)
    except (TypeError, ValueError, OverflowError):
        raise CompositionError(f"{option} {str(text)[:40]!r} is not a number.") from None
    if not math.isfinite(value):
        raise CompositionError(f"{option} {str(text)[:40]!r} is not a finite number.")
    return value


def count(option: str, value, low: int = 1, high: int = MAX_COUNT) -> int:
    """An integer in ``[low, high]``."""
    n = _integer(option, value)
    if not low <= n <= high:
        raise CompositionError(f"{option} must be an integer from {low} to {high}, not {str(n)[:40]}.")
    return n


def seed(value) -> int:
    return count("--seed", value, 0, MAX_SEED)


def rows(value) -> int | None:
    """``--rows``: the lower bound is the sampling's own (composition.score.sampling)."""
    return None if value is None else count("--rows", value, 1)


def fdr(value) -> float:
    v = _number("--fdr", value)
    if not 0 < v < 1:
        raise CompositionError(f"--fdr must lie strictly between 0 and 1, not {v:g}.")
    return v


def min_effect(value) -> float:
    v = _number("--min-effect", value)
    if not 0 <= v < 0.5:
        raise CompositionError(f"--min-effect must lie in [0, 0.5), not {v:g}.")
    return v


def calibrate(value) -> float:
    v = _number("--calibrate", value)
    if not 0.1 <= v <= 600:
        raise CompositionError(f"--calibrate must lie between 0.1 and 600 seconds, not {v:g}.")
    return v


def until_ci(value) -> float | None:
    """``--until-ci``: a number here; its range (0, 1) is the sampling's own check."""
    return None if value is None else _number("--until-ci", value)


def ks(value) -> tuple[int, ...]:
    """``--k 1,5,10`` -> (1, 5, 10): positive integers, sorted, duplicates dropped."""
    items = value.split(",") if isinstance(value, str) else list(value)
    found = tuple(sorted({count("--k", v) for v in items if str(v).strip()}))
    if not found:
        raise CompositionError("--k needs one or more positive integers, e.g. 1,5,10.")
    return found


def position(value):
    """``--position none|mean|N``."""
    if value in (None, "none"):
        return None
    if value == "mean":
        return "mean"
    try:
        return count("--position", value, 0)
    except CompositionError:
        raise CompositionError(f"--position {str(value)[:40]!r} is neither none, mean nor a position index.") from None


def member(option: str, value, choices):
    """``value`` if it is one of ``choices``; else one sentence naming the option."""
    if value not in choices:
        raise CompositionError(f"{option} {str(value)[:40]!r} is not one of: {', '.join(choices)}.")
    return value


def table(value: str) -> str:
    return member("--table", value, TABLES)


def offsets(single=None, span=None) -> tuple[int, int] | None:
    """``--rotary-offset N`` -> (N, N); ``--rotary-offsets A:B`` -> (A, B); neither -> None."""
    if single is not None and span is not None:
        raise CompositionError("give either --rotary-offset or --rotary-offsets, not both.")
    if single is not None:
        n = count("--rotary-offset", single, 0, MAX_OFFSET)
        return (n, n)
    if span is None:
        return None
    parts = span.split(":") if isinstance(span, str) else list(span)
    if len(parts) != 2:
        raise CompositionError(f"--rotary-offsets {span!r} is not of the form A:B with integers A <= B.")
    return check_offsets(tuple(_integer("--rotary-offsets", p) for p in parts))


def check_offsets(pair) -> tuple[int, int] | None:
    """``0 <= A <= B <= 10^7`` and at most 10^5 offsets in the average."""
    if pair is None:
        return None
    a, b = (_integer("--rotary-offsets", v) for v in pair)
    if not 0 <= a <= b <= MAX_OFFSET:
        raise CompositionError(f"--rotary-offsets {str(a)[:20]}:{str(b)[:20]} must satisfy 0 <= A <= B <= {MAX_OFFSET}.")
    if b - a + 1 > MAX_OFFSET_SPAN:
        raise CompositionError(f"--rotary-offsets {a}:{b} averages {b - a + 1} offsets; at most {MAX_OFFSET_SPAN}.")
    return (a, b)


def side(name: str, part: str = "full", orientation: str | None = None) -> sides.Side:
    """``--side``, ``--query-part`` and ``--orientation`` together: the registry's checks."""
    return sides.get(name, part, orientation)


def writer_group(value) -> str:
    """One ``--writer-group NAME=L.H+L.H``: its form checked here (members against the model in
    ``writer_groups_for_model``); returned as given, stripped."""
    from .compose.groups import parse_group

    parse_group(value, 10**9, 10**9)  # the form alone; layer and head bounds need the model
    return str(value).strip()


def writer_groups_for_model(specs, n_layers: int, n_heads: int) -> tuple[str, ...]:
    """Every ``--writer-group`` checked against the model, as normalised specs ``NAME=L.H+L.H``."""
    from .compose.groups import parse_groups

    return tuple(g.spec for g in parse_groups(specs, n_layers, n_heads))


def reference_draws(value) -> int:
    return count("--reference-draws", value, 2, 10_000)


def reference_seed(value) -> int:
    return count("--reference-seed", value, 0, MAX_SEED)


def check_for_model(options, keys_per_row: int) -> None:
    """Checks that need the model, run once it is read and before any file exists."""
    too_big = [k for k in options.k if int(k) > keys_per_row]
    if too_big:
        raise CompositionError(f"--k {too_big[0]} exceeds the {keys_per_row} keys per row of this model.")


# ---------------------------------------------------------------------------
# a scan's options (the Python API's form of the command line)
# ---------------------------------------------------------------------------

Head = tuple[int, int]
_HEAD = re.compile(r"(\d{1,9})(?:\.(\d{1,9}))?")  # a layer, or a head label layer.head


@dataclass(frozen=True)
class ScanOptions:
    """Everything that changes a scan's numbers, plus the head selection."""

    table: str = "attn0-mlp0"
    position: int | str | None = None
    orientation: str = "row"
    k: tuple[int, ...] = DEFAULT_K
    fdr: float = DEFAULT_FDR
    min_effect: float = DEFAULT_MIN_EFFECT
    writers: str | None = None  # e.g. "1,2.3": whole layers or layer.head labels
    responders: str | None = None
    block_rows: int = 256
    rotary_offsets: tuple[int, int] | None = None  # (A, B): mean rotation over delta in [A, B]; None: 0 for rotary models
    family: str | None = None  # reader override (not a result option: the weights fingerprint covers it)
    layout: str | None = None  # layout file for an unknown family (likewise)
    # how the ranks are computed (never changes a number: not in the fingerprint)
    precision: str = "auto"  # auto | fp32 | bf16x3 (where AMX is): composition.score.ranks.PRECISIONS
    device: str = "cpu"  # cpu | cuda
    engine: str = "auto"  # auto | kernel | torch
    # which rows are evaluated (in the fingerprint when sampling)
    rows: int | None = None  # uniform sample without replacement of this many rows
    seed: int = 0
    until_ci: float | None = None  # sequential looks until every share's interval is this narrow
    first_rows: int = DEFAULT_FIRST_ROWS
    # which path and which part of the write (docs/methods.md §3, §3b; in the fingerprint)
    side: str = "query"  # query | key | value (docs/methods.md §3, §3b)
    query_part: str = "full"  # full | unembed | rest: the part of the write the query side uses
    # writer groups and reference writers (docs/groups.md; in the fingerprint only when used)
    writer_groups: tuple[str, ...] = ()  # "NAME=L.H+L.H", normalised against the model by the driver
    references: bool = False  # identity, unembedding and random-band references of every responder
    reference_draws: int = 39  # draws of the random band (composition.compose.references.DEFAULT_DRAWS)
    reference_seed: int = 0

    def sampling(self) -> Sampling:
        """Which rows each pair evaluates (composition.score.sampling)."""
        return Sampling(self.rows, self.seed, self.until_ci, self.first_rows)

    def table_options(self) -> TableOptions:
        """Which token table the scan reads (composition.extract.tables)."""
        return TableOptions(self.table, self.position)

    def validate(self) -> None:
        """Every check of the options above that needs no model (``check_for_model`` does the rest)."""
        table(self.table)
        position(self.position)
        side(self.side, self.query_part, self.orientation)
        ks(self.k)
        fdr(self.fdr)
        min_effect(self.min_effect)
        check_offsets(self.rotary_offsets)
        check_precision(self.precision)
        check_device(self.device)
        seed(self.seed)
        rows(self.rows)
        until_ci(self.until_ci)
        self.sampling().validate()
        if isinstance(self.writer_groups, str):
            raise CompositionError("--writer-group takes a list of NAME=L.H+L.H specs, not one string.")
        for spec in self.writer_groups:
            writer_group(spec)
        if self.writer_groups and self.side == "query" and self.query_part != "full":
            raise CompositionError(f"--writer-group needs the query side's full write, the key side or the value "
                                   f"side; --query-part {self.query_part} is not defined for a group (its members' "
                                   "writes are projected on each token's direction one by one).")
        if self.references:
            reference_draws(self.reference_draws)
            reference_seed(self.reference_seed)
            if (self.side, self.query_part, self.orientation) != ("query", "full", "row"):
                raise CompositionError("--references compares pairs of the query side's full write in row "
                                       "orientation; drop --references or scan with --side query --query-part full "
                                       "--orientation row.")


def parse_heads(spec: str | None, n_layers: int, n_heads: int, option: str) -> list[Head]:
    """``"1,2.3"`` -> every head of layer 1 and head 3 of layer 2; None -> every head."""
    if spec is None or spec.strip() == "":
        return [(l, h) for l in range(n_layers) for h in range(n_heads)]
    heads: set[Head] = set()
    for item in spec.split(","):
        item = item.strip()
        m = _HEAD.fullmatch(item)
        if not m:
            raise CompositionError(f"{option} item {item[:40]!r} is neither a layer (4) nor a head label (4.3).")
        layer = int(m.group(1))
        if layer >= n_layers:
            raise CompositionError(f"{option} names layer {layer}, but the model has layers 0-{n_layers - 1}.")
        if m.group(2) is None:
            heads.update((layer, h) for h in range(n_heads))
        else:
            head = int(m.group(2))
            if head >= n_heads:
                raise CompositionError(f"{option} names head {item}, but layers have heads 0-{n_heads - 1}.")
            heads.add((layer, head))
    return sorted(heads)


def head_label(label: str, option: str) -> Head:
    """One head label ``"4.3"`` -> ``(4, 3)`` (checked against a model where it is used)."""
    m = _HEAD.fullmatch(str(label).strip())
    if not m or m.group(2) is None:
        raise CompositionError(f"{option} {str(label)[:40]!r} is not a head label of the form layer.head, e.g. 4.3.")
    return int(m.group(1)), int(m.group(2))


def result_options(options: ScanOptions) -> dict:
    """The options that change a scan's numbers (they enter the fingerprint)."""
    d = asdict(options)
    for key in ("writers", "responders", "block_rows", "family", "layout", "precision", "device", "engine"):
        d.pop(key)
    r = options.rotary_offsets
    d["rotary_offsets"] = "none" if r is None else f"{int(r[0])}:{int(r[1])}"
    if not options.sampling().sampled:  # exact scans keep the fingerprint they always had
        for key in ("rows", "seed", "until_ci", "first_rows"):
            d.pop(key)
    else:
        d["row_order"] = "numpy.random.default_rng(seed).permutation(V)"
        if options.until_ci is None:
            d.pop("first_rows")
    d["k"] = [int(k) for k in options.k]
    d["position"] = "none" if options.position is None else str(options.position)
    if options.query_part == "full":  # the default keeps the options (and fingerprint) of scans made before it
        d.pop("query_part")
    d.pop("writer_groups")  # groups and references enter only when used: old fingerprints stay the same
    if options.writer_groups:
        d["writer_groups"] = list(options.writer_groups)
    for key in ("references", "reference_draws", "reference_seed"):
        d.pop(key)
    if options.references:
        d.update(references=True, reference_draws=int(options.reference_draws),
                 reference_seed=int(options.reference_seed))
    return d


def scan_options(kw: dict) -> ScanOptions:
    """A command's parsed keywords as ``ScanOptions`` (the rotary pair folded into one)."""
    kw = dict(kw)
    if "writer_groups" in kw:
        kw["writer_groups"] = tuple(kw["writer_groups"] or ())
    offsets_pair = pop_offsets(kw)
    return ScanOptions(k=kw.pop("ks", DEFAULT_K), rotary_offsets=offsets_pair, **kw)


# ---------------------------------------------------------------------------
# click declarations
# ---------------------------------------------------------------------------

class _Parsed(click.ParamType):
    """A click type that parses with one of the functions above (its sentence, exit 2)."""

    def __init__(self, name: str, parse):
        self.name, self.parse = name, parse

    def convert(self, value, param, ctx):
        return value if value is None else self.parse(value)

    def get_metavar(self, *args, **kwargs) -> str:
        return self.name


def _choice(option: str, choices):
    return _Parsed("|".join(choices), lambda value: member(option, value, choices))


_OPTIONS = {
    "family": click.option(
        "--family", default=None, metavar="NAME",
        help=f"Read the checkpoint as this family instead of detecting it: {', '.join(FAMILIES)}."),
    "layout": click.option(
        "--layout", default=None, type=click.Path(), metavar="FILE.json",
        help="A layout file mapping tensor names to the canonical weights (docs/families.md)."),
    "rotary_offset": click.option(
        "--rotary-offset", default=None, metavar="N",
        help=f"Rotary models: score at relative offset N = destination - source (default 0: no rotation); "
             f"0 <= N <= {MAX_OFFSET}, far beyond any trained context."),
    "rotary_offsets": click.option(
        "--rotary-offsets", default=None, metavar="A:B",
        help=f"Rotary models: average the rotation uniformly over offsets A..B; B <= {MAX_OFFSET} and at most "
             f"{MAX_OFFSET_SPAN} offsets, since the average costs one rotation per offset."),
    "writers": click.option(
        "--writers", metavar="SPEC", help="Writer heads: layers and layer.head labels, e.g. 1,2.3 (default: all)."),
    "responders": click.option("--responders", metavar="SPEC", help="Responder heads, same form (default: all)."),
    "table": click.option(
        "--table", type=_choice("--table", TABLES), default="attn0-mlp0", show_default=True,
        help=f"Token table standing for the residual stream at a token: {', '.join(TABLES)}."),
    "position": click.option(
        "--position", type=_Parsed("none|mean|N", position), default="none", show_default=True,
        metavar="none|mean|N", help="Position embedding added to the token table: none, the mean row, or row N."),
    "orientation": click.option(
        "--orientation", type=_choice("--orientation", sides.ORIENTATIONS), default="row", show_default=True,
        help="Rank the diagonal within its row or its column; rows are written tokens on the query and value "
             "sides, query tokens on the key side."),
    "ks": click.option(
        "--k", "ks", type=_Parsed("K1,K2,..", ks), default="1,5,10", show_default=True, metavar="K1,K2,..",
        help="The k of the top-k and bottom-k shares: positive, at most the keys per row."),
    "fdr": click.option(
        "--fdr", type=_Parsed("FDR", fdr), default=DEFAULT_FDR, show_default=True,
        help="False discovery rate for labels, Benjamini-Hochberg over all pairs (or heads); in (0, 1)."),
    "min_effect": click.option(
        "--min-effect", type=_Parsed("EFFECT", min_effect), default=DEFAULT_MIN_EFFECT, show_default=True,
        help="Smallest |mean percentile - 0.5| that earns a label; in [0, 0.5)."),
    "side": click.option(
        "--side", type=_choice("--side", sides.SIDES), default="query", show_default=True,
        help="Which input of the responder the writer's write feeds: its query, its key, or its value "
             "(moved on to the logits). docs/sides.md."),
    "query_part": click.option(
        "--query-part", type=_choice("--query-part", sides.QUERY_PARTS), default="full", show_default=True,
        help="Query side only: the whole write, its projection on the token's unembedding direction, or the rest."),
    "precision": click.option(
        "--precision", type=_Parsed("|".join(PRECISIONS), check_precision), default="auto", show_default=True,
        help="Fast-pass arithmetic: auto (the fastest exact path on this processor), fp32 (vector kernel), "
             "bf16x3 (split-bfloat16 on AMX matrix units, where the processor has them). Every path gives "
             "the same float64 midranks; the scan file records which ran (docs/kernels.md)."),
    "device": click.option(
        "--device", type=_choice("--device", DEVICES), default="cpu", show_default=True, help="Where the fast pass runs."),
    "rows": click.option(
        "--rows", type=_Parsed("N", rows), default=None, metavar="N",
        help="Evaluate a uniform sample of N rows per pair (without replacement, seeded)."),
    "seed": click.option(
        "--seed", type=_Parsed("SEED", seed), default=0, show_default=True,
        help=f"Seed of the row sample, 0 to {MAX_SEED}."),
    "until_ci": click.option(
        "--until-ci", type=_Parsed("W", until_ci), default=None, metavar="W",
        help="Sample rows in growing batches until every share's 95% interval is narrower than W (0 < W < 1) "
             "or the pair's label is decided."),
    "writer_groups": click.option(
        "--writer-group", "writer_groups", type=_Parsed("NAME=L.H+L.H", writer_group), multiple=True,
        metavar="NAME=L.H+L.H",
        help="Scan a group of heads as one writer whose write is the sum of its members' writes, against every "
             "selected responder in a later layer than all members (repeatable; docs/groups.md)."),
    "references": click.option(
        "--references", is_flag=True, default=False,
        help="Also compute each responder's reference writers (identity, unembedding, random band) and show "
             "every pair beside them (query side, full write, row orientation; docs/groups.md)."),
    "reference_draws": click.option(
        "--reference-draws", type=_Parsed("N", reference_draws), default=39, show_default=True,
        help="Random writers drawn per responder layer for the random band (2 to 10000)."),
    "reference_seed": click.option(
        "--reference-seed", type=_Parsed("SEED", reference_seed), default=0, show_default=True,
        help="Seed of the random band's draws."),
    "calibrate": click.option(
        "--calibrate", type=_Parsed("SECONDS", calibrate), default=3.0, show_default=True,
        help="How long to time the ranks kernel on this machine (0.1 to 600 seconds)."),
}

GROUPS = {
    "checkpoint": ("family", "layout", "rotary_offset", "rotary_offsets"),
    "selection": ("writers", "responders"),
    "matrix": ("table", "position", "side", "query_part", "orientation", "ks"),
    "labels": ("fdr", "min_effect"),
    "run": ("precision", "device", "rows", "seed", "until_ci"),
    "beyond": ("writer_groups", "references", "reference_draws", "reference_seed"),
}


def use(*names: str):
    """A decorator adding the named options (or groups of options, ``GROUPS``) in that order."""
    chosen = [n for name in names for n in GROUPS.get(name, (name,))]

    def decorate(f):
        for name in reversed(chosen):
            f = _OPTIONS[name](f)
        return f
    return decorate


def pop_offsets(kw: dict) -> tuple[int, int] | None:
    """Take ``rotary_offset``/``rotary_offsets`` out of a command's keywords, as one (A, B) or None."""
    return offsets(kw.pop("rotary_offset", None), kw.pop("rotary_offsets", None))


__all__ = ["GROUPS", "ScanOptions", "check_for_model", "check_offsets", "fdr", "head_label", "ks", "member",
           "min_effect", "offsets", "parse_heads", "pop_offsets", "position", "result_options", "scan_options", "seed",
           "side", "use", "writer_group", "writer_groups_for_model"]
