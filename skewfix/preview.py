"""Stills to judge a correction by eye: panels side by side, each with straight reference lines.

`before_after` is the as-shot frame beside the corrected one; `side_by_side`
takes any number of panels (``preview --readout 12ms,16ms,20ms``: the frame
as shot, then one correction per candidate readout, each labelled), so that
the readout whose verticals stand straight can be picked when it cannot be
measured. Straight lines drawn over every panel show what leans.
"""

from __future__ import annotations

import cv2
import numpy as np

LABEL_BAND_PX = 36  # white band above the panels for their labels
GAP_PX = 8  # white gap between panels
MAX_STILL_WIDTH = 4096  # wider stills are scaled down as a whole (panels keep their proportions)


def draw_reference_grid(img: np.ndarray, spacing: int | None = None) -> np.ndarray:
    """Overlay thin straight vertical and horizontal lines (RGB uint8 copy)."""
    out = img.copy()
    h, w = out.shape[:2]
    spacing = spacing or max(32, w // 12)
    colour = (255, 210, 0)
    for x in range(spacing // 2, w, spacing):
        cv2.line(out, (x, 0), (x, h - 1), colour, 1, cv2.LINE_AA)
    for y in range(spacing // 2, h, spacing):
        cv2.line(out, (0, y), (w - 1, y), colour, 1, cv2.LINE_AA)
    return out


def side_by_side(images, labels) -> np.ndarray:
    """Panels (RGB uint8, one size) in one row with a reference grid each, ``labels`` above them.

    A row wider than `MAX_STILL_WIDTH` is scaled down (area averaging) as a whole.
    """
    images = list(images)
    labels = list(labels)
    if len(images) != len(labels) or not images:
        raise ValueError("one label per panel, at least one panel")
    panels = [draw_reference_grid(img) for img in images]
    h, w = panels[0].shape[:2]
    scale = min(1.0, (MAX_STILL_WIDTH - GAP_PX * (len(panels) - 1)) / (w * len(panels)))
    if scale < 1.0:
        size = (max(1, round(w * scale)), max(1, round(h * scale)))
        panels = [cv2.resize(p, size, interpolation=cv2.INTER_AREA) for p in panels]
        h, w = panels[0].shape[:2]
    gap = np.full((h, GAP_PX, 3), 255, np.uint8)
    row = [panels[0]]
    for panel in panels[1:]:
        row += [gap, panel]
    strip = np.concatenate(row, axis=1)
    band = np.full((LABEL_BAND_PX, strip.shape[1], 3), 255, np.uint8)
    for i, text in enumerate(labels):
        # the text shrinks to stay within its panel (HERSHEY_SIMPLEX: about 18 px a letter at scale 0.8)
        font = min(0.8, 0.8 * (w - 16) / max(1, 18 * len(text)))
        cv2.putText(band, text, (10 + i * (w + GAP_PX), 25), cv2.FONT_HERSHEY_SIMPLEX, font, (20, 20, 20),
                    2 if font > 0.5 else 1, cv2.LINE_AA)
    return np.concatenate([band, strip], axis=0)


def png_bytes(rgb: np.ndarray) -> bytes:
    """An RGB uint8 image as PNG file contents."""
    ok, data = cv2.imencode(".png", cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR))
    if not ok:
        raise ValueError("the still could not be encoded as PNG")
    return data.tobytes()


def before_after(before: np.ndarray, after: np.ndarray, path: str, labels=("as shot", "corrected")) -> str:
    """Write ``before | after`` side by side (RGB uint8 inputs) with a grid, as PNG."""
    panel = side_by_side([before, after], labels)
    if not cv2.imwrite(str(path), cv2.cvtColor(panel, cv2.COLOR_RGB2BGR)):
        raise OSError(f"could not write {path}")
    return str(path)
