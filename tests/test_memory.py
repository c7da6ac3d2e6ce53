"""Freed memory goes back to the operating system after a fit (service/memory.py). Reference: the process's
resident set as the kernel reports it (/proc/self/status, VmRSS), and glibc's documented malloc_trim."""

from __future__ import annotations

import platform
from pathlib import Path

import pytest

from service.memory import release_free_memory


def rss_bytes() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    raise AssertionError("no VmRSS")


@pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_freed_small_blocks_are_returned():
    # 200,000 blocks of 1,000 bytes (under glibc's mmap threshold, so they live on the heap): freeing them leaves
    # the pages with the process until malloc_trim hands them back. The last block is kept, so the heap's top
    # is pinned and glibc's automatic trimming of the top cannot do it instead.
    import ctypes

    libc = ctypes.CDLL(None)
    libc.malloc.restype = ctypes.c_void_p
    libc.free.argtypes = [ctypes.c_void_p]
    blocks = [libc.malloc(1000) for _ in range(200_000)]
    for block in blocks:
        ctypes.memset(block, 1, 1000)                          # touch the pages: they count in RSS
    keep = blocks.pop()
    for block in blocks:
        libc.free(block)
    before = rss_bytes()
    assert release_free_memory() is True
    after = rss_bytes()
    libc.free(keep)
    assert before - after > 100 * 2**20, (before, after)      # most of the ~200 MB freed went back
