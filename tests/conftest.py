"""Shared fixtures: small synthetic rolling-shutter clips with exact truth."""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import cv2
import pytest

from skewfix.synth.residual import decode_rgb  # noqa: F401  (tests import it from here)
from skewfix.synth.paths import Handheld, SteadyPan, WhipPan
from skewfix.synth.scenes import photo_panorama
from skewfix.synth.shutter import render_clip

SMALL_W, SMALL_H = 320, 180


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
