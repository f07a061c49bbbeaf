"""Cuts, fades and near-black frames: each shot is fitted on its own, gaps are reported.

The clip is made here from two rendered shots of different parts of the scene
with opposite pans, joined by a hard cut, and the second shot fades to black
and ends on near-black frames. The truth for every frame is the exact
global-shutter view of its own shot, so a fit that smeared one shot's motion
into the other would show up as a worse correction next to the cut.
"""

from __future__ import annotations

from fractions import Fraction

import numpy as np
import pytest

import truth
from conftest import SMALL_H, SMALL_W, decode_rgb
from skewfix.pipeline import FixOptions, fix_clip

RATE = Fraction(30)
READOUT = 0.024
SHOT_A = 12  # frames 0..11: pan to the right
SHOT_B = 10  # frames 12..21: pan to the left, different scene
FADE = 4  # frames 22..25: the second shot fades towards black
DARK = 3  # frames 26..28: near-black
FADE_GAINS = np.linspace(0.75, 0.2, FADE)
DARK_GAIN = 0.01
PAN_SPEED = 1500.0  # px/s: a lean of PAN_SPEED * READOUT = 36 px from top to bottom


class JoinedShots:
    """Renders the two shots with tests/truth.py (independent of skewfix) and knows each
    frame's exact global-shutter view."""

    def __init__(self):
        n = SHOT_A + SHOT_B + FADE + DARK
        times = [k / RATE for k in range(n)]
        self.shot_a = truth.render_planar_clip(SMALL_W, SMALL_H, SHOT_A, RATE, READOUT, truth.SteadyPan(PAN_SPEED),
                                               noise=1.0, seed=0)
        self.shot_b = truth.render_planar_clip(SMALL_W, SMALL_H, n - SHOT_A, None, READOUT,
                                               truth.SteadyPan(-PAN_SPEED), noise=1.0, seed=5,
                                               frame_times=[float(t) for t in times[SHOT_A:]])
        self.n_frames = n

    def _shot(self, k: int):
        return (self.shot_a, k) if k < SHOT_A else (self.shot_b, k - SHOT_A)

    def gain(self, k: int) -> float:
        fading = k - SHOT_A - SHOT_B
        if fading < 0:
            return 1.0
        return float(FADE_GAINS[fading]) if fading < FADE else DARK_GAIN

    @staticmethod
    def _dimmed(img: np.ndarray, gain: float) -> np.ndarray:
        return np.clip(np.rint(img.astype(np.float32) * gain), 0, 255).astype(np.uint8)

    def rolling(self, k: int) -> np.ndarray:
        clip, j = self._shot(k)
        return self._dimmed(clip.frames[j], self.gain(k))

    def truth(self, k: int) -> np.ndarray:
        """The global-shutter view at frame k's middle row's instant (README: --reference-line)."""
        clip, j = self._shot(k)
        return self._dimmed(clip.global_view(float(clip.reference_time(j, (SMALL_H - 1) / 2))), self.gain(k))


@pytest.fixture(scope="module")
def joined(tmp_path_factory):
    shots = JoinedShots()
    path = tmp_path_factory.mktemp("cuts") / "two_shots.mp4"
    truth.write_clip(path, [shots.rolling(k) for k in range(shots.n_frames)], RATE)
    out = path.with_name("two_shots_fixed.mp4")
    result = fix_clip(str(path), str(out), FixOptions(readout=READOUT))
    return shots, path, out, result


def test_the_cut_is_found_and_nothing_else_is_a_cut(joined):
    shots, _, _, result = joined
    # the clip was joined after frame SHOT_A - 1 (made here); a fade is not a cut (common practice)
    assert result.model.cuts == [SHOT_A - 1]
    assert any("cut" in note and str(SHOT_A - 1) in note for note in result.notes), result.notes


def test_frames_next_to_the_cut_are_corrected_like_the_rest(joined):
    shots, src, out, result = joined
    fixed, original = decode_rgb(out), decode_rgb(src)
    assert len(fixed) == len(original) == shots.n_frames

    def residual(frames, k):  # tests/truth.py's residual flow
        return truth.residual_flow(frames[k], shots.truth(k))

    near_cut = [SHOT_A - 2, SHOT_A - 1, SHOT_A, SHOT_A + 1]
    mid_shot = [3, 4, 5, 6, SHOT_A + 4, SHOT_A + 5, SHOT_A + 6]
    after_near = [residual(fixed, k) for k in near_cut]
    after_mid = [residual(fixed, k) for k in mid_shot]
    before_near = [residual(original, k) for k in near_cut]
    # the uncorrected frames lean by about PAN_SPEED * READOUT = 36 px (made here),
    # so their residual is many pixels; a corrected frame is sub-pixel (common practice)
    assert min(before_near) > 3.0, before_near
    assert max(after_near) < 0.5, after_near
    # smearing the two shots' opposite pans together would hurt exactly these frames
    assert max(after_near) < 2.0 * np.median(after_mid) + 0.1, (after_near, after_mid)


def test_near_black_frames_are_reported_unmeasured(joined):
    shots, _, _, result = joined
    dark_pairs = list(range(SHOT_A + SHOT_B + FADE, shots.n_frames - 1))  # pairs wholly inside the dark end
    assert set(dark_pairs) <= set(result.model.unmeasured_pairs), result.model.unmeasured_pairs
    assert not set(dark_pairs) & set(result.model.cuts)
    assert any("no motion could be measured" in note for note in result.notes), result.notes
    # the frames themselves are all still written, with their own timestamps (made here)
    assert result.frames_written == shots.n_frames


def test_runs_of_cuts_are_counted_for_the_warning():
    # common practice: real cuts are separated by whole shots; three in a row mean a motion the
    # tracker cannot follow, which the notes then say
    from skewfix.pipeline import longest_run

    assert longest_run([29, 75, 136]) == 1
    assert longest_run([5, 3, 4, 9, 10]) == 3
    assert longest_run([]) == 0
