"""Saved motion: what a correction solved, as JSON (for machines) and CSV (for people).

Motion file format ``skewfix-motion``, version 2
------------------------------------------------

One JSON object (UTF-8). Times are seconds, lengths pixels of the stored frame
(origin top-left, pixel centres at integer coordinates, rows in stored order)::

    {
      "format": "skewfix-motion",          # always this string
      "version": 2,                         # integer; readers refuse versions they do not know
      "model": {                            # which motion model the curves belong to
        "kind": "similarity",               # or "rotation"
        ...                                 # the model's own parameters (see below)
      },
      "created_by": "skewfix 0.1.0",
      "source": {
        "path": "plate.%04d.tif",           # what was analysed (informative)
        "width": 1920, "height": 1080,      # stored frame size
        "frame_rate": "24000/1001",         # exact rational, or null if unknown
        "frame_count": 120,
        "first_number": 1001                # number of the first frame (a sequence: its file number)
      },
      "timing": {
        "readout_s": 0.0185,                # first-to-last-row time (0 = global shutter)
        "line_order": "top-down",           # or "bottom-up"
        "reference_line": "middle",         # row whose instant a corrected frame shows: middle, top, bottom
        "frame_times_s": [0.0, 0.0417, ...] # start of each frame (its first-read row), one per frame
      },
      "cuts_after": [57],                   # a cut between frame k and k+1 (0-based)
      "unmeasured_after": [12],             # pairs (k, k+1) that gave no motion (bridged smoothly)
      "inlier_fraction": 0.93,
      "segments": [                         # one per shot, in order, covering every frame once
        {
          "first_frame": 0, "last_frame": 57,
          "knot_start_s": -0.0417,          # uniform cubic B-spline grid
          "knot_spacing_s": 0.0104,
          "pan_x_px": [...],                # the model's curves: n >= 4 spline coefficients
          "pan_y_px": [...],                #   each, equal lengths
          "roll_rad": [...],
          "log_zoom": [...]
        }
      ]
    }

Version 1 had no ``model`` and always the four similarity curves; it is still read.

Row ``y`` of frame ``k`` starts at ``t = frame_times_s[k] + readout_s * f``
with ``f = y / height`` (top-down) or ``(height - 1 - y) / height``
(bottom-up). Each curve at time ``t`` is ``sum_m c[i + m] * B_m(s)`` for
``m = 0..3``, where ``u = (t - knot_start_s) / knot_spacing_s``,
``i = clamp(floor(u), 0, n - 4)``, ``s = u - i`` and the uniform cubic B-spline
weights are ``B_0 = (1-s)^3/6``, ``B_1 = (3s^3 - 6s^2 + 4)/6``,
``B_2 = (-3s^3 + 3s^2 + 3s + 1)/6``, ``B_3 = s^3/6`` (de Boor, 1978). The
curves say where a world-fixed point ``q`` is seen at time ``t``::

    p = c + exp(log_zoom) * R(roll) * (q - (pan_x, pan_y)),   c = ((width-1)/2, (height-1)/2)

so ``pan_x`` grows as the camera pans right (the picture moves left). The
similarity's parameters: none, or ``"translation_only": true`` (roll and zoom
held at zero).

The ``rotation`` model's curves are ``rot_x_rad``, ``rot_y_rad``,
``rot_z_rad``: the rotation vector ``r(t)`` of the camera's orientation ``R(t) =
exp([r]x)`` (Rodrigues' formula), world to camera, axes x right, y down,
z forward. Its parameters: ``focal_length_px`` ``f``, ``principal_point_px``
``[cx, cy]``, ``distortion`` ``[k1, k2]``, and ``focal_estimated`` /
``focal_uncertainty_px`` when the focal length was measured from the footage.
A world direction ``d`` is seen at time ``t`` at the pixel ``p`` with::

    (x, y, z) = R(t) d,   (u, v) = (x / z, y / z),   g = 1 + k1 (u^2 + v^2) + k2 (u^2 + v^2)^2
    p = (cx + f g u, cy + f g v)

Frame positions in the file (``first_frame``, ``last_frame``, ``cuts_after``,
``unmeasured_after``) count from 0 at the first frame; ``source.first_number``
is the first frame's number (a video's frames are numbered from 1; with ``--frames``
it is the part's first frame; files that have null here are read as 1).

The CSV has one row per frame: ``frame`` (the frame number, as the README's
"Frame numbers" states: a sequence's file number, a video's counted from 1), ``time_s`` (frame start),
``reference_time_s``, the curves at the reference time (similarity:
``pan_x_px``, ``pan_y_px``, ``roll_deg``, ``zoom`` as a factor; rotation:
``rot_x_deg``, ``rot_y_deg``, ``rot_z_deg``), and the skew the
correction removes: ``skew_x_px`` (how far the bottom row sat right of the top
row in the input, e.g. the lean of a vertical edge across the frame height) and
``skew_y_px`` (how much taller the input picture was than the corrected one).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from fractions import Fraction
from pathlib import Path

import numpy as np

from skewfix.decode import VideoInfo
from skewfix.framerange import first_frame_number
from skewfix.errors import InputError, SkewfixError, UsageProblem
from skewfix.files import write_whole
from skewfix.motion import MotionModel, MotionSegment
from skewfix.rowclock import LINE_ORDERS, REFERENCE_LINES, RowClock
from skewfix.warp import WarpMap, correction_map

FORMAT_NAME = "skewfix-motion"
FORMAT_VERSION = 2
VERSION_1_CURVES = ("pan_x_px", "pan_y_px", "roll_rad", "log_zoom")  # the similarity's, version 1's only


def csv_columns(model: MotionModel) -> tuple[str, ...]:
    """The CSV's columns for this model's curves."""
    curves = tuple(model.kind.describe(np.zeros((model.kind.n_curves, 1))))
    return ("frame", "time_s", "reference_time_s") + curves + ("skew_x_px", "skew_y_px")


def check_new_file(path: str | os.PathLike, force: bool, option: str) -> None:
    """Refuse an output file that is a folder, exists (without --force), or whose folder is
    not writable (a missing folder is made when the file is written): all before any work."""
    from skewfix.encode import check_writable_file_path

    check_writable_file_path(path, option, may_create=True)
    if Path(path).exists() and not force:
        raise UsageProblem(f"{option} {path}: already exists (add --force to replace it)")


# --------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------

def _floats(values) -> list[float]:
    return [float(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def motion_document(model: MotionModel, clock: RowClock, reference_line: str, info: VideoInfo) -> dict:
    """The motion file's content as a JSON-ready dict (format described in the module docstring)."""
    from skewfix import __version__

    clock.reference_row(reference_line)  # refuses an unknown name
    return {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "created_by": f"skewfix {__version__}",
        "source": {
            "path": str(info.path),
            "width": int(model.width),
            "height": int(model.height),
            "frame_rate": f"{info.rate.numerator}/{info.rate.denominator}" if info.rate else None,
            "frame_count": int(len(clock.frame_times)),
            "first_number": first_frame_number(info),
        },
        "timing": {
            "readout_s": float(clock.readout),
            "line_order": clock.line_order,
            "reference_line": reference_line,
            "frame_times_s": _floats(clock.frame_times),
        },
        "model": {"kind": model.kind.name, **model.kind.parameters()},
        "cuts_after": [int(k) for k in model.cuts],
        "unmeasured_after": [int(k) for k in model.unmeasured_pairs],
        "inlier_fraction": float(model.inlier_fraction),
        "segments": [
            {
                "first_frame": int(seg.first_frame),
                "last_frame": int(seg.last_frame),
                "knot_start_s": float(seg.knot_start),
                "knot_spacing_s": float(seg.knot_spacing),
                **{key: _floats(seg.coefficients[i]) for i, key in enumerate(model.kind.curves)},
            }
            for seg in model.segments
        ],
    }


def save_motion(path: str | os.PathLike, model: MotionModel, clock: RowClock, reference_line: str,
                info: VideoInfo) -> Path:
    """Write the solved motion as a ``skewfix-motion`` JSON file, whole or not at all."""
    text = json.dumps(motion_document(model, clock, reference_line, info), indent=1, allow_nan=False)
    return write_whole(path, text + "\n")


def map_skew(wm: WarpMap) -> tuple[float, float]:
    """Skew a correction map removes, px: (x shift of the bottom row against the top row,
    extra height), from the map's first and last rows, averaged over the columns."""
    top_x, top_y = wm.row(0)
    bottom_x, bottom_y = wm.row(wm.height - 1)
    lean = float(np.mean(bottom_x.astype(np.float64) - top_x))
    height = float(np.mean(bottom_y.astype(np.float64) - top_y)) - (wm.height - 1)
    return lean, height


def skew_per_frame(model: MotionModel, clock: RowClock, reference_line: str) -> np.ndarray:
    """(n_frames, 2) array of `map_skew` for every frame's correction map."""
    return np.array([map_skew(correction_map(model, clock, k, reference_line))
                     for k in range(len(clock.frame_times))]).reshape(-1, 2)


def motion_table(model: MotionModel, clock: RowClock, reference_line: str, first_number: int = 1) -> list[dict]:
    """One dict per frame with the CSV's columns; ``frame`` is numbered from ``first_number``."""
    skew = skew_per_frame(model, clock, reference_line)
    rows = []
    for k in range(len(clock.frame_times)):
        t_ref = float(clock.reference_time(k, reference_line))
        curves = model.kind.describe(model.segment_for(k).evaluate(np.array([t_ref])))
        rows.append({"frame": first_number + k, "time_s": float(clock.frame_times[k]), "reference_time_s": t_ref,
                     **{name: float(v[0]) for name, v in curves.items()},
                     "skew_x_px": float(skew[k, 0]), "skew_y_px": float(skew[k, 1])})
    return rows


def save_motion_csv(path: str | os.PathLike, model: MotionModel, clock: RowClock, reference_line: str,
                    first_number: int = 1) -> Path:
    """Write one CSV row per frame (columns: `csv_columns`), whole or not at all; the
    ``frame`` column holds frame numbers from ``first_number`` (a sequence's first file
    number, else 1: `skewfix.sequence.first_frame_number`)."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=csv_columns(model), lineterminator="\n")
    writer.writeheader()
    for row in motion_table(model, clock, reference_line, first_number):
        writer.writerow({key: (f"{value:.9g}" if isinstance(value, float) else value) for key, value in row.items()})
    return write_whole(path, buf.getvalue())


# --------------------------------------------------------------------------
# Reading
# --------------------------------------------------------------------------

class _Reader:
    """Looks values up by dotted path and says exactly what is wrong."""

    def __init__(self, path: str):
        self.path = path

    def fail(self, message: str):
        raise InputError(f"{self.path}: not a valid motion file: {message}")

    def get(self, obj: dict, key: str, where: str = ""):
        name = f"{where}.{key}" if where else key
        if not isinstance(obj, dict) or key not in obj:
            self.fail(f"missing '{name}'")
        return obj[key]

    def number(self, obj, key, where="", minimum=None, positive=False):
        value = self.get(obj, key, where)
        name = f"{where}.{key}" if where else key
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            self.fail(f"'{name}' must be a number")
        if minimum is not None and value < minimum:
            self.fail(f"'{name}' must be at least {minimum}")
        if positive and value <= 0:
            self.fail(f"'{name}' must be positive")
        return value

    def integer(self, obj, key, where="", minimum=None):
        value = self.get(obj, key, where)
        name = f"{where}.{key}" if where else key
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(f"'{name}' must be a whole number")
        if minimum is not None and value < minimum:
            self.fail(f"'{name}' must be at least {minimum}")
        return value

    def numbers(self, obj, key, where="", whole=False) -> np.ndarray:
        value = self.get(obj, key, where)
        name = f"{where}.{key}" if where else key
        ok = isinstance(value, list) and all(
            not isinstance(v, bool) and isinstance(v, int if whole else (int, float)) and math.isfinite(v)
            for v in value)
        if not ok:
            self.fail(f"'{name}' must be a list of {'whole numbers' if whole else 'numbers'}")
        return np.asarray(value, dtype=np.int64 if whole else np.float64)

    def choice(self, obj, key, allowed, where=""):
        value = self.get(obj, key, where)
        if value not in allowed:
            self.fail(f"'{where}.{key}' must be one of {', '.join(allowed)}, not {value!r}")
        return value


def _parse_rate(reader: _Reader, text) -> Fraction | None:
    if text is None:
        return None
    try:
        rate = Fraction(str(text))
    except (ValueError, ZeroDivisionError):
        reader.fail(f"'source.frame_rate' is not a rate: {text!r}")
    if rate <= 0:
        reader.fail("'source.frame_rate' must be positive")
    return rate


def _read_kind(r: _Reader, doc: dict, version: int, width: int, height: int):
    """The motion model a document names (version 1: always the similarity)."""
    from skewfix.models import kind_from_parameters, registered_kinds

    if version == 1:
        return kind_from_parameters("similarity", width, height, {})
    spec = r.get(doc, "model")
    if not isinstance(spec, dict):
        r.fail("'model' must be an object")
    name = r.choice(spec, "kind", registered_kinds(), "model")
    params = {key: value for key, value in spec.items() if key != "kind"}
    try:
        return kind_from_parameters(name, width, height, params)
    except (TypeError, ValueError) as exc:
        r.fail(f"'model' has parameters the {name} model does not take: {exc}")


def parse_motion(doc, path: str = "motion file"):
    """Validate a decoded motion document; returns (MotionModel, RowClock, reference_line, meta)."""
    r = _Reader(path)
    if not isinstance(doc, dict) or doc.get("format") != FORMAT_NAME:
        r.fail(f"its 'format' is not {FORMAT_NAME!r}")
    version = r.get(doc, "version")
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        r.fail("'version' must be a whole number from 1")
    if version > FORMAT_VERSION:
        raise InputError(f"{path}: motion file version {version} is newer than this skewfix reads "
                         f"(version {FORMAT_VERSION}); update skewfix")
    source, timing = r.get(doc, "source"), r.get(doc, "timing")
    width = r.integer(source, "width", "source", minimum=1)
    height = r.integer(source, "height", "source", minimum=1)
    n_frames = r.integer(source, "frame_count", "source", minimum=1)
    rate = _parse_rate(r, r.get(source, "frame_rate", "source"))
    first_number = source.get("first_number")
    if first_number is not None and (isinstance(first_number, bool) or not isinstance(first_number, int)):
        r.fail("'source.first_number' must be a whole number or null")
    readout = r.number(timing, "readout_s", "timing", minimum=0)
    line_order = r.choice(timing, "line_order", LINE_ORDERS, "timing")
    reference_line = r.choice(timing, "reference_line", REFERENCE_LINES, "timing")
    times = r.numbers(timing, "frame_times_s", "timing")
    if len(times) != n_frames:
        r.fail(f"'timing.frame_times_s' has {len(times)} entries for {n_frames} frames")
    if n_frames > 1 and not np.all(np.diff(times) > 0):
        r.fail("'timing.frame_times_s' must increase")
    kind = _read_kind(r, doc, version, width, height)
    segments_doc = r.get(doc, "segments")
    if not isinstance(segments_doc, list) or not segments_doc:
        r.fail("'segments' must be a non-empty list")
    segments, expect_first = [], 0
    for i, sd in enumerate(segments_doc):
        where = f"segments[{i}]"
        first = r.integer(sd, "first_frame", where, minimum=0)
        last = r.integer(sd, "last_frame", where, minimum=first)
        if first != expect_first:
            r.fail(f"'{where}' starts at frame {first}; the segments must cover every frame in order")
        expect_first = last + 1
        coefficients = [r.numbers(sd, key, where) for key in kind.curves]
        n_coef = len(coefficients[0])
        if n_coef < 4 or any(len(c) != n_coef for c in coefficients):
            r.fail(f"'{where}' needs the {len(kind.curves)} curves with the same number (at least 4) of coefficients")
        segments.append(MotionSegment(first, last, r.number(sd, "knot_start_s", where),
                                      r.number(sd, "knot_spacing_s", where, positive=True),
                                      np.stack(coefficients)))
    if expect_first != n_frames:
        r.fail(f"the segments cover {expect_first} frames, the source has {n_frames}")
    model = MotionModel(width, height, segments,
                        unmeasured_pairs=[int(k) for k in r.numbers(doc, "unmeasured_after", whole=True)]
                        if "unmeasured_after" in doc else [],
                        cuts=[int(k) for k in r.numbers(doc, "cuts_after", whole=True)],
                        inlier_fraction=float(doc.get("inlier_fraction", 1.0)), kind=kind)
    try:
        clock = RowClock(times, height, float(readout), line_order)
    except SkewfixError as exc:
        r.fail(str(exc))
    meta = {"version": version, "frame_rate": rate, "width": width, "height": height, "frame_count": n_frames,
            "first_number": first_number, "source": source.get("path"), "created_by": doc.get("created_by")}
    return model, clock, reference_line, meta


def load_motion(path: str | os.PathLike):
    """Read a motion file; returns (MotionModel, RowClock, reference_line, meta), or a one-line `InputError`."""
    text_path = str(path)
    if not os.path.isfile(text_path):
        raise InputError(f"{text_path}: no such motion file")
    try:
        with open(text_path, "r", encoding="utf-8") as fh:
            doc = json.load(fh)
    except UnicodeDecodeError:
        raise InputError(f"{text_path}: not a motion file (not UTF-8 text)") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{text_path}: not a motion file (JSON error at line {exc.lineno}: {exc.msg})") from None
    return parse_motion(doc, text_path)
