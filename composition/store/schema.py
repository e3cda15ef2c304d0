"""The one schema of the scan file: every dataset of ``/pairs``, ``/heads``, ``/model_space``,
``/groups``, ``/group_heads`` and ``/references``.

Each dataset is declared once here (name, dtype, fill value, axes, meaning in one line).
The scan file's empty arrays, the per-unit arrays a work unit commits, the checks that
``load_scan`` runs on a file, the tidy tables (``Scan.pairs()``, ``HeadData.table()``: one
flattening function, :func:`tidy`) and the Markdown table of docs/scan-file.md
(:func:`markdown_table`) are all derived from it. A new statistic is added in one place.

Axis names: ``L`` layers, ``H`` heads per layer, ``k`` the scan's k values, ``bins`` the
histogram bins. The leading axes of a group index its rows: ``/pairs`` and the pair
datasets of ``/model_space`` are ``[writer_layer, writer_head, responder_layer,
responder_head]``, ``/heads`` is ``[layer, head]``. Writer groups (docs/groups.md): ``/groups``
holds each group's pairs ``[group, responder_layer, responder_head]`` (axis ``G``: the groups, in
the order of the group attribute ``group_names``), ``/group_heads`` each group's OV profile
``[group]``. Reference writers: ``/references`` is ``[layer, head]`` (responders), with the
random band's draws as a trailing axis ``draws`` (the group attribute ``draws``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..score.stats import LABEL_NOT_COMPUTED as LABEL_FILL  # int8 label of a pair or head not computed

PAIR_AXES = ("writer_layer", "writer_head", "responder_layer", "responder_head")
HEAD_AXES = ("layer", "head")
GROUP_PAIR_AXES = ("group", "responder_layer", "responder_head")
GROUP_AXES = ("group",)
TRAILING = ("k", "bins", "draws")


@dataclass(frozen=True)
class Dataset:
    group: str  # one of GROUPS
    name: str
    dtype: str  # NumPy dtype string
    fill: object  # value of an entry not computed
    axes: tuple[str, ...]  # leading index axes (names above) + optional trailing "k" | "bins" | "draws"
    meaning: str

    @property
    def leading(self) -> tuple[str, ...]:
        return tuple(a for a in self.axes if a not in TRAILING)

    @property
    def trailing(self) -> str | None:
        return self.axes[-1] if self.axes[-1] in TRAILING else None

    def shape(self, n_layers: int, n_heads: int, n_k: int, n_bins: int, n_groups: int = 0,
              n_draws: int = 0) -> tuple[int, ...]:
        sizes = {"k": n_k, "bins": n_bins, "group": n_groups, "draws": n_draws}
        return tuple(sizes.get(a, n_layers if a.endswith("layer") else n_heads) for a in self.axes)


def _stats(group: str, axes: tuple[str, ...], what: str) -> list[Dataset]:
    """The diagonal-rank statistics shared by pairs and heads (docs/methods.md §4, §5)."""
    return [
        Dataset(group, "top_share", "f8", np.nan, axes + ("k",), f"share of {what} rows whose diagonal entry ranks in the top k"),
        Dataset(group, "bottom_share", "f8", np.nan, axes + ("k",), f"share of {what} rows whose diagonal entry ranks in the bottom k"),
        Dataset(group, "mean_percentile", "f8", np.nan, axes, "mean percentile of the diagonal entry in its row (0.5 = chance)"),
        Dataset(group, "histogram", "i8", 0, axes + ("bins",), "histogram of the diagonal percentiles"),
        Dataset(group, "rows_evaluated", "i8", 0, axes, "rows of the token matrix evaluated"),
        Dataset(group, "p_value", "f8", np.nan, axes, "two-sided p-value of the mean percentile against chance"),
        Dataset(group, "q_value", "f8", np.nan, axes, "Benjamini-Hochberg q-value over the whole scan (set at the end)"),
    ]


_PAIR_LABEL = "+1 attention-raising, -1 attention-lowering, 0 neutral (side's words), -128 not computed"
_HEAD_LABEL = "+1 copying, -1 suppressing, 0 neutral, -128 not computed"

SCHEMA: tuple[Dataset, ...] = tuple(
    _stats("pairs", PAIR_AXES, "the pair's")
    + [
        Dataset("pairs", "label", "i1", LABEL_FILL, PAIR_AXES, _PAIR_LABEL),
        Dataset("pairs", "ci_low", "f8", np.nan, PAIR_AXES + ("k",), "95 % lower bound of the top-k share (exact hypergeometric)"),
        Dataset("pairs", "ci_high", "f8", np.nan, PAIR_AXES + ("k",), "95 % upper bound of the top-k share"),
        Dataset("pairs", "bottom_ci_low", "f8", np.nan, PAIR_AXES + ("k",), "95 % lower bound of the bottom-k share"),
        Dataset("pairs", "bottom_ci_high", "f8", np.nan, PAIR_AXES + ("k",), "95 % upper bound of the bottom-k share"),
        Dataset("pairs", "mean_ci_low", "f8", np.nan, PAIR_AXES, "95 % lower bound of the mean percentile (Serfling)"),
        Dataset("pairs", "mean_ci_high", "f8", np.nan, PAIR_AXES, "95 % upper bound of the mean percentile"),
        Dataset("pairs", "done", "?", False, PAIR_AXES, "the pair is computed"),
        Dataset("pairs", "write_fraction", "f8", np.nan, PAIR_AXES,
                "fraction of the writer's squared write carried by the scan's query part (1 for full)"),
    ]
    + _stats("heads", HEAD_AXES, "the head's OV token matrix")
    + [
        Dataset("heads", "eigen_copying_score", "f8", np.nan, HEAD_AXES,
                "sum Re(lambda) / sum |lambda| over the OV circuit's eigenvalues (Elhage et al. 2021)"),
        Dataset("heads", "label", "i1", LABEL_FILL, HEAD_AXES, _HEAD_LABEL),
        Dataset("heads", "done", "?", False, HEAD_AXES, "the head is profiled"),
    ]
    + [Dataset("model_space", f"{kind}_composition", "f8", np.nan, PAIR_AXES,
               f"{kind.upper()}-composition score (Elhage et al. 2021), norms folded") for kind in "qkv"]
    + [Dataset("model_space", f"projection_kernel_{kind}", "f8", np.nan, PAIR_AXES,
               f"projection kernel of the writer's write subspace and the responder's {kind} read subspace")
       for kind in "qkv"]
    + [Dataset("model_space", f"kernel_random_mean_{kind}", "f8", np.nan, PAIR_AXES,
               f"mean projection kernel of random subspaces of the same dimensions ({kind})") for kind in "qkv"]
    + [Dataset("model_space", "write_dim", "i8", 0, HEAD_AXES, "numerical rank of the head's W_O")]
    + [Dataset("model_space", f"read_dim_{kind}", "i8", 0, HEAD_AXES, f"numerical rank of the head's {kind} read factor")
       for kind in "qkv"]
    + [Dataset("model_space", "done", "?", False, ("writer_layer",), "the writer layer's scores are computed")]
)

_PAIRS = [d for d in SCHEMA if d.group == "pairs"]
_HEAD_STATS = [d for d in SCHEMA if d.group == "heads"]

_REFERENCE_WORDS = {"identity": "the token table row itself written into the query",
                    "unembedding": "the token's unit unembedding direction written into the query"}

SCHEMA = SCHEMA + tuple(
    [Dataset("groups", d.name, d.dtype, d.fill, GROUP_PAIR_AXES + d.axes[4:],
             (d.meaning.replace("the pair", "the group's pair").replace("the writer's", "the group's")
              .replace("over the whole scan", "over the scan's pairs and group pairs together")))
     for d in _PAIRS]
    + [Dataset("group_heads", d.name, d.dtype, d.fill, GROUP_AXES + d.axes[2:],
               {"label": _HEAD_LABEL.replace("not computed", "not computed (the group's OV token matrix, "
                                             "the sum of its members')"),
                "q_value": "Benjamini-Hochberg q-value over the scan's profiled heads and its groups together",
                "done": "the group's OV profile is computed"}.get(d.name, d.meaning.replace("the head's", "the group's")))
       for d in _HEAD_STATS]
    + [Dataset("references", f"{kind}_{name}", "f8", np.nan, HEAD_AXES + trailing,
               f"{meaning} under {_REFERENCE_WORDS[kind]} (the responder's {kind} reference)")
       for kind in ("identity", "unembedding")
       for name, trailing, meaning in (("mean_percentile", (), "mean percentile of the diagonal"),
                                       ("top_share", ("k",), "top-k share of the diagonal"),
                                       ("bottom_share", ("k",), "bottom-k share of the diagonal"),
                                       ("p_value", (), "two-sided p-value of the mean percentile"))]
    + [Dataset("references", "random_mean_percentile", "f8", np.nan, HEAD_AXES + ("draws",),
               "mean percentile of the diagonal under each random writer of the band (draw d of the responder's layer)"),
       Dataset("references", "done", "?", False, HEAD_AXES, "the responder's references are computed")]
)

GROUPS = ("pairs", "heads", "model_space", "groups", "group_heads", "references")
OPTIONAL_GROUPS = ("groups", "group_heads", "references")  # only in scans with --writer-group / --references
MAIN_AXES = {"pairs": PAIR_AXES, "model_space": PAIR_AXES, "heads": HEAD_AXES, "groups": GROUP_PAIR_AXES,
             "group_heads": GROUP_AXES, "references": HEAD_AXES}


def datasets(group: str) -> dict[str, Dataset]:
    """The datasets of one group, by name, in schema order."""
    return {d.name: d for d in SCHEMA if d.group == group}


def empty(group: str, n_layers: int, n_heads: int, n_k: int, n_bins: int, n_groups: int = 0,
          n_draws: int = 0) -> dict[str, np.ndarray]:
    """Arrays for every dataset of ``group``, filled with their not-computed values."""
    return {d.name: np.full(d.shape(n_layers, n_heads, n_k, n_bins, n_groups, n_draws), d.fill, dtype=d.dtype)
            for d in datasets(group).values()}


def unit_arrays(group: str, n: int, n_k: int, n_bins: int, n_draws: int = 0) -> dict[str, np.ndarray]:
    """Per-entry arrays ``{name: [n, trailing...]}`` for the datasets of ``group`` indexed by
    the group's full leading axes (what a work unit commits)."""
    out = {}
    for d in datasets(group).values():
        trailing = {None: (), "k": (n_k,), "bins": (n_bins,), "draws": (n_draws,)}[d.trailing]
        out[d.name] = np.full((n,) + trailing, d.fill, dtype=d.dtype)
    return out


def tidy(group: str, arrays: dict[str, np.ndarray], ks, rows: np.ndarray) -> dict[str, np.ndarray]:
    """A tidy table of one group: one 1-D array per column (pandas-ready).

    ``rows`` [n, m]: the leading indices of the rows to keep (``m`` = number of leading
    axes of the group's main datasets). Integer columns for those axes, one column per
    scalar dataset, ``{name}_{k}`` per k for datasets with a k axis (shares and their
    intervals), label strings ``writer``/``responder`` or ``head_label``; histograms and
    ``done`` are left out.
    """
    rows = np.asarray(rows, dtype=np.int64)
    decl = datasets(group)
    main = MAIN_AXES[group]
    rows = rows.reshape(-1, len(main))
    table = {axis: rows[:, i] for i, axis in enumerate(main)}
    sel = tuple(rows.T)
    for name, d in decl.items():
        if name == "done" or name not in arrays or d.leading != main or d.trailing in ("bins", "draws"):
            continue
        values = np.asarray(arrays[name])[sel]
        if d.trailing == "k":
            for j, k in enumerate(ks):
                table[f"{name}_{int(k)}"] = values[:, j]
        else:
            table[name] = values
    if main == PAIR_AXES:
        table["writer"] = np.array([f"{a}.{b}" for a, b in rows[:, :2]], dtype=str)
        table["responder"] = np.array([f"{a}.{b}" for a, b in rows[:, 2:]], dtype=str)
    elif main == GROUP_PAIR_AXES:
        table["responder"] = np.array([f"{a}.{b}" for a, b in rows[:, 1:]], dtype=str)
    elif main == HEAD_AXES:
        table["head_label"] = np.array([f"{a}.{b}" for a, b in rows], dtype=str)
    return table


def markdown_table() -> str:
    """The schema as the Markdown table of docs/scan-file.md (and the README)."""
    lines = ["| group | dataset | dtype | shape | fill | meaning |", "|---|---|---|---|---|---|"]
    for d in SCHEMA:
        short = {"writer_layer": "L", "writer_head": "H", "responder_layer": "L", "responder_head": "H",
                 "layer": "L", "head": "H", "k": "k", "bins": "bins", "group": "G", "draws": "draws"}
        shape = "[" + ", ".join(short[a] for a in d.axes) + "]"
        fill = "NaN" if isinstance(d.fill, float) and np.isnan(d.fill) else str(d.fill)
        lines.append(f"| /{d.group} | {d.name} | {np.dtype(d.dtype).name} | {shape} | {fill} | {d.meaning} |")
    return "\n".join(lines) + "\n"
