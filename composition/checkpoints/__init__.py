"""Checkpoint readers: files in, canonical :class:`~composition.weights.Weights` out.

Each family is one module with ``matches(config)`` and ``read(source, config)``.
"""

from __future__ import annotations

import os

from ..errors import CompositionError
from ..weights import Weights
from . import gpt2
from .files import TensorSource, locate

FAMILIES = {"gpt2": gpt2}


def load_weights(checkpoint: str | os.PathLike, family: str | None = None) -> Weights:
    """Read a checkpoint (directory or weights file with ``config.json``) into canonical weights."""
    weights_file, config = locate(checkpoint)
    if family is None:
        found = [name for name, mod in FAMILIES.items() if mod.matches(config)]
        if not found:
            kind = config.get("model_type") or config.get("architectures") or "unknown"
            raise CompositionError(
                f"the checkpoint's family ({kind}) is not one this tool reads; "
                f"supported: {', '.join(FAMILIES)}."
            )
        family = found[0]
    elif family not in FAMILIES:
        raise CompositionError(f"--family {family!r} is not one of: {', '.join(FAMILIES)}.")
    return FAMILIES[family].read(TensorSource(weights_file), config)


__all__ = ["load_weights", "FAMILIES", "TensorSource", "locate"]
