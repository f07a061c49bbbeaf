"""--model auto between translation, similarity and rotation, on clips from tests/truth.py."""

from __future__ import annotations

import truth
from skewfix.models.choice import LensSpec
from skewfix.pipeline import analyse, choose_for_analysis, choose_with_readout
from skewfix.measure.motion_fit import auto_readout_resolver

W, H, FPS, READOUT = 480, 270, 30, 0.024


def clip_file(tmp_path, clip, name):
    path = tmp_path / f"{name}.mp4"
    truth.write_clip(path, clip.frames, FPS)
    return analyse(str(path))


def test_a_whip_pan_needs_no_roll_or_zoom_and_a_rolling_camera_does(tmp_path):
    # A pan over a flat scene moves every point alike (a pure translation of the picture:
    # common practice); a narrow lens rolling by a degree turns the picture about its centre.
    pan = clip_file(tmp_path, truth.render_planar_clip(W, H, 24, FPS, READOUT, truth.whip_pan(30, FPS),
                                                       noise=1.0), "pan")
    choice = choose_for_analysis(pan, "auto", LensSpec(), READOUT, "top-down")
    assert choice.kind.name == "similarity" and choice.kind.translation_only, choice.reason
    roll = truth.RotationPath(sweep_peak_deg_s=10, sweep_centre_s=0.4, sweep_duration_s=2.0,
                              shake_deg=(0.0, 0.0, 1.0), seed=4)
    rolling = clip_file(tmp_path, truth.render_rotation_clip(W, H, 24, FPS, READOUT, 20.0, roll, noise=1.0), "roll")
    choice = choose_for_analysis(rolling, "auto", LensSpec(), READOUT, "top-down")
    assert choice.kind.name == "similarity" and not choice.kind.translation_only, choice.reason
    # measured with --readout auto: the first choice keeps roll and zoom (the rows are not timed
    # yet), and the readout is found with them; the rolling camera keeps them afterwards too
    readout, order, _, chosen = choose_with_readout(rolling, "auto", LensSpec(), 0.0, "top-down",
                                                    auto_readout_resolver(None))
    assert abs(readout - READOUT) < 0.03 * READOUT and not chosen.kind.translation_only
