"""CG rendered with overscan: a clean frame larger than the plate, centred on it.

``reskew --overscan`` takes the extra either as a factor of the plate's size
(``1.1``: a 1920x1080 plate's CG is 2112x1188) or as a margin in pixels on
each side (``96px``, or ``96,54px`` for x and y). The plate sits in the middle
of the CG frame, so the margin on each side is half the difference in size
(a half pixel when the difference is odd). The rolling shutter is put back
over the whole CG frame; rows above and below the plate were never read by
the sensor, so their instants continue the plate's row clock (a row one
plate height above the top is read one readout earlier).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from skewfix.errors import InputError, UsageProblem
from skewfix.pipeline import FrameWarper
from skewfix.warp import reskew_map

_MARGIN = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(?:,\s*(\d+(?:\.\d+)?)\s*)?px\s*$", re.IGNORECASE)
#: a factor's CG size may differ from ``plate * factor`` by this much (renderers round to whole pixels)
FACTOR_TOLERANCE_PX = 1.0


@dataclass(frozen=True)
class Overscan:
    """An asked-for overscan: a size ``factor``, or ``margin`` pixels (x, y) on each side."""

    factor: float | None = None
    margin: tuple[float, float] | None = None

    def margins(self, plate: tuple[int, int], clean: tuple[int, int], label: str = "INPUT") -> tuple[float, float]:
        """Margins (x, y) in pixels on each side for a ``clean`` frame (width, height) around
        ``plate``; an `InputError` naming ``label`` when the sizes do not fit this overscan."""
        (w, h), (cw, ch) = plate, clean
        if self.factor is not None:
            expect = (w * self.factor, h * self.factor)
            if abs(cw - expect[0]) > FACTOR_TOLERANCE_PX or abs(ch - expect[1]) > FACTOR_TOLERANCE_PX:
                raise InputError(f"{label}: is {cw}x{ch}, but a {w}x{h} plate with overscan {self.factor:g} "
                                 f"gives {expect[0]:.0f}x{expect[1]:.0f}")
        else:
            mx, my = self.margin
            if (cw, ch) != (round(w + 2 * mx), round(h + 2 * my)):
                raise InputError(f"{label}: is {cw}x{ch}, but a {w}x{h} plate with {mx:g},{my:g} px on each side "
                                 f"gives {round(w + 2 * mx)}x{round(h + 2 * my)}")
        return (cw - w) / 2.0, (ch - h) / 2.0


def parse_overscan(text: str | float | None) -> Overscan | None:
    """``1.1`` (a factor, at least 1), ``96px`` or ``96,54px`` (pixels on each side); None for none."""
    if text is None:
        return None
    if isinstance(text, (int, float)):
        text = str(text)
    match = _MARGIN.match(text)
    if match:
        mx = float(match.group(1))
        my = float(match.group(2)) if match.group(2) is not None else mx
        return Overscan(margin=(mx, my))
    try:
        factor = float(text)
    except ValueError:
        raise UsageProblem(f"--overscan must be a factor like 1.1 or a margin like 96px or 96,54px, "
                           f"not {text!r}") from None
    if not 1.0 <= factor <= 4.0:
        raise UsageProblem(f"--overscan factor must be between 1 and 4, not {text}")
    return Overscan(factor=factor)


def clean_frame_margins(overscan: Overscan | None, plate: tuple[int, int], clean: tuple[int, int],
                        label: str = "INPUT", motion_label: str = "the motion file") -> tuple[float, float]:
    """Margins for a clean frame of size ``clean`` over ``plate``: (0, 0) without overscan,
    where the sizes must match; otherwise as `Overscan.margins`."""
    if overscan is None:
        if tuple(clean) != tuple(plate):
            larger = clean[0] > plate[0] and clean[1] > plate[1]
            hint = (f"; for CG rendered with overscan give --overscan {clean[0] / plate[0]:.4g} or "
                    f"--overscan {(clean[0] - plate[0]) / 2:g},{(clean[1] - plate[1]) / 2:g}px") if larger else ""
            raise InputError(f"{label}: is {clean[0]}x{clean[1]} but the motion in {motion_label} was solved on "
                             f"{plate[0]}x{plate[1]} frames; reskew needs the same size{hint}")
        return 0.0, 0.0
    margins = overscan.margins(plate, clean, label)
    if min(margins) < 0:
        raise InputError(f"{label}: is {clean[0]}x{clean[1]}, smaller than the {plate[0]}x{plate[1]} plate; "
                         "an overscan frame is larger")
    return margins


class OverscanReskewWarper(FrameWarper):
    """`FrameWarper` putting the rolling shutter back onto a clean frame that reaches
    ``margins`` (x, y) pixels beyond the plate on each side."""

    def __init__(self, model, clock, settings, info, margins: tuple[float, float]):
        super().__init__(model, clock, settings, info)
        self.margins = margins

    def map_for(self, k: int):
        return reskew_map(self.model, self.clock, k, self.settings.reference_line, overscan=self.margins)

