"""Scenes for synthetic clips.

`photo_panorama` joins photographs that scikit-image ships (for tests and
benchmarks: real image statistics). `harbour_scene` is the demo's own
invented scene, drawn by code: a quay with warehouses, cranes and masts, full
of vertical edges that lean visibly under a rolling shutter.
"""

from __future__ import annotations

import cv2
import numpy as np


def photo_panorama(height: int, min_width: int) -> np.ndarray:
    """scikit-image's bundled photographs side by side, as float32 RGB in [0, 1]."""
    from skimage import data

    names = ["astronaut", "coffee", "chelsea", "rocket", "immunohistochemistry", "camera", "coins", "page"]
    tiles = []
    width = 0
    while width < min_width:
        for name in names:
            img = getattr(data, name)()
            if img.ndim == 2:
                img = np.stack([img] * 3, axis=-1)
            img = img[..., :3].astype(np.float32) / 255.0
            w = int(round(img.shape[1] * height / img.shape[0]))
            tiles.append(cv2.resize(img, (w, height), interpolation=cv2.INTER_CUBIC))
            width += w
            if width >= min_width:
                break
    return np.clip(np.concatenate(tiles, axis=1), 0, 1)


def harbour_scene(height: int, width: int, seed: int = 11) -> np.ndarray:
    """An invented harbour front, drawn procedurally (float32 RGB in [0, 1])."""
    rng = np.random.default_rng(seed)
    img = np.zeros((height, width, 3), np.float32)
    horizon = int(height * 0.62)
    # sky gradient and water
    sky = np.linspace(0.95, 0.70, horizon)[:, None]
    img[:horizon] = np.stack([sky * 0.75, sky * 0.85, sky], -1)
    water = np.linspace(0.35, 0.15, height - horizon)[:, None]
    img[horizon:] = np.stack([water * 0.4, water * 0.7, water], -1)
    x = 0
    while x < width:  # warehouses with windows
        w = int(rng.integers(120, 320))
        h = int(rng.integers(int(height * 0.2), int(height * 0.45)))
        colour = rng.uniform(0.25, 0.8, 3)
        cv2.rectangle(img, (x, horizon - h), (x + w, horizon), colour.tolist(), -1)
        for wy in range(horizon - h + 20, horizon - 30, 40):
            for wx in range(x + 14, x + w - 20, 32):
                lit = 0.9 if rng.random() < 0.3 else 0.15
                cv2.rectangle(img, (wx, wy), (wx + 14, wy + 22), (lit, lit * 0.9, lit * 0.6), -1)
        x += w + int(rng.integers(10, 60))
    for _ in range(width // 90):  # masts, poles and crane legs: long verticals
        mx = int(rng.integers(0, width))
        top = int(rng.integers(int(height * 0.05), int(height * 0.4)))
        thick = int(rng.integers(2, 7))
        shade = float(rng.uniform(0.05, 0.3))
        cv2.line(img, (mx, top), (mx, int(height * 0.8)), (shade, shade, shade), thick)
        cv2.line(img, (mx - 25, top + 30), (mx + 25, top + 30), (shade, shade, shade), 2)
    # fine texture so that features can be tracked everywhere
    img += rng.normal(0, 0.03, img.shape).astype(np.float32)
    img = cv2.GaussianBlur(img, (0, 0), 0.8)
    return np.clip(img, 0, 1)
