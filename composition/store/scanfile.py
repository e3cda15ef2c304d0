"""The scan file: an HDF5 file with one dataset per statistic under ``/pairs``.

Every dataset under ``/pairs`` is indexed ``[writer_layer, writer_head, responder_layer,
responder_head, ...]``; pairs not computed hold the fill values below and ``done = False``.
The layout is documented in the README ("The scan file").

A scan file is either complete (attribute ``status = "complete"``: every selected pair is
computed and labelled) or in progress (``status = "in-progress"``, a scan that is still
running or was stopped; labels and q-values are not computed yet). An in-progress file has
a journal beside it, ``<file>.journal``: an append-only list of committed work units, each
record framed by its length and a CRC-32 and flushed to disk (fsync) before the unit counts
as committed. The HDF5 file itself is only ever replaced whole: written to a temporary name
beside the target, flushed, and renamed into place, so no reader ever sees a half-written
dataset. ``load_scan`` merges the journal of an in-progress file, and a resumed scan
replays it; a torn last record (a kill in the middle of an append) fails its check and is
dropped. See docs/long-runs.md for why this is crash-safe.
"""

from __future__ import annotations

import glob
import json
import os
import stat
import struct
import time
import uuid
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import CompositionError
from . import schema
from .atomic import (WriteError, atomic_write, check_target, directory_of, fsync_dir, os_reason,
                     remove_quietly, special_kind)

FORMAT_NAME = "composition-scan"
FORMAT_VERSION = 2  # 2: the fingerprint covers the configuration (model_settings); /heads and /model_space are
#                     work units of the scan (with their own done flags)
READABLE_VERSIONS = (1, 2)
STATUS_COMPLETE = "complete"  # attribute ``status``: every selected pair computed and labelled
STATUS_IN_PROGRESS = "in-progress"  # units still missing; labels not computed; see the journal
FOLD_SECONDS = 300.0  # an in-progress file is rewritten with the journal folded in this often

CAUTION = (
    "Weight-space predictions under the token-table assumption: they ignore what other "
    "components add to the residual stream, the norm's real scale and the data distribution. "
    "They rank candidates for causal experiments; they are not causal evidence."
)

# name -> (dtype, fill value, trailing axis: None, "k" or "bins"), derived from the schema
PAIR_DATASETS = {d.name: (d.dtype, d.fill, d.trailing) for d in schema.datasets("pairs").values()}


def empty_pairs(n_layers: int, n_heads: int, n_k: int, n_bins: int) -> dict[str, np.ndarray]:
    """Arrays for every ``/pairs`` dataset, filled with their not-computed values."""
    return schema.empty("pairs", n_layers, n_heads, n_k, n_bins)


class ScanWriteError(WriteError):
    """Writing the scan file or its journal failed; ``reason`` says why in a few words."""

    def __init__(self, path, exc: BaseException, what: str = "scan file"):
        super().__init__(path, exc, what)


def write_scan(path: str | os.PathLike, attrs: dict, pairs: dict[str, np.ndarray],
               groups: dict[str, dict[str, np.ndarray]] | None = None,
               group_attrs: dict[str, dict] | None = None) -> Path:
    """Write a scan file atomically (store.atomic): ``/pairs`` and any further ``groups``."""
    import h5py

    path = Path(path)
    with atomic_write(path, what="scan file", error=ScanWriteError) as tmp:
        with h5py.File(tmp, "w") as f:
            for key, value in attrs.items():
                f.attrs[key] = _attr(value)
            for name, arrays in {"pairs": pairs, **(groups or {})}.items():
                group = f.create_group(name)
                for key, value in (group_attrs or {}).get(name, {}).items():
                    group.attrs[key] = _attr(value)
                for key, data in arrays.items():
                    group.create_dataset(key, data=data)
    return path


@dataclass
class Scan:
    """A scan file in memory: ``attrs`` (dict) and one NumPy array per ``/pairs`` dataset."""

    path: Path
    attrs: dict
    arrays: dict[str, np.ndarray]
    groups: dict = field(default_factory=dict)  # "heads" | "model_space" -> arrays, if present
    group_attrs: dict = field(default_factory=dict)

    def __getattr__(self, name):
        arrays = self.__dict__.get("arrays", {})
        if name in arrays:
            return arrays[name]
        raise AttributeError(name)

    @property
    def k(self) -> np.ndarray:
        return np.asarray(self.attrs["k"])

    @property
    def complete(self) -> bool:
        """True when every selected pair is computed and labelled (``status = "complete"``)."""
        return self.attrs.get("status", STATUS_COMPLETE) == STATUS_COMPLETE

    def enrichment(self, which: str = "top") -> np.ndarray:
        """A share divided by its null value ``k/n``. # -> [L, H, L, H, nk]"""
        share = self.arrays[f"{which}_share"]
        return share / (self.k / self.attrs["keys_per_row"])

    def pairs(self) -> dict[str, np.ndarray]:
        """A tidy table of the computed pairs: one 1-D array per column (pandas-ready):
        integer ``writer_layer, writer_head, responder_layer, responder_head``, the labels
        ``writer``/``responder``, and per k the shares with their intervals (store.schema.tidy).
        A scan with references adds each pair's standing against its responder's references
        (:meth:`references_of`). Writer groups' pairs are in :meth:`group_pairs`."""
        table = schema.tidy("pairs", self.arrays, self.k, np.argwhere(self.arrays["done"]))
        return self._with_standing(table)

    @property
    def group_names(self) -> list[str]:
        """The scan's writer groups, in the order of the ``/groups`` arrays (empty without groups)."""
        return [str(n) for n in self.group_attrs.get("groups", {}).get("group_names", [])]

    @property
    def group_members(self) -> dict[str, list[tuple[int, int]]]:
        """Each writer group's member heads."""
        members = self.group_attrs.get("groups", {}).get("group_members", [])
        return {name: [tuple(int(v) for v in m) for m in ms] for name, ms in zip(self.group_names, members)}

    def group_pairs(self) -> dict[str, np.ndarray]:
        """The writer groups' pairs as a tidy table with the columns of :meth:`pairs`: the writer is the
        group's name (``writer`` and ``writer_group``), ``writer_layer = writer_head = -1``, plus the
        integer ``group`` index into ``/groups``. Empty columns when the scan has no groups."""
        arrays = self.groups.get("groups")
        if arrays is None:
            arrays = schema.empty("groups", 1, 1, len(self.k), 1, 0)
        idx = np.argwhere(arrays["done"])  # [P, 3]
        table = schema.tidy("groups", arrays, self.k, idx)
        names = np.array(self.group_names + [""], dtype=str)
        table["writer"] = names[idx[:, 0]] if len(idx) else np.array([], dtype=str)
        table["writer_group"] = table["writer"]
        table["writer_layer"] = np.full(len(idx), -1, dtype=np.int64)
        table["writer_head"] = np.full(len(idx), -1, dtype=np.int64)
        return self._with_standing(table)

    def references_of(self, responder_layer, responder_head) -> dict[str, np.ndarray] | None:
        """The references of responders (arrays of layers and heads, any shape), or None when the scan
        has none: ``identity``, ``unembedding`` (mean percentiles) and ``draws`` ``[..., draws]``."""
        ref = self.groups.get("references")
        if ref is None:
            return None
        sel = (np.asarray(responder_layer, dtype=np.int64), np.asarray(responder_head, dtype=np.int64))
        return {"identity": ref["identity_mean_percentile"][sel], "unembedding": ref["unembedding_mean_percentile"][sel],
                "draws": ref["random_mean_percentile"][sel], "done": ref["done"][sel]}

    def standing(self, mean_percentile, responder_layer, responder_head) -> dict[str, np.ndarray] | None:
        """How far pairs stand above their responders' references (compose.references.standing,
        docs/groups.md §3); None when the scan has no references. # [...] -> {name: [...]}"""
        from ..compose.references import standing

        ref = self.references_of(responder_layer, responder_head)
        if ref is None:
            return None
        return standing(mean_percentile, ref["identity"], ref["unembedding"], ref["draws"])

    def _with_standing(self, table: dict) -> dict:
        found = self.standing(table["mean_percentile"], table["responder_layer"], table["responder_head"])
        if found is not None:
            for name in ("above_identity", "above_unembedding", "random_z", "outside_band", "above_generic"):
                table[name] = found[name]
        return table


def load_scan(path: str | os.PathLike, complete_only: bool = False) -> Scan:
    """Read a scan file into plain NumPy arrays.

    An in-progress file (``Scan.complete`` is False) comes with every unit committed so far,
    its journal merged in; its ``label`` and ``q_value`` are not computed yet (the false
    discovery rate is controlled over all pairs, so labels exist only once all are done).
    ``complete_only=True`` refuses an in-progress file instead. A file that is not a scan
    of this tool (or not of a version it reads, or with datasets of the wrong shape or
    type) is refused with a sentence.
    """
    path = Path(path)
    attrs, groups, group_attrs = read_scan_groups(path)
    if attrs.get("status", STATUS_COMPLETE) != STATUS_COMPLETE:
        journal = journal_path(path)
        if special_kind(journal) is None and journal.exists():
            for group, index, fields in read_journal(journal, attrs.get("scan_id")):
                apply_unit(groups, group, index, fields, journal)
    scan = Scan(path, attrs, groups["pairs"], {g: a for g, a in groups.items() if g != "pairs"}, group_attrs)
    if complete_only:
        require_complete(scan)
    return scan


def require_complete(scan: Scan, command: str | None = None) -> Scan:
    """Refuse an in-progress scan with a sentence (``shortlist``, ``report``, ``heads --into``)."""
    if not scan.complete:
        done = int(scan.arrays["done"].sum())
        uses = f"{command} needs a finished scan: " if command else ""
        raise CompositionError(
            f"{uses}{scan.path} is an unfinished scan ({done} of {scan.attrs.get('pairs_selected', '?')} "
            "pairs computed); run the same scan command again to finish it.")
    return scan


def check_matches(scan: Scan, weights) -> None:
    """Refuse ``weights`` that are not those the scan was computed from, naming what differs.

    Compares the configuration values that change numbers (``model_settings``) key by key,
    then the fingerprint (format 1 files recorded the tensors' fingerprint only).
    """
    diff = settings_change(scan.attrs, weights)
    if diff:
        raise CompositionError(f"the checkpoint does not match the scan {scan.path}: {diff}.")


def settings_change(attrs: dict, weights) -> str | None:
    """What differs between the model a scan file was computed from and ``weights``, or None."""
    old_fp = str(attrs.get("weights_fingerprint"))
    if int(attrs.get("format_version", 1)) < 2:
        now = weights.tensor_fingerprint()
        if old_fp != now:
            return f"the checkpoint differs: its weights differ (weights fingerprint {old_fp[:12]} in the file, {now[:12]} now)"
        return None
    try:
        old = json.loads(attrs.get("model_settings", "{}"))
    except (TypeError, ValueError):
        old = {}
    new = weights.settings()
    changed = [key for key in new if key in old and old[key] != new[key]]
    if changed:
        parts = [f"the checkpoint's {key} changed from {_show(old[key])} to {_show(new[key])}" for key in changed]
        return (", ".join(parts[:-1]) + " and " + parts[-1] if len(parts) > 1 else parts[0]) + " since the scan started"
    now = weights.fingerprint()
    if old_fp != now:
        return f"the checkpoint differs: its weights differ (weights fingerprint {old_fp[:12]} in the file, {now[:12]} now)"
    return None


def _show(value) -> str:
    if isinstance(value, list):
        return ",".join(str(v) for v in value)
    return str(value)


def read_scan_file(path: Path) -> tuple[dict, dict[str, np.ndarray]]:
    """The attributes and ``/pairs`` arrays of the HDF5 file alone (no journal)."""
    attrs, groups, _ = read_scan_groups(path)
    return attrs, groups["pairs"]


def read_scan_groups(path: Path) -> tuple[dict, dict[str, dict[str, np.ndarray]], dict[str, dict]]:
    """Attributes, every group's arrays and every group's attributes of the HDF5 file alone,
    checked against the schema."""
    import h5py

    path = Path(path)
    kind = special_kind(path)
    if kind is not None or not path.exists():
        raise CompositionError(f"scan file {path} does not exist." if kind is None else
                               f"scan file {path} is {kind}, not a regular file.")
    try:
        with h5py.File(path, "r") as f:
            if _text(f.attrs.get("format")) != FORMAT_NAME:
                raise CompositionError(f"{path} is not a scan file of this tool.")
            attrs = {k: _unattr(v) for k, v in f.attrs.items()}
            sizes = _sizes(path, attrs) + _extra_sizes(path, f)
            groups, group_attrs = {}, {}
            for name in schema.GROUPS:
                if name not in f:
                    continue
                g = f[name]
                if not isinstance(g, h5py.Group):
                    raise CompositionError(f"{path} is not a valid scan file: /{name} is not a group.")
                groups[name] = {key: _read_dataset(path, g, name, key, sizes) for key in schema.datasets(name)
                                if key in g or name == "pairs" or key != "done"}
                group_attrs[name] = {k: _unattr(v) for k, v in g.attrs.items()}
    except CompositionError:
        raise
    except (OSError, KeyError, ValueError, TypeError, RuntimeError) as exc:
        raise CompositionError(f"{path} is not a readable scan file ({str(exc).splitlines()[0] if str(exc) else exc!r}).") from None
    if "pairs" not in groups:
        raise CompositionError(f"{path} is not a valid scan file: it has no /pairs group.")
    for name in ("heads", "model_space"):  # files of format 1 have no done flags: complete groups
        if name in groups and "done" not in groups[name]:
            groups[name]["done"] = np.ones(schema.datasets(name)["done"].shape(*sizes), dtype=bool)
    for attrs_of_group in group_attrs.values():
        for key, value in attrs_of_group.items():
            if isinstance(value, str) and value.startswith("["):
                try:
                    attrs_of_group[key] = json.loads(value)
                except ValueError:
                    pass
    return attrs, groups, group_attrs


def _sizes(path: Path, attrs: dict) -> tuple[int, int, int, int]:
    """``(L, H, n_k, bins)`` from the file's attributes, checked."""
    version = attrs.get("format_version", 1)
    if not isinstance(version, int) or isinstance(version, bool) or version not in READABLE_VERSIONS:
        raise CompositionError(f"{path} is a scan file of format version {version!r}, which this version of the "
                               f"tool does not read (it reads versions {', '.join(map(str, READABLE_VERSIONS))}).")
    out = []
    for key in ("n_layers", "n_heads"):
        value = attrs.get(key)
        if not isinstance(value, int) or isinstance(value, bool) or not 0 < value <= 100_000:
            raise CompositionError(f"{path} is not a valid scan file: its attribute {key} is {value!r}.")
        out.append(value)
    k = attrs.get("k")
    k = list(np.atleast_1d(k)) if k is not None and not isinstance(k, str) else None
    if not k or not all(isinstance(v, (int, np.integer)) and v > 0 for v in k):
        raise CompositionError(f"{path} is not a valid scan file: its attribute k is {attrs.get('k')!r}.")
    bins = attrs.get("histogram_bins", 20)
    if not isinstance(bins, int) or not 0 < bins <= 100_000:
        raise CompositionError(f"{path} is not a valid scan file: its attribute histogram_bins is {bins!r}.")
    return out[0], out[1], len(k), bins


def _extra_sizes(path: Path, f) -> tuple[int, int]:
    """``(n_groups, n_draws)``: the writer groups named in ``/groups`` and the random band's draws of
    ``/references`` (0 where the file has no such group), checked."""
    n_groups = n_draws = 0
    if "groups" in f:
        names = _unattr(f["groups"].attrs.get("group_names", "[]"))
        try:
            names = json.loads(names) if isinstance(names, str) else list(names)
        except (TypeError, ValueError):
            names = None
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names) or len(names) > 100_000:
            raise CompositionError(f"{path} is not a valid scan file: /groups has no valid group_names attribute.")
        n_groups = len(names)
    if "references" in f:
        draws = _unattr(f["references"].attrs.get("draws"))
        if not isinstance(draws, int) or isinstance(draws, bool) or not 0 < draws <= 100_000:
            raise CompositionError(f"{path} is not a valid scan file: /references has draws {draws!r}.")
        n_draws = draws
    return n_groups, n_draws


def _read_dataset(path: Path, group, gname: str, name: str, sizes) -> np.ndarray:
    import h5py

    d = schema.datasets(gname)[name]
    obj = group.get(name, getlink=True)
    if obj is None:
        raise CompositionError(f"{path} is not a valid scan file: it has no dataset /{gname}/{name}.")
    if not isinstance(obj, h5py.HardLink):
        raise CompositionError(f"{path} is not a valid scan file: /{gname}/{name} is a link, not a dataset.")
    ds = group[name]
    if not isinstance(ds, h5py.Dataset):
        raise CompositionError(f"{path} is not a valid scan file: /{gname}/{name} is not a dataset.")
    if ds.is_virtual or ds.external:
        raise CompositionError(f"{path} is not a valid scan file: /{gname}/{name} stores its data outside the file.")
    shape = d.shape(*sizes)
    if ds.shape != shape or ds.dtype != np.dtype(d.dtype):
        raise CompositionError(f"{path} is not a valid scan file: /{gname}/{name} has shape {ds.shape} and type "
                               f"{ds.dtype}, not {shape} and {np.dtype(d.dtype)}.")
    return ds[()]


def _text(value):
    return value.decode(errors="replace") if isinstance(value, bytes) else value


# --- the journal of committed work units -------------------------------------------------
#
# file   := record(header) record(unit)*
# record := b"CJ01" | u32 payload length | u32 CRC-32 of payload | payload     (little-endian)
# header payload: JSON {"scan_id": ...}
# unit payload  := u32 JSON length | JSON {"group": a name of store.schema.GROUPS (pairs, heads,
#                                         model_space, groups, group_heads, references),
#                                         "pairs": [[i0, i1, ...], ...],   (leading indices, [n, m])
#                                         "fields": [[name, dtype, shape], ...]} | raw arrays
# The arrays are C-ordered bytes, one per field, each of shape [n, ...]. A record without
# "group" (format 1) belongs to /pairs.

_MAGIC = b"CJ01"
_FRAME = struct.Struct("<4sII")


def journal_path(path: str | os.PathLike) -> Path:
    """The journal of an in-progress scan file: ``<file>.journal`` beside it."""
    path = Path(path)
    return path.with_name(path.name + ".journal")


def read_journal(path: Path, scan_id: str | None):
    """Yield ``(group, index [n, m], {name: [n, ...]})`` for every intact unit record.

    Reading stops at the first record that is cut short or fails its CRC (a kill in the
    middle of an append). A journal whose header names another scan yields nothing.
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK)
        try:
            if not stat.S_ISREG(os.fstat(fd).st_mode):
                raise CompositionError(f"the journal {path} is not a regular file.")
            with os.fdopen(os.dup(fd), "rb") as f:
                data = f.read()
        finally:
            os.close(fd)
    except OSError as exc:
        raise CompositionError(f"cannot read the journal {path} ({os_reason(exc)}).") from None
    records, _ = _parse_journal(data, scan_id)
    for payload in records:
        yield _decode_unit(payload, path)


def _parse_journal(data: bytes, scan_id: str | None) -> tuple[list[bytes], int]:
    """Unit payloads of intact records and the byte length they span (header included)."""
    payloads, offset = [], 0
    while offset + _FRAME.size <= len(data):
        magic, length, crc = _FRAME.unpack_from(data, offset)
        start, end = offset + _FRAME.size, offset + _FRAME.size + length
        if magic != _MAGIC or end > len(data) or zlib.crc32(data[start:end]) != crc:
            break
        payloads.append(data[start:end])
        offset = end
    if not payloads:
        return [], 0
    try:
        header = json.loads(payloads[0])
    except ValueError:
        return [], 0
    if not isinstance(header, dict) or scan_id is None or header.get("scan_id") != scan_id:
        return [], 0
    return payloads[1:], offset


def _encode_unit(index: np.ndarray, fields: dict[str, np.ndarray], group: str = "pairs") -> bytes:
    index = np.ascontiguousarray(index, dtype="<i8")  # [n, m]
    arrays = {name: np.ascontiguousarray(a) for name, a in fields.items()}
    head = json.dumps({"group": group, "pairs": index.tolist(),
                       "fields": [[n, a.dtype.str, list(a.shape)] for n, a in arrays.items()]}).encode()
    return b"".join([struct.pack("<I", len(head)), head] + [a.tobytes() for a in arrays.values()])


class JournalError(CompositionError):
    """A journal record passed its CRC but does not fit the scan file."""


def _decode_unit(payload: bytes, path: Path):
    """``(group, index [n, m], {name: [n, ...]})`` of one record; nonsense raises JournalError."""
    def bad(why: str):
        return JournalError(f"the journal {path} holds a record that passes its checksum but {why}; move the "
                            "journal away to resume from the scan file alone, or pass --overwrite to start afresh.")

    try:
        (n,) = struct.unpack_from("<I", payload, 0)
        head = json.loads(payload[4:4 + n])
    except (struct.error, ValueError, UnicodeDecodeError):
        raise bad("whose header is not readable") from None
    if not isinstance(head, dict) or not isinstance(head.get("fields"), list):
        raise bad("whose header is not a unit description")
    group = head.get("group", "pairs")
    if group not in schema.GROUPS:
        raise bad(f"names an unknown group {group!r}")
    try:
        index = np.asarray(head.get("pairs"), dtype=np.int64)  # [n, m]
    except (TypeError, ValueError, OverflowError):
        raise bad("whose indices are not integers") from None
    if index.ndim != 2 or index.shape[0] == 0 or index.shape[1] == 0:
        raise bad("whose indices are not a list of index rows")
    fields, offset = {}, 4 + n
    for item in head["fields"]:
        if (not isinstance(item, list) or len(item) != 3 or not isinstance(item[0], str)
                or not isinstance(item[2], list) or not all(isinstance(v, int) and v >= 0 for v in item[2])):
            raise bad("whose field list is malformed")
        name, dtype, shape = item
        try:
            dt = np.dtype(dtype)
        except (TypeError, ValueError):
            raise bad(f"whose field {name} has an unknown dtype") from None
        if dt.hasobject or dt.itemsize == 0:
            raise bad(f"whose field {name} has an unusable dtype")
        size = int(np.prod(shape, dtype=np.int64)) * dt.itemsize
        if size < 0 or offset + size > len(payload):
            raise bad("that does not match its own header")
        fields[name] = np.frombuffer(payload, dtype=dt, count=size // dt.itemsize, offset=offset).reshape(shape)
        offset += size
    if offset != len(payload):
        raise bad("that does not match its own header")
    return group, index, fields


def apply_unit(groups: dict[str, dict[str, np.ndarray]], group: str, index: np.ndarray,
               fields: dict[str, np.ndarray], path: Path | None = None) -> None:
    """Store one unit's values into the full arrays, after checking that they fit them.

    # index [n, m] leading indices; fields {name: [n, ...]} of the schema's dtypes
    """
    def bad(why: str):
        where = f"the journal {path}" if path is not None else "a work unit"
        return JournalError(f"{where} holds a record that passes its checksum but {why}; move the journal away "
                            "to resume from the scan file alone, or pass --overwrite to start afresh.")

    arrays = groups.get(group)
    if arrays is None:
        raise bad(f"belongs to the group /{group}, which the scan file does not have")
    index = np.asarray(index)
    n, m = index.shape
    for name, values in fields.items():
        if name not in arrays:
            raise bad(f"names a dataset {name!r} that /{group} does not have")
        target = arrays[name]
        if m > target.ndim:
            raise bad(f"indexes /{group}/{name} with {m} indices")
        if values.dtype != target.dtype or values.shape != (n,) + target.shape[m:]:
            raise bad(f"holds values of shape {values.shape} and type {values.dtype} for /{group}/{name}")
        if ((index < 0) | (index >= np.asarray(target.shape[:m]))).any():
            raise bad(f"holds indices outside /{group}/{name}")
    if "done" not in fields:
        raise bad("marks nothing as done")
    sel = tuple(index.T)
    for name, values in fields.items():
        arrays[name][sel] = values


def _frame(payload: bytes) -> bytes:
    return _FRAME.pack(_MAGIC, len(payload), zlib.crc32(payload)) + payload


class ScanStore:
    """The writer's side of one scan file: resume or start it, commit units, finish it.

    Holds an exclusive lock on the journal, so two scans never write the same file.
    ``groups`` always hold every committed unit (``arrays`` is ``groups["pairs"]``).
    """

    def __init__(self, path: Path, attrs: dict, groups: dict[str, dict[str, np.ndarray]], complete: bool,
                 group_attrs: dict | None = None):
        self.path, self.attrs, self.groups, self.complete = path, attrs, groups, complete
        self.group_attrs = dict(group_attrs or {})
        self.journal = journal_path(path)
        self._fd: int | None = None
        self._good = 0  # bytes of the journal known intact
        self._folded = time.monotonic()

    @property
    def arrays(self) -> dict[str, np.ndarray]:
        return self.groups["pairs"]

    @classmethod
    def start(cls, path: Path, attrs: dict, groups, group_attrs: dict | None = None) -> "ScanStore":
        """A new in-progress scan file (replacing any file of that name) and an empty journal."""
        if "pairs" not in groups:  # a dict of /pairs arrays
            groups = {"pairs": groups}
        attrs = dict(attrs, status=STATUS_IN_PROGRESS, scan_id=uuid.uuid4().hex, journal=journal_path(path).name)
        store = cls(path, attrs, groups, complete=False, group_attrs=group_attrs)
        check_target(path, "scan file")
        store._lock(create=True)
        try:
            store._reset_journal()
            store._write()
            store._remove_stale_temporaries()
        except BaseException as exc:
            _remove(store.journal)  # ours: we hold its lock and have just emptied it
            store.close()
            if isinstance(exc, OSError):
                raise ScanWriteError(path, exc) from None
            raise
        return store

    @classmethod
    def resume(cls, path: Path, attrs: dict, groups, group_attrs: dict | None = None) -> "ScanStore":
        """Continue the scan file ``path`` whose attributes and arrays were just read."""
        if "pairs" not in groups:
            groups = {"pairs": groups}
        complete = attrs.get("status", STATUS_COMPLETE) == STATUS_COMPLETE
        store = cls(path, attrs, groups, complete, group_attrs)
        if complete:
            if special_kind(store.journal) is None and store.journal.exists():
                store._remove_journal()  # left by a kill between the final rename and its removal
            return store
        store._lock(create=False)
        try:
            now, _ = read_scan_file(path)  # under the lock: has another scan changed it meanwhile?
            if now.get("scan_id") != attrs.get("scan_id"):
                raise CompositionError(f"{path} changed while this scan was opening it (another scan "
                                       "finished or restarted it); run the command again.")
            try:
                data = os.pread(store._fd, os.fstat(store._fd).st_size, 0)
            except OSError as exc:
                raise ScanWriteError(store.journal, exc, "journal") from None
            payloads, good = _parse_journal(data, attrs.get("scan_id"))
            for payload in payloads:
                apply_unit(groups, *_decode_unit(payload, store.journal), store.journal)
            if good == 0:
                store._reset_journal()
            else:
                store._good = good
                if good != len(data):
                    os.ftruncate(store._fd, good)  # drop a torn last record
                    os.fsync(store._fd)
            store._remove_stale_temporaries()
        except OSError as exc:
            store.close()
            raise ScanWriteError(path, exc) from None
        except BaseException:
            store.close()
            raise
        return store

    def commit(self, index: np.ndarray, fields: dict[str, np.ndarray], group: str = "pairs") -> None:
        """Commit one unit: append its record to the journal and flush it to disk.

        # index [n, m] leading indices, fields {name: [n, ...]}
        On failure the journal is cut back to its last intact record and ScanWriteError raised.
        """
        record = _frame(_encode_unit(index, fields, group))
        try:
            view = memoryview(record)
            while view:
                view = view[os.pwrite(self._fd, view, self._good + len(record) - len(view)):]
            os.fsync(self._fd)
        except OSError as exc:
            try:
                os.ftruncate(self._fd, self._good)
            except OSError:
                pass
            raise ScanWriteError(self.path, exc) from None
        self._good += len(record)
        apply_unit(self.groups, group, index, fields)
        if time.monotonic() - self._folded >= FOLD_SECONDS:
            try:
                self.fold()
            except ScanWriteError:
                pass  # the journal holds the unit; a full disk stops the next append anyway

    def fold(self) -> None:
        """Rewrite the in-progress HDF5 file with every committed unit and empty the journal."""
        self._folded = time.monotonic()
        self._write()
        header = len(self._header())
        try:
            os.ftruncate(self._fd, header)
            os.fsync(self._fd)
        except OSError as exc:
            raise ScanWriteError(self.journal, exc, "journal") from None
        self._good = header

    def finish(self, attrs: dict, group_attrs: dict | None = None) -> None:
        """Write the complete file (labels included in the groups) and delete the journal."""
        self.attrs = dict(attrs, status=STATUS_COMPLETE)
        self.attrs.pop("scan_id", None)
        self.attrs.pop("journal", None)
        self.group_attrs.update(group_attrs or {})
        self._write()
        self.complete = True
        self._remove_journal()

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)  # releases the lock
            self._fd = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # private -------------------------------------------------------------------------------
    def _write(self) -> None:
        others = {g: a for g, a in self.groups.items() if g != "pairs"}
        write_scan(self.path, self.attrs, self.groups["pairs"], others, self.group_attrs)

    def _lock(self, create: bool) -> None:
        import fcntl

        kind = special_kind(self.journal)
        if kind is not None:
            raise CompositionError(f"the journal path {self.journal} is {kind}; this tool writes only regular "
                                   "files, so remove it or choose another output path.")
        flags = os.O_RDWR | os.O_NOFOLLOW | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0) | (os.O_CREAT if create else 0)
        try:
            self._fd = os.open(self.journal, flags, 0o666)
        except FileNotFoundError:
            if create:
                raise ScanWriteError(self.path, FileNotFoundError(2, "No such file or directory")) from None
            self._fd = None
            self._lock(create=True)  # a journal deleted by hand: the units since the last fold are lost
            return
        except OSError as exc:
            raise ScanWriteError(self.path, exc) from None
        if not stat.S_ISREG(os.fstat(self._fd).st_mode):
            self.close()
            raise CompositionError(f"the journal path {self.journal} is not a regular file; remove it or "
                                   "choose another output path.")
        try:
            fcntl.flock(self._fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.close()
            raise CompositionError(f"another scan is writing {self.path} now (its journal {self.journal.name} is locked).") from None

    def _header(self) -> bytes:
        return _frame(json.dumps({"scan_id": self.attrs.get("scan_id")}).encode())

    def _reset_journal(self) -> None:
        header = self._header()
        os.ftruncate(self._fd, 0)
        os.pwrite(self._fd, header, 0)
        os.fsync(self._fd)
        self._good = len(header)

    def _remove_journal(self) -> None:
        _remove(self.journal)
        fsync_dir(directory_of(self.path))

    def _remove_stale_temporaries(self) -> None:
        """Temporary files of earlier runs killed while writing (we hold the lock)."""
        for stale in directory_of(self.path).glob(f".{glob.escape(self.path.name)}.*.partial"):
            if special_kind(stale) is None:
                _remove(stale)


def _attr(value):
    if isinstance(value, (dict, list, tuple)) and not (
        isinstance(value, (list, tuple)) and value and all(isinstance(v, (int, float)) for v in value)
    ):
        return json.dumps(value)
    if value is None:
        return "none"
    return value


def _unattr(value):
    if isinstance(value, bytes):
        value = value.decode(errors="replace")
    if isinstance(value, np.generic):
        value = value.item()
    return value


def _remove(path) -> None:
    remove_quietly(path)
