"""The common result of every readout measurement method."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass
class ReadoutEstimate:
    """A measured readout time with its uncertainty.

    readout_s      time from first to last row, seconds
    uncertainty_s  one-sigma uncertainty, seconds
    line_order     "top-down", "bottom-up" or "undetermined"
    method         "flicker", "pan" or "motion"
    frames_used    indices of the frames that entered the estimate
    height         rows in the stored frame (for the line delay)
    frame_interval nominal frame interval, seconds (for the readout fraction)
    diagnostics    method-specific arrays for plots (not serialised)
    notes          short human-readable remarks (warnings, caveats)
    """

    readout_s: float
    uncertainty_s: float
    line_order: str
    method: str
    frames_used: list[int]
    height: int
    frame_interval: float
    diagnostics: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def line_delay_s(self) -> float:
        return self.readout_s / self.height

    @property
    def readout_fraction(self) -> float:
        return self.readout_s / self.frame_interval

    def to_json_dict(self) -> dict[str, Any]:
        return {
            "readout_ms": self.readout_s * 1e3,
            "line_delay_us": self.line_delay_s * 1e6,
            "readout_fraction": self.readout_fraction,
            "line_order": self.line_order,
            "uncertainty_ms": self.uncertainty_s * 1e3,
            "method": self.method,
            "frames_used": list(map(int, self.frames_used)),
            "height": self.height,
            "frame_interval_s": self.frame_interval,
            "notes": list(self.notes),
        }
