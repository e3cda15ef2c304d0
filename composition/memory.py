"""The memory a scan holds: handing freed blocks back to the system, and measuring what is resident.

Tensors of 32 MiB and more are mapped one by one by the C library and go back to the system
when freed; smaller ones (a model's weight matrices, the table's block temporaries) come from
the library's heap, which keeps freed blocks for reuse. After the driver releases many of them
at once (the MLP weights after the token table, the per-layer factors after the pairs), it
asks the library to return the free pages (``malloc_trim``), so the resident memory of the
process follows what it holds (docs/performance.md, "Memory").
"""

from __future__ import annotations

import ctypes
import ctypes.util
import resource
import sys


def return_freed() -> None:
    """Give the heap's free pages back to the system (glibc ``malloc_trim``; elsewhere nothing)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        libc.malloc_trim(ctypes.c_size_t(0))
    except (OSError, AttributeError):  # not glibc (musl has no malloc_trim): the pages stay until reused
        pass


def _status_bytes(key: str) -> int | None:
    """A memory line of ``/proc/self/status`` (``VmRSS``, ``VmHWM``) in bytes; None where there is none."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(key + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def resident_bytes() -> int:
    """The process's resident memory now (``VmRSS``; the peak where it cannot be read)."""
    now = _status_bytes("VmRSS")
    return peak_resident_bytes() if now is None else now


def peak_resident_bytes() -> int:
    """The process's peak resident memory so far.

    ``VmHWM`` of ``/proc/self/status`` where it exists: the peak of this process's own memory.
    ``ru_maxrss`` (the fallback) is not that on Linux: it keeps the peak of the address space the
    process replaced at ``exec``, so a child started by a large parent (``vfork``/``posix_spawn``)
    reports the parent's size. (Common practice, no source: proc(5), getrusage(2).)
    """
    peak = _status_bytes("VmHWM")
    if peak is not None:
        return peak
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


__all__ = ["return_freed", "resident_bytes", "peak_resident_bytes"]
