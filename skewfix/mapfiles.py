"""Warp maps as image files: float TIFF or OpenEXR, in pixels or normalized.

A map tells, for every output pixel, where to read the source. Two units:

* ``pixels`` (the default): absolute source x and y in pixels of the full
  frame, origin at the top-left, pixel centres at integer coordinates (the
  centre of the top-left pixel is (0, 0)), y down — what ``cv2.remap`` takes.
* ``normalized``: 0 to 1 across the frame, origin at the bottom-left *corner*
  of the frame, y up: ``u = (x + 0.5) / W`` and ``v = 1 - (y + 0.5) / H``, so
  the centre of the top-left pixel is ``(0.5 / W, 1 - 0.5 / H)`` and the
  frame's corners are 0 and 1. This is the convention compositing tools
  usually load for a map; values outside 0..1 read from beyond the frame.

Two file formats (x always in the first channel, y in the second):

* ``tiff``: 32-bit float, three samples per pixel (x, y, 0), as OpenCV writes
  no two-sample TIFF; read with OpenCV the order is BGR, so x is ``[..., 2]``.
* ``exr``: two FLOAT channels, ``R`` holding x and ``G`` holding y (R and G are
  the first and second channels in the usual RGBA order; an OpenEXR file
  itself always lists its channels alphabetically).
"""

from __future__ import annotations

import numpy as np

MAP_FORMATS = {"tiff": ".tif", "exr": ".exr"}
MAP_UNITS = ("pixels", "normalized")


def in_units(map_x: np.ndarray, map_y: np.ndarray, units: str = "pixels") -> tuple[np.ndarray, np.ndarray]:
    """A pixel map (absolute source positions) in ``units``: unchanged, or normalized as above."""
    if units == "pixels":
        return map_x, map_y
    if units != "normalized":
        raise ValueError(f"units must be one of {', '.join(MAP_UNITS)}, not {units!r}")
    h, w = map_x.shape
    u = (map_x.astype(np.float64) + 0.5) / w
    v = 1.0 - (map_y.astype(np.float64) + 0.5) / h
    return u.astype(np.float32), v.astype(np.float32)


def pixels_from_normalized(u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The inverse of `in_units(..., "normalized")`: source positions in pixels."""
    h, w = u.shape
    return (u.astype(np.float64) * w - 0.5).astype(np.float32), ((1.0 - v.astype(np.float64)) * h - 0.5).astype(np.float32)


def map_image(map_x: np.ndarray, map_y: np.ndarray) -> np.ndarray:
    """A map as the 3-channel float32 image OpenCV writes with samples (x, y, 0) in file order."""
    return np.dstack([np.zeros_like(map_x), map_y, map_x]).astype(np.float32)


def write_map(staged, index: int, map_x: np.ndarray, map_y: np.ndarray, units: str = "pixels") -> None:
    """Stage frame ``index`` of a map sequence (`skewfix.sequence.StagedSequence`); the
    format follows the sequence's extension (``.tif`` or ``.exr``)."""
    x, y = in_units(map_x, map_y, units)
    if staged.pattern.extension == ".exr":
        from skewfix.exr import write_exr

        staged.write_with(index, lambda target: write_exr(target, ("R", "G"), [x, y], ("float", "float")))
    else:
        staged.write(index, map_image(x, y))
