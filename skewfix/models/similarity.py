"""The 2-D similarity: pan, tilt, roll and zoom of the picture about its centre.

A world-fixed point ``q`` (on a plane facing the camera) is seen at time ``t`` at::

    p(t) = c + S(t) (q - X(t)),     S(t) = exp(sigma(t)) R(theta(t))

with ``c`` the image centre, ``X = (pan_x, pan_y)`` the view offset in pixels,
``theta`` the roll and ``sigma`` the log zoom. A track seen at ``p0`` (time
``t0``) is the world point ``q0 = X(t0) + S(t0)^-1 (p0 - c)``; the residual is
where the motion carries it in the second picture less where it was seen,
``c + S(t1) (q0 - X(t1)) - p1``: the transfer error, in image pixels (linear
in the pan curves, so Gauss-Newton converges in a step or two). The world
plane's shift, rotation and scale are the gauge: all four curves are pinned.

The difference of the two world points, ``q0 - q1``, is cheaper but not a
distance in the picture: it shrinks with the world plane, so wherever the
pinned gauge reaches a stretch of the shot only through the smoothness
penalty (the first frame pairs of a shot untracked, or a run of pairs
missing), the fit could shrink that stretch's world (zoom in without bound)
and carry every residual towards zero. The transfer error cannot shrink so:
it is the same whatever the world plane's scale (Hartley & Zisserman,
*Multiple View Geometry*, 2nd ed., section 4.2.2).

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
        """Transfer error (px) of each track into the second picture, with its analytic
        Jacobians with respect to the curves at ``t0`` and at ``t1``."""
        n = len(p0)
        x0, y0 = (np.broadcast_to(v, (n,)) for v in values0[:2])
        x1, y1, th1, sg1 = (np.broadcast_to(v, (n,)) for v in values1)
        qx, qy = self.to_world(values0, p0[:, 0], p0[:, 1])
        cx, cy = self.centre
        # S(t1) = exp(sigma1) R(theta1) as its two columns, per track
        a1 = np.exp(sg1)
        c1, s1 = a1 * np.cos(th1), a1 * np.sin(th1)
        dx, dy = qx - x1, qy - y1
        wx, wy = c1 * dx - s1 * dy, s1 * dx + c1 * dy  # S(t1) (q0 - X(t1)), an image vector
        resid = np.stack([cx + wx - p1[:, 0], cy + wy - p1[:, 1]], 1)
        jac0, jac1 = np.zeros((n, 2, 4)), np.zeros((n, 2, 4))
        # d r / d X(t0) = S(t1); d r / d X(t1) = -S(t1)
        jac0[:, 0, 0], jac0[:, 1, 0], jac0[:, 0, 1], jac0[:, 1, 1] = c1, s1, -s1, c1
        jac1[:, :, :2] = -jac0[:, :, :2]
        if not self.translation_only:
            # q0 - X(t0) = exp(-sigma0) R(-theta0) (p0 - c) =: u; d u / d theta0 = (u_y, -u_x),
            # d u / d sigma0 = -u; both carried into the picture by S(t1)
            ux, uy = qx - x0, qy - y0
            jac0[:, 0, 2], jac0[:, 1, 2] = c1 * uy + s1 * ux, s1 * uy - c1 * ux
            jac0[:, 0, 3], jac0[:, 1, 3] = -(c1 * ux - s1 * uy), -(s1 * ux + c1 * uy)
            # d (S w) / d theta1 = R(90 deg) S w; d / d sigma1 = S w
            jac1[:, 0, 2], jac1[:, 1, 2] = -wy, wx
            jac1[:, 0, 3], jac1[:, 1, 3] = wx, wy
        return resid, jac0, jac1

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
