"""Translation estimates against scikit-image's phase_cross_correlation."""

import cv2
import numpy as np
import pytest
from scipy import ndimage
from skimage import data
from skimage.registration import phase_cross_correlation

from skewfix.track import PairTracker, phase_shift


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
