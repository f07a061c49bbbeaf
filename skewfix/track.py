"""Global-motion tracking between consecutive frames on a luma proxy.

Each frame's luma is reduced to a proxy (longest side at most
``proxy_size``). Between consecutive proxies we

1. seed the global shift with phase correlation (Kuglin & Hines, 1975), so
   that whip pans of well over 100 px per frame are caught;
2. refine corner features (FAST corners, Rosten & Drummond, 2006, kept
   evenly spread by taking the strongest few in each cell of a grid) with
   pyramidal Lucas-Kanade (Bouguet, 2000), starting from the seed;
3. keep only tracks that survive a forward-backward check (Kalal et al., 2010).

Coordinates returned are in full-resolution stored pixels. A pair with too few
surviving tracks is "unmeasured" (blur, black frames); such a pair between two
pictures that both have plenty of detail is treated as a cut.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from skewfix.motion import PairObservations


def luma_proxy(luma: np.ndarray, bit_depth: int, proxy_size: int) -> tuple[np.ndarray, float]:
    """8-bit proxy of a luma plane and the scale factor (proxy px per full px)."""
    h, w = luma.shape[:2]
    scale = min(1.0, proxy_size / max(h, w))
    img = luma
    if img.dtype != np.uint8:
        img = cv2.convertScaleAbs(img, alpha=255.0 / ((1 << bit_depth) - 1))
    if scale < 1.0:
        img = cv2.resize(img, (int(round(w * scale)), int(round(h * scale))), interpolation=cv2.INTER_AREA)
    elif img is luma:
        img = luma.copy()  # the tracker keeps the proxy; the render loop reuses the plane's buffer
    return img, scale


@dataclass
class TrackerSettings:
    proxy_size: int = 960
    grid: tuple[int, int] = (12, 7)  # cells across and down for spreading features (~100 tracks)
    per_cell: int = 2
    fast_threshold: int = 12
    window: int = 15  # the phase-correlation seed makes a large window unnecessary
    levels: int = 3
    fb_threshold: float = 0.5  # proxy px
    min_tracks: int = 8


class PairTracker:
    """Feeds frames one at a time; returns the tracks to the previous frame."""

    DETAILED = 4  # a picture with this many times ``min_tracks`` corners has detail to track

    def __init__(self, settings: TrackerSettings | None = None):
        self.settings = settings or TrackerSettings()
        self._prev = None
        self._scale = 1.0
        self._full_shape = None
        self.index = -1

    def _to_full(self, pts: np.ndarray) -> np.ndarray:
        """Proxy pixel centres to full-resolution pixel coordinates."""
        if self._scale == 1.0:
            return pts.astype(np.float64)
        sx = self._full_shape[1] / self._proxy_shape[1]
        sy = self._full_shape[0] / self._proxy_shape[0]
        return np.stack([(pts[:, 0] + 0.5) * sx - 0.5, (pts[:, 1] + 0.5) * sy - 0.5], 1)

    def push(self, luma: np.ndarray, bit_depth: int = 8) -> PairObservations | None:
        """Add the next frame's luma; tracks from the previous frame to this one."""
        s = self.settings
        proxy, self._scale = luma_proxy(luma, bit_depth, s.proxy_size)
        self._full_shape = luma.shape[:2]
        self._proxy_shape = proxy.shape[:2]
        self.index += 1
        prev, self._prev = self._prev, proxy
        if prev is None:
            return None
        k = self.index - 1
        p0, p1 = self._track(prev, proxy)
        empty = np.zeros((0, 2))
        if len(p0) < s.min_tracks:
            return PairObservations(k, empty, empty, cut=self._is_cut(prev, proxy))
        return PairObservations(k, self._to_full(p0), self._to_full(p1))

    def _is_cut(self, prev: np.ndarray, cur: np.ndarray) -> bool:
        """Tracking failed: a cut when both pictures have plenty of detail to track.

        Blurred, black or fading frames have little detail and are merely
        unmeasured; their brightness is no guide (limited-range black is 16,
        and two shots can share one histogram).
        """
        s = self.settings
        return all(len(spread_corners(img, s.grid, s.per_cell, s.fast_threshold)) >= self.DETAILED * s.min_tracks
                   for img in (prev, cur))

    def _track(self, prev: np.ndarray, cur: np.ndarray):
        s = self.settings
        pts = spread_corners(prev, s.grid, s.per_cell, s.fast_threshold)
        if len(pts) < s.min_tracks:
            return np.zeros((0, 2)), np.zeros((0, 2))
        seed = phase_shift(prev, cur)
        guess = pts + np.float32(seed)
        lk = dict(winSize=(s.window, s.window), maxLevel=s.levels,
                  criteria=(cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 20, 0.01))
        fwd, st1, _ = cv2.calcOpticalFlowPyrLK(prev, cur, pts, guess.copy(), flags=cv2.OPTFLOW_USE_INITIAL_FLOW, **lk)
        back, st2, _ = cv2.calcOpticalFlowPyrLK(cur, prev, fwd, pts.copy(), flags=cv2.OPTFLOW_USE_INITIAL_FLOW, **lk)
        h, w = cur.shape[:2]
        fb = np.hypot(*(back - pts).T)
        ok = (st1.ravel() == 1) & (st2.ravel() == 1) & (fb < s.fb_threshold)
        ok &= (fwd[:, 0] >= 0) & (fwd[:, 0] <= w - 1) & (fwd[:, 1] >= 0) & (fwd[:, 1] <= h - 1)
        return pts[ok], fwd[ok]


_FAST = {}


def spread_corners(img: np.ndarray, grid=(16, 9), per_cell: int = 2, threshold: int = 12) -> np.ndarray:
    """FAST corners, the ``per_cell`` strongest in each grid cell (float32, (n, 2)).

    Spreading matters twice here: every image row band must be sampled (rows
    are clocks), and one busy region must not outvote the rest.
    """
    detector = _FAST.get(threshold)
    if detector is None:
        detector = _FAST[threshold] = cv2.FastFeatureDetector_create(threshold=threshold, nonmaxSuppression=True)
    keypoints = detector.detect(img, None)
    if not keypoints:
        return np.zeros((0, 2), np.float32)
    pts = cv2.KeyPoint_convert(keypoints).reshape(-1, 2).astype(np.float32, copy=False)
    response = np.array([kp.response for kp in keypoints], np.float32)
    h, w = img.shape[:2]
    border = 8  # keep the LK window inside the picture
    keep = (pts[:, 0] >= border) & (pts[:, 0] < w - border) & (pts[:, 1] >= border) & (pts[:, 1] < h - border)
    pts, response = pts[keep], response[keep]
    cell = (np.minimum((pts[:, 1] * grid[1] / h).astype(int), grid[1] - 1) * grid[0]
            + np.minimum((pts[:, 0] * grid[0] / w).astype(int), grid[0] - 1))
    order = np.lexsort((-response, cell))
    cell_sorted = cell[order]
    rank = np.arange(len(order)) - np.searchsorted(cell_sorted, cell_sorted, side="left")
    return pts[order[rank < per_cell]]


def phase_shift(prev: np.ndarray, cur: np.ndarray) -> tuple[float, float]:
    """Global shift (dx, dy) with ``cur(x + dx) ~ prev(x)``, by phase correlation.

    Computed at a quarter of the proxy size with a Hann window
    (cv2.phaseCorrelate): a coarse seed is all Lucas-Kanade needs.
    """
    small_prev = cv2.resize(prev, None, fx=0.25, fy=0.25, interpolation=cv2.INTER_AREA).astype(np.float32)
    small_cur = cv2.resize(cur, None, fx=0.25, fy=0.25, interpolation=cv2.INTER_AREA).astype(np.float32)
    window = _hann(small_prev.shape)
    (dx, dy), _ = cv2.phaseCorrelate(small_prev, small_cur, window)
    return 4.0 * dx, 4.0 * dy


_HANN = {}


def _hann(shape):
    if shape not in _HANN:
        _HANN[shape] = cv2.createHanningWindow(shape[::-1], cv2.CV_32F)
    return _HANN[shape]
