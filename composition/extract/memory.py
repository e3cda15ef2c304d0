"""A model already in memory: a state dict of named tensors and a config mapping.

``load_weights(state_dict, config=mapping)`` reads a model a notebook already holds (for
example ``model.state_dict()`` and ``model.config.to_dict()`` of a ``transformers`` model)
through the same family readers as a checkpoint file: the tensor names are the family's
usual ones, exactly as ``save_pretrained`` would write them, and the family is detected
from the config's ``model_type``/``architectures`` as for files. No model library is
imported here: values are torch tensors or NumPy arrays.

Tensors are handed out lazily, by name, through :class:`MemorySource`, which offers the
reader the same interface as :class:`~composition.extract.files.TensorSource`: each tensor
is checked (shape, floating-point dtype, finite values) and copied to a float32 CPU tensor
when a reader takes it, so the weights never share memory with the model. A layer read
again later (large models keep only some layers in memory) is copied again from the
mapping: do not change the model's parameters while its weights are being analysed.

Tied parameters (an unembedding that is the input embedding) appear twice in a state dict
and once in a saved file; the readers treat an unembedding equal to the embedding as tied
either way, so both give the same canonical weights and the same model fingerprint.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import torch

from ..errors import CompositionError
from .files import NamedTensors

LABEL = "state dict in memory"


class MemorySource(NamedTensors):
    """Named access to the tensors of a state dict: the interface of ``TensorSource``."""

    def __init__(self, state_dict: Mapping, label: str = LABEL):
        self.path = label  # what messages and ``Weights.source`` show
        self._label = f"the {label}"
        self._index: dict[str, torch.Tensor | np.ndarray] = {}
        self._taken: set[str] = set()
        for name, value in state_dict.items():
            if not isinstance(name, str):
                raise CompositionError(f"the {label} has a key {name!r} that is not a tensor name (a string).")
            if not isinstance(value, (torch.Tensor, np.ndarray)):
                raise CompositionError(
                    f"entry {name} of the {label} is a {type(value).__name__}, not a torch tensor or NumPy array."
                )
            self._index[name] = value

    def shape(self, name: str) -> tuple[int, ...]:
        self._need(name)
        return tuple(int(n) for n in self._index[name].shape)

    def file_of(self, name: str) -> str:
        self._need(name)
        return self.path

    def _float32(self, name: str, where) -> torch.Tensor:
        """A float32 CPU copy: the weights never share memory with the model."""
        value = self._index[name]
        if isinstance(value, np.ndarray):
            if value.dtype.kind != "f":
                raise CompositionError(f"tensor {name} in {where} is {value.dtype}, not a floating-point type.")
            return torch.from_numpy(np.array(value, dtype=np.float32, copy=True))
        if not value.is_floating_point():
            raise CompositionError(f"tensor {name} in {where} is {value.dtype}, not a floating-point type.")
        return value.detach().to(device="cpu", dtype=torch.float32, copy=True).contiguous()


def memory_source(state_dict: Mapping, config) -> tuple[MemorySource, dict]:
    """The tensor source and config dict of a model in memory.

    ``config``: a mapping (``model.config.to_dict()``, or the parsed ``config.json``); an object
    with a ``to_dict()`` method is accepted as well.
    """
    if config is None:
        raise CompositionError(
            "a state dict needs its config: pass config=model.config.to_dict() (or the parsed config.json)."
        )
    if not isinstance(config, Mapping) and callable(getattr(config, "to_dict", None)):
        config = config.to_dict()
    if not isinstance(config, Mapping):
        raise CompositionError(f"config= must be a mapping of config keys, not a {type(config).__name__}.")
    if not state_dict:
        raise CompositionError("the state dict is empty: it holds no tensors to analyse.")
    return MemorySource(state_dict), dict(config)
