"""Known camera paths for rendering clips with exact ground truth.

A path gives the same four curves as `skewfix.motion` (pan_x, pan_y in
pixels, roll in radians, log zoom) as analytic functions of time, so a clip
rendered from it has an exact answer for every row of every frame.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class CameraPath:
    """Base class: subclasses implement ``curves(t)``."""

    def curves(self, t: np.ndarray):  # pragma: no cover - interface
        raise NotImplementedError

    def speed(self, t: np.ndarray) -> np.ndarray:
        """Pan speed magnitude in px/s (central difference)."""
        dt = 1e-4
        a = np.array(self.curves(np.asarray(t) + dt)[:2])
        b = np.array(self.curves(np.asarray(t) - dt)[:2])
        return np.hypot(*(a - b)) / (2 * dt)


@dataclass
class WhipPan(CameraPath):
    """A horizontal whip pan: smooth acceleration to ``peak_px_s``, then a stop.

    The speed follows a raised-cosine bump centred at ``centre_s`` lasting
    ``duration_s``; a little tilt drift adds vertical motion.
    """

    peak_px_s: float = 4200.0
    centre_s: float = 0.6
    duration_s: float = 0.8
    tilt_px_s: float = 15.0

    def curves(self, t):
        t = np.asarray(t, dtype=np.float64)
        u = np.clip((t - (self.centre_s - self.duration_s / 2)) / self.duration_s, 0.0, 1.0)
        # integral of peak * (1 - cos(2 pi u)) / 2 over time
        x = self.peak_px_s * self.duration_s * (u - np.sin(2 * np.pi * u) / (2 * np.pi)) / 2
        y = self.tilt_px_s * t
        zeros = np.zeros_like(t)
        return x, y, zeros, zeros


@dataclass
class Handheld(CameraPath):
    """Handheld vibration: sums of sines at 7-11 Hz in x, y and roll, slow drift."""

    amplitude_px: float = 3.0
    roll_rad: float = 0.01
    zoom: float = 0.0
    drift_px_s: float = 20.0
    seed: int = 3

    def curves(self, t):
        t = np.asarray(t, dtype=np.float64)
        rng = np.random.default_rng(self.seed)
        freqs = rng.uniform(7.0, 11.0, size=(4, 2))
        phases = rng.uniform(0, 2 * np.pi, size=(4, 2))
        def wobble(i):
            return sum(np.sin(2 * np.pi * freqs[i, j] * t + phases[i, j]) for j in range(2)) / 2
        x = self.drift_px_s * t + self.amplitude_px * wobble(0)
        y = 0.5 * self.drift_px_s * t + self.amplitude_px * wobble(1)
        roll = self.roll_rad * wobble(2)
        zoom = self.zoom * wobble(3)
        return x, y, roll, zoom


@dataclass
class SteadyPan(CameraPath):
    """Constant-velocity pan (the readout cannot be seen from such motion)."""

    vx_px_s: float = 600.0
    vy_px_s: float = 0.0

    def curves(self, t):
        t = np.asarray(t, dtype=np.float64)
        z = np.zeros_like(t)
        return self.vx_px_s * t, self.vy_px_s * t, z, z


@dataclass
class Still(CameraPath):
    """A locked-off camera."""

    def curves(self, t):
        z = np.zeros_like(np.asarray(t, dtype=np.float64))
        return z, z, z, z
