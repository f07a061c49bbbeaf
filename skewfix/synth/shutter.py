"""Render a rolling shutter (and the exact global-shutter truth) from a known path.

Row ``y`` of frame ``k`` is sampled at its own instant ``t(k, y)`` from the
row clock; the scene is a large world-plane image and the camera path maps
image points to it (`skewfix.motion` conventions). A global-shutter view at
any instant uses the same mapping with one time for every row, so the truth
for every output frame is exact.
"""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np

from skewfix.rowclock import RowClock, frame_times_from_rate
from skewfix.synth.paths import CameraPath


class ShutterRenderer:
    """Samples a world-plane scene through a moving camera."""

    def __init__(self, scene: np.ndarray, width: int, height: int, path: CameraPath, origin=None):
        """``origin`` is the scene pixel under the image *centre* at t = 0 (default:
        70 % of the frame width in from the scene's left edge, vertically centred)."""
        self.scene = scene
        self.width = width
        self.height = height
        self.path = path
        self.origin = origin if origin is not None else (width * 0.7, scene.shape[0] / 2.0)
        self.xs, self.ys = np.meshgrid(np.arange(width, dtype=np.float64), np.arange(height, dtype=np.float64))

    def _sample(self, times_per_row: np.ndarray) -> np.ndarray:
        x, y, th, sg = self.path.curves(times_per_row)
        cx, cy = (self.width - 1) / 2.0, (self.height - 1) / 2.0
        vx, vy = self.xs - cx, self.ys - cy
        shrink = np.exp(-sg)[:, None]  # the inverse zoom: image offsets to world offsets
        c, s = np.cos(th)[:, None], np.sin(th)[:, None]
        qx = x[:, None] + shrink * (c * vx + s * vy) + self.origin[0]
        qy = y[:, None] + shrink * (-s * vx + c * vy) + self.origin[1]
        return cv2.remap(
            self.scene, qx.astype(np.float32), qy.astype(np.float32), cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT_101
        )

    def rolling(self, clock: RowClock, k: int) -> np.ndarray:
        """Frame ``k`` as a rolling shutter reads it (float RGB)."""
        return self._sample(clock.row_time(k, np.arange(self.height)))

    def global_view(self, t: float) -> np.ndarray:
        """The exact global-shutter view at instant ``t``."""
        return self._sample(np.full(self.height, float(t)))


def to_uint8(img: np.ndarray, noise_sigma: float = 0.0, rng=None) -> np.ndarray:
    if noise_sigma > 0:
        rng = rng or np.random.default_rng(0)
        img = img + rng.normal(0, noise_sigma, img.shape).astype(np.float32)
    return (np.clip(img, 0, 1) * 255 + 0.5).astype(np.uint8)


def write_rgb_clip(
    path: str | Path,
    frames,
    rate: Fraction,
    codec: str = "libx264",
    pix_fmt: str = "yuv420p",
    crf: int = 10,
    audio_seconds: float | None = None,
    options: dict | None = None,
) -> None:
    """Encode an iterable of RGB uint8 (or uint16) frames; optional test-tone audio."""
    import av

    rate = Fraction(rate)
    with av.open(str(path), "w") as out:
        vs = None
        a_stream = None
        if audio_seconds:
            a_stream = out.add_stream("aac", rate=48000)
            a_stream.layout = "stereo"
        for i, rgb in enumerate(frames):
            if vs is None:
                vs = out.add_stream(codec, rate=rate)
                vs.width, vs.height = rgb.shape[1], rgb.shape[0]
                vs.pix_fmt = pix_fmt
                vs.codec_context.time_base = Fraction(1) / rate
                opts = dict(options or {})
                if codec in ("libx264", "libx265"):
                    opts.setdefault("crf", str(crf))
                    opts.setdefault("preset", "medium" if codec == "libx264" else "fast")
                    if codec == "libx265":
                        opts.setdefault("x265-params", "log-level=error")
                vs.options = opts
            fmt = "rgb48le" if rgb.dtype == np.uint16 else "rgb24"
            frame = av.VideoFrame.from_ndarray(rgb, format=fmt)
            frame.pts = i
            frame.time_base = vs.codec_context.time_base
            for packet in vs.encode(frame):
                out.mux(packet)
        for packet in vs.encode():
            out.mux(packet)
        if a_stream is not None:
            n = int(48000 * audio_seconds)
            t = np.arange(n) / 48000.0
            tone = (0.2 * np.sin(2 * np.pi * 440 * t)).astype(np.float32)
            for start in range(0, n, 1024):
                chunk = np.stack([tone[start:start + 1024]] * 2)
                aframe = av.AudioFrame.from_ndarray(chunk, format="fltp", layout="stereo")
                aframe.sample_rate = 48000
                aframe.pts = start
                for packet in a_stream.encode(aframe):
                    out.mux(packet)
            for packet in a_stream.encode():
                out.mux(packet)


def render_clip(
    path: str | Path,
    scene: np.ndarray,
    camera: CameraPath,
    width: int,
    height: int,
    rate: Fraction,
    n_frames: int,
    readout: float,
    line_order: str = "top-down",
    noise_sigma: float = 0.004,
    crf: int = 10,
    audio: bool = False,
    origin=None,
    codec: str = "libx264",
    pix_fmt: str = "yuv420p",
):
    """Render and encode a rolling-shutter clip; returns (renderer, clock) for truth."""
    clock = RowClock(frame_times_from_rate(n_frames, rate), height, readout, line_order)
    renderer = ShutterRenderer(scene, width, height, camera, origin)
    rng = np.random.default_rng(1)
    deep = pix_fmt.endswith(("10le", "12le", "16le"))

    def frames():
        for k in range(n_frames):
            img = renderer.rolling(clock, k)
            if deep:
                if noise_sigma > 0:
                    img = img + rng.normal(0, noise_sigma, img.shape).astype(np.float32)
                yield (np.clip(img, 0, 1) * 65535 + 0.5).astype(np.uint16)
            else:
                yield to_uint8(img, noise_sigma, rng)

    write_rgb_clip(path, frames(), rate, codec=codec, pix_fmt=pix_fmt, crf=crf,
                   audio_seconds=(n_frames / float(rate)) if audio else None)
    return renderer, clock
