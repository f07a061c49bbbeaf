"""A camera turning about its centre, seen through a lens of known focal length.

The camera's orientation is a rotation ``R(t)`` from world to camera
coordinates (x right, y down, z forward), written as a rotation vector whose
three components are smooth curves (``rot_x_rad``, ``rot_y_rad``,
``rot_z_rad``: about the x axis a tilt, about y a pan, about z a roll). A world
direction ``d`` is imaged at::

    p ~ K R(t) d,      K = [[f, 0, cx], [0, f, cy], [0, 0, 1]]

(the pinhole camera; Hartley & Zisserman, *Multiple View Geometry*, 2nd ed.,
section 6.1), ``f`` the focal length in pixels and ``(cx, cy)`` the principal
point, by default the image centre. A track seen at ``p0`` (time ``t0``) and
``p1`` (``t1``) satisfies ``R(t0)^T K^-1 p0 ∥ R(t1)^T K^-1 p1``; the fit uses
the transfer error of that constraint in pixels. Each row of a corrected frame
is then mapped by the homography ``K R(t_row) R(t_ref)^T K^-1`` (rolling-shutter
rectification with rotations interpolated over time: Forssén & Ringaby, 2010;
per-row homographies from rotations: Karpenko et al., 2011).

Radial distortion follows Brown–Conrady with OpenCV's convention: a
normalised point ``(x, y)`` is stored at ``(x, y) (1 + k1 r^2 + k2 r^4)``. Tracks
and maps are undistorted before the rotation and distorted again after it, so
the corrected picture keeps its lens.

The horizontal field of view ``hfov`` of the stored frame and the focal length
are tied by the pinhole relation ``f = (W / 2) / tan(hfov / 2)``; a
35 mm-equivalent focal length ``F`` (mm) is a field of view of
``2 atan(36 / (2 F))`` across the long side (the 36 mm width of the 35 mm frame).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from skewfix.models.base import MotionKind, PointsMemo, register

_HOMOGRAPHIES = PointsMemo()  # per pair of undistorted point sets: the homography between them
FULL_FRAME_WIDTH_MM = 36.0  # the long side of a 35 mm still frame, the basis of "35 mm equivalent"


@dataclass(frozen=True)
class Lens:
    """Pinhole intrinsics with Brown–Conrady radial distortion (OpenCV's k1, k2)."""

    focal_px: float
    cx: float
    cy: float
    k1: float = 0.0
    k2: float = 0.0

    @property
    def distorted(self) -> bool:
        return self.k1 != 0.0 or self.k2 != 0.0

    def matrix(self) -> np.ndarray:
        return np.array([[self.focal_px, 0, self.cx], [0, self.focal_px, self.cy], [0, 0, 1.0]])

    def hfov_deg(self, width: int) -> float:
        return math.degrees(2 * math.atan(width / 2.0 / self.focal_px))

    def distort(self, x, y):
        """Normalised undistorted -> normalised stored coordinates."""
        if not self.distorted:
            return x, y
        r2 = x * x + y * y
        g = 1 + self.k1 * r2 + self.k2 * r2 * r2
        return x * g, y * g

    def undistort(self, xd, yd, iterations: int = 12):
        """Normalised stored -> normalised undistorted, by fixed-point iteration
        (the scheme of OpenCV's undistortPoints, with more rounds)."""
        if not self.distorted:
            return xd, yd
        x, y = xd, yd
        for _ in range(iterations):
            r2 = x * x + y * y
            g = 1 + self.k1 * r2 + self.k2 * r2 * r2
            x, y = xd / g, yd / g
        return x, y

    def normalised(self, px, py):
        """Stored pixels -> undistorted normalised image coordinates."""
        return self.undistort((px - self.cx) / self.focal_px, (py - self.cy) / self.focal_px)

    def pixels(self, x, y):
        """Undistorted normalised image coordinates -> stored pixels."""
        xd, yd = self.distort(x, y)
        return self.cx + self.focal_px * xd, self.cy + self.focal_px * yd


def focal_from_hfov(width: int, hfov_deg: float) -> float:
    """Focal length in pixels from the horizontal field of view (pinhole relation)."""
    return (width / 2.0) / math.tan(math.radians(hfov_deg) / 2.0)


def focal_from_equivalent_mm(width: int, height: int, focal_mm: float) -> float:
    """Focal length in pixels from a 35 mm-equivalent focal length (long side = 36 mm)."""
    return focal_mm * max(width, height) / FULL_FRAME_WIDTH_MM


def rotate(rvec, vx, vy, vz):
    """Rotate vectors by rotation vectors (Rodrigues' rotation formula), elementwise.

    ``rvec`` is (3, ...) broadcasting with the vector components."""
    rx, ry, rz = rvec
    theta = np.sqrt(rx * rx + ry * ry + rz * rz)
    small = theta < 1e-8
    safe = np.where(small, 1.0, theta)
    # sin(t)/t and (1 - cos t)/t^2, with their series near zero
    a = np.where(small, 1.0 - theta * theta / 6.0, np.sin(safe) / safe)
    b = np.where(small, 0.5 - theta * theta / 24.0, (1.0 - np.cos(safe)) / (safe * safe))
    # v cos t + (r x v) sin t / t + r (r . v) (1 - cos t) / t^2, with cos t = 1 - b t^2
    cx = ry * vz - rz * vy
    cy = rz * vx - rx * vz
    cz = rx * vy - ry * vx
    dot = rx * vx + ry * vy + rz * vz
    cos_t = 1.0 - b * theta * theta
    return (vx * cos_t + a * cx + b * rx * dot,
            vy * cos_t + a * cy + b * ry * dot,
            vz * cos_t + a * cz + b * rz * dot)


class Rotation(MotionKind):
    """Camera rotation as a rotation vector (rad) over time, through a `Lens`."""

    name = "rotation"
    curves = ("rot_x_rad", "rot_y_rad", "rot_z_rad")
    gauge = (0, 1, 2)
    active = (0, 1, 2)

    def __init__(self, width: int, height: int, focal_length_px: float | None = None,
                 principal_point_px=None, distortion=(0.0, 0.0), focal_estimated: bool = False,
                 focal_uncertainty_px: float | None = None):
        super().__init__(width, height)
        if focal_length_px is None:
            focal_length_px = focal_from_hfov(width, 60.0)  # a placeholder until estimated
        if not (np.isfinite(focal_length_px) and focal_length_px > 0):
            raise ValueError(f"focal length must be a positive number of pixels, not {focal_length_px!r}")
        cx, cy = principal_point_px if principal_point_px is not None else self.centre
        k1, k2 = (tuple(distortion) + (0.0, 0.0))[:2]
        self.lens = Lens(float(focal_length_px), float(cx), float(cy), float(k1), float(k2))
        self.focal_estimated = bool(focal_estimated)
        self.focal_uncertainty_px = focal_uncertainty_px
        self.extra_parameters = 1 if focal_estimated else 0

    def with_focal(self, focal_px: float, estimated: bool = True, uncertainty: float | None = None) -> "Rotation":
        lens = self.lens
        return Rotation(self.width, self.height, focal_px, (lens.cx, lens.cy), (lens.k1, lens.k2),
                        focal_estimated=estimated, focal_uncertainty_px=uncertainty)

    def curve_scales(self) -> np.ndarray:
        return np.full(3, self.lens.focal_px)

    def to_world(self, values, px, py):
        x, y = self.lens.normalised(px, py)
        r = np.asarray(values)
        dx, dy, dz = rotate(-r, x, y, np.ones_like(x))  # R^T ray: rotation by -r
        norm = np.sqrt(dx * dx + dy * dy + dz * dz)
        return dx / norm, dy / norm, dz / norm

    def to_image(self, values, world):
        cx_, cy_, cz_ = rotate(np.asarray(values), *world)
        ahead = cz_ > 1e-6
        z = np.where(ahead, cz_, np.nan)
        return self.lens.pixels(cx_ / z, cy_ / z)

    def pair_inliers(self, p0, p1, threshold: float = 3.0):
        import cv2

        if len(p0) < 5:
            return None
        u0 = np.stack(self._undistorted_pixels(p0), 1)
        u1 = np.stack(self._undistorted_pixels(p1), 1)
        _, inliers = cv2.findHomography(u0.astype(np.float32), u1.astype(np.float32), cv2.RANSAC, threshold)
        return None if inliers is None else inliers.ravel().astype(np.float64)

    def inlier_key(self) -> tuple:
        lens = self.lens  # the inliers are found on undistorted pixels
        return ("homography", lens.k1, lens.k2) + ((lens.focal_px, lens.cx, lens.cy) if lens.distorted else ())

    def relative_rotation(self, p0, p1) -> np.ndarray | None:
        """The rotation ``R1 R0^T`` between two frames from one pair's tracks, ignoring
        the rolling shutter: the homography ``K R K^-1`` of a turning camera (RANSAC),
        brought back to the nearest rotation (SVD)."""
        import cv2

        if len(p0) < 5:
            return None
        u0 = np.stack(self._undistorted_pixels(p0), 1).astype(np.float32)
        u1 = np.stack(self._undistorted_pixels(p1), 1).astype(np.float32)

        def homography():
            cv2.setRNGSeed(len(u0))  # RANSAC's draws from the points alone, not from what ran before
            return cv2.findHomography(u0, u1, cv2.RANSAC, 3.0)[0]

        hom = _HOMOGRAPHIES.get((u0, u1), homography)  # the same for every focal length tried
        if hom is None:
            return None
        k = self.lens.matrix()
        m = np.linalg.inv(k) @ hom @ k
        u, _, vt = np.linalg.svd(m)
        rot = u @ vt
        return rot if np.linalg.det(rot) > 0 else None

    def initial_frame_values(self, pairs, clock, first, last, start_values):
        import cv2

        by_k = {p.k: p for p in pairs}
        current = cv2.Rodrigues(np.asarray(start_values, dtype=np.float64).reshape(3, 1))[0]
        step = np.eye(3)
        times, values = [], []
        for k in range(first, last + 1):
            times.append(float(clock.reference_time(k)))
            values.append(cv2.Rodrigues(current)[0].ravel())
            pair = by_k.get(k)
            rel = self.relative_rotation(pair.p0, pair.p1) if pair is not None else None
            step = rel if rel is not None else step  # no measurement: keep turning as before
            current = step @ current
        return np.array(times), np.array(values).T

    def _undistorted_pixels(self, p):
        x, y = self.lens.normalised(p[:, 0], p[:, 1])
        return self.lens.cx + self.lens.focal_px * x, self.lens.cy + self.lens.focal_px * y

    def parameters(self) -> dict:
        lens = self.lens
        out = {"focal_length_px": lens.focal_px, "principal_point_px": [lens.cx, lens.cy],
               "distortion": [lens.k1, lens.k2]}
        if self.focal_estimated:
            out["focal_estimated"] = True
            if self.focal_uncertainty_px is not None:
                out["focal_uncertainty_px"] = float(self.focal_uncertainty_px)
        return out

    def describe(self, values):
        rx, ry, rz = values
        return {"rot_x_deg": np.degrees(rx), "rot_y_deg": np.degrees(ry), "rot_z_deg": np.degrees(rz)}

    def summary(self) -> str:
        lens = self.lens
        how = "estimated" if self.focal_estimated else "given"
        text = (f"3-D rotation, focal length {lens.focal_px:.1f} px ({how}; "
                f"{lens.hfov_deg(self.width):.1f}° horizontal view)")
        if lens.distorted:
            text += f", radial distortion k1={lens.k1:g}, k2={lens.k2:g}"
        return text


register("rotation", Rotation)
