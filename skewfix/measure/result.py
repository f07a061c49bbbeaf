"""The common result of every readout measurement method."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any


@dataclass
class ModelUsed:
    """The motion model a measurement fitted (the motion method; None for flicker and pan).

    name            "similarity" or "rotation" (`skewfix.models`)
    reason          why it was chosen (`skewfix.models.choice.ModelChoice.reason`)
    summary         one phrase describing it (`MotionKind.summary`)
    focal_length_px the rotation's focal length in pixels of the stored frame (None for the similarity)
    focal_uncertainty_px  one sigma, when the focal length was measured from the footage
    focal_given     the focal length came from the user (options or a saved camera), not the footage
    hfov_deg        the horizontal field of view that focal length means for the measured frame
    distortion      Brown–Conrady (k1, k2) in OpenCV's convention (None for the similarity)
    """

    name: str
    reason: str = ""
    summary: str = ""
    focal_length_px: float | None = None
    focal_uncertainty_px: float | None = None
    focal_given: bool = False
    hfov_deg: float | None = None
    distortion: tuple[float, float] | None = None

    @classmethod
    def from_kind(cls, kind, reason: str = "") -> "ModelUsed":
        """Read a `MotionKind` (duck-typed: a rotation has a ``lens``)."""
        lens = getattr(kind, "lens", None)
        if lens is None:
            return cls(kind.name, reason, kind.summary())
        estimated = bool(getattr(kind, "focal_estimated", False))
        sigma = getattr(kind, "focal_uncertainty_px", None) if estimated else None
        return cls(kind.name, reason, kind.summary(), float(lens.focal_px),
                   float(sigma) if sigma is not None and math.isfinite(sigma) else None,
                   not estimated, float(lens.hfov_deg(kind.width)), (float(lens.k1), float(lens.k2)))

    def line(self) -> str:
        """One line for people: the model, its lens, and why."""
        if self.focal_length_px is None:
            text = self.summary or self.name
        else:
            sigma = f" ± {self.focal_uncertainty_px:.1f}" if self.focal_uncertainty_px is not None else ""
            how = "given" if self.focal_given else "measured from the footage"
            text = f"{self.name}, focal length {self.focal_length_px:.1f}{sigma} px {how}"
            if self.hfov_deg is not None:
                text += f" ({self.hfov_deg:.1f}° horizontal view)"
            if self.distortion and any(self.distortion):
                text += f", radial distortion k1={self.distortion[0]:g}, k2={self.distortion[1]:g}"
        return f"{text}; {self.reason}" if self.reason else text


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
    model          the motion model fitted (`ModelUsed`; the motion method sets it)
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
    model: ModelUsed | None = None

    @property
    def line_delay_s(self) -> float:
        return self.readout_s / self.height

    @property
    def readout_fraction(self) -> float:
        return self.readout_s / self.frame_interval

    @property
    def lens_measured(self) -> bool:
        """Whether the measurement fitted a lens (the rotation model), estimated or given."""
        return self.model is not None and self.model.focal_length_px is not None

    def to_json_dict(self) -> dict[str, Any]:
        m = self.model
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
            # the motion model (null without one: flicker, pan); the focal length is null for
            # the similarity, its uncertainty null when it was given rather than measured
            "model": m.name if m else None,
            "model_reason": m.reason if m else None,
            "focal_length_px": m.focal_length_px if m else None,
            "focal_uncertainty_px": m.focal_uncertainty_px if m else None,
            "focal_given": bool(m and m.focal_length_px is not None and m.focal_given),
            "hfov_deg": m.hfov_deg if m else None,
            "lens_distortion": list(m.distortion) if m and m.distortion else None,
            "notes": list(self.notes),
        }


def refusal(message: str, partial: ReadoutEstimate | None = None):
    """A `MeasurementRefused` carrying what the method saw (``partial``: its best candidate and
    diagnostics, for ``--plot``), so a refusal can still be drawn, marked as refused."""
    from skewfix.errors import MeasurementRefused

    exc = MeasurementRefused(message)
    exc.partial = partial
    return exc
