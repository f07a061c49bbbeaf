"""Residual-motion metric between a corrected frame and the exact truth.

Dense optical flow (DIS; Kroeger et al., 2016, as in OpenCV) from the truth
to the frame under test; the median flow is removed (a pure time offset or
whole-frame shift is not skew), and the RMS of what remains is taken over
textured pixels in the central 76 % of the frame (flow is meaningless on flat
areas and at borders the correction may have filled).
"""

from __future__ import annotations

import cv2
import numpy as np


def to_gray8(img: np.ndarray) -> np.ndarray:
    if img.dtype != np.uint8:
        img = (np.clip(img, 0, 1) * 255 + 0.5).astype(np.uint8)
    if img.ndim == 3:
        img = cv2.cvtColor(img, cv2.COLOR_RGB2GRAY)
    return img


def residual_flow_rms(test: np.ndarray, truth: np.ndarray, central: float = 0.76) -> float:
    """RMS residual flow (px) of ``test`` against ``truth`` after removing the median flow."""
    a, b = to_gray8(truth), to_gray8(test)
    dis = cv2.DISOpticalFlow_create(cv2.DISOPTICAL_FLOW_PRESET_MEDIUM)
    flow = dis.calc(a, b, None)
    h, w = a.shape
    my, mx = int(round(h * (1 - central) / 2)), int(round(w * (1 - central) / 2))
    flow = flow[my:h - my, mx:w - mx]
    gx = cv2.Sobel(a, cv2.CV_32F, 1, 0, ksize=3)[my:h - my, mx:w - mx]
    gy = cv2.Sobel(a, cv2.CV_32F, 0, 1, ksize=3)[my:h - my, mx:w - mx]
    mag = np.hypot(gx, gy)
    textured = mag > max(40.0, float(np.percentile(mag, 50)))
    if textured.sum() < 100:
        textured = np.ones_like(textured)
    f = flow[textured]
    f = f - np.median(f, axis=0)
    return float(np.sqrt(np.mean(np.sum(f * f, axis=1))))


def psnr(a: np.ndarray, b: np.ndarray, peak: float = 255.0) -> float:
    mse = float(np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2))
    return float("inf") if mse == 0 else 10 * np.log10(peak * peak / mse)


def decode_rgb(path) -> list[np.ndarray]:
    """Every frame of a clip as RGB uint8 (for comparisons with the truth)."""
    import av

    with av.open(str(path)) as container:
        return [frame.to_ndarray(format="rgb24") for frame in container.decode(video=0)]


def clip_residual(frames, truths, indices) -> float:
    """RMS over frames of `residual_flow_rms` of ``frames[k]`` against ``truths[k]``."""
    return float(np.sqrt(np.mean([residual_flow_rms(frames[k], truths[k]) ** 2 for k in indices])))
