"""Synthetic rolling-shutter clips of a wall under a flickering light.

The clips come with exact truth (readout, line order, light frequency, per-frame
camera shake) so the flicker method of readout measurement can be tested and
benchmarked without a camera.

The physics rendered here (see skewfix/rowclock.py and README.md, "Finding a camera's
readout time"):

* row ``y`` of frame ``k`` starts its exposure at ``t_k + readout * y / H``
  (top-down) or ``t_k + readout * (H - 1 - y) / H`` (bottom-up), with
  ``t_k = k / fps`` taken from the exact rational frame rate;
* each row integrates the light over ``[t, t + exposure]``; the integral is
  evaluated exactly from the antiderivative of the light waveform, so the band
  contrast of a sine light follows ``|sinc(f * exposure)|`` (the frequency
  response of a box filter) and a square-wave (PWM) light keeps its harmonics,
  each attenuated by its own sinc factor;
* the wall (plain, or a texture you pass in) carries a smooth lighting gradient
  and moves with the camera shake; the lens vignetting does not move; the
  flicker bands belong to the sensor rows (they are time) and do not move either;
* the result goes through a power-law transfer curve, limited-range 8-bit luma,
  Gaussian sensor noise and H.264 (libx264, yuv420p) compression.

Safety: this module only draws pictures. If you reproduce these scenes with a
real flickering or strobing light, remember that flicker and strobe light can
trigger seizures in people with photosensitive epilepsy (keep the rig out of
sight of others, warn people, keep sessions short), and that mains-powered
light rigs are for qualified hands only.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

import numpy as np

from skewfix.rowclock import RowClock, frame_times_from_rate

__all__ = [
    "FlickerTruth",
    "light_mean",
    "render_flicker_clip",
]

WAVEFORMS = ("sine", "square", "ac")


@dataclass
class FlickerTruth:
    """What was rendered: the exact answer a measurement should give."""

    path: str
    width: int
    height: int
    fps: Fraction
    n_frames: int
    readout_s: float
    line_order: str
    light_hz: float
    waveform: str
    exposure_s: float
    frame_times: np.ndarray
    shift_y: np.ndarray = field(repr=False)
    shift_x: np.ndarray = field(repr=False)

    @property
    def frame_interval(self) -> float:
        return float(1 / self.fps)

    @property
    def band_period_rows(self) -> float:
        """Band period in rows, ``H / (f * readout)`` (inf for a global shutter)."""
        if self.readout_s <= 0:
            return float("inf")
        return self.height / (self.light_hz * self.readout_s)


def _antiderivative(t, light_hz, waveform, depth, duty, phase):
    """Exact integral of the light intensity from 0 to t (mean intensity 1)."""
    f = float(light_hz)
    if waveform == "sine":
        # L(t) = 1 + depth * sin(2 pi f t + phase)
        w = 2 * np.pi * f
        return t - depth / w * (np.cos(w * t + phase) - np.cos(phase))
    if waveform == "ac":
        # A lamp on an AC supply at f/2: power goes as v(t)^2 (Joule's law),
        # L(t) = (1 - depth) + 2 depth sin^2(2 pi (f/2) t + phase); the
        # instantaneous power has no thermal smoothing here.
        wm = 2 * np.pi * (f / 2)
        sin2_int = t / 2 - (np.sin(2 * (wm * t + phase)) - np.sin(2 * phase)) / (4 * wm)
        return (1 - depth) * t + 2 * depth * sin2_int
    if waveform == "square":
        # PWM: on for `duty` of each period. Levels chosen so the mean is 1 and
        # the on/off step is 2*depth:  lo = 1 - 2 depth duty, hi = lo + 2 depth.
        period = 1.0 / f
        lo = 1.0 - 2 * depth * duty
        step = 2 * depth
        u = t / period + phase / (2 * np.pi)
        whole = np.floor(u)
        on_time = (whole * duty + np.minimum(u - whole, duty)) * period
        u0 = phase / (2 * np.pi)
        on0 = (np.floor(u0) * duty + min(u0 - np.floor(u0), duty)) * period
        return lo * t + step * (on_time - on0)
    raise ValueError(f"waveform must be one of {WAVEFORMS}, not {waveform!r}")


def light_mean(t0, exposure_s, light_hz, waveform="sine", depth=0.3, duty=0.5, phase=0.0):
    """Mean light intensity over ``[t0, t0 + exposure_s]`` (instantaneous if 0).

    The exposure is a box filter on the light: for the sine waveform the
    modulation is scaled by ``sinc(f * exposure)`` exactly.
    """
    t0 = np.asarray(t0, dtype=np.float64)
    if exposure_s <= 0:
        h = 1e-9 / float(light_hz)  # a tiny box: the instantaneous value
        return (_antiderivative(t0 + h, light_hz, waveform, depth, duty, phase)
                - _antiderivative(t0, light_hz, waveform, depth, duty, phase)) / h
    a = _antiderivative(t0 + exposure_s, light_hz, waveform, depth, duty, phase)
    b = _antiderivative(t0, light_hz, waveform, depth, duty, phase)
    return (a - b) / exposure_s


def wall_shading(width: int, height: int, amplitude: float, seed: int = 0) -> np.ndarray:
    """Multiplicative shading of a plain wall, ``1 +- amplitude``: three smooth ripples with
    wavelengths of 0.3 to 1.1 frame heights at random angles and phases, and a soft spot
    (a Gaussian) of about a third of the height. Smooth, but no low-degree polynomial:
    what a real wall and its lighting do at the scale of the flicker bands."""
    rng = np.random.default_rng(1000 + int(seed))
    yy = (np.arange(height, dtype=np.float64)[:, None] + 0.5) / height
    xx = (np.arange(width, dtype=np.float64)[None, :] + 0.5) / height
    field = np.zeros((height, width))
    for _ in range(3):
        wavelength = rng.uniform(0.3, 1.1)
        angle = rng.uniform(-0.5, 0.5)  # mostly varying down the wall, as the bands do
        field += np.cos(2 * np.pi * (yy * np.cos(angle) + xx * np.sin(angle)) / wavelength
                        + rng.uniform(0, 2 * np.pi))
    cy, cx = rng.uniform(0.2, 0.8), rng.uniform(0.2, 0.8) * width / height
    field += 1.5 * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * 0.15 ** 2))
    field /= np.max(np.abs(field))
    return (1.0 + amplitude * field).astype(np.float32)


def _prepare_texture(texture, width, height):
    import cv2

    tex = np.asarray(texture)
    if tex.ndim == 3:
        if np.issubdtype(tex.dtype, np.integer):
            tex = tex.astype(np.float64) / np.iinfo(texture.dtype).max
        # luma weights of ITU-R BT.709: KR = 0.2126, KB = 0.0722 (ITU-T H.273 Table 4, code point 1)
        tex = tex[..., 0] * 0.2126 + tex[..., 1] * 0.7152 + tex[..., 2] * 0.0722
    elif tex.ndim == 2:
        if np.issubdtype(tex.dtype, np.integer):
            tex = tex.astype(np.float64) / np.iinfo(texture.dtype).max
    else:
        raise ValueError("texture must be a 2-D (grey) or 3-D (colour) array")
    tex = np.clip(tex.astype(np.float32), 0.0, 1.0)
    tex = cv2.resize(tex, (width, height), interpolation=cv2.INTER_AREA
                     if tex.shape[0] > height else cv2.INTER_CUBIC)
    # reflectance between 0.15 and 0.9: a wall poster, never pitch black
    return (0.15 + 0.75 * np.clip(tex, 0.0, 1.0)).astype(np.float32)


def render_flicker_clip(
    path,
    width: int,
    height: int,
    fps: Fraction,
    n_frames: int,
    readout_s: float,
    light_hz: float | None,
    line_order: str = "top-down",
    exposure_s: float = 1 / 1000,
    texture: np.ndarray | None = None,
    shake_px: float = 0.0,
    waveform: str = "sine",
    gradient: bool = True,
    vignette: bool = True,
    noise_sigma: float = 1.0,
    crf: int = 18,
    *,
    depth: float = 0.3,
    duty: float = 0.5,
    phase: float = 0.4,
    gamma: float = 1 / 2.2,
    preset: str = "veryfast",
    seed: int = 0,
    mains_hz: float | None = None,
    codec_options: dict | None = None,
    shading: float = 0.0,
) -> FlickerTruth:
    """Render a rolling-shutter clip of a wall under a flickering light; H.264.

    path        output file (.mp4 keeps the exact rational timestamps)
    width, height  frame size in pixels (both even)
    fps         frame rate as a Fraction, e.g. Fraction(30000, 1001)
    n_frames    number of frames
    readout_s   time from first to last row (0 = global shutter); at most 1/fps
    light_hz    intensity frequency of the light (100 or 120 for mains lamps);
                may be None with ``waveform="ac"``
    mains_hz    for ``waveform="ac"``: the AC supply frequency; the lamp's power
                goes as v(t)^2 (Joule's law), so it flickers at ``2 * mains_hz``
    line_order  "top-down" or "bottom-up"
    exposure_s  exposure (shutter) time; each row integrates the light over it
    texture     None for a plain wall, or an image (grey or RGB) used as the wall
    shake_px    std of the per-frame camera jitter, pixels (vertical and horizontal)
    waveform    "sine", "square" (PWM with ``duty``) or "ac" (lamp on AC mains)
    gradient    light falling off across the wall (moves with the wall)
    vignette    lens falloff towards the corners (fixed to the frame)
    noise_sigma std of the Gaussian sensor noise in 8-bit code values
    crf         libx264 constant rate factor
    depth       modulation depth of the light (0..1)
    gamma       exponent of the transfer curve applied to linear light
    preset      libx264 preset; ``codec_options`` adds further libx264 options
    seed        seed of the noise and shake
    shading     relative amplitude of the wall's own faint, smooth shading (e.g. 0.01): a
                few broad ripples and a soft spot at the scale of the bands, not a
                polynomial (`wall_shading`); it moves with the wall

    Returns a FlickerTruth. Pictures only: a real flickering/strobing test light
    can trigger photosensitive seizures, and mains-powered rigs are for
    qualified hands.
    """
    import av
    import cv2

    fps = Fraction(fps)
    width, height, n_frames = int(width), int(height), int(n_frames)
    if width % 2 or height % 2 or width <= 0 or height <= 0:
        raise ValueError("width and height must be positive and even (yuv420p)")
    if n_frames < 1:
        raise ValueError("n_frames must be at least 1")
    interval = float(1 / fps)
    if not 0 <= readout_s <= interval * (1 + 1e-9):
        raise ValueError("readout_s must be between 0 and the frame interval")
    if not 0 <= exposure_s <= interval * (1 + 1e-9):
        raise ValueError("exposure_s must be between 0 and the frame interval")
    if waveform not in WAVEFORMS:
        raise ValueError(f"waveform must be one of {WAVEFORMS}")
    if waveform == "ac":
        if mains_hz is None or not mains_hz > 0:
            raise ValueError('waveform="ac" needs mains_hz, the supply frequency')
        if light_hz is not None and abs(light_hz - 2 * mains_hz) > 1e-9 * light_hz:
            raise ValueError("an AC lamp flickers at twice mains_hz; leave light_hz None")
        light_hz = 2.0 * float(mains_hz)
    elif light_hz is None or not light_hz > 0:
        raise ValueError("light_hz must be a positive frequency")
    if not 0 <= depth <= 1:
        raise ValueError("depth must be between 0 and 1")

    rng = np.random.default_rng(seed)
    frame_times = frame_times_from_rate(n_frames, Fraction(fps))

    # ---- per-row light, exactly integrated over each row's exposure ----------
    clock = RowClock(frame_times, height, readout_s, line_order)
    starts = clock.row_time(np.arange(n_frames)[:, None], np.arange(height, dtype=np.float64)[None, :])
    light = light_mean(starts, exposure_s, light_hz, waveform, depth, duty, phase)
    light = light.astype(np.float32)  # (n_frames, height)

    # ---- the wall (moves with the camera) and the lens (does not) ------------
    yy = (np.arange(height, dtype=np.float32)[:, None] + 0.5) / height - 0.5
    xx = (np.arange(width, dtype=np.float32)[None, :] + 0.5) / width - 0.5
    if texture is None:
        wall = np.full((height, width), 0.7, dtype=np.float32)
    else:
        wall = _prepare_texture(texture, width, height)
    if shading > 0:
        wall = wall * wall_shading(width, height, shading, seed)
    if gradient:
        # a lamp up and to the left: brighter there, smooth falloff
        wall = wall / (1.0 + 0.5 * ((xx + 0.7) ** 2 + (yy + 0.6) ** 2))
    lens = np.ones((height, width), dtype=np.float32)
    if vignette:
        r2 = (xx * 2) ** 2 + (yy * 2 * height / width) ** 2  # 1 at the side edges
        lens = (1.0 / (1.0 + 0.25 * r2) ** 2).astype(np.float32)  # cos^4-like
    wall = wall.astype(np.float32)

    shift_y = rng.normal(0.0, shake_px, n_frames) if shake_px > 0 else np.zeros(n_frames)
    shift_x = rng.normal(0.0, shake_px, n_frames) if shake_px > 0 else np.zeros(n_frames)

    # peak exposure level: the brightest pixel at the brightest moment at 85 %
    scale = 0.85 / max(float(np.max(wall * lens)) * float(np.max(light)), 1e-6)

    path = str(path)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    container = av.open(path, mode="w")
    try:
        stream = container.add_stream("libx264", rate=fps)
        stream.width = width
        stream.height = height
        stream.pix_fmt = "yuv420p"
        stream.time_base = Fraction(1) / fps
        stream.codec_context.time_base = Fraction(1) / fps
        options = {"crf": str(int(crf)), "preset": preset}
        options.update({str(k): str(v) for k, v in (codec_options or {}).items()})
        stream.options = options
        chroma = np.full(2 * (height // 2) * (width // 2), 128, dtype=np.uint8)
        for k in range(n_frames):
            if shake_px > 0:
                m = np.float32([[1, 0, shift_x[k]], [0, 1, shift_y[k]]])
                wk = cv2.warpAffine(wall, m, (width, height), flags=cv2.INTER_CUBIC,
                                    borderMode=cv2.BORDER_REFLECT101)
            else:
                wk = wall
            linear = wk * lens * (scale * light[k][:, None])
            np.clip(linear, 0.0, 1.0, out=linear)
            code = 16.0 + 219.0 * np.power(linear, np.float32(gamma))
            if noise_sigma > 0:
                noise = rng.standard_normal((height, width), dtype=np.float32)
                code += noise * np.float32(noise_sigma)
            luma = np.clip(np.rint(code), 0, 255).astype(np.uint8)
            buf = np.concatenate([luma.reshape(-1), chroma]).reshape(-1, width)
            frame = av.VideoFrame.from_ndarray(buf, format="yuv420p")
            frame.pts = k
            frame.time_base = Fraction(1) / fps
            for packet in stream.encode(frame):
                container.mux(packet)
        for packet in stream.encode():
            container.mux(packet)
    finally:
        container.close()

    return FlickerTruth(
        path=path, width=width, height=height, fps=fps, n_frames=n_frames,
        readout_s=float(readout_s), line_order=line_order, light_hz=float(light_hz),
        waveform=waveform, exposure_s=float(exposure_s), frame_times=frame_times,
        shift_y=shift_y, shift_x=shift_x,
    )
