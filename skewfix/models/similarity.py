"""The 2-D similarity: pan, tilt, roll and zoom of the picture about its centre.

A world-fixed point ``q`` (on a plane facing the camera) is seen at time ``t`` at::

    p(t) = c + S(t) (q - X(t)),     S(t) = exp(sigma(t)) R(theta(t))

with ``c`` the image centre, ``X = (pan_x, pan_y)`` the view offset in pixels,
``theta`` the roll and ``sigma`` the log zoom. A track seen at ``p0`` (time
``t0``) and ``p1`` (``t1``) satisfies ``X(t0) + S(t0)^-1 (p0 - c) = X(t1) +
S(t1)^-1 (p1 - c)``; that world-plane difference is the residual (linear in
the pan curves, so Gauss-Newton converges in a step or two). The world plane's
shift, rotation and scale are the gauge: all four curves are pinned.

Right for a narrow lens, and for any lens while the camera only pans; at a wide
field of view a turning camera moves the edges faster than the centre, which
no similarity fits (`skewfix.models.rotation`).
"""

from __future__ import annotations

import math

import numpy as np

from skewfix.models.base import MotionKind, register


class Similarity(MotionKind):
    """Pan x/y (px), roll (rad), log zoom; ``translation_only`` keeps roll and zoom at 0."""

    name = "similarity"
    curves = ("pan_x_px", "pan_y_px", "roll_rad", "log_zoom")
    gauge = (0, 1, 2, 3)

    def __init__(self, width: int, height: int, translation_only: bool = False):
        super().__init__(width, height)
        self.translation_only = bool(translation_only)
        self.active = (0, 1) if self.translation_only else (0, 1, 2, 3)

    def curve_scales(self) -> np.ndarray:
        radius = 0.5 * math.hypot(self.width, self.height)
        return np.array([1.0, 1.0, radius, radius])

    def to_world(self, values, px, py):
        x, y, th, sg = values
        cx, cy = self.centre
        vx, vy = px - cx, py - cy
        a = np.exp(-sg)
        c, s = np.cos(th), np.sin(th)
        return x + a * (c * vx + s * vy), y + a * (-s * vx + c * vy)

    def to_image(self, values, world):
        x, y, th, sg = values
        qx, qy = world
        cx, cy = self.centre
        dx, dy = qx - x, qy - y
        a = np.exp(sg)
        c, s = np.cos(th), np.sin(th)
        return cx + a * (c * dx - s * dy), cy + a * (s * dx + c * dy)

    def constraint(self, values0, p0, values1, p1):
        """World-plane residual ``q(p0, t0) - q(p1, t1)`` with its analytic Jacobians."""
        n = len(p0)
        q0 = np.stack(self.to_world(values0, p0[:, 0], p0[:, 1]), 1)
        q1 = np.stack(self.to_world(values1, p1[:, 0], p1[:, 1]), 1)
        jac0, jac1 = np.zeros((n, 2, 4)), np.zeros((n, 2, 4))
        for jac, values, q, sign in ((jac0, values0, q0, 1.0), (jac1, values1, q1, -1.0)):
            x, y, th, sg = (np.broadcast_to(v, (n,)) for v in values)
            av = q - np.stack([x, y], 1)  # exp(-sigma) R(-theta) (p - c)
            jac[:, 0, 0] = sign
            jac[:, 1, 1] = sign
            if not self.translation_only:
                # d/d theta of R(-theta) v is (-sin, cos; -cos, -sin) v = (av_y, -av_x)
                jac[:, 0, 2], jac[:, 1, 2] = sign * av[:, 1], -sign * av[:, 0]
                jac[:, 0, 3], jac[:, 1, 3] = -sign * av[:, 0], -sign * av[:, 1]
        return q0 - q1, jac0, jac1

    def pair_inliers(self, p0, p1, threshold: float = 3.0):
        import cv2

        if len(p0) < 4:
            return None
        _, inliers = cv2.estimateAffinePartial2D(p0.astype(np.float32), p1.astype(np.float32),
                                                 method=cv2.RANSAC, ransacReprojThreshold=threshold)
        return None if inliers is None else inliers.ravel().astype(np.float64)

    def parameters(self) -> dict:
        return {"translation_only": True} if self.translation_only else {}

    def describe(self, values):
        x, y, th, sg = values
        return {"pan_x_px": np.asarray(x), "pan_y_px": np.asarray(y), "roll_deg": np.degrees(th),
                "zoom": np.exp(sg)}

    def summary(self) -> str:
        return "2-D translation" if self.translation_only else "2-D similarity (pan, tilt, roll, zoom)"


register("similarity", Similarity)
