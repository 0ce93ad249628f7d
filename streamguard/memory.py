"""Keeping a long-running service's resident memory close to what it holds (glibc's allocator only).

Two habits of glibc's malloc make a Python service's RSS creep above its live data. Its mmap threshold
rises each time a large block is freed (up to 32 MiB), so later per-tag arrays and checkpoint copies come
from the heap, whose freed middle is never returned; and freed heap pages stay resident until trimmed.
Fixing the threshold (which also turns off its drift) keeps large arrays in their own mappings, returned
to the system when freed; trimming after a checkpoint hands back what the copies left. Elsewhere
(musl, macOS) both calls do nothing.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

_M_MMAP_THRESHOLD = -3  # mallopt parameter number in glibc's malloc.h
MMAP_THRESHOLD = 256 * 1024  # blocks at least this large get their own mapping (glibc's default starts at 128 KiB)


def _libc() -> ctypes.CDLL | None:
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    return libc if hasattr(libc, "malloc_trim") and hasattr(libc, "mallopt") else None


_LIBC = _libc()


def fix_mmap_threshold() -> bool:
    """Pin glibc's mmap threshold (stops its upward drift); True when it was set."""
    return bool(_LIBC is not None and _LIBC.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1)


def release_free_memory() -> bool:
    """Return free heap pages to the system; True when glibc released some."""
    return bool(_LIBC is not None and _LIBC.malloc_trim(0) == 1)
