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

import errno
import glob
import json
import os
import struct
import tempfile
import time
import uuid
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import CompositionError
from ..score.stats import LABEL_NOT_COMPUTED

FORMAT_NAME = "composition-scan"
FORMAT_VERSION = 1
STATUS_COMPLETE = "complete"  # attribute ``status``: every selected pair computed and labelled
STATUS_IN_PROGRESS = "in-progress"  # units still missing; labels not computed; see the journal
FOLD_SECONDS = 300.0  # an in-progress file is rewritten with the journal folded in this often

CAUTION = (
    "Weight-space predictions under the token-table assumption: they ignore what other "
    "components add to the residual stream, the norm's real scale and the data distribution. "
    "They rank candidates for causal experiments; they are not causal evidence."
)

# name -> (dtype, fill value, trailing axis: None, "k" or "bins")
PAIR_DATASETS = {
    "top_share": ("f8", np.nan, "k"),
    "bottom_share": ("f8", np.nan, "k"),
    "mean_percentile": ("f8", np.nan, None),
    "histogram": ("i8", 0, "bins"),
    "rows_evaluated": ("i8", 0, None),
    "p_value": ("f8", np.nan, None),
    "q_value": ("f8", np.nan, None),
    "label": ("i1", LABEL_NOT_COMPUTED, None),
    # 95 % intervals (exact hypergeometric for shares, Serfling for the mean; zero width
    # when every row was evaluated); see composition.score.stats
    "ci_low": ("f8", np.nan, "k"),  # top-k share
    "ci_high": ("f8", np.nan, "k"),
    "bottom_ci_low": ("f8", np.nan, "k"),  # bottom-k share
    "bottom_ci_high": ("f8", np.nan, "k"),
    "mean_ci_low": ("f8", np.nan, None),  # mean percentile
    "mean_ci_high": ("f8", np.nan, None),
    "done": ("?", False, None),
    # fraction of the writer's squared write norm carried by the scan's query part (METHODS §3b):
    # depends on the writer only; 1 for part full and for the key and value sides
    "write_fraction": ("f8", np.nan, None),
}


def empty_pairs(n_layers: int, n_heads: int, n_k: int, n_bins: int) -> dict[str, np.ndarray]:
    """Arrays for every ``/pairs`` dataset, filled with their not-computed values."""
    base = (n_layers, n_heads, n_layers, n_heads)
    extra = {None: (), "k": (n_k,), "bins": (n_bins,)}
    return {name: np.full(base + extra[axis], fill, dtype=dtype)
            for name, (dtype, fill, axis) in PAIR_DATASETS.items()}


def write_scan(path: str | os.PathLike, attrs: dict, pairs: dict[str, np.ndarray]) -> Path:
    """Write a scan file atomically: a temporary file beside it, flushed to disk, then renamed."""
    import h5py

    path = Path(path)
    directory = _directory(path)
    if not directory.is_dir():
        raise CompositionError(f"output directory {directory} does not exist.")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=directory)
        os.close(fd)
        os.chmod(tmp, 0o666 & ~_umask())  # as an ordinary new file (mkstemp makes it private)
    except OSError as exc:
        raise ScanWriteError(path, exc) from None
    try:
        with h5py.File(tmp, "w") as f:
            for key, value in attrs.items():
                f.attrs[key] = _attr(value)
            group = f.create_group("pairs")
            for name, data in pairs.items():
                group.create_dataset(name, data=data)
        _fsync_file(tmp)
        os.replace(tmp, path)
        _fsync_dir(directory)
    except OSError as exc:
        _remove(tmp)
        raise ScanWriteError(path, exc) from None
    except BaseException:
        _remove(tmp)
        raise
    return path


class ScanWriteError(CompositionError):
    """Writing the scan file or its journal failed; ``reason`` says why in a few words."""

    def __init__(self, path, exc: BaseException):
        self.path = Path(path)
        self.reason = os_reason(exc)
        super().__init__(f"cannot write the scan file {self.path} ({self.reason}).")


def os_reason(exc: BaseException) -> str:
    """A few plain words for an operating-system failure (h5py hides errno in its text)."""
    code = getattr(exc, "errno", None)
    text = str(exc)
    if code == errno.ENOSPC or "No space left" in text or "errno = 28" in text:
        return "no space left on the device"
    if code == errno.EDQUOT or "Disk quota" in text:
        return "disk quota exceeded"
    if code == errno.EROFS or "Read-only file system" in text or "errno = 30" in text:
        return "read-only file system"
    if code in (errno.EACCES, errno.EPERM) or "Permission denied" in text or "errno = 13" in text:
        return "permission denied"
    return getattr(exc, "strerror", None) or text or type(exc).__name__


@dataclass
class Scan:
    """A scan file in memory: ``attrs`` (dict) and one NumPy array per ``/pairs`` dataset."""

    path: Path
    attrs: dict
    arrays: dict[str, np.ndarray]

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
        """A tidy table of the computed pairs: one 1-D array per column (pandas-ready)."""
        idx = np.argwhere(self.arrays["done"])  # [P, 4]
        table = {"writer_layer": idx[:, 0], "writer_head": idx[:, 1],
                 "responder_layer": idx[:, 2], "responder_head": idx[:, 3]}
        sel = tuple(idx.T)
        for name, data in self.arrays.items():
            if name == "done":
                continue
            values = data[sel]
            if values.ndim == 1:
                table[name] = values
            elif name in ("top_share", "bottom_share"):
                for j, k in enumerate(self.k):
                    table[f"{name}_{k}"] = values[:, j]
        table["writer"] = np.array([f"{a}.{b}" for a, b in idx[:, :2]])
        table["responder"] = np.array([f"{a}.{b}" for a, b in idx[:, 2:]])
        return table


def load_scan(path: str | os.PathLike, complete_only: bool = False) -> Scan:
    """Read a scan file into plain NumPy arrays.

    An in-progress file (``Scan.complete`` is False) comes with every unit committed so far,
    its journal merged in; its ``label`` and ``q_value`` are not computed yet (the false
    discovery rate is controlled over all pairs, so labels exist only once all are done).
    ``complete_only=True`` refuses an in-progress file instead.
    """
    path = Path(path)
    attrs, arrays = read_scan_file(path)
    if attrs.get("status", STATUS_COMPLETE) != STATUS_COMPLETE:
        journal = journal_path(path)
        if journal.is_file():
            for index, fields in read_journal(journal, attrs.get("scan_id")):
                _apply(arrays, index, fields)
        if complete_only:
            raise CompositionError(
                f"{path} is an unfinished scan ({int(arrays['done'].sum())} of {attrs.get('pairs_selected', '?')} "
                "pairs computed); run the same scan command again to finish it."
            )
    return Scan(path, attrs, arrays)


def read_scan_file(path: Path) -> tuple[dict, dict[str, np.ndarray]]:
    """The attributes and ``/pairs`` arrays of the HDF5 file alone (no journal)."""
    import h5py

    if not path.is_file():
        raise CompositionError(f"scan file {path} does not exist.")
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != FORMAT_NAME:
                raise CompositionError(f"{path} is not a scan file of this tool.")
            attrs = {k: _unattr(v) for k, v in f.attrs.items()}
            arrays = {name: f["pairs"][name][()] for name in f["pairs"]}
    except OSError as exc:
        raise CompositionError(f"{path} is not a readable HDF5 file ({exc}).") from None
    return attrs, arrays


# --- the journal of committed work units -------------------------------------------------
#
# file   := record(header) record(unit)*
# record := b"CJ01" | u32 payload length | u32 CRC-32 of payload | payload     (little-endian)
# header payload: JSON {"scan_id": ...}
# unit payload  := u32 JSON length | JSON {"pairs": [[lU, hU, lR, hR], ...],
#                                         "fields": [[name, dtype, shape], ...]} | raw arrays
# The arrays are C-ordered bytes, one per field, each of shape [n_pairs, ...].

_MAGIC = b"CJ01"
_FRAME = struct.Struct("<4sII")


def journal_path(path: str | os.PathLike) -> Path:
    """The journal of an in-progress scan file: ``<file>.journal`` beside it."""
    path = Path(path)
    return path.with_name(path.name + ".journal")


def read_journal(path: Path, scan_id: str | None):
    """Yield ``(pair_index [n, 4], {name: [n, ...]})`` for every intact unit record.

    Reading stops at the first record that is cut short or fails its CRC (a kill in the
    middle of an append). A journal whose header names another scan yields nothing.
    """
    try:
        data = path.read_bytes()
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


def _encode_unit(index: np.ndarray, fields: dict[str, np.ndarray]) -> bytes:
    index = np.ascontiguousarray(index, dtype="<i8")  # [n, 4]
    arrays = {name: np.ascontiguousarray(a) for name, a in fields.items()}
    head = json.dumps({"pairs": index.tolist(),
                       "fields": [[n, a.dtype.str, list(a.shape)] for n, a in arrays.items()]}).encode()
    return b"".join([struct.pack("<I", len(head)), head] + [a.tobytes() for a in arrays.values()])


def _decode_unit(payload: bytes, path: Path):
    (n,) = struct.unpack_from("<I", payload, 0)
    head = json.loads(payload[4:4 + n])
    index = np.asarray(head["pairs"], dtype=np.int64).reshape(-1, 4)  # [n, 4]
    fields, offset = {}, 4 + n
    for name, dtype, shape in head["fields"]:
        dt = np.dtype(dtype)
        size = int(np.prod(shape, dtype=np.int64)) * dt.itemsize
        if offset + size > len(payload):
            raise CompositionError(f"the journal {path} holds a record that does not match its own header.")
        fields[name] = np.frombuffer(payload, dtype=dt, count=size // dt.itemsize, offset=offset).reshape(shape)
        offset += size
    return index, fields


def _apply(arrays: dict[str, np.ndarray], index: np.ndarray, fields: dict[str, np.ndarray]) -> None:
    """Store one unit's per-pair values into the full arrays."""
    sel = tuple(np.asarray(index).T)
    for name, values in fields.items():
        if name in arrays:
            arrays[name][sel] = values


def _frame(payload: bytes) -> bytes:
    return _FRAME.pack(_MAGIC, len(payload), zlib.crc32(payload)) + payload


class ScanStore:
    """The writer's side of one scan file: resume or start it, commit units, finish it.

    Holds an exclusive lock on the journal, so two scans never write the same file.
    ``arrays`` always hold every committed unit.
    """

    def __init__(self, path: Path, attrs: dict, arrays: dict[str, np.ndarray], complete: bool):
        self.path, self.attrs, self.arrays, self.complete = path, attrs, arrays, complete
        self.journal = journal_path(path)
        self._fd: int | None = None
        self._good = 0  # bytes of the journal known intact
        self._folded = time.monotonic()

    @classmethod
    def start(cls, path: Path, attrs: dict, arrays: dict[str, np.ndarray]) -> "ScanStore":
        """A new in-progress scan file (replacing any file of that name) and an empty journal."""
        attrs = dict(attrs, status=STATUS_IN_PROGRESS, scan_id=uuid.uuid4().hex, journal=journal_path(path).name)
        store = cls(path, attrs, arrays, complete=False)
        store._lock()
        try:
            store._reset_journal()
            write_scan(path, attrs, arrays)
            store._remove_stale_temporaries()
        except BaseException as exc:
            _remove(store.journal)  # ours: we hold its lock and have just emptied it
            store.close()
            if isinstance(exc, OSError):
                raise ScanWriteError(path, exc) from None
            raise
        return store

    @classmethod
    def resume(cls, path: Path, attrs: dict, arrays: dict[str, np.ndarray]) -> "ScanStore":
        """Continue the scan file ``path`` whose attributes and arrays were just read."""
        complete = attrs.get("status", STATUS_COMPLETE) == STATUS_COMPLETE
        store = cls(path, attrs, arrays, complete)
        if complete:
            if store.journal.exists():
                store._remove_journal()  # left by a kill between the final rename and its removal
            return store
        store._lock()
        try:
            now, _ = read_scan_file(path)  # under the lock: has another scan changed it meanwhile?
            if now.get("scan_id") != attrs.get("scan_id"):
                raise CompositionError(f"{path} changed while this scan was opening it (another scan "
                                       "finished or restarted it); run the command again.")
            try:
                data = os.pread(store._fd, os.fstat(store._fd).st_size, 0)
            except OSError as exc:
                raise ScanWriteError(store.journal, exc) from None
            payloads, good = _parse_journal(data, attrs.get("scan_id"))
            for payload in payloads:
                _apply(arrays, *_decode_unit(payload, store.journal))
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

    def commit(self, index: np.ndarray, fields: dict[str, np.ndarray]) -> None:
        """Commit one unit: append its record to the journal and flush it to disk.

        # index [n, 4] pair indices, fields {name: [n, ...]}
        On failure the journal is cut back to its last intact record and ScanWriteError raised.
        """
        record = _frame(_encode_unit(index, fields))
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
        _apply(self.arrays, index, fields)
        if time.monotonic() - self._folded >= FOLD_SECONDS:
            try:
                self.fold()
            except ScanWriteError:
                pass  # the journal holds the unit; a full disk stops the next append anyway

    def fold(self) -> None:
        """Rewrite the in-progress HDF5 file with every committed unit and empty the journal."""
        self._folded = time.monotonic()
        write_scan(self.path, self.attrs, self.arrays)
        header = len(self._header())
        try:
            os.ftruncate(self._fd, header)
            os.fsync(self._fd)
        except OSError as exc:
            raise ScanWriteError(self.journal, exc) from None
        self._good = header

    def finish(self, attrs: dict) -> None:
        """Write the complete file (labels included in ``arrays``) and delete the journal."""
        self.attrs = dict(attrs, status=STATUS_COMPLETE)
        self.attrs.pop("scan_id", None)
        self.attrs.pop("journal", None)
        write_scan(self.path, self.attrs, self.arrays)
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
    def _lock(self) -> None:
        import fcntl

        try:
            self._fd = os.open(self.journal, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise ScanWriteError(self.path, exc) from None
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
        _fsync_dir(_directory(self.path))

    def _remove_stale_temporaries(self) -> None:
        """Temporary files of earlier runs killed while writing (we hold the lock)."""
        for stale in _directory(self.path).glob(f".{glob.escape(self.path.name)}.*.partial"):
            _remove(stale)


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _directory(path: Path) -> Path:
    return path.parent if str(path.parent) else Path(".")


def _fsync_file(path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


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
        value = value.decode()
    if isinstance(value, np.generic):
        value = value.item()
    return value


def _remove(path) -> None:
    try:
        os.remove(path)
    except OSError:
        pass
