"""Shared fixtures: small synthetic rolling-shutter clips with exact truth.

Two kinds of clip. ``truth_clip`` renders from the published formulas in
``tests/truth.py``, which imports nothing from skewfix: tests that judge how
well skewfix corrects or measures use these, so that an error in the
package's row clock or motion model cannot cancel out against the same error
in the clip. ``clip_factory`` renders with the package's own
``skewfix.synth`` (its row clock and model): for tests of everything else
(formats, sound, bad input, passthrough) where accuracy is not judged.
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np
import pytest

import truth

from skewfix.synth.residual import decode_rgb  # noqa: F401  (tests import it from here)
from skewfix.synth.paths import Handheld, SteadyPan, WhipPan
from skewfix.synth.scenes import photo_panorama
from skewfix.synth.shutter import render_clip

SMALL_W, SMALL_H = 320, 180
TRUTH_FPS = 30


def run_cli(capsys, *args):
    """Run the command line in-process; returns (exit status, stderr)."""
    from skewfix.cli import main

    code = main([str(a) for a in args])
    return code, capsys.readouterr().err


def write_sequence(folder: Path, name: str, frames, first: int = 1) -> None:
    """Write RGB frames as numbered images; ``name`` is a format string such as 'p.{:04d}.png'."""
    for k, rgb in enumerate(frames):
        assert cv2.imwrite(str(folder / name.format(first + k)), cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR))


@pytest.fixture(autouse=True)
def config_dir(tmp_path, monkeypatch):
    """Every test keeps its saved cameras in its own folder, never the user's."""
    monkeypatch.setenv("SKEWFIX_CONFIG_DIR", str(tmp_path / "config"))
    return tmp_path / "config"


@pytest.fixture(scope="session")
def panorama():
    """scikit-image's bundled photographs side by side (real image statistics)."""
    return photo_panorama(int(SMALL_H * 1.5), 4000)


@pytest.fixture(scope="session")
def clip_factory(tmp_path_factory, panorama):
    """Render (and cache) a small clip: returns (path, renderer, clock)."""
    cache = {}
    root = tmp_path_factory.mktemp("clips")

    def make(kind: str, readout: float, n_frames: int = 16, rate=Fraction(30), audio=False,
             codec="libx264", pix_fmt="yuv420p", suffix=".mp4"):
        key = (kind, readout, n_frames, rate, audio, codec, pix_fmt, suffix)
        if key in cache:
            return cache[key]
        if kind == "whip":
            cam = WhipPan(peak_px_s=60 * float(rate), centre_s=n_frames / 2 / float(rate), duration_s=n_frames / float(rate) * 0.8)
        elif kind == "handheld":
            cam = Handheld(amplitude_px=2.0, roll_rad=0.01)
        elif kind == "steady":
            cam = SteadyPan(vx_px_s=300.0)
        else:
            raise ValueError(kind)
        path = root / f"{kind}_{int(readout * 1e6)}us_{n_frames}_{len(cache)}{suffix}"
        renderer, clock = render_clip(path, panorama, cam, SMALL_W, SMALL_H, rate, n_frames, readout,
                                      origin=(SMALL_W * 0.8, SMALL_H * 0.75), audio=audio, codec=codec,
                                      pix_fmt=pix_fmt)
        cache[key] = (path, renderer, clock)
        return cache[key]

    return make


@dataclass
class TruthClipFile:
    """A clip rendered by ``tests/truth.py`` and written to ``path`` (H.264, CRF 10)."""

    path: Path
    clip: "truth.ShutterClip"

    def global_view(self, k: int) -> np.ndarray:
        """The exact global-shutter view (RGB uint8) at frame ``k``'s middle row's instant, the
        instant a corrected frame shows by default (README: --reference-line middle)."""
        return self.clip.global_view(float(self.clip.reference_time(k, (self.clip.height - 1) / 2)))


def truth_camera(kind: str, n_frames: int):
    """The camera of a ``truth_clip`` kind (paths from tests/truth.py, common practice):

    * ``whip``: a horizontal whip pan (3 degrees off level) peaking at 60 px a frame;
    * ``handheld``: a camera held by hand behind a 50-degree lens, drifting sideways at
      45 degrees a second while it shakes (1.5 degrees of yaw and pitch, 1 of roll, 4-10 Hz).
    """
    fps = TRUTH_FPS
    if kind == "whip":
        return truth.whip_pan(60, fps, centre_s=n_frames / 2 / fps, duration_s=n_frames / fps * 0.8, angle_deg=3)
    if kind == "handheld":
        return truth.RotationPath(sweep_peak_deg_s=45.0, sweep_centre_s=n_frames / 2 / fps,
                                  sweep_duration_s=4 * n_frames / fps, shake_deg=(1.5, 1.5, 1.0), seed=2)
    raise ValueError(kind)


@pytest.fixture(scope="session")
def truth_clip(tmp_path_factory):
    """Render (and cache) a 320x180, 30 fps clip from tests/truth.py: ``make(kind, readout,
    n_frames=16)`` -> `TruthClipFile`."""
    cache = {}
    root = tmp_path_factory.mktemp("truth_clips")

    def make(kind: str, readout: float, n_frames: int = 16) -> TruthClipFile:
        key = (kind, readout, n_frames)
        if key not in cache:
            camera = truth_camera(kind, n_frames)
            if kind == "handheld":
                clip = truth.render_rotation_clip(SMALL_W, SMALL_H, n_frames, TRUTH_FPS, readout, 50.0, camera,
                                                  noise=1.0)
            else:
                clip = truth.render_planar_clip(SMALL_W, SMALL_H, n_frames, TRUTH_FPS, readout, camera, noise=1.0)
            path = root / f"{kind}_{round(readout * 1e6)}us_{n_frames}.mp4"
            truth.write_clip(path, clip.frames, TRUTH_FPS)
            cache[key] = TruthClipFile(path, clip)
        return cache[key]

    return make
