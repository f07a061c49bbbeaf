"""Solved motion holds together: a streamed shot is one continuous spline across its windows."""

from __future__ import annotations

import numpy as np

import truth
from skewfix.pipeline import FixOptions, fix_clip
from skewfix.motionfile import load_motion, save_motion

W, H, FPS, N = 320, 180, 30, 64


def test_a_long_shot_is_one_segment_without_steps_at_window_borders(tmp_path):
    # Two whip pans and back (the truth's pan path is the sum); the streamed fit runs in windows
    # of at most 16 frames, so there are several borders in 64 frames.
    out_pan = truth.whip_pan(25, FPS, centre_s=0.6, duration_s=0.8)
    back_pan = truth.whip_pan(-25, FPS, centre_s=1.5, duration_s=0.8)

    def pan(t):
        (x0, y0), (x1, y1) = out_pan(t), back_pan(t)
        return x0 + x1, y0 + y1

    clip = truth.render_planar_clip(W, H, N, FPS, 0.02, pan, noise=1.0)
    src, out = tmp_path / "long.mp4", tmp_path / "fixed.mp4"
    truth.write_clip(src, clip.frames, FPS)
    result = fix_clip(str(src), str(out), FixOptions(readout=0.02, model="similarity"))
    assert [(s.first_frame, s.last_frame) for s in result.model.segments] == [(0, N - 1)]
    t_ref = np.array([float(clip.reference_time(k, (H - 1) / 2)) for k in range(N)])
    solved = result.model.segments[0].evaluate(t_ref)[0]
    # the picture moves left as the view pans right: pan_x follows the view (README convention)
    true = np.asarray(pan(t_ref)[0])
    step_error = np.abs(np.diff(solved) - np.diff(true))
    # no step beyond the motion between the frames: every frame-to-frame change agrees with the
    # truth to a small fraction of the largest one (25 px/frame)
    assert step_error.max() < 0.5
    drift = (solved - solved[0]) - (true - true[0])
    assert np.abs(drift).max() < 3.0  # a 2-D track integrates, so small errors may add up
    # and the motion file says the same: one segment, the same curve
    path = save_motion(tmp_path / "m.json", result.model, result.clock, "middle", result.info)
    model, *_ = load_motion(path)
    np.testing.assert_allclose(model.segments[0].evaluate(t_ref)[0], solved, atol=1e-9)
