"""Fast tilts: the correction map's source row is solved to tolerance, or refused.

The reference is a brute-force root of g(ys) = y_image(t(k, ys)) - ys found on a
fine grid of candidate rows (bracketing and linear interpolation), independent
of the Newton iteration in skewfix.warp.
"""

from __future__ import annotations

import numpy as np
import pytest

from skewfix.errors import RuntimeProblem
from skewfix.motion import MotionModel, MotionSegment, bspline_basis
from skewfix.rowclock import RowClock
from skewfix.warp import coarse_grid, correction_map

W, H, FPS, READOUT = 1920, 1080, 25.0, 0.030


def tilt_model(rows_per_frame: float, n_frames: int = 5) -> tuple[MotionModel, RowClock, float]:
    """A similarity model whose view moves down steadily (picture moves up), and a slight wobble
    so the speed is not constant within the readout."""
    v = rows_per_frame * FPS
    spacing = 1 / FPS / 4
    start = -1 / FPS
    n_coef = int(np.ceil((n_frames + 3) / FPS / spacing)) + 3
    t = np.linspace(start, start + (n_coef - 3) * spacing, 400)
    y = v * t + 0.02 * v / FPS * np.sin(2 * np.pi * 6 * t)
    idx, w = bspline_basis(t, start, spacing, n_coef)
    basis = np.zeros((len(t), n_coef))
    np.put_along_axis(basis, idx, w, axis=1)
    coef_y = np.linalg.lstsq(basis, y, rcond=None)[0]
    coef = np.zeros((4, n_coef))
    coef[1] = coef_y
    seg = MotionSegment(0, n_frames - 1, start, spacing, coef)
    return MotionModel(W, H, [seg]), RowClock(np.arange(n_frames) / FPS, H, READOUT), v


def brute_force_rows(model: MotionModel, clock: RowClock, k: int) -> np.ndarray:
    gx, gy = coarse_grid(W, H)
    seg = model.segment_for(k)
    t_ref = float(clock.reference_time(k))
    world = model.world_from_image(seg, np.float64(t_ref), gx[:, :1], gy[:, :1])  # one column suffices
    candidates = np.arange(-3 * H, 4 * H, 0.5)
    out = []
    for wx, wy in zip(world[0].ravel(), world[1].ravel()):
        _, yi = model.image_from_world(seg, clock.row_time(k, candidates), (np.full_like(candidates, wx),
                                                                             np.full_like(candidates, wy)))
        g = yi - candidates
        i = int(np.flatnonzero(np.sign(g[:-1]) != np.sign(g[1:]))[0])
        out.append(candidates[i] - g[i] * (candidates[i + 1] - candidates[i]) / (g[i + 1] - g[i]))
    return np.array(out)


@pytest.mark.parametrize("order", ["top-down", "bottom-up"])
@pytest.mark.parametrize("rows_per_frame", [50, 200, 400, 700, -400, -700])
def test_source_rows_converge_on_fast_tilts(rows_per_frame, order):
    model, clock, _ = tilt_model(rows_per_frame)
    clock = RowClock(clock.frame_times, H, READOUT, order)
    k = 2
    wm = correction_map(model, clock, k)
    gx, gy = coarse_grid(W, H)
    solved = (gy + wm.dy)[:, 0]
    expected = brute_force_rows(model, clock, k)
    # agreement to well under a hundredth of a pixel (the brute-force root is linear
    # interpolation on a half-row grid of a nearly linear function)
    assert np.max(np.abs(solved - expected)) < 5e-3


def test_a_vertical_speed_beyond_one_frame_per_readout_is_refused():
    # With the picture moving down the frame (the way the rows are read) by more than a frame
    # height per readout, the scan cannot keep up and no source row is unique (fact of the row
    # clock): refused in one line. Moving the other way, every row stays unique.
    rows_per_frame = -1.2 * H / READOUT / FPS  # the view tilts up: the picture moves down
    model, clock, _ = tilt_model(rows_per_frame)
    with pytest.raises(RuntimeProblem, match="frame 2: the solved motion moves the picture down the frame faster") as err:
        correction_map(model, clock, 2)
    assert "\n" not in str(err.value)
    model, clock, _ = tilt_model(-rows_per_frame)
    correction_map(model, clock, 2)  # the picture moving up as fast: solvable
