"""Reusable full-size plane buffers for the render loop.

Every frame needs full-size arrays: the decoded planes, the maps and the
remapped planes. Allocated anew, each block is fresh memory that the kernel
must fault in and zero (in perf, page zeroing was about 8 % of fix's CPU
samples at 1080p, most of it inside the encoder). The render loop instead
takes them from a `PlanePool` and gives them back once the frame is encoded,
which keeps the resident set steady; the CPU saved was within the noise of
the benchmark (DEVELOPERS.md). The pool keeps at most ``limit`` spare
buffers of each shape, so it never holds more than the look-ahead already
needed at its peak.
"""

from __future__ import annotations

import threading
from collections import defaultdict

import numpy as np


class PlanePool:
    """Thread-safe free lists of arrays, keyed by shape and dtype."""

    def __init__(self, limit: int = 64):
        self.limit = limit
        self._free: dict[tuple, list[np.ndarray]] = defaultdict(list)
        self._lock = threading.Lock()
        self.allocated = 0  # arrays made new (for tests and benchmarks)

    def take(self, shape, dtype) -> np.ndarray:
        """An array of this shape and dtype with unspecified contents."""
        key = (tuple(shape), np.dtype(dtype).str)
        with self._lock:
            free = self._free.get(key)
            if free:
                return free.pop()
            self.allocated += 1
        return np.empty(shape, dtype)

    def give(self, *arrays: np.ndarray) -> None:
        """Return arrays that nothing refers to any more (each at most once)."""
        with self._lock:
            for arr in arrays:
                if arr.base is not None or not arr.flags.c_contiguous:
                    continue  # a view: its owner is returned on its own
                free = self._free[(arr.shape, arr.dtype.str)]
                if len(free) < self.limit and not any(a is arr for a in free):
                    free.append(arr)
