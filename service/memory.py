"""Giving freed memory back to the operating system after the rare large requests (fits).

glibc's malloc keeps freed blocks for reuse: after a fit request (a 20 MB CSV parsed into arrays, the arrays sent
to the fit worker, the bundle saved), the server process's resident memory stayed ~80 MB higher for good, and
more under concurrent traffic, where the work lands on other threads' arenas. ``malloc_trim(0)`` returns the
free pages of every arena (glibc 2.8 and later). Called once per fit, never on the assign path. Elsewhere
(musl, macOS) it is a no-op.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import functools


@functools.cache
def _malloc_trim():
    name = ctypes.util.find_library("c")
    try:
        return ctypes.CDLL(name).malloc_trim if name else None
    except (OSError, AttributeError):
        return None


def release_free_memory() -> bool:
    """Return freed heap memory to the operating system; True if the C library could (glibc)."""
    trim = _malloc_trim()
    if trim is None:
        return False
    trim(0)
    return True
