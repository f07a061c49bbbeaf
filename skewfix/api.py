"""skewfix's Python interface: correct clips, measure readouts, and use solved motion.

The names here are what ``import skewfix`` offers (`skewfix.__init__` loads
this module on first use, so ``import skewfix`` itself stays light):

* `correct` — remove the rolling shutter from a clip or image sequence, as
  ``skewfix fix`` does;
* `measure_readout` — measure a camera mode's readout time, as ``skewfix measure``;
* `load_motion` and `Motion` — a solved motion (a ``--save-motion`` file): its
  curves, its correction and reskew maps at any frame; `steady_pan` makes one
  for a camera panning at a known speed;
* `reskew_image` and `correct_image` — apply a motion to images held as arrays
  (CG layers, mattes, plates), at their own dtype and channel count.

Frames are named by their **frame numbers** (README, "Frame numbers"): a
sequence's file numbers, a video's frames counted from 1. Errors are
`skewfix.errors.SkewfixError` subclasses with a one-line message.

Examples
--------
Put the rolling shutter of a known pan onto a picture: a camera reading its
rows top-down in 20 ms while the picture moves right at 1000 px/s leans every
vertical edge by the distance moved during the readout, 1000 px/s x 20 ms =
20 px from the top row to the bottom row (less one row's share, ``(H - 1) / H``),
the textbook rolling-shutter skew:

>>> import numpy as np
>>> import skewfix
>>> pan = skewfix.steady_pan(width=160, height=100, frame_count=3, frame_rate=25,
...                          readout_s=0.020, velocity_px_s=(1000.0, 0.0))
>>> image = np.zeros((100, 160), np.float32)
>>> image[:, 78:82] = 1.0                       # a vertical bar, 4 px wide
>>> leaning = skewfix.reskew_image(image, pan, frame=2, interpolation="linear")
>>> def centre(row):
...     return float((row * np.arange(row.size)).sum() / row.sum())
>>> round(centre(leaning[-1]) - centre(leaning[0]), 1)   # 20 * 99 / 100
19.8
>>> round(centre(leaning[50]) - centre(image[50]), 1)   # the middle row is the reference instant
0.1
>>> restored = skewfix.correct_image(leaning, pan, frame=2, interpolation="linear")
>>> round(centre(restored[-1]) - centre(restored[0]), 2)
0.0
"""

from __future__ import annotations

import os
from fractions import Fraction
from typing import Callable

import numpy as np

__all__ = ["correct", "measure_readout", "load_motion", "Motion", "steady_pan", "reskew_image", "correct_image"]


class Motion:
    """A clip's solved camera motion: curves through time, the row clock and the frame numbers.

    Made by `load_motion` (a motion file from ``fix --save-motion`` or ``measure
    --save-motion``), by `correct` (``result.motion``), or by `steady_pan`.

    Parameters
    ----------
    model : skewfix.motion.MotionModel
        The fitted curves and the motion model that reads them.
    clock : skewfix.rowclock.RowClock
        Frame start times, readout time and line order.
    reference_line : {"middle", "top", "bottom"}
        The row whose instant a corrected frame shows.
    first_number : int
        The number of the first frame (a sequence's first file number; 1 for a video).
    frame_rate : fractions.Fraction or None
        The clip's frame rate, when known.

    Examples
    --------
    >>> import skewfix
    >>> pan = skewfix.steady_pan(320, 180, frame_count=5, frame_rate=24, readout_s=0.018,
    ...                          velocity_px_s=(-480.0, 0.0), first_number=1001)
    >>> list(pan.frame_numbers)
    [1001, 1002, 1003, 1004, 1005]
    >>> pan.curve_names
    ('pan_x_px', 'pan_y_px', 'roll_rad', 'log_zoom')
    >>> curves = pan.curves_at(1003)        # at the middle row's instant of frame 1003
    >>> round(curves["pan_x_px"], 3)        # the view has moved 480 px/s x (2/24 s + 0.009 s x 179/180)
    44.296
    >>> x, y = pan.correction_map(1003)
    >>> x.shape
    (180, 320)
    """

    def __init__(self, model, clock, reference_line: str = "middle", first_number: int = 1,
                 frame_rate: Fraction | None = None):
        clock.reference_row(reference_line)  # refuses an unknown name
        self.model, self.clock, self.reference_line = model, clock, reference_line
        self.first_number = int(first_number)
        self.frame_rate = frame_rate

    @property
    def width(self) -> int:
        return int(self.model.width)

    @property
    def height(self) -> int:
        return int(self.model.height)

    @property
    def frame_count(self) -> int:
        return len(self.clock.frame_times)

    @property
    def frame_numbers(self) -> range:
        """The frame numbers this motion covers, first to last."""
        return range(self.first_number, self.first_number + self.frame_count)

    @property
    def readout_s(self) -> float:
        return float(self.clock.readout)

    @property
    def line_order(self) -> str:
        return self.clock.line_order

    @property
    def curve_names(self) -> tuple[str, ...]:
        """The model's curves with their units, as the motion file names them."""
        return tuple(self.model.kind.curves)

    def index(self, frame: int) -> int:
        """The position (from 0) of frame number ``frame``; a `skewfix.errors.InputError` outside."""
        k = int(frame) - self.first_number
        if not 0 <= k < self.frame_count:
            from skewfix.errors import InputError

            raise InputError(f"the motion covers frames {self.first_number} to "
                             f"{self.first_number + self.frame_count - 1}; there is no frame {frame}")
        return k

    def time_of(self, frame: int, row: float | None = None) -> float:
        """When ``row`` of frame ``frame`` was read, seconds (default: the reference row)."""
        k = self.index(frame)
        if row is None:
            return float(self.clock.reference_time(k, self.reference_line))
        return float(self.clock.row_time(k, row))

    def curves_at(self, frame: int, row: float | None = None, raw: bool = False) -> dict[str, float]:
        """The motion curves at the instant ``row`` of ``frame`` was read (default: the reference row).

        Parameters
        ----------
        frame : int
            A frame number (README: frame numbers).
        row : float, optional
            A stored row (0 is the top); its read instant is used instead of the reference row's.
        raw : bool
            True for the curves as stored (`curve_names`: radians, log zoom); False (the
            default) for the units of the motion table (degrees, zoom factor).

        Returns
        -------
        dict
            Curve name to value.
        """
        k = self.index(frame)
        t = np.array([self.time_of(frame, row)])
        values = self.model.segment_for(k).evaluate(t)
        if raw:
            return {name: float(v[0]) for name, v in zip(self.curve_names, values)}
        return {name: float(np.asarray(v).ravel()[0]) for name, v in self.model.kind.describe(values).items()}

    def correction_map(self, frame: int, units: str = "pixels") -> tuple[np.ndarray, np.ndarray]:
        """The map that turns frame ``frame`` as shot into its global-shutter view.

        Parameters
        ----------
        frame : int
            A frame number.
        units : {"pixels", "normalized"}
            Absolute source positions in pixels (origin top-left, pixel centres at integers),
            or 0..1 across the frame with the origin at the bottom-left corner, y up
            (`skewfix.mapfiles`).

        Returns
        -------
        map_x, map_y : numpy.ndarray
            float32 arrays of the plate's size: where each output pixel reads the input.
        """
        from skewfix.mapfiles import in_units
        from skewfix.warp import correction_map

        wm = correction_map(self.model, self.clock, self.index(frame), self.reference_line, label=frame)
        return in_units(*wm.full(), units)

    def reskew_map(self, frame: int, units: str = "pixels",
                   size: tuple[int, int] | None = None) -> tuple[np.ndarray, np.ndarray]:
        """The map that puts the rolling shutter back onto a clean frame ``frame``.

        Parameters
        ----------
        frame : int
            A frame number.
        units : {"pixels", "normalized"}
            As for `correction_map`.
        size : (int, int), optional
            (width, height) of a clean frame larger than the plate and centred on it (CG with
            overscan); the map then covers that frame. Default: the plate's size.

        Returns
        -------
        map_x, map_y : numpy.ndarray
            float32 arrays of the clean frame's size.
        """
        from skewfix.mapfiles import in_units
        from skewfix.overscan import clean_frame_margins, Overscan
        from skewfix.warp import reskew_map

        plate = (self.width, self.height)
        size = tuple(size) if size is not None else plate
        overscan = None if size == plate else Overscan(margin=((size[0] - plate[0]) / 2, (size[1] - plate[1]) / 2))
        margins = clean_frame_margins(overscan, plate, size, "the clean frame", "this motion")
        wm = reskew_map(self.model, self.clock, self.index(frame), self.reference_line, overscan=margins)
        return in_units(*wm.full(), units)

    def save(self, path: str | os.PathLike, source: str = "") -> None:
        """Write this motion as a motion file (``skewfix-motion``, version 2), whole or not at all."""
        from skewfix.decode import VideoInfo
        from skewfix.motionfile import save_motion

        rate = self.frame_rate
        info = VideoInfo(path=source, width=self.width, height=self.height, pix_fmt="", bit_depth=8, codec="",
                         profile=None, rate=rate, time_base=Fraction(1) / rate if rate else Fraction(1),
                         frame_count=self.frame_count, duration_s=None, is_sequence=self.first_number != 1,
                         first_number=self.first_number)
        save_motion(path, self.model, self.clock, self.reference_line, info)

    def __repr__(self) -> str:
        return (f"Motion({self.width}x{self.height}, frames {self.frame_numbers.start}-{self.frame_numbers.stop - 1}, "
                f"readout {self.readout_s * 1e3:.3f} ms {self.line_order}, {self.model.kind.name})")


def load_motion(path: str | os.PathLike) -> Motion:
    """Read a motion file written by ``fix --save-motion`` or ``measure --save-motion``.

    Parameters
    ----------
    path : str or os.PathLike
        The JSON motion file (format ``skewfix-motion``, README: "Motion file").

    Returns
    -------
    Motion
        The motion, numbered like the clip it was solved on.

    Examples
    --------
    >>> import os, tempfile
    >>> import skewfix
    >>> path = os.path.join(tempfile.mkdtemp(), "pan.motion.json")
    >>> skewfix.steady_pan(320, 180, 4, 25, 0.015, (300.0, 0.0), first_number=1001).save(path)
    >>> motion = skewfix.load_motion(path)
    >>> motion
    Motion(320x180, frames 1001-1004, readout 15.000 ms top-down, similarity)
    >>> round(motion.curves_at(1001, row=0)["pan_x_px"], 6)   # row 0 of the first frame is read at t = 0
    0.0
    """
    from skewfix.motionfile import load_motion as read

    model, clock, reference_line, meta = read(path)
    first = meta.get("first_number")
    return Motion(model, clock, reference_line, first if first is not None else 1, meta.get("frame_rate"))


def steady_pan(width: int, height: int, frame_count: int, frame_rate, readout_s: float,
               velocity_px_s: tuple[float, float], *, line_order: str = "top-down",
               reference_line: str = "middle", first_number: int = 1) -> Motion:
    """The motion of a camera panning at constant speed, seen as the picture moving.

    Parameters
    ----------
    width, height : int
        The plate's size in pixels.
    frame_count : int
        Frames covered.
    frame_rate : int, str or fractions.Fraction
        Frame rate (``24``, ``"24000/1001"``); frame ``k`` starts at ``k / frame_rate``.
    readout_s : float
        Readout time, seconds (0 for a global shutter).
    velocity_px_s : (float, float)
        How fast the picture moves, pixels per second (x right, y down): a camera panning
        left moves the picture right.
    line_order : {"top-down", "bottom-up"}
    reference_line : {"middle", "top", "bottom"}
    first_number : int
        The first frame's number.

    Returns
    -------
    Motion
        A similarity motion with straight-line pan curves (a uniform cubic B-spline
        reproduces a straight line exactly when its coefficients lie on it at the
        knots shifted by one spacing: de Boor, *A Practical Guide to Splines*, 1978).
    """
    from skewfix.models import make_kind
    from skewfix.motion import MotionModel, MotionSegment
    from skewfix.rowclock import RowClock, frame_times_from_rate, parse_rate

    rate = frame_rate if isinstance(frame_rate, Fraction) else \
        Fraction(frame_rate) if isinstance(frame_rate, int) else parse_rate(str(frame_rate))
    times = frame_times_from_rate(int(frame_count), rate)
    clock = RowClock(times, int(height), float(readout_s), line_order)
    interval = float(1 / rate)
    spacing, start = interval / 4, -interval
    n_coef = int(np.ceil((times[-1] + 3 * interval - start) / spacing)) + 3
    knots = start + (np.arange(n_coef) - 1) * spacing
    coefficients = np.zeros((4, n_coef))
    # the similarity images a world point q at c + (q - X(t)): the picture moves by -dX/dt
    coefficients[0], coefficients[1] = -velocity_px_s[0] * knots, -velocity_px_s[1] * knots
    kind = make_kind("similarity", int(width), int(height), translation_only=True)
    model = MotionModel(int(width), int(height), [MotionSegment(0, int(frame_count) - 1, start, spacing, coefficients)],
                        kind=kind, model_reason="a steady pan given by its speed")
    return Motion(model, clock, reference_line, first_number, rate)


def _remap_image(image: np.ndarray, map_x: np.ndarray, map_y: np.ndarray, border: str,
                 interpolation: str) -> np.ndarray:
    """Resample an HxW or HxWxC array (any number of channels; float16 through float32)."""
    from skewfix.warp import remap_plane

    if image.dtype not in (np.uint8, np.uint16, np.float32, np.float16, np.float64):
        raise TypeError(f"images must be uint8, uint16 or floating point, not {image.dtype}")
    work = image.astype(np.float32) if image.dtype in (np.float16, np.float64) else image
    if work.ndim == 2 or work.shape[2] <= 4:
        out = remap_plane(np.ascontiguousarray(work), map_x, map_y, border, 0, interpolation)
        if work.ndim == 3 and out.ndim == 2:
            out = out[..., None]
    else:
        out = np.concatenate([_remap_image(work[..., i:i + 4], map_x, map_y, border, interpolation)
                              for i in range(0, work.shape[2], 4)], axis=2)
    return out.astype(image.dtype, copy=False)


def reskew_image(image: np.ndarray, motion: Motion, frame: int, *, border: str = "edge",
                 interpolation: str = "cubic") -> np.ndarray:
    """Put the rolling shutter of ``motion`` at ``frame`` onto a clean image.

    Parameters
    ----------
    image : numpy.ndarray
        HxW or HxWxC, uint8, uint16 or float (half floats are resampled as float32 and
        returned as half; values are not clipped). The plate's size, or larger and centred
        on it (CG with overscan): then the whole image is given the rolling shutter.
    motion : Motion
    frame : int
        A frame number of ``motion``.
    border : {"edge", "black"}
        What fills pixels whose source lies outside the image.
    interpolation : {"cubic", "linear"}

    Returns
    -------
    numpy.ndarray
        Same shape and dtype as ``image``.

    References
    ----------
    The row clock and the rolling-shutter model: Forssén & Ringaby, "Rectifying rolling
    shutter video from hand-held devices", CVPR 2010. Cubic convolution: Keys, 1981.
    """
    h, w = image.shape[:2]
    map_x, map_y = motion.reskew_map(frame, size=(w, h))
    return _remap_image(image, map_x, map_y, border, interpolation)


def correct_image(image: np.ndarray, motion: Motion, frame: int, *, border: str = "edge",
                  interpolation: str = "cubic") -> np.ndarray:
    """Remove the rolling shutter of ``motion`` at ``frame`` from an image of the plate's size.

    Parameters and returns as `reskew_image` (the image must be the plate's size).

    References
    ----------
    Forssén & Ringaby, CVPR 2010 (per-row correction through the camera's motion).
    """
    h, w = image.shape[:2]
    if (w, h) != (motion.width, motion.height):
        from skewfix.errors import InputError

        raise InputError(f"the image is {w}x{h} but the motion was solved on {motion.width}x{motion.height} frames")
    map_x, map_y = motion.correction_map(frame)
    return _remap_image(image, map_x, map_y, border, interpolation)


def correct(input: str | os.PathLike, output: str | os.PathLike, readout, *, fps=None,
            line_order: str | None = None, reference_line: str = "middle", border: str = "edge",
            model: str = "auto", hfov: str | float | None = None, focal_length: str | None = None,
            lens_distortion: str | None = None, interpolation: str = "cubic", depth: int | None = None,
            save_motion: str | os.PathLike | None = None, force: bool = False,
            progress: Callable[[str, int, int | None], None] | None = None):
    """Remove the rolling shutter from a clip or image sequence and write the result, as ``skewfix fix``.

    Parameters
    ----------
    input, output : str or os.PathLike
        A clip, or a numbered sequence (``plate.%04d.exr``, ``plate.####.tif``).
    readout : float or str
        Seconds (``0.0185``), a duration (``"18.5ms"``), ``"auto"`` (measured from the clip's
        own motion) or a saved camera's name.
    fps : int, str or fractions.Fraction, optional
        Frame rate of a sequence input.
    line_order, reference_line, border, model, hfov, focal_length, lens_distortion, interpolation, depth
        As the ``fix`` options of the same names (README: "Correcting a clip").
    save_motion : str or os.PathLike, optional
        Also write the solved motion as a motion file.
    force : bool
        Replace existing outputs.
    progress : callable, optional
        ``progress(stage, done, total)`` called as frames are done.

    Returns
    -------
    skewfix.pipeline.FixResult
        With ``readout``, ``line_order``, ``frames_written``, ``notes`` and the solved
        ``clock`` and ``model``; ``result.motion`` is the same as a `Motion`.

    References
    ----------
    Lucas & Kanade, 1981 (tracking); Eilers & Marx, 1996 (P-spline motion curves);
    Forssén & Ringaby, CVPR 2010 (rolling-shutter correction). DEVELOPERS.md describes the stages.

    Examples
    --------
    A plate rendered with the rolling shutter of a known pan (a scikit-image photograph;
    the picture moves 20 px left per frame), corrected with its readout:

    >>> import os, tempfile
    >>> import cv2, numpy as np
    >>> from skimage import data
    >>> import skewfix
    >>> photo = cv2.cvtColor(data.astronaut(), cv2.COLOR_RGB2BGR)
    >>> pan = skewfix.steady_pan(224, 160, 10, 25, 0.030, (-500.0, 0.0))
    >>> folder = tempfile.mkdtemp()
    >>> clean = {}
    >>> for k, number in enumerate(pan.frame_numbers):
    ...     clean[number] = photo[200:360, 60 + 20 * k: 284 + 20 * k]
    ...     shot = skewfix.reskew_image(clean[number], pan, number)
    ...     _ = cv2.imwrite(os.path.join(folder, f"plate.{number:04d}.png"), shot)
    >>> result = skewfix.correct(os.path.join(folder, "plate.%04d.png"), os.path.join(folder, "fixed.%04d.png"),
    ...                          "30ms", fps=25, save_motion=os.path.join(folder, "plate.motion.json"))
    >>> result.frames_written
    10
    >>> fixed = cv2.imread(os.path.join(folder, "fixed.0005.png")).astype(float)
    >>> before = cv2.imread(os.path.join(folder, "plate.0005.png")).astype(float)
    >>> inner = np.s_[20:-20, 20:-20]
    >>> error_before = np.abs(before - clean[5])[inner].mean()
    >>> error_after = np.abs(fixed - clean[5])[inner].mean()
    >>> bool(error_after < 0.5 * error_before)
    True
    >>> motion = skewfix.load_motion(os.path.join(folder, "plate.motion.json"))
    >>> round(motion.curves_at(6)["pan_x_px"] - motion.curves_at(5)["pan_x_px"])   # the view moved 20 px a frame
    20
    """
    from skewfix.cameras import plan_readout
    from skewfix.models.choice import MODELS, parse_lens
    from skewfix.motionfile import check_new_file
    from skewfix.motionfile import save_motion as write_motion
    from skewfix.pipeline import FixOptions, fix_clip
    from skewfix.rowclock import parse_rate
    from skewfix.sequence import check_float_output, check_sequence_output, first_frame_number, is_pattern, open_sink

    input, output = str(input), str(output)
    if model not in MODELS:
        from skewfix.errors import UsageProblem

        raise UsageProblem(f"model must be one of {', '.join(MODELS)}, not {model!r}")
    lens = None
    if hfov is not None or focal_length is not None or lens_distortion is not None:
        lens = parse_lens(None if hfov is None else str(hfov), focal_length, lens_distortion)
    text = f"{float(readout)!r}s" if isinstance(readout, (int, float)) else str(readout)
    plan = plan_readout(text, line_order, lens)
    rate = fps if isinstance(fps, Fraction) or fps is None else parse_rate(str(fps))
    check_float_output(input, output)
    if is_pattern(output):
        check_sequence_output(input, output, force)
    if save_motion is not None:
        check_new_file(save_motion, force, "save_motion")
    options = FixOptions(readout=plan.seconds or 0.0, readout_origin=plan.origin, line_order=plan.line_order,
                         reference_line=reference_line, border=border, force=force, fps=rate,
                         interpolation=interpolation, model=model, lens=plan.lens)

    def sink_factory(info, template=None):
        return open_sink(input, output, info, depth=depth, force=force, template=template)

    result = fix_clip(input, output, options, progress or (lambda *_: None), readout_resolver=plan.resolver,
                      sink_factory=sink_factory)
    if save_motion is not None:
        write_motion(save_motion, result.model, result.clock, reference_line, result.info)
    result.motion = Motion(result.model, result.clock, reference_line, first_frame_number(result.info),
                           result.info.rate)
    return result


def measure_readout(clip: str | os.PathLike, *, method: str = "auto", light_hz: float | None = None,
                    exposure_s: float | None = None, fps=None, model: str = "auto"):
    """Measure the readout time of the camera mode that shot ``clip``, as ``skewfix measure``.

    Parameters
    ----------
    clip : str or os.PathLike
        A clip or numbered sequence.
    method : {"auto", "flicker", "pan", "motion"}
        ``flicker``: a plain wall under a flickering light (give ``light_hz``); ``pan``:
        steady pans across vertical edges; ``motion``: ordinary footage whose motion
        changes. ``auto`` tries flicker (with ``light_hz``), then motion, then pan.
    light_hz : float, optional
        The light's flicker frequency (100 or 120 for mains lighting on 50 or 60 Hz).
    exposure_s : float, optional
        The shutter time, seconds, when known (flicker).
    fps : optional
        Frame rate of a sequence input.
    model : {"auto", "similarity", "rotation"}
        The motion model for the motion method.

    Returns
    -------
    skewfix.measure.result.ReadoutEstimate
        ``readout_s``, ``uncertainty_s``, ``line_order``, ``method``, ``frames_used``, ``notes``.

    References
    ----------
    README, "Measuring a readout"; the flicker method fits the banding of a light whose
    brightness follows the mains (IEC 60038 frequencies) row by row.

    Examples
    --------
    A plain wall under a 100 Hz light, filmed at 30 fps by a sensor that reads its 120
    rows top-down in 20 ms: row ``y`` of frame ``k`` is read at ``k / 30 + 0.020 * y / 120``
    and shows the light's brightness at that instant.

    >>> import os, tempfile
    >>> import cv2, numpy as np
    >>> import skewfix
    >>> folder = tempfile.mkdtemp()
    >>> rows = np.arange(120)[:, None]
    >>> for k in range(24):
    ...     t = k / 30 + 0.020 * rows / 120
    ...     wall = 128 + 40 * np.sin(2 * np.pi * 100 * t)
    ...     _ = cv2.imwrite(os.path.join(folder, f"wall.{k + 1:04d}.png"),
    ...                     np.repeat(np.rint(wall), 160, axis=1).astype(np.uint8))
    >>> estimate = skewfix.measure_readout(os.path.join(folder, "wall.%04d.png"), method="flicker",
    ...                                    light_hz=100, fps=30)
    >>> bool(abs(estimate.readout_s - 0.020) < 0.0005), estimate.line_order
    (True, 'top-down')
    """
    from skewfix.cli.measure import _Measurer
    from skewfix.errors import MeasurementRefused, UsageProblem
    from skewfix.rowclock import parse_rate

    methods = ("auto", "flicker", "pan", "motion")
    if method not in methods:
        raise UsageProblem(f"method must be one of {', '.join(methods)}, not {method!r}")
    if method == "flicker" and light_hz is None:
        raise UsageProblem("the flicker method needs the light's frequency (light_hz)")
    rate = fps if isinstance(fps, Fraction) or fps is None else parse_rate(str(fps))
    measurer = _Measurer(str(clip), rate, light_hz, exposure_s, lambda *_: None, model)
    order = [method] if method != "auto" else (["flicker"] if light_hz is not None else []) + ["motion", "pan"]
    reasons = []
    for name in order:
        try:
            return measurer.run(name)
        except MeasurementRefused as exc:
            if method != "auto":
                raise
            reasons.append(f"{name}: {exc}")
    raise MeasurementRefused(f"{clip}: no method could measure the readout ({'; '.join(reasons)})")
