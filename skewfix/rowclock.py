"""The row clock: when each sensor row of each frame was read.

A rolling shutter starts exposing row ``y`` of frame ``k`` at::

    t(k, y) = t_k + readout * y / H            (top-down line order)
    t(k, y) = t_k + readout * (H - 1 - y) / H  (bottom-up)

``t_k`` comes from the frame's own timestamp, never from ``k / fps``, so
variable-frame-rate phone clips are timed correctly. ``readout`` is the time
from the first to the last row; the line delay is ``readout / H``. A global
shutter has ``readout == 0`` and every row of a frame shares one instant.
Rows are counted in the *stored* orientation of the frame.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from skewfix.errors import UsageProblem

LINE_ORDERS = ("top-down", "bottom-up")
REFERENCE_LINES = ("middle", "top", "bottom")

_UNIT_SECONDS = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6}
_DURATION = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*(s|ms|us|µs)?\s*$")


def parse_duration(text: str) -> float:
    """Parse ``18.5ms``, ``0.0185s``, ``18500us`` (a bare number is ms) to seconds.

    Raises `UsageProblem` for anything else, including negative values.
    """
    if text is None:
        raise UsageProblem("no duration given")
    raw = str(text).strip()
    if raw.startswith("-"):
        raise UsageProblem(f"readout must not be negative: {raw!r}")
    match = _DURATION.match(raw)
    if not match:
        raise UsageProblem(
            f"not a duration: {raw!r} (use e.g. 18.5ms, 0.0185s or 18500us; a bare number is ms)"
        )
    value = float(match.group(1))
    unit = match.group(2) or "ms"
    seconds = value * _UNIT_SECONDS[unit]
    if not np.isfinite(seconds):
        raise UsageProblem(f"not a finite duration: {raw!r}")
    return seconds


_NTSC_FACTOR = Fraction(1000, 1001)
_NTSC_SNAP = 2e-4  # a decimal this close (relative) to n * 1000/1001 means that rate


def parse_rate(text: str | None) -> Fraction | None:
    """``25``, ``23.976``, ``24000/1001`` -> an exact Fraction.

    A decimal within 0.02 % of an NTSC-family rate ``n * 1000/1001`` (23.976,
    29.97, 59.94, and 23.98 as often written) is that rate exactly; other
    decimals are taken as written.
    """
    if text is None:
        return None
    text = str(text).strip()
    try:
        if "/" in text:
            num, den = text.split("/", 1)
            rate = Fraction(int(num), int(den))
        else:
            rate = Fraction(text)
            ntsc = round(rate / _NTSC_FACTOR) * _NTSC_FACTOR
            if rate.denominator != 1 and ntsc and abs(rate - ntsc) <= _NTSC_SNAP * ntsc:
                rate = ntsc
    except (ValueError, ZeroDivisionError):
        raise UsageProblem(f"not a frame rate: {text!r} (use e.g. 25, 23.976 or 24000/1001)") from None
    if rate <= 0:
        raise UsageProblem(f"frame rate must be positive: {text!r}")
    return rate


def clip_frame_interval(nominal: float | None, frame_times) -> float | None:
    """The clip's frame interval in seconds: the one its stated rate gives, else the
    median step of its timestamps (variable-rate phone footage); None for one frame."""
    if nominal:
        return float(nominal)
    times = np.asarray(frame_times, dtype=np.float64)
    return float(np.median(np.diff(times))) if times.size > 1 else None


def frame_times_from_rate(n_frames: int, rate: Fraction, start: Fraction = Fraction(0)) -> np.ndarray:
    """Exact frame start times ``start + k / rate`` (computed in rationals)."""
    rate = Fraction(rate)
    return np.array([float(start + Fraction(k) / rate) for k in range(n_frames)], dtype=np.float64)


@dataclass(frozen=True)
class RowClock:
    """Per-row exposure-start times for a clip.

    frame_times  start time of each frame (its first-read row), seconds
    height       stored rows per frame
    readout      first-to-last-row time, seconds (0 = global shutter)
    line_order   "top-down" or "bottom-up"
    """

    frame_times: np.ndarray
    height: int
    readout: float
    line_order: str = "top-down"

    def __post_init__(self):
        if self.line_order not in LINE_ORDERS:
            raise UsageProblem(f"line order must be one of {', '.join(LINE_ORDERS)}, not {self.line_order!r}")
        if self.readout < 0:
            raise UsageProblem("readout must not be negative")
        object.__setattr__(self, "frame_times", np.asarray(self.frame_times, dtype=np.float64))

    @property
    def line_delay(self) -> float:
        return self.readout / self.height

    def row_fraction(self, y) -> np.ndarray:
        """Fraction of the readout elapsed when row ``y`` starts (0 for the first-read row)."""
        y = np.asarray(y, dtype=np.float64)
        if self.line_order == "top-down":
            return y / self.height
        return (self.height - 1 - y) / self.height

    def row_time(self, k, y) -> np.ndarray:
        """Exposure start of row ``y`` (may be fractional) of frame ``k``."""
        return self.frame_times[np.asarray(k)] + self.readout * self.row_fraction(y)

    def reference_row(self, reference_line: str) -> float:
        """The stored row whose instant the corrected frame shows."""
        if reference_line == "middle":
            return (self.height - 1) / 2.0
        if reference_line == "top":
            return 0.0
        if reference_line == "bottom":
            return float(self.height - 1)
        raise UsageProblem(f"reference line must be one of {', '.join(REFERENCE_LINES)}, not {reference_line!r}")

    def reference_time(self, k, reference_line: str = "middle") -> np.ndarray:
        return self.row_time(k, self.reference_row(reference_line))

    def median_interval(self) -> float:
        if len(self.frame_times) < 2:
            return float("nan")
        return float(np.median(np.diff(self.frame_times)))

    def check_readout_fits(self, nominal_interval: float | None = None) -> None:
        """Refuse a readout longer than the frame interval (rows would overlap frames)."""
        check_readout_fits(self.readout, nominal_interval if nominal_interval else self.median_interval())


def check_readout_fits(readout: float, interval: float | None) -> None:
    """Refuse a readout longer than the frame interval: a sensor cannot take longer to
    read a frame than the frame lasts."""
    if interval is not None and np.isfinite(interval) and readout > interval * (1 + 1e-9):
        raise UsageProblem(
            f"readout {readout * 1e3:.3f} ms is longer than the frame interval "
            f"{interval * 1e3:.3f} ms; a sensor cannot take longer to read a frame than the frame lasts"
        )
