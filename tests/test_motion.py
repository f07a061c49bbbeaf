"""The motion fit on synthetic tracks with exact truth."""

from fractions import Fraction

import numpy as np
import pytest

from skewfix.motion import FitSettings, PairObservations, bspline_basis, fit_motion
from skewfix.rowclock import RowClock, frame_times_from_rate
from skewfix.synth.paths import Handheld, WhipPan

W, H = 640, 360


def row_time(clock, k, y):
    """When row y of frame k was read, by the published top-down formula t_k + readout * y / H
    (Liang et al., 2008; Forssen & Ringaby, 2010), written here rather than taken from
    skewfix.rowclock, so that a convention error there cannot cancel out in these tests."""
    return clock.frame_times[k] + clock.readout * np.asarray(y, dtype=np.float64) / H


def synthetic_pairs(path, clock, n_tracks=150, outlier_fraction=0.0, seed=0):
    """World points seen by a moving camera, timed by their own rows; optional movers."""
    rng = np.random.default_rng(seed)
    cx, cy = (W - 1) / 2, (H - 1) / 2
    pairs = []

    def image_of(q, t):
        x, y, th, sg = path.curves(t)
        k = np.exp(sg)
        dx, dy = q[:, 0] - x, q[:, 1] - y
        return np.stack([cx + k * (np.cos(th) * dx - np.sin(th) * dy), cy + k * (np.sin(th) * dx + np.cos(th) * dy)], 1)

    def world_of(p, t):
        x, y, th, sg = path.curves(t)
        k = np.exp(-sg)
        vx, vy = p[:, 0] - cx, p[:, 1] - cy
        return np.stack([x + k * (np.cos(th) * vx + np.sin(th) * vy), y + k * (-np.sin(th) * vx + np.cos(th) * vy)], 1)

    for k in range(len(clock.frame_times) - 1):
        p0 = rng.uniform([10, 10], [W - 10, H - 10], size=(n_tracks, 2))
        q = world_of(p0, row_time(clock, k, p0[:, 1]))
        p1 = p0.copy()
        for _ in range(6):  # fixed point: the row where the point is seen in frame k+1
            p1 = image_of(q, row_time(clock, k + 1, p1[:, 1]))
        p1 += rng.normal(0, 0.05, p1.shape)
        n_out = int(outlier_fraction * n_tracks)
        if n_out:
            p1[:n_out] += np.array([25.0, -8.0])  # a car moving on its own
        pairs.append(PairObservations(k, p0, p1))
    return pairs


def test_bspline_partition_of_unity():
    # Cubic B-spline basis functions sum to one (de Boor, A Practical Guide to Splines).
    idx, w = bspline_basis(np.linspace(0, 1, 57), 0.0, 0.1, 14)
    assert np.allclose(w.sum(axis=1), 1.0)
    assert np.all(w >= -1e-12)


@pytest.mark.parametrize("camera", [WhipPan(peak_px_s=3000, centre_s=0.35, duration_s=0.5),
                                    Handheld(amplitude_px=3.0, roll_rad=0.01)])
def test_fit_recovers_intra_frame_motion(camera):
    clock = RowClock(frame_times_from_rate(24, Fraction(30)), H, 0.024)
    model = fit_motion(synthetic_pairs(camera, clock), clock, W)
    # Skew depends on the motion *within* each frame: compare the change over the readout.
    errs = []
    for k in range(2, 22):
        t = row_time(clock, k, np.array([0.0, H - 1.0]))
        seg = model.segment_for(k)
        fx, fy, fth, _ = seg.evaluate(t)
        tx, ty, tth, _ = camera.curves(t)
        errs.append([np.diff(fx)[0] - np.diff(tx)[0], np.diff(fy)[0] - np.diff(ty)[0],
                     (np.diff(fth)[0] - np.diff(tth)[0]) * W / 2])
    assert np.sqrt(np.mean(np.square(errs))) < 0.1  # px over one readout


def test_moving_objects_are_rejected():
    camera = Handheld(amplitude_px=3.0, roll_rad=0.01)
    clock = RowClock(frame_times_from_rate(20, Fraction(30)), H, 0.024)
    clean = fit_motion(synthetic_pairs(camera, clock), clock, W)
    dirty = fit_motion(synthetic_pairs(camera, clock, outlier_fraction=0.25), clock, W)
    t = np.linspace(0.1, 0.5, 50)
    a = np.array(clean.segments[0].evaluate(t)[:2])
    b = np.array(dirty.segments[0].evaluate(t)[:2])
    a -= a.mean(axis=1, keepdims=True)
    b -= b.mean(axis=1, keepdims=True)
    assert np.sqrt(np.mean((a - b) ** 2)) < 0.15
    assert dirty.inlier_fraction < 0.85  # the movers were seen as outliers


def test_translation_model_cannot_follow_roll():
    camera = Handheld(amplitude_px=1.0, roll_rad=0.02)
    clock = RowClock(frame_times_from_rate(16, Fraction(30)), H, 0.024)
    pairs = synthetic_pairs(camera, clock)
    full = fit_motion(pairs, clock, W)
    trans = fit_motion(pairs, clock, W, FitSettings(model="translation"))
    t = np.linspace(0.1, 0.4, 40)
    roll_err = np.abs(full.segments[0].evaluate(t)[2] - camera.curves(t)[2]
                      - np.mean(full.segments[0].evaluate(t)[2] - camera.curves(t)[2]))
    assert roll_err.max() < 1e-3
    assert np.all(trans.segments[0].coefficients[2] == 0)


def test_cut_splits_the_fit():
    camera = Handheld()
    clock = RowClock(frame_times_from_rate(12, Fraction(25)), H, 0.02)
    pairs = synthetic_pairs(camera, clock)
    pairs[5] = PairObservations(5, np.zeros((0, 2)), np.zeros((0, 2)), cut=True)
    model = fit_motion(pairs, clock, W)
    assert model.cuts == [5]
    assert [(s.first_frame, s.last_frame) for s in model.segments] == [(0, 5), (6, 11)]


def test_unmeasured_pair_is_reported_and_bridged():
    camera = WhipPan(peak_px_s=2000, centre_s=0.3, duration_s=0.5)
    clock = RowClock(frame_times_from_rate(16, Fraction(25)), H, 0.02)
    pairs = synthetic_pairs(camera, clock)
    pairs[7] = PairObservations(7, np.zeros((0, 2)), np.zeros((0, 2)))
    model = fit_motion(pairs, clock, W)
    assert model.unmeasured_pairs == [7]
    assert len(model.segments) == 1
    t = row_time(clock, 7, np.array([0.0, H - 1.0]))
    fx = model.segments[0].evaluate(t)[0]
    tx = camera.curves(t)[0]
    assert abs(np.diff(fx)[0] - np.diff(tx)[0]) < 1.0
