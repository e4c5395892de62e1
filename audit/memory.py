"""Give freed memory back to the operating system between the stages of a run.

A run builds large temporary tables (raw rows, canonical text for hashing, batch results).
When they are freed, the C allocator and Arrow's memory pool keep most of the pages for reuse,
so the process's resident size stays at its high-water mark and the next stage adds to it.
:func:`release_freed_memory` hands those pages back (Arrow's pool, then glibc's
``malloc_trim``); :func:`prefer_returnable_allocations` makes glibc serve large blocks from
their own mappings, which go back to the system as soon as they are freed.

Both are best effort: on a system without glibc (macOS, Windows, musl) they do nothing.
Nothing here changes any result.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys
from functools import lru_cache

# glibc mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
# Blocks of at least this size get their own mapping (glibc's default starts at 128 KiB but
# grows with the largest block freed, after which large arrays stay in the heap).
MMAP_THRESHOLD_BYTES = 1 << 20


@lru_cache(maxsize=1)
def _libc():
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        libc.malloc_trim  # noqa: B018 - glibc only
        libc.mallopt  # noqa: B018
    except (OSError, AttributeError):
        return None
    return libc


def prefer_returnable_allocations() -> bool:
    """Fix glibc's mmap threshold (large blocks in their own mappings); True when applied."""
    libc = _libc()
    if libc is None:
        return False
    ok = libc.mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
    ok &= libc.mallopt(_M_TRIM_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
    return bool(ok)


def release_freed_memory() -> None:
    """Return freed pages of Arrow's memory pool and of the C heap to the operating system."""
    try:
        import pyarrow as pa

        pa.default_memory_pool().release_unused()
    except Exception:  # noqa: BLE001 - best effort (an old pyarrow, another pool)
        pass
    libc = _libc()
    if libc is not None:
        libc.malloc_trim(0)
