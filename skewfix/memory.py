"""Keep the resident set flat while frames stream through.

glibc's malloc raises its mmap threshold each time a large block is freed, so
after the first few frames every new full-size plane comes from the heap,
which fragments across the decode, warp and encode threads and lets the
resident set creep up with clip length. Fixing the threshold at 1 MiB keeps
planes (hundreds of kB to tens of MB) in their own mappings that go back to
the system as soon as they are freed (see mallopt(3), M_MMAP_THRESHOLD).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

_M_MMAP_THRESHOLD = -3
_DONE = False


def keep_large_buffers_mapped(threshold_bytes: int = 1 << 20) -> bool:
    """Fix glibc's mmap threshold (once per process); False where that is not possible."""
    global _DONE
    if _DONE:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        _DONE = bool(libc.mallopt(_M_MMAP_THRESHOLD, int(threshold_bytes)))
    except (OSError, AttributeError):
        return False
    return _DONE
