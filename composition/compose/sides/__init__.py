"""The sides of a scan, as a registry (docs/methods.md §3, §3b, §6; docs/sides.md).

Each side of the responder the writer's write can feed (query, key, value), and each part of
the query side's write (full, unembed, rest), is one :class:`Side` object that declares its
validation, its factors, its orientations, the words of its labels (+1, -1, 0) and what they
mean, and whether its labels enter the compensation prediction. Every command asks this
registry (``get``, ``for_scan``); nothing outside it branches on a side's name.

Adding a side: a module here defining a ``Side`` subclass (its ``fixed`` and ``middles``
factors, words, note) and its name in ``_MODULES`` below.
"""

from __future__ import annotations

from importlib import import_module

from ...errors import CompositionError
from ._side import ORIENTATIONS, Product, Side, Words, dense
from .cache import SideFactors

_MODULES = ("query", "key", "value")  # one module per side; each lists its Side objects in SIDES
_REGISTRY: dict[tuple[str, str], Side] = {
    (s.name, s.part): s for m in _MODULES for s in import_module(f"{__name__}.{m}").SIDES}

SIDES = tuple(dict.fromkeys(name for name, _ in _REGISTRY))  # ("query", "key", "value")
QUERY_PARTS = tuple(part for name, part in _REGISTRY if name == "query")  # ("full", "unembed", "rest")


def get(side: str = "query", part: str = "full", orientation: str | None = None) -> Side:
    """The registered side (or query part), validated; one sentence naming the option otherwise."""
    if side not in SIDES:
        raise CompositionError(f"--side {side!r} is not one of: {', '.join(SIDES)}.")
    if part not in QUERY_PARTS:
        raise CompositionError(f"--query-part {part!r} is not one of: {', '.join(QUERY_PARTS)}.")
    if (side, part) not in _REGISTRY:
        raise CompositionError(f"--query-part {part} applies to --side query only, not --side {side}.")
    found = _REGISTRY[(side, part)]
    if orientation is not None:
        if orientation not in ORIENTATIONS:
            raise CompositionError(f"--orientation {orientation!r} is not one of: {', '.join(ORIENTATIONS)}.")
        found.validate(orientation)
    return found


def for_scan(attrs: dict) -> Side:
    """The side a scan file was computed on (files made before sides existed are query-side, full write)."""
    part = attrs.get("query_part", "full")
    return get(str(attrs.get("side", "query")), "full" if part in (None, "none") else str(part))


def every() -> list[Side]:
    """Every registered side and part, in registry order."""
    return list(_REGISTRY.values())


__all__ = ["ORIENTATIONS", "QUERY_PARTS", "SIDES", "Product", "Side", "SideFactors", "Words", "dense", "every",
           "for_scan", "get"]
