"""Saved cameras: a measured readout kept under a name for later use.

Each camera mode is one small text file, ``NAME.camera``, in

* ``$SKEWFIX_CONFIG_DIR/cameras/`` when that variable is set, else
* ``$XDG_CONFIG_HOME/skewfix/cameras/`` when that is set, else
* ``~/.config/skewfix/cameras/``.

Names are 1 to 64 characters: letters, digits, ``-``, ``_`` and ``.``,
starting with a letter (so ``fix --readout NAME`` cannot mistake one for a
duration); ``auto`` is taken.

The file format ("skewfix camera v1")::

    skewfix camera v1
    # deckcam-uhd25: measured by skewfix; edit the notes freely
    name: deckcam-uhd25
    readout_ms: 18.5123
    uncertainty_ms: 0.0412
    line_delay_us: 8.5705
    line_order: top-down
    method: flicker
    width: 3840
    height: 2160
    frame_rate: 25/1
    measured: 2024-05-01T14:03:22+02:00
    clip: wall_100hz.mp4
    note: bands (nearly) still: a smooth background was fitted per frame

* The first line that is neither blank nor a comment must be the header
  ``skewfix camera v1``. Lines starting with ``#`` are comments.
* Every other line is ``key: value`` (the key in lower case, the value is the
  rest of the line with surrounding spaces removed). ``note`` may repeat; any
  other key given twice is an error. Unknown keys are kept and ignored.
* ``readout_ms`` (first to last row, milliseconds) is required and is what
  ``fix --readout NAME`` uses. ``line_order`` is ``top-down``, ``bottom-up``
  or ``undetermined``. ``line_delay_us`` (readout per row, microseconds),
  ``uncertainty_ms`` (one sigma), ``method``, ``width`` and ``height``
  (stored pixels), ``frame_rate`` (an exact fraction such as ``24000/1001``),
  ``measured`` (ISO 8601 date and time) and ``clip`` (the test clip's file
  name) describe the measurement. The file's name, not its ``name:`` line,
  is the camera's name.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from datetime import datetime
from fractions import Fraction
from pathlib import Path

from skewfix.errors import InputError, UsageProblem
from skewfix.files import write_whole
from skewfix.rowclock import parse_duration

HEADER = "skewfix camera v1"
SUFFIX = ".camera"
ORDERS = ("top-down", "bottom-up", "undetermined")
_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9._-]{0,63}$")
_LOOKS_LIKE_NAME = re.compile(r"^[A-Za-z][\w.\-]*$")  # not a duration: a camera name, good or bad
_KEY = re.compile(r"^([a-z][a-z0-9_]*)\s*:\s?(.*)$")
_RESERVED = {"auto"}
# Frame rates closer than this count as the same mode (29.97 and 30 are one
# sensor mode on most bodies: common practice).
_RATE_TOLERANCE = 0.002


@dataclass
class SavedCamera:
    """One saved camera mode (see the module docstring for the file format)."""

    name: str
    readout_s: float
    line_order: str
    uncertainty_s: float | None = None
    line_delay_s: float | None = None
    method: str | None = None
    width: int | None = None
    height: int | None = None
    frame_rate: Fraction | None = None
    measured: str | None = None
    clip: str | None = None
    notes: list[str] = field(default_factory=list)
    path: Path | None = None

    def mode_text(self) -> str:
        """``3840x2160, 25 fps`` (what is known of the measured mode)."""
        parts = []
        if self.width and self.height:
            parts.append(f"{self.width}x{self.height}")
        if self.frame_rate:
            parts.append(f"{rate_text(self.frame_rate)} fps")
        return ", ".join(parts) or "an unrecorded mode"


def rate_text(rate: Fraction) -> str:
    """``25``, ``23.976``, ``29.97`` for display."""
    rate = Fraction(rate)
    if rate.denominator == 1:
        return str(rate.numerator)
    return f"{float(rate):.3f}".rstrip("0").rstrip(".")


def config_dir() -> Path:
    """skewfix's configuration folder (``SKEWFIX_CONFIG_DIR``, XDG, or ~/.config/skewfix)."""
    own = os.environ.get("SKEWFIX_CONFIG_DIR")
    if own:
        return Path(own).expanduser()
    xdg = os.environ.get("XDG_CONFIG_HOME")
    if xdg and Path(xdg).is_absolute():  # the XDG spec says to ignore relative paths
        return Path(xdg) / "skewfix"
    return Path.home() / ".config" / "skewfix"


def cameras_dir() -> Path:
    return config_dir() / "cameras"


def check_name(name: str) -> str:
    """The name itself if it can be a saved camera's, else UsageProblem."""
    text = str(name).strip()
    if not _NAME.match(text) or text.lower() in _RESERVED:
        raise UsageProblem(
            f"not a usable camera name: {name!r} (1-64 letters, digits, '-', '_' or '.', "
            "starting with a letter; 'auto' is taken)")
    return text


def camera_path(name: str) -> Path:
    return cameras_dir() / f"{check_name(name)}{SUFFIX}"


def _number(text: str, what: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise ValueError(f"{what} is not a number: {text!r}") from None
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"{what} must be a finite number, not negative: {text!r}")
    return value


def _whole(text: str, what: str) -> int:
    if not re.fullmatch(r"\d+", text):
        raise ValueError(f"{what} is not a whole number: {text!r}")
    return int(text)


def _fraction(text: str) -> Fraction:
    try:
        rate = Fraction(text.replace(" ", ""))
    except (ValueError, ZeroDivisionError):
        raise ValueError(f"frame_rate is not a fraction such as 24000/1001: {text!r}") from None
    if rate <= 0:
        raise ValueError(f"frame_rate must be positive: {text!r}")
    return rate


def parse_camera(text: str, name: str) -> SavedCamera:
    """Read the text of a camera file; ValueError (with the line number) if it is malformed."""
    values: dict[str, str] = {}
    notes: list[str] = []
    header_seen = False
    for number, raw in enumerate(text.splitlines(), 1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        if not header_seen:
            if line.lower() != HEADER:
                if line.lower().startswith("skewfix camera"):
                    raise ValueError(f"line {number}: {line!r} is a format this skewfix does not know "
                                     f"(it reads {HEADER!r})")
                raise ValueError(f"line {number}: expected the header {HEADER!r}")
            header_seen = True
            continue
        match = _KEY.match(line)
        if not match:
            raise ValueError(f"line {number}: expected 'key: value', got {line!r}")
        key, value = match.group(1), match.group(2).strip()
        if key == "note":
            if value:
                notes.append(value)
            continue
        if key in values:
            raise ValueError(f"line {number}: {key} is given twice")
        values[key] = value
    if not header_seen:
        raise ValueError(f"no {HEADER!r} header")
    if "readout_ms" not in values:
        raise ValueError("readout_ms is missing")
    order = values.get("line_order", "undetermined") or "undetermined"
    if order not in ORDERS:
        raise ValueError(f"line_order must be one of {', '.join(ORDERS)}, not {order!r}")
    get = values.get
    return SavedCamera(
        name=name,
        readout_s=_number(values["readout_ms"], "readout_ms") * 1e-3,
        line_order=order,
        uncertainty_s=_number(get("uncertainty_ms"), "uncertainty_ms") * 1e-3 if get("uncertainty_ms") else None,
        line_delay_s=_number(get("line_delay_us"), "line_delay_us") * 1e-6 if get("line_delay_us") else None,
        method=get("method") or None,
        width=_whole(get("width"), "width") if get("width") else None,
        height=_whole(get("height"), "height") if get("height") else None,
        frame_rate=_fraction(get("frame_rate")) if get("frame_rate") else None,
        measured=get("measured") or None,
        clip=get("clip") or None,
        notes=notes,
    )


def format_camera(camera: SavedCamera) -> str:
    """The file text for a camera (the inverse of `parse_camera`)."""
    def one_line(text) -> str:
        return " ".join(str(text).split())

    lines = [HEADER, f"# {camera.name}: readout measured by skewfix; lines are 'key: value', "
                     "'#' starts a comment, notes may be edited freely",
             f"name: {camera.name}", f"readout_ms: {camera.readout_s * 1e3:.4f}"]
    if camera.uncertainty_s is not None and math.isfinite(camera.uncertainty_s):
        lines.append(f"uncertainty_ms: {camera.uncertainty_s * 1e3:.4f}")
    if camera.line_delay_s is not None:
        lines.append(f"line_delay_us: {camera.line_delay_s * 1e6:.4f}")
    lines.append(f"line_order: {camera.line_order}")
    for key in ("method", "width", "height"):
        value = getattr(camera, key)
        if value is not None:
            lines.append(f"{key}: {one_line(value)}")
    if camera.frame_rate is not None:
        rate = Fraction(camera.frame_rate)
        lines.append(f"frame_rate: {rate.numerator}/{rate.denominator}")
    for key in ("measured", "clip"):
        value = getattr(camera, key)
        if value:
            lines.append(f"{key}: {one_line(value)}")
    lines.extend(f"note: {one_line(note)}" for note in camera.notes if one_line(note))
    return "\n".join(lines) + "\n"


def save_camera(name: str, estimate, info, clip: str | None = None) -> Path:
    """Save a `ReadoutEstimate` measured on a clip with `VideoInfo` ``info`` as NAME.

    Replaces a camera of the same name. Returns the file written.
    """
    name = check_name(name)
    if not (math.isfinite(estimate.readout_s) and estimate.readout_s >= 0):
        raise UsageProblem("the measurement has no finite readout to save")
    rate = info.rate
    if rate is None and estimate.frame_interval:
        rate = Fraction(1.0 / estimate.frame_interval).limit_denominator(1001)
    camera = SavedCamera(
        name=name,
        readout_s=float(estimate.readout_s),
        line_order=estimate.line_order if estimate.line_order in ORDERS else "undetermined",
        uncertainty_s=float(estimate.uncertainty_s),
        line_delay_s=float(estimate.readout_s) / int(info.height),
        method=estimate.method,
        width=int(info.width),
        height=int(info.height),
        frame_rate=Fraction(rate) if rate else None,
        measured=datetime.now().astimezone().isoformat(timespec="seconds"),
        clip=clip or (Path(str(info.path)).name if getattr(info, "path", None) else None),
        notes=list(estimate.notes),
    )
    path = camera_path(name)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_whole(path, format_camera(camera))
    except OSError as exc:
        raise InputError(f"could not save camera {name!r} in {path.parent}: {exc.strerror or exc}") from None
    return path


def _read(path: Path, name: str) -> SavedCamera:
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"saved camera {name!r} ({path}) cannot be read: {exc}") from None
    try:
        camera = parse_camera(text, name)
    except ValueError as exc:
        raise InputError(f"saved camera {name!r} ({path}) is malformed: {exc}") from None
    camera.path = path
    return camera


def load_camera(name: str) -> SavedCamera:
    """The saved camera NAME; UsageProblem if there is none, InputError if its file is broken."""
    name = check_name(name)
    path = camera_path(name)
    if not path.is_file():
        raise UsageProblem(f"no saved camera called {name!r} (skewfix cameras list shows saved ones)")
    return _read(path, name)


def list_cameras(problems: list | None = None) -> list[SavedCamera]:
    """Every saved camera, by name; unreadable files go to ``problems`` as (name, message)."""
    folder = cameras_dir()
    if not folder.is_dir():
        return []
    cameras = []
    for path in sorted(folder.glob(f"*{SUFFIX}")):
        name = path.name[: -len(SUFFIX)]
        if not _NAME.match(name):
            continue
        try:
            cameras.append(_read(path, name))
        except InputError as exc:
            if problems is not None:
                problems.append((name, str(exc)))
    return cameras


def remove_camera(name: str) -> Path:
    """Delete the saved camera NAME; returns the file removed."""
    path = camera_path(name)
    if not path.is_file():
        raise UsageProblem(f"no saved camera called {name!r} (skewfix cameras list shows saved ones)")
    try:
        path.unlink()
    except OSError as exc:
        raise InputError(f"could not remove {path}: {exc.strerror or exc}") from None
    return path


def mode_differences(camera: SavedCamera, info) -> list[str]:
    """How the clip's mode (resolution, frame rate) differs from the camera's measured one."""
    out = []
    if camera.width and camera.height and (camera.width, camera.height) != (info.width, info.height):
        out.append("resolution")
    if camera.frame_rate and info.rate:
        saved, clip = float(camera.frame_rate), float(info.rate)
        if abs(saved - clip) > _RATE_TOLERANCE * saved:
            out.append("frame rate")
    return out


def _clip_mode(info) -> str:
    mode = f"{info.width}x{info.height}"
    return f"{mode} at {rate_text(info.rate)} fps" if info.rate else f"{mode} (frame rate not stated)"


def camera_resolver(name: str, line_order: str | None):
    """``fix --readout NAME``: (readout_s, line order, origin, resolver) for `readout_plan`.

    ``resolver(analysis) -> (readout_s, line_order, origin)`` compares the
    clip's resolution and frame rate with the mode the camera was measured in
    and says so in the origin text when they differ.
    """
    try:
        camera = load_camera(name)
    except UsageProblem:
        raise UsageProblem(f"not a duration or a saved camera: {name} "
                           "(skewfix cameras list shows saved ones)") from None
    order_note = ""
    if line_order is not None:
        order = line_order
        if camera.line_order in ("top-down", "bottom-up") and camera.line_order != line_order:
            order_note = f"; --line-order {line_order} overrides the saved {camera.line_order}"
    elif camera.line_order in ("top-down", "bottom-up"):
        order = camera.line_order
    else:
        order = "top-down"
        order_note = "; its line order was not measured, top-down assumed (give --line-order)"
    base = f"saved camera '{camera.name}'"
    origin = f"{base} (measured at {camera.mode_text()}{order_note})"

    def resolver(analysis, kind=None):
        info = analysis.info
        differs = mode_differences(camera, info)
        if differs:
            text = (f"{base} (measured at {camera.mode_text()}; this clip is {_clip_mode(info)}: "
                    f"{' and '.join(differs)} differ{'s' if len(differs) == 1 else ''}, "
                    f"check the readout{order_note})")
        else:
            text = origin
        return camera.readout_s, order, text

    return camera.readout_s, order, origin, resolver


def readout_plan(text: str, line_order: str | None):
    """Turn ``--readout`` into (seconds or None, line order, origin, resolver or None).

    Accepts a duration, ``auto`` (measured from the clip's own motion) or the
    name of a saved camera.
    """
    if text.strip().lower() == "auto":
        from skewfix.measure.selfcal import auto_readout_resolver

        return None, line_order or "top-down", "measured from this clip's motion", auto_readout_resolver(line_order)
    try:
        return parse_duration(text), line_order or "top-down", "given on the command line", None
    except UsageProblem:
        if not _LOOKS_LIKE_NAME.match(text.strip()):  # a mistyped duration: say so
            raise
    return camera_resolver(text.strip(), line_order)
