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

and, when the readout was measured with the rotation model (``measure
--method motion`` through a lens, estimated or given), its lens::

    focal_length_px: 1450.2
    hfov_deg: 105.9
    lens_distortion: -0.12,0.03

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
* The lens lines are optional and describe the measured mode's stored frame:
  ``focal_length_px`` (pinhole focal length in pixels, positive),
  ``hfov_deg`` (the horizontal field of view it gives, degrees) and
  ``lens_distortion`` (Brown–Conrady radial terms ``k1,k2`` in OpenCV's
  convention). ``fix --readout NAME`` uses the focal length (else the field
  of view) and the distortion as the lens unless lens options are given.
  Files without them (older ones) load as before.
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
    focal_length_px: float | None = None
    hfov_deg: float | None = None
    lens_distortion: tuple[float, float] | None = None

    @property
    def has_lens(self) -> bool:
        return self.focal_length_px is not None or self.hfov_deg is not None

    def lens_spec(self):
        """The saved lens as a `skewfix.models.choice.LensSpec` (None when none was saved)."""
        from skewfix.models.choice import LensSpec

        if not self.has_lens and not self.lens_distortion:
            return None
        distortion = tuple(self.lens_distortion) if self.lens_distortion else (0.0, 0.0)
        if self.hfov_deg is not None:  # the field of view scales with a clip of another size
            return LensSpec(hfov_deg=self.hfov_deg, distortion=distortion)
        return LensSpec(focal_px=self.focal_length_px, distortion=distortion)

    def lens_text(self) -> str:
        """``focal length 277.1 px (60.0° horizontal view), distortion k1=-0.1, k2=0`` or ``-``."""
        parts = []
        if self.focal_length_px is not None:
            parts.append(f"focal length {self.focal_length_px:.1f} px"
                         + (f" ({self.hfov_deg:.1f}° horizontal view)" if self.hfov_deg is not None else ""))
        elif self.hfov_deg is not None:
            parts.append(f"{self.hfov_deg:.1f}° horizontal view")
        if self.lens_distortion and any(self.lens_distortion):
            k1, k2 = self.lens_distortion
            parts.append(f"radial distortion k1={k1:g}, k2={k2:g}")
        return ", ".join(parts) or "-"

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


def _positive(text: str, what: str, below: float | None = None) -> float:
    value = _number(text, what)
    if value <= 0 or (below is not None and value >= below):
        raise ValueError(f"{what} must be more than 0" + (f" and less than {below:g}" if below else "")
                         + f": {text!r}")
    return value


def _distortion(text: str) -> tuple[float, float]:
    """``k1,k2`` (or ``k1``): Brown–Conrady radial terms, signed."""
    parts = [p.strip() for p in text.split(",")]
    try:
        values = [float(p) for p in parts]
    except ValueError:
        values = []
    if len(values) not in (1, 2) or not all(math.isfinite(v) for v in values):
        raise ValueError(f"lens_distortion must be k1,k2 (two numbers), not {text!r}")
    return values[0], values[1] if len(values) > 1 else 0.0


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
        focal_length_px=_positive(get("focal_length_px"), "focal_length_px") if get("focal_length_px") else None,
        hfov_deg=_positive(get("hfov_deg"), "hfov_deg", below=180.0) if get("hfov_deg") else None,
        lens_distortion=_distortion(get("lens_distortion")) if get("lens_distortion") else None,
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
    if camera.focal_length_px is not None:
        lines.append(f"focal_length_px: {camera.focal_length_px:.4f}")
    if camera.hfov_deg is not None:
        lines.append(f"hfov_deg: {camera.hfov_deg:.4f}")
    if camera.lens_distortion is not None:
        k1, k2 = camera.lens_distortion
        lines.append(f"lens_distortion: {k1!r},{k2!r}")
    lines.extend(f"note: {one_line(note)}" for note in camera.notes if one_line(note))
    return "\n".join(lines) + "\n"


def save_camera(name: str, estimate, info, clip: str | None = None) -> Path:
    """Save a `ReadoutEstimate` measured on a clip with `VideoInfo` ``info`` as NAME.

    Replaces a camera of the same name. Returns the file written. When the
    measurement fitted a lens (the rotation model, ``estimate.model``), the lens
    is kept too.
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
    model = getattr(estimate, "model", None)
    if model is not None and model.focal_length_px is not None:
        camera.focal_length_px = float(model.focal_length_px)
        camera.hfov_deg = float(model.hfov_deg) if model.hfov_deg is not None else None
        camera.lens_distortion = tuple(model.distortion) if model.distortion else (0.0, 0.0)
        how = ("given to the measurement, not measured" if model.focal_given else
               "measured from the footage" + (f", ± {model.focal_uncertainty_px:.1f} px"
                                              if model.focal_uncertainty_px is not None else ""))
        camera.notes.append(f"lens: the focal length was {how}")
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


@dataclass
class ReadoutPlan:
    """What ``--readout`` (with the lens options) comes to before the clip is read.

    ``seconds`` is None when the readout is measured (``auto``); ``resolver``
    (``resolver(analysis, kind) -> (readout_s, line_order, origin)``) is set for
    ``auto`` and saved cameras; ``lens`` is the `LensSpec` to fit with: the
    options' when any was given, else a saved camera's, else an empty one.
    """

    seconds: float | None
    line_order: str
    origin: str
    resolver: object | None
    lens: object

    def as_tuple(self):
        return self.seconds, self.line_order, self.origin, self.resolver


def _lens_note(camera: SavedCamera, lens) -> str:
    if not camera.has_lens:
        return ""
    if lens is not None:
        return "; the lens options override its saved lens"
    return f"; its saved lens: {camera.lens_text()}"


def _camera_plan(name: str, line_order: str | None, lens=None) -> ReadoutPlan:
    from skewfix.models.choice import LensSpec

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
    lens_note = _lens_note(camera, lens)
    use_lens = lens if lens is not None else (camera.lens_spec() or LensSpec())
    base = f"saved camera '{camera.name}'"
    origin = f"{base} (measured at {camera.mode_text()}{order_note}{lens_note})"

    def resolver(analysis, kind=None):
        info = analysis.info
        differs = mode_differences(camera, info)
        if differs:
            check = "the readout and the lens" if lens_note and lens is None else "the readout"
            text = (f"{base} (measured at {camera.mode_text()}; this clip is {_clip_mode(info)}: "
                    f"{' and '.join(differs)} differ{'s' if len(differs) == 1 else ''}, "
                    f"check {check}{order_note}{lens_note})")
        else:
            text = origin
        return camera.readout_s, order, text

    return ReadoutPlan(camera.readout_s, order, origin, resolver, use_lens)


def camera_resolver(name: str, line_order: str | None, lens=None):
    """``fix --readout NAME``: (readout_s, line order, origin, resolver) for `readout_plan`.

    ``resolver(analysis) -> (readout_s, line_order, origin)`` compares the
    clip's resolution and frame rate with the mode the camera was measured in
    and says so in the origin text when they differ. ``lens`` is the lens the
    options gave (None: none), named in the origin when it overrides a saved one.
    """
    return _camera_plan(name, line_order, lens).as_tuple()


def plan_readout(text: str, line_order: str | None, lens=None) -> ReadoutPlan:
    """``--readout`` and the lens options together (see `ReadoutPlan`).

    ``lens`` is the `LensSpec` the lens options gave, or None when none was
    given: then a saved camera's lens, if it has one, is used.
    """
    from skewfix.models.choice import LensSpec

    if text.strip().lower() == "auto":
        from skewfix.measure.motion_fit import auto_readout_resolver

        return ReadoutPlan(None, line_order or "top-down", "measured from this clip's motion",
                           auto_readout_resolver(line_order), lens or LensSpec())
    try:
        return ReadoutPlan(parse_duration(text), line_order or "top-down", "given on the command line", None,
                           lens or LensSpec())
    except UsageProblem:
        if not _LOOKS_LIKE_NAME.match(text.strip()):  # a mistyped duration: say so
            raise
    return _camera_plan(text.strip(), line_order, lens)


def readout_plan(text: str, line_order: str | None):
    """Turn ``--readout`` into (seconds or None, line order, origin, resolver or None).

    Accepts a duration, ``auto`` (measured from the clip's own motion) or the
    name of a saved camera.
    """
    return plan_readout(text, line_order).as_tuple()
