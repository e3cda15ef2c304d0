"""Checkpoint files: locate them, read the config, and hand out tensors one at a time.

A :class:`TensorSource` is the only thing a family reader sees of the files. It reads

* a single ``.safetensors`` file;
* sharded safetensors (or sharded torch files) through their JSON index, whose
  ``weight_map`` names the shard that holds each tensor;
* an HDF5 file in the layout of docs/families.md: one dataset per tensor, the tensor's
  name being the dataset's path with ``/`` read as ``.`` (``h/0/attn/c_attn/weight`` and a
  root dataset named ``h.0.attn.c_attn.weight`` are the same tensor); the config is
  ``config.json`` beside the file or, failing that, a JSON string in the root attribute
  ``config``;
* a PyTorch state dict (``.bin``/``.pt``/``.pth``), loaded only with
  ``torch.load(..., weights_only=True)``: a pickle that needs more than tensors is refused
  and no code from it runs.

Tensors are read lazily, by name: safetensors and HDF5 files are memory-mapped or read
per dataset, zip-format torch files are memory-mapped, so reading a few layers of a large
checkpoint does not load it whole. Every tensor handed out is checked for its shape, a
floating-point dtype and finite values, and converted to float32.
"""

from __future__ import annotations

import json
import os
import pickle
from pathlib import Path

import torch

from ..errors import CompositionError

CONFIG_NAME = "config.json"
SAFETENSORS = (".safetensors",)
TORCH = (".bin", ".pt", ".pth")
HDF5 = (".h5", ".hdf5")
INDEX = ".index.json"


class NamedTensors:
    """What every tensor source offers a reader: names, shapes, checked float32 tensors by name,
    and which tensors were used. A subclass fills ``_index`` (name -> what holds it), sets ``path``
    and ``_label`` (how messages name the source), and implements ``shape``, ``file_of`` and
    ``_float32``."""

    path: object
    _label: object
    _index: dict

    def names(self) -> list[str]:
        return list(self._index)

    def has(self, name: str) -> bool:
        return name in self._index

    def shape(self, name: str) -> tuple[int, ...]:
        raise NotImplementedError

    def get(self, name: str, shape: tuple[int, ...] | None = None) -> torch.Tensor:
        """The tensor ``name`` as float32, checked against ``shape`` if given, for floating-point
        values and for finite values. # -> shape"""
        self._need(name)
        where = self._where(name)
        if shape is not None and self.shape(name) != tuple(shape):
            raise CompositionError(
                f"tensor {name} in {where} has shape {self.shape(name)}, but the config implies {tuple(shape)}."
            )
        t = self._float32(name, where)
        if not torch.isfinite(t).all():
            raise CompositionError(f"tensor {name} in {where} contains NaN or Inf values; it cannot be analysed.")
        self._taken.add(name)
        return t

    def used(self) -> list[str]:
        return sorted(self._taken)

    def ignored(self) -> list[str]:
        return sorted(set(self._index) - self._taken)

    def _where(self, name: str) -> object:
        """How messages about tensor ``name`` name the place that holds it."""
        return self._label

    def _float32(self, name: str, where) -> torch.Tensor:
        """The tensor read and converted to float32, or a sentence when it is not floating-point."""
        raise NotImplementedError

    def _need(self, name: str) -> None:
        if name not in self._index:
            raise CompositionError(f"tensor {name} is missing from {self._label}.")


class TensorSource(NamedTensors):
    """Lazy, named access to the tensors of one checkpoint: a file, or shards behind an index."""

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)
        self._label = self.path
        self._index: dict[str, _File] = {}
        if self.path.name.endswith(INDEX):
            self._open_index(self.path)
        else:
            f = _open_file(self.path)
            self._index = {name: f for name in f.names()}
        self._taken: set[str] = set()

    def shape(self, name: str) -> tuple[int, ...]:
        self._need(name)
        return self._index[name].shape(name)

    def file_of(self, name: str) -> Path:
        self._need(name)
        return self._index[name].path

    def _where(self, name: str) -> Path:
        return self._index[name].path

    def _float32(self, name: str, where) -> torch.Tensor:
        f = self._index[name]
        t = f.get(name)
        if tuple(t.shape) != f.shape(name):
            raise CompositionError(f"tensor {name} in {where} does not hold the shape its header states.")
        if not t.is_floating_point():
            raise CompositionError(f"tensor {name} in {where} is {t.dtype}, not a floating-point type.")
        return t.to(torch.float32)

    def _open_index(self, index: Path) -> None:
        _check_regular(index, "shard index")
        try:
            data = json.loads(index.read_text(), object_pairs_hook=_unique_keys(f"the shard index {index}"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise CompositionError(f"the shard index {index} is not valid JSON ({_first_line(exc)}).") from None
        wmap = data.get("weight_map") if isinstance(data, dict) else None
        if not isinstance(wmap, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in wmap.items()):
            raise CompositionError(f"the shard index {index} has no weight_map of tensor names to shard files.")
        shards: dict[str, _File] = {}
        for shard in sorted(set(wmap.values())):
            p = index.parent / shard
            if Path(shard).name != shard:
                raise CompositionError(f"the shard index {index} names {shard!r}, which is not a file beside it.")
            if not p.is_file():
                raise CompositionError(f"shard {shard} named by {index} does not exist.")
            shards[shard] = _open_file(p)
        seen: dict[str, str] = {}
        for shard, f in shards.items():
            for name in f.names():
                if name in seen:
                    raise CompositionError(f"tensor {name} is held by two shards of {index} ({seen[name]} and "
                                           f"{shard}); which one is meant is unclear.")
                seen[name] = shard
        for name, shard in wmap.items():
            if not shards[shard].has(name):
                raise CompositionError(f"the shard index {index} places tensor {name} in {shard}, which does not hold it.")
            self._index[name] = shards[shard]


def locate(checkpoint: str | os.PathLike, need_config: bool = True) -> tuple[Path, dict]:
    """Find the weights (a file or a shard index) and read the config for a checkpoint path.

    ``checkpoint`` is a directory holding ``config.json`` and the weights, or a weights
    file (or shard index) with ``config.json`` beside it. In a directory the first kind
    found wins: a safetensors index, one safetensors file, a torch index, one torch file,
    one HDF5 file. Without ``need_config`` (a layout file gives the sizes) a missing
    config is an empty one.
    """
    p = Path(checkpoint)
    if not p.exists():
        raise CompositionError(f"checkpoint path {p} does not exist.")
    if p.is_dir():
        weights_file = _pick(p)
        config_dir = p
    else:
        if not (p.name.endswith(INDEX) or p.suffix in SAFETENSORS + TORCH + HDF5):
            raise CompositionError(
                f"{p} is not a checkpoint file this tool reads (.safetensors, .bin/.pt/.pth, .h5/.hdf5 "
                "or a shard index .index.json)."
            )
        weights_file, config_dir = p, p.parent
        _check_regular(p, "checkpoint file")
    config_path = config_dir / CONFIG_NAME
    if config_path.exists() and not config_path.is_file():
        raise CompositionError(f"{config_path} is not a regular file.")
    if config_path.is_file():
        try:
            config = json.loads(config_path.read_text())
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise CompositionError(f"{config_path} is not valid JSON ({_first_line(exc)}).") from None
    elif weights_file.suffix in HDF5:
        config = _hdf5_config(weights_file, need_config)
    elif not need_config:
        config = {}
    else:
        raise CompositionError(f"no {CONFIG_NAME} beside {weights_file}: the model's sizes are unknown.")
    if not isinstance(config, dict):
        raise CompositionError(f"the config of {weights_file} does not hold a JSON object.")
    return weights_file, config


def _pick(directory: Path) -> Path:
    """The weights of a checkpoint directory, by the preference order of :func:`locate`."""
    kinds = [
        ("safetensors shard index", lambda f: f.name.endswith(".safetensors" + INDEX)),
        ("safetensors file", lambda f: f.suffix in SAFETENSORS),
        ("torch shard index", lambda f: f.name.endswith(INDEX) and any(f.name.endswith(s + INDEX) for s in TORCH)),
        ("torch file", lambda f: f.suffix in TORCH),
        ("HDF5 file", lambda f: f.suffix in HDF5),
    ]
    files = sorted(f for f in directory.iterdir() if f.is_file() and not f.name.startswith(".")
                   and not (f.suffix in HDF5 and _is_output_of_this_tool(f)))
    for kind, test in kinds:
        found = [f for f in files if test(f)]
        if len(found) == 1:
            return found[0]
        if len(found) > 1:
            names = ", ".join(f.name for f in found)
            raise CompositionError(f"directory {directory} holds several of one kind ({kind}: {names}); name one.")
    raise CompositionError(
        f"directory {directory} holds no checkpoint file (.safetensors, shard index, .bin/.pt/.pth or .h5)."
    )


class _File:
    """One weights file: names, header shapes, tensors by name."""

    path: Path
    _shapes: dict[str, tuple[int, ...]]

    def names(self) -> list[str]:
        return list(self._shapes)

    def has(self, name: str) -> bool:
        return name in self._shapes

    def shape(self, name: str) -> tuple[int, ...]:
        return self._shapes[name]

    def get(self, name: str) -> torch.Tensor:
        raise NotImplementedError

    def _unreadable(self, name: str, exc: BaseException) -> CompositionError:
        return CompositionError(f"tensor {name} in {self.path} could not be read ({_first_line(exc)}); "
                                "the file may be truncated or corrupt.")


class _Safetensors(_File):
    def __init__(self, path: Path):
        from safetensors import safe_open

        self.path = path
        _safetensors_names_unique(path)
        try:
            with safe_open(str(path), framework="pt") as handle:
                self._shapes = {n: tuple(handle.get_slice(n).get_shape()) for n in handle.keys()}
        except Exception as exc:  # noqa: BLE001 - the library's errors vary by fault
            raise CompositionError(
                f"{path} is not a readable safetensors file ({_first_line(exc)}); it may be truncated or corrupt."
            ) from None

    def get(self, name: str) -> torch.Tensor:
        """An owned copy: the library's tensors view a memory map of the whole file, whose pages
        count in the process's resident memory for as long as any view lives (docs/performance.md)."""
        from safetensors import safe_open

        try:
            with safe_open(str(self.path), framework="pt") as handle:
                return handle.get_tensor(name).clone()
        except Exception as exc:  # noqa: BLE001
            raise self._unreadable(name, exc) from None


class _HDF5(_File):
    def __init__(self, path: Path):
        import h5py

        self.path = path
        try:
            self._handle = h5py.File(path, "r")
            self._datasets = _hdf5_datasets(self._handle, path)
            self._shapes = {n: tuple(self._handle[p].shape) for n, p in self._datasets.items()}
        except CompositionError:
            raise
        except Exception as exc:  # noqa: BLE001
            raise CompositionError(
                f"{path} is not a readable HDF5 file ({_first_line(exc)}); it may be truncated or corrupt."
            ) from None

    def get(self, name: str) -> torch.Tensor:
        import numpy as np

        ds = self._handle[self._datasets[name]]
        if ds.dtype.kind != "f":
            raise CompositionError(f"tensor {name} in {self.path} is {ds.dtype}, not a floating-point type.")
        try:
            return torch.from_numpy(np.ascontiguousarray(ds[()]))
        except Exception as exc:  # noqa: BLE001
            raise self._unreadable(name, exc) from None


class _Torch(_File):
    def __init__(self, path: Path):
        self.path = path
        state = _torch_load(path)
        self._tensors = {k: v for k, v in state.items() if isinstance(k, str) and isinstance(v, torch.Tensor)}
        self._shapes = {k: tuple(v.shape) for k, v in self._tensors.items()}

    def get(self, name: str) -> torch.Tensor:
        return self._tensors[name]


def _torch_load(path: Path) -> dict:
    """``torch.load`` restricted to tensors and plain containers; never runs checkpoint code."""
    import zipfile

    mmap = zipfile.is_zipfile(path)  # the zip format can be memory-mapped; the legacy one cannot
    try:
        state = torch.load(path, map_location="cpu", weights_only=True, mmap=mmap)
    except pickle.UnpicklingError as exc:
        raise CompositionError(
            f"{path} is a pickle that needs more than tensors to load ({_first_line(exc)[:120]}); "
            "it was refused, because loading it could run code."
        ) from None
    except Exception as exc:  # noqa: BLE001
        raise CompositionError(
            f"{path} is not a readable PyTorch state dict ({_first_line(exc)[:160]}); it may be truncated or corrupt."
        ) from None
    for key in ("state_dict", "model"):
        if isinstance(state, dict) and len(state) == 1 and isinstance(state.get(key), dict):
            state = state[key]
    if not isinstance(state, dict):
        raise CompositionError(f"{path} holds a {type(state).__name__}, not a state dict of named tensors.")
    return state


def _open_file(path: Path) -> _File:
    _check_regular(path, "checkpoint file")
    if path.suffix in SAFETENSORS:
        return _Safetensors(path)
    if path.suffix in HDF5:
        return _HDF5(path)
    if path.suffix in TORCH:
        return _Torch(path)
    raise CompositionError(f"{path} is not a checkpoint file type this tool reads.")


def _hdf5_datasets(f, path: Path) -> dict[str, str]:
    """Tensor name -> dataset path of every dataset of an HDF5 checkpoint, refusing anything that
    reads outside the file (external or soft links, external storage, virtual datasets) and two
    datasets that name the same tensor."""
    import h5py

    found: dict[str, str] = {}
    stack = ["/"]
    while stack:
        gpath = stack.pop()
        group = f[gpath]
        for key in group:
            full = gpath.rstrip("/") + "/" + key
            link = group.get(key, getlink=True)
            if isinstance(link, h5py.ExternalLink):
                raise CompositionError(f"{path} links {full} to another file; checkpoints are read only from inside themselves.")
            if isinstance(link, h5py.SoftLink):
                raise CompositionError(f"{path} holds a soft link {full}; checkpoints with links are not read.")
            obj = group[key]
            if isinstance(obj, h5py.Group):
                stack.append(full)
                continue
            if not isinstance(obj, h5py.Dataset):
                continue
            if obj.is_virtual:
                raise CompositionError(f"dataset {full} of {path} is a virtual dataset that reads other files; "
                                       "checkpoints are read only from inside themselves.")
            if obj.external:
                raise CompositionError(f"dataset {full} of {path} keeps its data in an external file; "
                                       "checkpoints are read only from inside themselves.")
            name = full.strip("/").replace("/", ".")
            if name in found:
                raise CompositionError(f"{path} holds two datasets for tensor {name} ({found[name]} and {full}); "
                                       "which one is meant is unclear.")
            found[name] = full
    return found


def _check_regular(path: Path, what: str) -> None:
    """A file to read must be a regular file (a FIFO or device would hang or never end)."""
    import stat

    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise CompositionError(f"{what} {path} does not exist.") from None
    except OSError as exc:
        raise CompositionError(f"{what} {path} cannot be read ({exc.strerror}).") from None
    if not stat.S_ISREG(mode):
        raise CompositionError(f"{what} {path} is not a regular file.")


def _unique_keys(what: str):
    """A json ``object_pairs_hook`` that refuses a key given twice."""
    def hook(pairs):
        out = {}
        for key, value in pairs:
            if key in out:
                raise CompositionError(f"{what} names {key!r} twice.")
            out[key] = value
        return out
    return hook


def _safetensors_names_unique(path: Path) -> None:
    """Refuse a safetensors header that names a tensor twice (the reader would keep one)."""
    import struct

    with open(path, "rb") as f:
        head = f.read(8)
        if len(head) < 8:
            return  # the reader's own check reports a truncated file
        (n,) = struct.unpack("<Q", head)
        if n > 100 * 2**20:
            raise CompositionError(f"{path} has a safetensors header of {n} bytes, more than this tool reads.")
        raw = f.read(n)
    try:
        json.loads(raw, object_pairs_hook=_unique_keys(f"the safetensors header of {path}"))
    except (ValueError, UnicodeDecodeError):
        return  # the reader reports a corrupt header


def _is_output_of_this_tool(path: Path) -> bool:
    """A scan file or heads file written into the checkpoint directory is not a checkpoint."""
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
    except Exception:  # noqa: BLE001 - unreadable files are reported when chosen
        return False
    fmt = fmt.decode(errors="replace") if isinstance(fmt, bytes) else fmt
    return fmt in ("composition-scan", "composition-heads")


def _hdf5_config(path: Path, need_config: bool = True) -> dict:
    import h5py

    try:
        with h5py.File(path, "r") as f:
            raw = f.attrs.get("config")
    except Exception as exc:  # noqa: BLE001
        raise CompositionError(f"{path} is not a readable HDF5 file ({_first_line(exc)}).") from None
    if raw is None and not need_config:
        return {}
    if raw is None:
        raise CompositionError(f"no {CONFIG_NAME} beside {path} and no 'config' attribute in it: the sizes are unknown.")
    try:
        return json.loads(raw.decode() if isinstance(raw, bytes) else str(raw))
    except json.JSONDecodeError as exc:
        raise CompositionError(f"the 'config' attribute of {path} is not valid JSON ({_first_line(exc)}).") from None


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
