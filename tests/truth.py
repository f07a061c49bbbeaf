"""Ground-truth rolling-shutter renderer for tests and benchmarks.

Deliberately imports nothing from the ``skewfix`` package, so that a convention
error there (row clock, rotation sense, pixel centres) cannot cancel out against
the same error here.  Everything is written from the published models:

* Row clock: row ``y`` (0 = top, stored order) of frame ``k`` starts its exposure
  at ``t_k + readout * y / H`` (top-down) or ``t_k + readout * (H-1-y) / H``
  (bottom-up); ``t_k = k / fps`` unless explicit frame times are given.
* Rotating camera: the pinhole camera model (Hartley & Zisserman, Multiple View
  Geometry, 2nd ed., ch. 6) with ``K = [[f,0,cx],[0,f,cy],[0,0,1]]``,
  ``cx = (W-1)/2``, ``cy = (H-1)/2``, ``f = (W/2) / tan(hfov/2)``; a world
  direction ``d`` is imaged at ``p ~ K R(t) d`` with ``R(t)`` given by Rodrigues'
  formula from a rotation-vector path (x right, y down, z forward).  Optional
  radial distortion is Brown-Conrady in OpenCV's convention (k1, k2): the stored
  point is the distorted projection.
* The scene of a rotation clip is an equirectangular panorama on the sphere
  (longitude ``atan2(d_x, d_z)``, latitude ``asin(d_y / |d|)``).
* Planar clips: a world point ``q`` is seen at ``p = q - X(t)``; world
  coordinates are the image coordinates of the camera at ``X = (0, 0)``.
* Motion blur: each row averages sub-samples (midpoint rule) over its exposure
  ``[t, t + exposure]``, spaced less than half a pixel apart.

Sampling uses ``cv2.remap`` (bicubic).  OpenCV's remap looks sub-pixel positions
up in a table of ``cv2.INTER_TAB_SIZE`` = 32 steps per pixel (``cv2.INTER_BITS`` = 5),
i.e. at most 1/64 px of position error, well below what the benchmarks resolve.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from functools import lru_cache
from typing import Callable, Sequence

import cv2
import numpy as np

MAX_SUBSAMPLES = 64  # cap on blur sub-samples per row (common practice: enough for ~32 px of blur)
LINE_ORDERS = ("top-down", "bottom-up")


# --------------------------------------------------------------------------- timing

def as_rate(fps) -> Fraction:
    """A frame rate as an exact Fraction (``30``, ``Fraction(30000, 1001)``, ``"24000/1001"``, ``29.97``)."""
    if isinstance(fps, float):
        return Fraction(fps).limit_denominator(1_000_000)
    return Fraction(fps)


def clip_frame_times(n_frames: int, fps, frame_times: Sequence[float] | None = None) -> np.ndarray:
    """``t_k = k / fps`` computed exactly, or the given explicit times (seconds)."""
    if frame_times is not None:
        times = np.asarray(frame_times, dtype=np.float64)
        if times.shape != (n_frames,):
            raise ValueError(f"frame_times has {times.size} entries for {n_frames} frames")
        return times
    rate = as_rate(fps)
    return np.array([float(Fraction(k) / rate) for k in range(n_frames)])


# --------------------------------------------------------------------------- camera model

def focal_from_hfov(width: int, hfov_deg: float) -> float:
    """Pinhole relation tan(hfov/2) = (W/2) / f (Hartley & Zisserman, ch. 6)."""
    return (width / 2.0) / math.tan(math.radians(hfov_deg) / 2.0)


def camera_matrix(width: int, height: int, hfov_deg: float) -> np.ndarray:
    f = focal_from_hfov(width, hfov_deg)
    return np.array([[f, 0.0, (width - 1) / 2.0], [0.0, f, (height - 1) / 2.0], [0.0, 0.0, 1.0]])


def rodrigues(rotvecs) -> np.ndarray:
    """Rotation matrices (n, 3, 3) from rotation vectors (n, 3) by Rodrigues' formula.

    ``R = I + sin(a)/a [r]x + (1 - cos(a))/a^2 [r]x^2`` with ``a = |r|`` (series near 0);
    the same sense as ``cv2.Rodrigues`` (checked against it in test_truth.py).
    """
    r = np.asarray(rotvecs, dtype=np.float64).reshape(-1, 3)
    a2 = np.einsum("ni,ni->n", r, r)
    a = np.sqrt(a2)
    small = a < 1e-5
    safe = np.where(small, 1.0, a)
    s = np.where(small, 1.0 - a2 / 6.0, np.sin(safe) / safe)
    c = np.where(small, 0.5 - a2 / 24.0, (1.0 - np.cos(safe)) / (safe * safe))
    x, y, z = r[:, 0], r[:, 1], r[:, 2]
    zero = np.zeros_like(x)
    cross = np.stack([np.stack([zero, -z, y], -1), np.stack([z, zero, -x], -1),
                      np.stack([-y, x, zero], -1)], axis=1)
    return np.eye(3) + s[:, None, None] * cross + c[:, None, None] * (cross @ cross)


def distort(xn: np.ndarray, yn: np.ndarray, k1: float, k2: float):
    """Brown-Conrady radial distortion, OpenCV's convention: x_d = x (1 + k1 r^2 + k2 r^4)."""
    r2 = xn * xn + yn * yn
    g = 1.0 + k1 * r2 + k2 * r2 * r2
    return xn * g, yn * g


def undistort(xd: np.ndarray, yd: np.ndarray, k1: float, k2: float, iterations: int = 30):
    """Invert :func:`distort` by Newton's method on the radius (s + k1 s^3 + k2 s^5 = r_d)."""
    if k1 == 0.0 and k2 == 0.0:
        return xd.copy(), yd.copy()
    rd = np.hypot(xd, yd)
    s = rd.copy()
    for _ in range(iterations):
        s2 = s * s
        step = (s * (1.0 + k1 * s2 + k2 * s2 * s2) - rd) / (1.0 + 3.0 * k1 * s2 + 5.0 * k2 * s2 * s2)
        s -= step
        if np.max(np.abs(step)) < 1e-14:
            break
    if np.max(np.abs(s * (1.0 + k1 * s * s + k2 * s ** 4) - rd)) > 1e-9:
        raise ValueError(f"distortion k1={k1}, k2={k2} is not invertible over this frame")
    scale = np.where(rd > 0, s / np.where(rd > 0, rd, 1.0), 1.0)
    return xd * scale, yd * scale


def pixel_rays(K: np.ndarray, width: int, height: int, k1: float = 0.0, k2: float = 0.0) -> np.ndarray:
    """Camera-frame rays (H, W, 3) = (x_n, y_n, 1) of every stored (distorted) pixel centre."""
    ys, xs = np.mgrid[0:height, 0:width].astype(np.float64)
    xn, yn = undistort((xs - K[0, 2]) / K[0, 0], (ys - K[1, 2]) / K[1, 1], k1, k2)
    return np.stack([xn, yn, np.ones_like(xn)], axis=-1)


# --------------------------------------------------------------------------- scenes

PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "camera")  # scikit-image's bundled photographs


@lru_cache(maxsize=None)
def _photo(name: str) -> np.ndarray:
    from skimage import data

    img = getattr(data, name)()
    return np.repeat(img[..., None], 3, axis=2) if img.ndim == 2 else img[..., :3]


def fine_texture(shape: tuple[int, int], rng: np.random.Generator, amplitude: float = 12.0,
                 sigma: float = 1.0) -> np.ndarray:
    """Band-limited grey noise (std ``amplitude``) so that flow and tracking find detail everywhere."""
    noise = cv2.GaussianBlur(rng.standard_normal(shape).astype(np.float32), (0, 0), sigma)
    return noise * np.float32(amplitude / max(float(noise.std()), 1e-6))


def photo_mosaic(width: int, height: int, tile_height: int, seed: int = 0,
                 photos: Sequence[str] = ("astronaut", "coffee", "rocket", "camera"),
                 texture: float = 12.0) -> np.ndarray:
    """Rows of photographs side by side (each row starting elsewhere), plus fine texture; uint8 RGB."""
    rng = np.random.default_rng(seed)
    tiles = []
    for name in photos:
        img = _photo(name)
        w = max(1, round(img.shape[1] * tile_height / img.shape[0]))
        interp = cv2.INTER_AREA if tile_height < img.shape[0] else cv2.INTER_CUBIC
        tiles.append(cv2.resize(img, (w, tile_height), interpolation=interp))
    strips = []
    for row in range(-(-height // tile_height)):
        strip, i = [], row
        while sum(t.shape[1] for t in strip) < width + tiles[0].shape[1]:
            strip.append(tiles[i % len(tiles)])
            i += 1
        strip = np.concatenate(strip, axis=1)
        shift = int(rng.integers(0, strip.shape[1] - width + 1))
        strips.append(strip[:, shift:shift + width])
    out = np.concatenate(strips, axis=0)[:height].astype(np.float32)
    out += fine_texture((height, width), rng, texture)[..., None]
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


@lru_cache(maxsize=4)
def sphere_panorama(px_per_radian: float, seed: int = 0) -> np.ndarray:
    """Equirectangular panorama (uint8 RGB, read-only): 2*pi*s columns, pi*s rows.

    Column ``u`` centres at longitude ``(u + 0.5) / W * 2 pi - pi``, row ``v`` at latitude
    ``(v + 0.5) / H * pi - pi/2`` (y down: positive latitude is below the horizon).
    """
    wp, hp = int(round(2 * math.pi * px_per_radian)), int(round(math.pi * px_per_radian))
    pano = photo_mosaic(wp, hp, tile_height=max(8, hp // 6), seed=seed, photos=PHOTOS)
    pano.flags.writeable = False
    return pano


# --------------------------------------------------------------------------- paths

def _raised_cosine_distance(t: np.ndarray, peak: float, centre: float, duration: float) -> np.ndarray:
    """Distance travelled at speed ``peak * (1 - cos(2 pi u)) / 2``, u = (t - start)/duration in [0, 1]."""
    u = np.clip((np.asarray(t, dtype=np.float64) - (centre - duration / 2)) / duration, 0.0, 1.0)
    return peak * duration * (u - np.sin(2 * math.pi * u) / (2 * math.pi)) / 2


def _sines(t: np.ndarray, amplitude: float, freqs, phases) -> np.ndarray:
    """Sum of sines with weights summing to 1, so the peak never exceeds ``amplitude``."""
    t = np.asarray(t, dtype=np.float64)
    out = sum(np.sin(2 * math.pi * f * t + p) for f, p in zip(freqs, phases))
    return amplitude * out / len(freqs)


def _shake_terms(seed: int, axes: int, n: int = 3, band=(4.0, 10.0)):
    rng = np.random.default_rng(seed)
    return [(rng.uniform(*band, n), rng.uniform(0, 2 * math.pi, n)) for _ in range(axes)]


@dataclass(frozen=True)
class RotationPath:
    """Yaw sweep with a raised-cosine speed bump plus handheld shake (rotation vector, rad).

    ``rotvec(t)`` returns (n, 3) = (pitch about x, yaw about y, roll about z), each a
    component of the rotation vector fed to Rodrigues' formula.  Shake is a sum of three
    sines per axis at 4-10 Hz (frequencies and phases from ``seed``), peak ``shake_deg``.
    """

    sweep_peak_deg_s: float = 90.0
    sweep_centre_s: float = 0.5
    sweep_duration_s: float = 0.6
    shake_deg: tuple[float, float, float] = (0.3, 0.3, 0.2)  # yaw, pitch, roll
    seed: int = 0

    def rotvec(self, t) -> np.ndarray:
        t = np.atleast_1d(np.asarray(t, dtype=np.float64))
        yaw = np.radians(_raised_cosine_distance(t, self.sweep_peak_deg_s, self.sweep_centre_s,
                                                 self.sweep_duration_s))
        (fy, py), (fp, pp), (fr, pr) = _shake_terms(self.seed, 3)
        yaw = yaw + _sines(t, math.radians(self.shake_deg[0]), fy, py)
        pitch = _sines(t, math.radians(self.shake_deg[1]), fp, pp)
        roll = _sines(t, math.radians(self.shake_deg[2]), fr, pr)
        return np.stack([pitch, yaw, roll], axis=-1)


@dataclass(frozen=True)
class SteadyPan:
    """Camera translation at constant velocity (px/s): X(t) = (vx t, vy t)."""

    vx: float
    vy: float = 0.0

    def __call__(self, t):
        t = np.asarray(t, dtype=np.float64)
        return self.vx * t, self.vy * t


@dataclass(frozen=True)
class SpeedBumpPan:
    """Translation along ``angle_deg`` (0 = right, 90 = down) with a raised-cosine speed bump."""

    peak_px_s: float
    centre_s: float
    duration_s: float
    angle_deg: float = 0.0

    def __call__(self, t):
        d = _raised_cosine_distance(t, self.peak_px_s, self.centre_s, self.duration_s)
        a = math.radians(self.angle_deg)
        return d * math.cos(a), d * math.sin(a)


@dataclass(frozen=True)
class Shake2D:
    """Handheld translation: sums of sines at 4-10 Hz on x and y, peak ``amplitude_px``."""

    amplitude_px: float = 3.0
    seed: int = 0

    def __call__(self, t):
        (fx, px), (fy, py) = _shake_terms(self.seed, 2)
        return _sines(t, self.amplitude_px, fx, px), _sines(t, self.amplitude_px, fy, py)


def steady_pan(px_per_frame: float, fps=30, vertical: float = 0.0) -> SteadyPan:
    rate = float(as_rate(fps))
    return SteadyPan(px_per_frame * rate, vertical * rate)


def whip_pan(peak_px_per_frame: float, fps=30, centre_s: float = 0.5, duration_s: float = 0.6,
             angle_deg: float = 0.0) -> SpeedBumpPan:
    """Whip pan: speed rises and falls as a raised cosine, peaking at ``peak_px_per_frame``."""
    return SpeedBumpPan(peak_px_per_frame * float(as_rate(fps)), centre_s, duration_s, angle_deg)


def fast_tilt(rows_per_frame: float, direction: str = "down", fps=30) -> SteadyPan:
    """Vertical camera motion at a constant speed; tilting down moves the picture up."""
    if direction not in ("down", "up"):
        raise ValueError(f"direction must be 'down' or 'up', not {direction!r}")
    sign = 1.0 if direction == "down" else -1.0
    return SteadyPan(0.0, sign * rows_per_frame * float(as_rate(fps)))


def handheld_2d(amplitude_px: float = 3.0, seed: int = 0) -> Shake2D:
    return Shake2D(amplitude_px, seed)


@dataclass(frozen=True)
class Subject:
    """A textured patch (another photo) moving on its own.

    ``path(t) -> (x, y)`` is the patch centre, in world coordinates (``coords="world"``) or in
    the global view's image coordinates (``coords="image"``, i.e. world = path + pan).
    ``fraction`` of the frame area it covers (at most 1/3), ``aspect`` = width / height.
    """

    path: Callable
    fraction: float = 0.2
    aspect: float = 4 / 3
    coords: str = "image"
    image: np.ndarray | None = None


@dataclass(frozen=True)
class _LinearImagePath:
    x0: float
    y0: float
    vx: float

    def __call__(self, t):
        t = np.asarray(t, dtype=np.float64)
        return self.x0 + self.vx * t, np.full_like(t, self.y0)


def crossing_subject(width: int, height: int, duration_s: float, fraction: float = 0.2,
                     rightward: bool = True) -> Subject:
    """A subject crossing the frame (in the image) from 20 % to 80 % of the width, or back."""
    x0, x1 = (0.2 * width, 0.8 * width) if rightward else (0.8 * width, 0.2 * width)
    speed = (x1 - x0) / duration_s
    return Subject(path=_LinearImagePath(x0, (height - 1) / 2, speed), fraction=fraction, coords="image")



# --------------------------------------------------------------------------- clips

def _to_uint8(img: np.ndarray) -> np.ndarray:
    return np.clip(np.rint(img), 0, 255).astype(np.uint8)


class ShutterClip:
    """Shared row clock, exposure integral and frame loop; subclasses supply ``_sample``."""

    def __init__(self, width, height, n_frames, fps, readout, line_order, exposure, noise, seed,
                 frame_times=None):
        if line_order not in LINE_ORDERS:
            raise ValueError(f"line_order must be one of {LINE_ORDERS}, not {line_order!r}")
        self.width, self.height = int(width), int(height)
        self.fps = as_rate(fps) if fps is not None else None
        self.frame_times = clip_frame_times(n_frames, fps, frame_times)
        self.readout, self.line_order = float(readout), line_order
        self.exposure, self.noise, self.seed = float(exposure), float(noise), seed
        self.frames: list[np.ndarray] = []

    # row clock
    def reference_time(self, k: int, row) -> np.ndarray | float:
        """Start of exposure of ``row`` (stored order, may be fractional) of frame ``k``."""
        row = np.asarray(row, dtype=np.float64)
        lines = row if self.line_order == "top-down" else (self.height - 1) - row
        out = self.frame_times[k] + self.readout * lines / self.height
        return float(out) if out.ndim == 0 else out

    def row_times(self, k: int) -> np.ndarray:
        return self.reference_time(k, np.arange(self.height))

    # exposure integral
    def _motion_length(self, row_t: np.ndarray, exposure: float) -> float:
        raise NotImplementedError

    def _sample(self, row_t: np.ndarray, want_alpha: bool = False):
        raise NotImplementedError

    def subsample_count(self, row_t, exposure: float | None = None) -> int:
        """Sub-samples for the exposure integral: spaced under 0.5 px along the fastest motion."""
        exposure = self.exposure if exposure is None else float(exposure)
        if exposure <= 0:
            return 1
        length = self._motion_length(np.asarray(row_t, dtype=np.float64), exposure)
        return int(min(MAX_SUBSAMPLES, max(1, math.floor(2.0 * length) + 1)))

    def _offsets(self, row_t, exposure):
        n = self.subsample_count(row_t, exposure)
        return [0.0] if exposure <= 0 else [exposure * (j + 0.5) / n for j in range(n)]

    def view(self, row_t, exposure: float | None = None) -> np.ndarray:
        """Float RGB (H, W, 3): each row ``y`` integrated over ``[row_t[y], row_t[y] + exposure]``."""
        exposure = self.exposure if exposure is None else float(exposure)
        row_t = np.broadcast_to(np.asarray(row_t, dtype=np.float64), (self.height,))
        offsets = self._offsets(row_t, exposure)
        acc = np.zeros((self.height, self.width, 3), np.float32)
        for dt in offsets:
            acc += self._sample(row_t + dt)
        return acc / np.float32(len(offsets))

    def global_view(self, t: float, exposure: float | None = None) -> np.ndarray:
        """What a global shutter sees: every row at instant ``t`` (integrated over the exposure)."""
        return _to_uint8(self.view(np.full(self.height, float(t)), exposure))

    def _render_frames(self) -> None:
        rng = np.random.default_rng(self.seed)
        for k in range(len(self.frame_times)):
            img = self.view(self.row_times(k))
            if self.noise > 0:
                img = img + np.float32(self.noise) * rng.standard_normal(img.shape, dtype=np.float32)
            self.frames.append(_to_uint8(img))


class RotationClip(ShutterClip):
    """A camera turning about its centre inside a textured sphere (see module docstring)."""

    def __init__(self, width, height, n_frames, fps, readout, hfov_deg, path, line_order="top-down",
                 exposure=0.0, k1=0.0, k2=0.0, panorama=None, noise=0.0, seed=0, frame_times=None):
        super().__init__(width, height, n_frames, fps, readout, line_order, exposure, noise, seed,
                         frame_times)
        self.hfov_deg = float(hfov_deg)
        self.K = camera_matrix(self.width, self.height, self.hfov_deg)
        self.focal_px = float(self.K[0, 0])
        self.k1, self.k2 = float(k1), float(k2)
        self.path = path
        self.panorama = sphere_panorama(round(1.25 * self.focal_px), seed) if panorama is None else panorama
        self.rays = pixel_rays(self.K, self.width, self.height, self.k1, self.k2)

    def rotation(self, t: float) -> np.ndarray:
        """World-to-camera rotation R(t) (3x3), from cv2.Rodrigues of the path's rotation vector."""
        return cv2.Rodrigues(self.path.rotvec([float(t)])[0].reshape(3, 1))[0]

    def project(self, directions: np.ndarray, t) -> np.ndarray:
        """Stored pixel positions (n, 2) of world directions (n, 3) at times ``t`` (scalar or (n,))."""
        d = np.asarray(directions, dtype=np.float64).reshape(-1, 3)
        R = rodrigues(self.path.rotvec(np.broadcast_to(np.asarray(t, float), (len(d),))))
        c = np.einsum("nij,nj->ni", R, d)
        xd, yd = distort(c[:, 0] / c[:, 2], c[:, 1] / c[:, 2], self.k1, self.k2)
        return np.stack([self.K[0, 0] * xd + self.K[0, 2], self.K[1, 1] * yd + self.K[1, 2]], axis=-1)

    def _world_directions(self, row_t: np.ndarray) -> np.ndarray:
        R = rodrigues(self.path.rotvec(row_t))  # one rotation per row
        return np.einsum("yji,yxj->yxi", R, self.rays)  # d = R^T ray

    def _sample(self, row_t, want_alpha=False):
        d = self._world_directions(row_t)
        lon = np.arctan2(d[..., 0], d[..., 2])
        lat = np.arcsin(d[..., 1] / np.linalg.norm(d, axis=-1))
        hp, wp = self.panorama.shape[:2]
        mx = ((lon + math.pi) / (2 * math.pi) * wp - 0.5).astype(np.float32)
        my = ((lat + math.pi / 2) / math.pi * hp - 0.5).astype(np.float32)
        # BORDER_WRAP joins longitude -pi to +pi; it also wraps at the poles, never in view here.
        return cv2.remap(self.panorama, mx, my, cv2.INTER_CUBIC, borderMode=cv2.BORDER_WRAP).astype(np.float32)

    def _motion_length(self, row_t, exposure):
        rows = np.linspace(0, self.height - 1, 5).round().astype(int)
        cols = np.linspace(0, self.width - 1, 5).round().astype(int)
        yy, xx = np.meshgrid(rows, cols, indexing="ij")
        rays = self.rays[yy.ravel(), xx.ravel()]
        t0 = row_t[yy.ravel()]
        d = np.einsum("nji,nj->ni", rodrigues(self.path.rotvec(t0)), rays)
        track = np.stack([self.project(d, t0 + exposure * s) for s in np.linspace(0, 1, 9)])
        return float(np.max(np.sum(np.linalg.norm(np.diff(track, axis=0), axis=-1), axis=0)))


def render_rotation_clip(width: int, height: int, n_frames: int, fps, readout: float, hfov_deg: float,
                         path: RotationPath, line_order: str = "top-down", exposure: float = 0.0,
                         k1: float = 0.0, k2: float = 0.0, panorama: np.ndarray | None = None,
                         noise: float = 0.0, seed: int = 0,
                         frame_times: Sequence[float] | None = None) -> RotationClip:
    """Render a rolling-shutter clip of a rotating pinhole camera; see :class:`RotationClip`."""
    clip = RotationClip(width, height, n_frames, fps, readout, hfov_deg, path, line_order, exposure,
                        k1, k2, panorama, noise, seed, frame_times)
    clip._render_frames()
    return clip


class PlanarClip(ShutterClip):
    """A camera translating over a large flat photograph, optionally with a moving subject.

    The scene is made large enough for the pan path from 0.1 s before the first frame to
    0.1 s after the last row's exposure; views outside that span see a mirrored scene.
    """

    MARGIN = 16  # px of scene kept beyond the frame on every side (for the bicubic kernel)

    def __init__(self, width, height, n_frames, fps, readout, pan_path, subject=None, exposure=0.0,
                 line_order="top-down", scene=None, noise=0.0, seed=0, frame_times=None):
        super().__init__(width, height, n_frames, fps, readout, line_order, exposure, noise, seed,
                         frame_times)
        self.pan_path, self.subject = pan_path, subject
        t = self.frame_times
        span = np.linspace(t.min() - 0.1, t.max() + self.readout + self.exposure + 0.1, 2000)
        px, py = (np.asarray(a, dtype=np.float64) for a in pan_path(span))
        need_w = int(math.ceil(px.max() - px.min())) + self.width + 2 * self.MARGIN
        need_h = int(math.ceil(py.max() - py.min())) + self.height + 2 * self.MARGIN
        if scene is None:
            scene = photo_mosaic(need_w, need_h, tile_height=max(32, int(0.9 * self.height)), seed=seed)
        elif scene.shape[0] < need_h or scene.shape[1] < need_w:
            raise ValueError(f"scene {scene.shape[1]}x{scene.shape[0]} is smaller than the {need_w}x{need_h} the path needs")
        self.scene = scene
        # scene index = world + origin; the path's extent sits in the middle of the scene
        self.origin = ((scene.shape[1] - (px.max() + px.min() + self.width - 1)) / 2,
                       (scene.shape[0] - (py.max() + py.min() + self.height - 1)) / 2)
        self.xs = np.arange(self.width, dtype=np.float64)
        self.ys = np.arange(self.height, dtype=np.float64)
        if subject is not None:
            self._prepare_subject(subject, seed)

    def _prepare_subject(self, subject: Subject, seed: int) -> None:
        if not 0 < subject.fraction <= 1 / 3:
            raise ValueError(f"subject fraction must be in (0, 1/3], not {subject.fraction}")
        if subject.coords not in ("image", "world"):
            raise ValueError(f"subject coords must be 'image' or 'world', not {subject.coords!r}")
        h = int(round(math.sqrt(subject.fraction * self.width * self.height / subject.aspect)))
        w = int(round(h * subject.aspect))
        img = subject.image
        if img is None:
            img = _photo("chelsea")
            img = cv2.resize(img, (w, h), interpolation=cv2.INTER_AREA).astype(np.float32)
            img = _to_uint8(img + fine_texture((h, w), np.random.default_rng(seed + 1))[..., None])
        else:
            img = cv2.resize(img, (w, h), interpolation=cv2.INTER_AREA)
        pad = 3
        self.subject_size = (w, h)
        self.subject_pad = pad
        self.subject_rgb = cv2.copyMakeBorder(img, pad, pad, pad, pad, cv2.BORDER_REPLICATE).astype(np.float32)
        alpha = np.zeros((h + 2 * pad, w + 2 * pad), np.float32)
        alpha[pad:pad + h, pad:pad + w] = 1.0
        self.subject_alpha = alpha

    def subject_centre(self, t):
        """World position (x, y) of the subject's centre at ``t``."""
        sx, sy = (np.asarray(a, dtype=np.float64) for a in self.subject.path(t))
        if self.subject.coords == "image":
            px, py = self.pan_path(t)
            sx, sy = sx + px, sy + py
        return sx, sy

    def _sample(self, row_t, want_alpha=False):
        px, py = (np.broadcast_to(np.asarray(a, dtype=np.float64), row_t.shape) for a in self.pan_path(row_t))
        wx = self.xs[None, :] + px[:, None]  # world coordinates of every pixel
        wy = np.broadcast_to(self.ys[:, None] + py[:, None], wx.shape)
        img = cv2.remap(self.scene, (wx + self.origin[0]).astype(np.float32),
                        (wy + self.origin[1]).astype(np.float32), cv2.INTER_CUBIC,
                        borderMode=cv2.BORDER_REFLECT_101).astype(np.float32)
        alpha = np.zeros(wx.shape, np.float32)
        if self.subject is not None:
            sx, sy = (np.broadcast_to(a, row_t.shape) for a in self.subject_centre(row_t))
            (w, h), pad = self.subject_size, self.subject_pad
            # patch pixel j is centred at world x = sx - w/2 + 0.5 + j
            u = (wx - sx[:, None] + w / 2 - 0.5 + pad).astype(np.float32)
            v = (wy - sy[:, None] + h / 2 - 0.5 + pad).astype(np.float32)
            alpha = cv2.remap(self.subject_alpha, u, v, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT)
            rgb = cv2.remap(self.subject_rgb, u, v, cv2.INTER_CUBIC, borderMode=cv2.BORDER_REPLICATE)
            img = img * (1 - alpha[..., None]) + rgb * alpha[..., None]
        return (img, alpha) if want_alpha else img

    def _image_tracks(self, row_t, exposure):
        ts = row_t[:, None] + exposure * np.linspace(0, 1, 9)[None, :]
        px, py = (np.broadcast_to(np.asarray(a, dtype=np.float64), ts.shape) for a in self.pan_path(ts))
        tracks = [(px, py)]
        if self.subject is not None:
            sx, sy = (np.broadcast_to(a, ts.shape) for a in self.subject_centre(ts))
            tracks.append((sx - px, sy - py))
        return tracks

    def _motion_length(self, row_t, exposure):
        rows = row_t[np.linspace(0, self.height - 1, 9).round().astype(int)]
        return max(float(np.max(np.sum(np.hypot(np.diff(x, axis=1), np.diff(y, axis=1)), axis=1)))
                   for x, y in self._image_tracks(rows, exposure))

    def unseen_mask(self, k: int, t: float, margin: int = 4) -> np.ndarray:
        """Bool (H, W): rows of ``global_view(t)`` that frame ``k`` never saw, plus ``margin`` rows.

        A tilt read against the motion stretches the picture, so the frame sees fewer world rows
        than it has: a correction can only fill the rest from its border. World row of stored
        row y read at time t_y is y + pan_y(t_y) (the rendering formula in ``_sample``).
        """
        seen = self.ys + np.asarray(self.pan_path(self.row_times(k))[1], np.float64)
        wanted = self.ys + float(self.pan_path(t)[1])
        rows = (wanted < seen.min() + margin) | (wanted > seen.max() - margin)
        return np.broadcast_to(rows[:, None], (self.height, self.width)).copy()

    def subject_mask(self, t: float, dilate: int = 3, exposure: float | None = None) -> np.ndarray:
        """Bool (H, W): pixels the subject touches in ``global_view(t)``, dilated by ``dilate`` px."""
        mask = np.zeros((self.height, self.width), bool)
        if self.subject is None:
            return mask
        exposure = self.exposure if exposure is None else float(exposure)
        row_t = np.full(self.height, float(t))
        for dt in self._offsets(row_t, exposure):
            mask |= self._sample(row_t + dt, want_alpha=True)[1] > 0
        if dilate > 0:
            kernel = np.ones((2 * dilate + 1, 2 * dilate + 1), np.uint8)
            mask = cv2.dilate(mask.astype(np.uint8), kernel).astype(bool)
        return mask


def render_planar_clip(width: int, height: int, n_frames: int, fps, readout: float, pan_path: Callable,
                       subject: Subject | None = None, exposure: float = 0.0, line_order: str = "top-down",
                       scene: np.ndarray | None = None, noise: float = 0.0, seed: int = 0,
                       frame_times: Sequence[float] | None = None) -> PlanarClip:
    """Render a rolling-shutter clip of a translating camera over a photo; see :class:`PlanarClip`."""
    clip = PlanarClip(width, height, n_frames, fps, readout, pan_path, subject, exposure, line_order,
                      scene, noise, seed, frame_times)
    clip._render_frames()
    return clip


# --------------------------------------------------------------------------- files and metric

def write_clip(path, frames: Sequence[np.ndarray], fps, crf: int = 10, codec: str = "libx264",
               pix_fmt: str = "yuv420p", frame_times: Sequence[float] | None = None) -> None:
    """Encode RGB frames with PyAV (libx264 at ``crf``, or ffv1); explicit times go on a 90 kHz clock.

    The RGB to YUV conversion is swscale's default (BT.601 matrix, limited range).
    """
    import av

    rate = as_rate(fps)
    with av.open(str(path), "w") as out:
        stream = out.add_stream(codec, rate=rate)
        stream.height, stream.width = frames[0].shape[:2]
        stream.pix_fmt = pix_fmt
        stream.time_base = Fraction(1, 90000) if frame_times is not None else 1 / rate
        if codec in ("libx264", "libx265"):
            stream.options = {"crf": str(crf)}
        for k, rgb in enumerate(frames):
            frame = av.VideoFrame.from_ndarray(np.ascontiguousarray(rgb), format="rgb24")
            frame.pts = round(frame_times[k] * 90000) if frame_times is not None else k
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)


def gray8(img: np.ndarray) -> np.ndarray:
    if img.dtype != np.uint8:
        img = _to_uint8(img)
    return cv2.cvtColor(img, cv2.COLOR_RGB2GRAY) if img.ndim == 3 else img


def residual_flow(test: np.ndarray, truth: np.ndarray, mask: np.ndarray | None = None,
                  central: float = 0.76) -> float:
    """RMS residual optical flow (px) of ``test`` against ``truth``.

    Dense flow truth -> test by DIS optical flow (Kroeger et al., 2016, OpenCV's
    implementation), median flow removed (a whole-frame shift is not skew); pixels
    counted: the central ``central`` part of each axis, textured (smaller structure-tensor
    eigenvalue, Shi-Tomasi's measure, above a tenth of its 90th percentile there, where flow
    is determined), and not in ``mask`` (True = leave out, e.g. a moving subject).
    """
    a, b = gray8(truth), gray8(test)
    flow = cv2.DISOpticalFlow_create(cv2.DISOPTICAL_FLOW_PRESET_MEDIUM).calc(a, b, None)
    h, w = a.shape
    keep = np.zeros((h, w), bool)
    my, mx = int(round(h * (1 - central) / 2)), int(round(w * (1 - central) / 2))
    keep[my:h - my, mx:w - mx] = True
    if mask is not None:
        keep &= ~np.asarray(mask, bool)
    eig = cv2.cornerMinEigenVal(a, blockSize=7, ksize=3)
    if keep.sum() == 0:
        raise ValueError("no pixels left to measure the residual flow on")
    textured = keep & (eig > 0.1 * np.percentile(eig[keep], 90))
    if textured.sum() >= 200:
        keep = textured
    f = flow[keep].astype(np.float64)
    f -= np.median(f, axis=0)
    return float(np.sqrt(np.mean(np.sum(f * f, axis=1))))
