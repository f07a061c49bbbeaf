"""A pan test target and pan moves for the pan method (synthetic truth).

`vertical_edges_scene` draws a chart of vertical bars (every boundary a strong
edge, optionally tilted by a known angle) with sparse small squares on it so
that the corner tracker has something to hold on to. `SweepPan` is a camera
path of steady horizontal pans joined by smooth speed changes: one way
(``speeds_px_s=(900,)``), from rest (``(0, 900)``) or there and back
(``(900, -900)``).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from skewfix.synth.paths import CameraPath


def vertical_edges_scene(height: int, width: int, tilt_rad: float = 0.0, seed: int = 5,
                         markers: bool = True) -> np.ndarray:
    """Vertical bars of random widths and alternating dark/light levels (float32 RGB in [0, 1]).

    ``tilt_rad`` leans every bar edge by that angle from the vertical (the top
    to the right for a positive angle: an edge at column ``x0`` on the middle
    row sits at ``x0 + tan(tilt) * (yc - y)``). ``markers`` adds small squares
    so that corner features can be tracked.
    """
    rng = np.random.default_rng(seed)
    margin = int(abs(np.tan(tilt_rad)) * height) + 4
    n_cols = width + 2 * margin
    profile = np.empty(n_cols, np.float32)
    x, dark = 0, True
    while x < n_cols:
        w = int(rng.integers(6, 48))
        level = rng.uniform(0.08, 0.35) if dark else rng.uniform(0.6, 0.92)
        profile[x:x + w] = level
        x += w
        dark = not dark
    profile = cv2.GaussianBlur(profile[None, :], (0, 0), 0.7)[0]  # optics: no perfect step
    cols = np.arange(width, dtype=np.float64) + margin
    yc = (height - 1) / 2.0
    lean = np.tan(tilt_rad) * (np.arange(height) - yc)
    grey = np.stack([np.interp(cols + lean[y], np.arange(n_cols), profile) for y in range(height)])
    grey = grey.astype(np.float32)
    if markers:
        for _ in range(max(8, width * height // 3000)):
            mx, my = int(rng.integers(0, width - 6)), int(rng.integers(0, height - 6))
            patch = grey[my:my + 5, mx:mx + 5]
            grey[my:my + 5, mx:mx + 5] = 0.95 if patch.mean() < 0.5 else 0.05
    grey += cv2.GaussianBlur(rng.normal(0, 0.02, grey.shape).astype(np.float32), (0, 0), 0.8)
    return np.clip(np.stack([grey] * 3, axis=-1), 0, 1)


@dataclass
class SweepPan(CameraPath):
    """Horizontal pans at ``speeds_px_s`` held ``hold_s`` each, joined by raised-cosine ramps.

    The camera starts at the first speed at ``t = 0`` and keeps the last one
    after its hold. Speeds are of the camera's view (the picture moves the
    other way).
    """

    speeds_px_s: tuple = (900.0,)
    hold_s: float = 0.5
    ramp_s: float = 0.15

    def _segments(self):
        t, segs = 0.0, []
        speeds = [float(v) for v in self.speeds_px_s]
        for i, v in enumerate(speeds):
            segs.append((t, self.hold_s, v, v))
            t += self.hold_s
            if i + 1 < len(speeds):
                segs.append((t, self.ramp_s, v, speeds[i + 1]))
                t += self.ramp_s
        return segs, t, speeds[-1]

    def curves(self, t):
        t = np.asarray(t, dtype=np.float64)
        segs, end, last = self._segments()
        x = np.zeros_like(t)
        for start, dur, v0, v1 in segs:
            tau = np.clip(t - start, 0.0, dur)
            if v0 == v1:
                x += v0 * tau
            else:  # integral of v0 + (v1 - v0) (1 - cos(pi tau / dur)) / 2
                x += v0 * tau + (v1 - v0) / 2 * (tau - dur / np.pi * np.sin(np.pi * tau / dur))
        x += last * np.clip(t - end, 0.0, None)
        zeros = np.zeros_like(t)
        return x, zeros, zeros, zeros

    def velocity(self, t):
        """The view's horizontal speed (px/s) at ``t``."""
        t = np.asarray(t, dtype=np.float64)
        segs, end, last = self._segments()
        v = np.full_like(t, last)
        for start, dur, v0, v1 in reversed(segs):
            inside = (t >= start) & (t < start + dur)
            tau = t - start
            v = np.where(inside, v0 + (v1 - v0) * (1 - np.cos(np.pi * tau / dur)) / 2, v)
        return v


def render_pan_clip(path, width: int, height: int, rate, n_frames: int, readout: float,
                    speeds_px_s=(900.0,), line_order: str = "top-down", tilt_deg: float = 0.0,
                    hold_s: float = 0.5, ramp_s: float = 0.15, camera: CameraPath | None = None,
                    **render_options):
    """Render a pan across `vertical_edges_scene` (H.264 by default); returns (renderer, clock, camera).

    The scene is made wide enough for the whole move; ``render_options`` go to
    `skewfix.synth.shutter.render_clip` (``crf``, ``noise_sigma``, ...).
    """
    from skewfix.synth.shutter import render_clip

    camera = camera or SweepPan(speeds_px_s=tuple(speeds_px_s), hold_s=hold_s, ramp_s=ramp_s)
    duration = n_frames / float(rate)
    xs = camera.curves(np.linspace(0.0, duration + readout, 200))[0]
    low, high = float(min(xs.min(), 0.0)), float(max(xs.max(), 0.0))
    scene_h = int(round(height * 1.4))
    scene = vertical_edges_scene(scene_h, int(high - low + 3 * width), tilt_rad=np.radians(tilt_deg))
    # the renderer's origin is the scene point under the image centre at t = 0
    origin = (1.5 * width - low, scene_h / 2.0)
    renderer, clock = render_clip(path, scene, camera, width, height, rate, n_frames, readout, line_order,
                                  origin=origin, **render_options)
    return renderer, clock, camera
