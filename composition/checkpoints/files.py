"""Checkpoint files: locate them, read the config, and hand out tensors one at a time.

A :class:`TensorSource` is the only thing a family reader sees of the files. Tensors are
read lazily, by name, so reading a few layers of a large checkpoint does not load it whole.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import torch

from ..errors import CompositionError

CONFIG_NAME = "config.json"


class TensorSource:
    """Lazy, named access to the tensors of one checkpoint file."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self._handle = _open_safetensors(self.path)
        self._names = list(self._handle.keys())
        self._taken: set[str] = set()

    def names(self) -> list[str]:
        return list(self._names)

    def has(self, name: str) -> bool:
        return name in self._names

    def shape(self, name: str) -> tuple[int, ...]:
        self._need(name)
        return tuple(self._handle.get_slice(name).get_shape())

    def get(self, name: str, shape: tuple[int, ...] | None = None) -> torch.Tensor:
        """The tensor ``name`` as float32, checked against ``shape`` if given."""
        self._need(name)
        try:
            t = self._handle.get_tensor(name)
        except Exception as exc:  # noqa: BLE001 - the library's errors vary by fault
            raise CompositionError(
                f"tensor {name} in {self.path} could not be read ({_first_line(exc)}); "
                "the file may be truncated or corrupt."
            ) from None
        if shape is not None and tuple(t.shape) != tuple(shape):
            raise CompositionError(
                f"tensor {name} in {self.path} has shape {tuple(t.shape)}, but the config "
                f"implies {tuple(shape)}."
            )
        if not t.is_floating_point():
            raise CompositionError(f"tensor {name} in {self.path} is {t.dtype}, not a float type.")
        t = t.to(torch.float32)
        if not torch.isfinite(t).all():
            raise CompositionError(f"tensor {name} in {self.path} contains NaN or Inf values.")
        self._taken.add(name)
        return t

    def used(self) -> list[str]:
        return sorted(self._taken)

    def ignored(self) -> list[str]:
        return sorted(set(self._names) - self._taken)

    def _need(self, name: str) -> None:
        if name not in self._names:
            raise CompositionError(f"tensor {name} is missing from {self.path}.")


def locate(checkpoint: str | os.PathLike) -> tuple[Path, dict]:
    """Find the weights file and read ``config.json`` for a checkpoint path.

    ``checkpoint`` is a directory holding ``config.json`` and one ``*.safetensors`` file,
    or a ``.safetensors`` file with ``config.json`` beside it.
    """
    p = Path(checkpoint)
    if not p.exists():
        raise CompositionError(f"checkpoint path {p} does not exist.")
    if p.is_dir():
        files = sorted(p.glob("*.safetensors"))
        if not files:
            raise CompositionError(f"directory {p} holds no .safetensors checkpoint file.")
        if len(files) > 1:
            names = ", ".join(f.name for f in files)
            raise CompositionError(f"directory {p} holds several .safetensors files ({names}); name one.")
        weights_file, config_dir = files[0], p
    else:
        weights_file, config_dir = p, p.parent
    config_path = config_dir / CONFIG_NAME
    if not config_path.is_file():
        raise CompositionError(f"no {CONFIG_NAME} beside {weights_file}: the model's sizes are unknown.")
    try:
        config = json.loads(config_path.read_text())
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CompositionError(f"{config_path} is not valid JSON ({_first_line(exc)}).") from None
    if not isinstance(config, dict):
        raise CompositionError(f"{config_path} does not hold a JSON object.")
    return weights_file, config


def _open_safetensors(path: Path):
    from safetensors import safe_open

    if not path.is_file():
        raise CompositionError(f"checkpoint file {path} does not exist.")
    try:
        return safe_open(str(path), framework="pt")
    except Exception as exc:  # noqa: BLE001
        raise CompositionError(
            f"{path} is not a readable safetensors file ({_first_line(exc)})."
        ) from None


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
