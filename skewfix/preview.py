"""Before/after stills with straight reference lines over both halves."""

from __future__ import annotations

import cv2
import numpy as np


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


def before_after(before: np.ndarray, after: np.ndarray, path: str, labels=("as shot", "corrected")) -> str:
    """Write ``before | after`` side by side (RGB uint8 inputs) with a grid, as PNG."""
    a, b = draw_reference_grid(before), draw_reference_grid(after)
    gap = np.full((a.shape[0], 8, 3), 255, np.uint8)
    panel = np.concatenate([a, gap, b], axis=1)
    band = np.full((36, panel.shape[1], 3), 255, np.uint8)
    for text, x in zip(labels, (10, a.shape[1] + 18)):
        cv2.putText(band, text, (x, 25), cv2.FONT_HERSHEY_SIMPLEX, 0.8, (20, 20, 20), 2, cv2.LINE_AA)
    panel = np.concatenate([band, panel], axis=0)
    if not cv2.imwrite(str(path), cv2.cvtColor(panel, cv2.COLOR_RGB2BGR)):
        raise OSError(f"could not write {path}")
    return str(path)
