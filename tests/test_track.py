"""Translation estimates against scikit-image's phase_cross_correlation."""

import cv2
import numpy as np
import pytest
from scipy import ndimage
from skimage import data
from skimage.registration import phase_cross_correlation

from skewfix.track import PairTracker, TrackerSettings, chained_features, phase_shift, spread_corners


@pytest.mark.parametrize("name,shift", [("camera", (37.0, -12.0)), ("astronaut", (-61.0, 8.0)),
                                        ("coffee", (4.5, 2.25))])
def test_shift_agrees_with_scikit_image(name, shift):
    img = getattr(data, name)()
    if img.ndim == 3:
        img = cv2.cvtColor(img, cv2.COLOR_RGB2GRAY)
    img = img.astype(np.float32)
    dx, dy = shift
    moved = ndimage.shift(img, (dy, dx), order=3, mode="reflect")
    crop = (slice(70, img.shape[0] - 70), slice(70, img.shape[1] - 70))
    a, b = img[crop].astype(np.uint8), np.clip(moved[crop], 0, 255).astype(np.uint8)
    # reference: skimage.registration.phase_cross_correlation (upsampled, sub-pixel)
    ref, _, _ = phase_cross_correlation(a, b, upsample_factor=20)
    ref_dx, ref_dy = -ref[1], -ref[0]
    seed = phase_shift(a, b)
    assert abs(seed[0] - ref_dx) < 1.5 and abs(seed[1] - ref_dy) < 1.5  # the seed is coarse
    tracker = PairTracker()
    tracker.push(a)
    obs = tracker.push(b)
    d = np.median(obs.p1 - obs.p0, axis=0)
    # skimage's estimate is quantised to 1/20 px and slightly biased: agree to 0.15 px
    assert abs(d[0] - ref_dx) < 0.15 and abs(d[1] - ref_dy) < 0.15
    assert abs(d[0] - dx) < 0.1 and abs(d[1] - dy) < 0.1  # and to the applied shift itself



@pytest.mark.parametrize("shift", [(0.0, -0.55), (0.0, 0.55), (-0.6, 0.0), (0.6, 0.1), (0.3, -0.4)])
def test_shifts_beyond_half_the_frame_are_not_folded_back(shift):
    """A tilt or whip pan of more than half the frame between frames (a fast tilt read against
    the motion stretches the picture that far): phase correlation alone reports such a shift
    modulo the frame size, with the wrong sign (the DFT's periodicity, common practice).
    Two windows on scikit-image's astronaut photograph (enlarged twice), one moved by that share."""
    img = cv2.resize(cv2.cvtColor(data.astronaut(), cv2.COLOR_RGB2GRAY), (1024, 1024),
                     interpolation=cv2.INTER_CUBIC)
    h, w = 270, 480
    dx, dy = int(round(shift[0] * w)), int(round(shift[1] * h))
    x0, y0 = int(512 - w / 2 - dx / 2), int(512 - h / 2 - dy / 2)
    a = img[y0:y0 + h, x0:x0 + w]
    b = img[y0 + dy:y0 + dy + h, x0 + dx:x0 + dx + w]  # the view moved by (dx, dy): the picture by -(dx, dy)
    tracker = PairTracker()
    tracker.push(a)
    obs = tracker.push(b)
    assert not obs.cut and len(obs.p0) >= TrackerSettings().min_tracks
    d = np.median(obs.p1 - obs.p0, axis=0)
    assert abs(d[0] + dx) < 0.1 and abs(d[1] + dy) < 0.1


def test_black_frames_give_no_tracks_and_no_cut():
    tracker = PairTracker()
    tracker.push(np.zeros((180, 320), np.uint8))
    obs = tracker.push(np.zeros((180, 320), np.uint8))
    assert len(obs.p0) == 0 and not obs.cut


def test_hard_cut_is_detected():
    a = data.camera()
    b = 255 - cv2.resize(data.coins(), a.shape[::-1])
    tracker = PairTracker()
    tracker.push(a)
    assert tracker.push(b).cut


def test_phase_shift_on_odd_sized_transforms():
    # a 960x540 picture is 240x135 at a quarter: cv2.phaseCorrelate is half a pixel off along an axis
    # of odd transform size (seen when this test was written), which the seed must not inherit
    img = cv2.resize(cv2.cvtColor(data.astronaut(), cv2.COLOR_RGB2GRAY), (1100, 700)).astype(np.float32)
    dx, dy = 23.0, -9.0
    moved = ndimage.shift(img, (dy, dx), order=3, mode="reflect")
    a = img[80:620, 70:1030].astype(np.uint8)
    b = np.clip(moved[80:620, 70:1030], 0, 255).astype(np.uint8)
    # reference: skimage.registration.phase_cross_correlation (upsampled, sub-pixel)
    ref, _, _ = phase_cross_correlation(a, b, upsample_factor=20)
    seed = phase_shift(a, b)
    assert abs(seed[0] - dx) < 1.0 and abs(seed[1] - dy) < 1.0, seed
    assert abs(seed[0] + ref[1]) < 1.0 and abs(seed[1] + ref[0]) < 1.0, (seed, ref)


def steady_frames(n, step=(7.25, 1.5), size=(640, 360)):
    """Windows onto scikit-image's astronaut and coffee photographs side by side, moved by ``step`` a frame."""
    tiles = [cv2.cvtColor(getattr(data, name)(), cv2.COLOR_RGB2GRAY) for name in ("astronaut", "coffee")]
    tiles = [cv2.resize(t, (round(t.shape[1] * 480 / t.shape[0]), 480)) for t in tiles]
    scene = np.concatenate(tiles, axis=1).astype(np.float32)
    w, h = size
    frames = []
    for k in range(n):
        m = np.float32([[1, 0, 40 + step[0] * k], [0, 1, 30 + step[1] * k]])
        frames.append(np.clip(cv2.warpAffine(scene, m, (w, h), flags=cv2.INTER_CUBIC | cv2.WARP_INVERSE_MAP),
                              0, 255).astype(np.uint8))
    return frames


def test_track_ids_persist_from_pair_to_pair():
    tracker = PairTracker()
    first, second = [obs for obs in (tracker.push(f) for f in steady_frames(3)) if obs is not None]
    for obs in (first, second):
        assert obs.ids.dtype == np.int64 and len(obs.ids) == len(obs.p0) == len(obs.p1)
        assert len(np.unique(obs.ids)) == len(obs.ids)
        assert obs.method == "tracks"
        d = np.median(obs.p1 - obs.p0, axis=0)
        assert abs(d[0] + 7.25) < 0.1 and abs(d[1] + 1.5) < 0.1, d  # the window moved (7.25, 1.5) px (made here)
    common, i1, i2 = np.intersect1d(first.ids, second.ids, return_indices=True)
    assert len(common) >= 0.8 * len(first.ids), (len(common), len(first.ids))
    # a followed feature starts the second pair exactly where the first pair left it
    assert np.array_equal(second.p0[i2], first.p1[i1])
    # features new in the second pair have ids never used before
    new = np.setdiff1d(second.ids, first.ids)
    assert len(new) == 0 or new.min() > first.ids.max()
    # topping up keeps every row band of the grid sampled (rows are clocks)
    rows = tracker.settings.grid[1]
    assert set((second.p0[:, 1] * rows // 360).astype(int)) == set(range(rows))


def test_chained_features_keep_the_grid_spread():
    # carried features crowded into one corner do not crowd out the rest of the picture
    img = steady_frames(1)[0]
    carried = np.float32([[20 + 3 * i, 20 + 2 * i] for i in range(12)])
    pts, ids = chained_features(img, carried, np.arange(12), grid=(12, 7), per_cell=2, threshold=12)
    cells = (np.minimum(pts[:, 1] * 7 // 360, 6) * 12 + np.minimum(pts[:, 0] * 12 // 640, 11)).astype(int)
    assert np.bincount(cells).max() <= 2  # never more than per_cell in a cell
    kept = ids[ids >= 0]
    assert set(kept) <= set(range(12)) and len(kept) == 2  # the two oldest in the crowded cell
    assert set(kept) == {0, 1}
    fresh = spread_corners(img, (12, 7), 2, 12)
    assert len(pts) >= len(fresh) - 2
