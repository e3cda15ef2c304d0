"""Writer groups: several writers acting together as one writer (docs/groups.md).

A group ``G = {m_1, ..., m_n}`` of heads (possibly in different layers) writes the sum of
its members' writes. Each member reaches the responder through its own path (docs/methods.md §3),
so the group's query for written token ``t`` is

    q_G(t) = sum_m o_m(t) Lin(path l_m -> l_R) W_Q^R = sum_m A_m C_m,R       [dh]

with ``A_m = N_lm(T) W_V^m`` ``[V, dh]`` and ``C_m,R = W_O^m Lin(path) W_Q^R [M]`` ``[dh, dh]``,
exactly the single-writer factors of ``composition.compose.factors``. Summing is a product
with stacked factors:

    A_G = [A_1 | ... | A_n]                           [V, n dh]   once per group
    C_G,R = [C_1,R ; ... ; C_n,R]  (stacked rows)     [n dh, dh]  per (group, responder)
    left = A_G C_G,R = sum_m A_m C_m,R                [V, dh]

so the group is one more writer whose "values" have ``n dh`` columns: the key side
(``W_K`` middles) and the value side (``W_V`` middles) stack the same way, and every
function of the single-writer pipeline that takes ``A_writer`` and a ``middle`` takes
``A_G`` and ``C_G`` unchanged. The group's own write through to the logits (its copying
label, docs/methods.md §5) is ``F_G = A_G B_G^T`` with ``B_G^T = [W_O^m readout(l_m) W_U]_m``
``[n dh, V]``: the sum of its members' OV token matrices, of rank <= n dh; the ranks kernel
takes any inner dimension. A group's write is the sum of its members' writes, so its effect
on the token's logit is the sum of theirs.

A group is scanned against responders in a layer later than all its members.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import torch

from ..errors import CompositionError
from ..extract.weights import Weights
from .factors import key_middles, query_middles, readout_path, value_middles, writer_values

Head = tuple[int, int]
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_\-]*")


@dataclass(frozen=True)
class WriterGroup:
    """A named set of writer heads, in layer, head order."""

    name: str
    members: tuple[Head, ...]

    @property
    def last_layer(self) -> int:
        """The latest member's layer: responders must come after it."""
        return max(layer for layer, _ in self.members)

    @property
    def spec(self) -> str:
        """``NAME=L.H+L.H``: the form the option takes, normalised."""
        return f"{self.name}=" + "+".join(f"{l}.{h}" for l, h in self.members)


def parse_group(spec: str, n_layers: int, n_heads: int) -> WriterGroup:
    """``"copiers=1.0+1.2+2.5"`` -> a WriterGroup; one plain sentence for any fault."""
    option = "--writer-group"
    if not isinstance(spec, str) or "=" not in spec:
        raise CompositionError(f"{option} {spec!r} is not of the form NAME=L.H+L.H (e.g. copiers=1.0+1.2).")
    name, _, body = spec.partition("=")
    name = name.strip()
    if not _NAME.fullmatch(name):
        raise CompositionError(f"{option} name {name!r} must start with a letter and hold only letters, digits, _ or -.")
    members: list[Head] = []
    for item in body.split("+"):
        item = item.strip()
        m = re.fullmatch(r"(\d{1,9})\.(\d{1,9})", item)  # bounded like options' head labels: int() has a digit limit
        if not m:
            raise CompositionError(f"{option} {name}: member {item[:40]!r} is not a head label L.H (e.g. 1.0).")
        layer, head = int(m.group(1)), int(m.group(2))
        if layer >= n_layers:
            raise CompositionError(f"{option} {name}: member {item} names layer {layer}, but the model has layers "
                                   f"0-{n_layers - 1}.")
        if head >= n_heads:
            raise CompositionError(f"{option} {name}: member {item} names head {head}, but layers have heads "
                                   f"0-{n_heads - 1}.")
        if (layer, head) in members:
            raise CompositionError(f"{option} {name}: member {item} is named twice.")
        members.append((layer, head))
    return WriterGroup(name, tuple(sorted(members)))


def parse_groups(specs, n_layers: int, n_heads: int) -> list[WriterGroup]:
    """Every ``--writer-group`` of a scan; names must be distinct and not look like head labels."""
    groups = [parse_group(s, n_layers, n_heads) for s in specs or ()]
    seen: set[str] = set()
    for g in groups:
        if g.name in seen:
            raise CompositionError(f"--writer-group name {g.name} is used twice.")
        seen.add(g.name)
        if g.last_layer >= n_layers - 1:
            raise CompositionError(f"--writer-group {g.name} has a member in the last layer ({g.last_layer}): "
                                   "no responder comes after it.")
    return groups


def group_values(w: Weights, table: torch.Tensor, group: WriterGroup, values_of=None) -> torch.Tensor:
    """``A_G = [A_1 | ... | A_n]``, the members' values side by side. # table [V, d] -> [V, n dh]

    ``values_of(layer)`` -> ``[H, V, dh]`` may supply cached writer values (the scan driver's
    factor cache); by default they are built here with :func:`~composition.compose.factors.writer_values`.
    """
    values_of = values_of or (lambda layer: writer_values(w, table, layer))
    return torch.cat([values_of(layer)[head] for layer, head in group.members], dim=1)  # [V, n dh]


def _stacked(group: WriterGroup, responder_layer: int, middles_of) -> torch.Tensor:
    """Members' middles stacked along the inner dimension. # -> [H_R, n dh, dh]"""
    if responder_layer <= group.last_layer:
        raise CompositionError(f"responder layer {responder_layer} must come after every member of writer group "
                               f"{group.name} (its last member is in layer {group.last_layer}).")
    return torch.cat([middles_of(layer, head) for layer, head in group.members], dim=1)


def group_query_middles(w: Weights, group: WriterGroup, responder_layer: int,
                        rotation: torch.Tensor | None = None) -> torch.Tensor:
    """``C_G,R`` for every responder head of a layer: each member's ``W_O^m Lin(path) W_Q^R [M]``. # -> [H_R, n dh, dh]"""
    return _stacked(group, responder_layer, lambda l, h: query_middles(w, l, h, responder_layer, rotation))


def group_key_middles(w: Weights, group: WriterGroup, responder_layer: int,
                      rotation: torch.Tensor | None = None) -> torch.Tensor:
    """Key side: each member's ``W_O^m Lin(path) W_K^R [M^T]``, stacked. # -> [H_R, n dh, dh]"""
    return _stacked(group, responder_layer, lambda l, h: key_middles(w, l, h, responder_layer, rotation))


def group_value_middles(w: Weights, group: WriterGroup, responder_layer: int) -> torch.Tensor:
    """Value side: each member's ``W_O^m Lin(path) W_V^R``, stacked. # -> [H_R, n dh, dh]"""
    return _stacked(group, responder_layer, lambda l, h: value_middles(w, l, h, responder_layer))


def group_query_left(A_group: torch.Tensor, middle: torch.Tensor) -> torch.Tensor:
    """The group's query factor for one responder head, ``sum_m A_m C_m,R``. # [V, n dh], [n dh, dh] -> [V, dh]"""
    return A_group @ middle


def group_output(w: Weights, group: WriterGroup) -> torch.Tensor:
    """``W_O^G = [W_O^1 ; ... ; W_O^n]``: the group's write is ``o_G(t) = A_G[t] W_O^G``. # -> [n dh, d]

    Used with ``unembed_coefficients`` and ``write_fraction`` for the query parts; for post-norm
    models with members in different layers the parts are not defined (each member's write
    reaches the logits through another path) and the driver should refuse them.
    """
    return torch.cat([w.layers[l].attn.W_O[h].double() for l, h in group.members], dim=0)  # [n dh, d]


def group_readouts(w: Weights, group: WriterGroup) -> torch.Tensor:
    """``B_G``: the group's OV token matrix is ``F_G = A_G B_G^T`` (docs/methods.md §5, the members' sum). # -> [V, n dh]

    ``B_G^T = [W_O^m readout_path(l_m) W_U]_m`` stacked along the inner dimension.
    """
    W_U = w.W_U.double()  # [d, V]
    parts = [(w.layers[l].attn.W_O[h].double() @ readout_path(w, l) @ W_U).T for l, h in group.members]  # [V, dh] each
    return torch.cat(parts, dim=1)  # [V, n dh]


def group_statistics(w: Weights, table: torch.Tensor, group: WriterGroup, responder_layer: int, ks=(1, 5, 10),
                     rotation: torch.Tensor | None = None, precision: str = "fp32") -> list:
    """Query-side statistics (row orientation, every row) of a group against every head of a later layer.

    # table [V, d] -> [H_R] PairStats. For notebooks and tests (the scan driver computes the same in work units, run/units.py);
    labels need the false discovery rate over all pairs of a scan, so none are given here.
    """
    from ..score.ranks import diagonal_midranks
    from ..score.stats import summarise_many
    from .factors import responder_keys

    A = group_values(w, table, group)  # [V, n dh]
    middles = group_query_middles(w, group, responder_layer, rotation)  # [H_R, n dh, dh]
    K = responder_keys(w, table, responder_layer)  # [H_R, V, dh]
    ranks = [diagonal_midranks(A @ m, k, precision=precision).numpy() for m, k in zip(middles, K)]
    return summarise_many(ranks, K.shape[1], ks)


__all__ = ["WriterGroup", "parse_group", "parse_groups", "group_values", "group_query_middles", "group_key_middles",
           "group_value_middles", "group_query_left", "group_output", "group_readouts", "group_statistics"]
