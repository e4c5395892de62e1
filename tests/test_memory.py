"""audit.memory: freed memory handed back to the system (glibc on Linux; nothing elsewhere)."""

from __future__ import annotations

import platform
import sys

import numpy as np
import pytest

from audit import memory


def _rss_mib() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


glibc_linux = pytest.mark.skipif(
    not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc", reason="glibc on Linux only")


@glibc_linux
def test_large_blocks_go_back_to_the_system_when_freed():
    assert memory.prefer_returnable_allocations()
    np.ones((8 << 20) // 8)  # freeing an 8 MiB block would raise glibc's own threshold above 2 MiB
    before = _rss_mib()
    blocks, pins = [], []
    for _ in range(100):  # 2 MiB blocks, each followed by a small block that stays (heap fragments)
        blocks.append(np.ones((2 << 20) // 8))
        pins.append(np.ones((64 << 10) // 8))
    held = _rss_mib()
    del blocks  # in their own mappings, they are unmapped at once; in the heap they would stay
    after = _rss_mib()
    assert held - before > 150
    assert after - before < 50
    del pins


def test_release_is_safe_to_call_anywhere():
    memory.release_freed_memory()
    memory.release_freed_memory()
