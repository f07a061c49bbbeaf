"""Camera motion as continuous functions of time, fitted from timed tracks.

The image of a world-fixed point ``q`` at time ``t`` is::

    p(t) = c + S(t) (q - X(t)),     S(t) = exp(sigma(t)) R(theta(t))

with ``c`` the image centre, ``X(t) = (pan_x, pan_y)`` the view offset in
pixels (pan and tilt), ``theta`` the roll about the centre and ``sigma`` the
log zoom. Each curve is a uniform cubic B-spline with knots at sub-frame
spacing (vibration at 10-15 Hz lives inside one frame's readout) and a
second-difference smoothness penalty (P-splines; Eilers & Marx, 1996).

A feature tracked from ``p0`` in frame ``k`` to ``p1`` in frame ``k+1`` was
seen at ``t0 = t(k, y0)`` and ``t1 = t(k+1, y1)`` (the row clock). A
world-fixed point satisfies ``X(t0) + S(t0)^-1 (p0-c) = X(t1) + S(t1)^-1 (p1-c)``,
which is solved for the knot values by Gauss-Newton with iteratively
reweighted least squares (Cauchy weights; Holland & Welsch, 1977), so that
moving objects are treated as outliers. Frame pairs with no measurement are
bridged by the smoothness prior alone; a cut splits the clip into shots that
are fitted separately.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from skewfix.rowclock import RowClock

CURVES = ("pan_x", "pan_y", "roll", "log_zoom")


# --------------------------------------------------------------------------
# Uniform cubic B-spline basis
# --------------------------------------------------------------------------

def bspline_basis(t: np.ndarray, t_start: float, spacing: float, n_coef: int):
    """Indices (n, 4) and weights (n, 4) of the cubic B-spline basis at ``t``."""
    u = (np.asarray(t, dtype=np.float64) - t_start) / spacing
    i = np.clip(np.floor(u).astype(np.int64), 0, n_coef - 4)
    s = u - i
    s2, s3 = s * s, s * s * s
    w = np.stack(
        [
            (1 - s) ** 3 / 6.0,
            (3 * s3 - 6 * s2 + 4) / 6.0,
            (-3 * s3 + 3 * s2 + 3 * s + 1) / 6.0,
            s3 / 6.0,
        ],
        axis=-1,
    )
    idx = i[..., None] + np.arange(4)
    return idx, w


@dataclass
class MotionSegment:
    """One shot's motion curves: B-spline coefficients on a shared knot grid."""

    first_frame: int
    last_frame: int
    knot_start: float
    knot_spacing: float
    coefficients: np.ndarray  # (4, n_coef): pan_x, pan_y, roll, log_zoom

    @property
    def n_coef(self) -> int:
        return self.coefficients.shape[1]

    def evaluate(self, t):
        """Return (pan_x, pan_y, roll, log_zoom) arrays at times ``t``."""
        idx, w = bspline_basis(t, self.knot_start, self.knot_spacing, self.n_coef)
        vals = (self.coefficients[:, idx] * w).sum(axis=-1)
        return vals[0], vals[1], vals[2], vals[3]

    def tabulated(self, t_lo: float, t_hi: float, samples: int = 257) -> "TabulatedSegment":
        """This segment sampled on [t_lo, t_hi], for evaluating at many times in a short span."""
        return TabulatedSegment(self, t_lo, t_hi, samples)

    def velocity(self, t):
        """Time derivative of the curves by a central difference (px/s, rad/s)."""
        dt = self.knot_spacing * 1e-3
        a = np.array(self.evaluate(np.asarray(t) + dt))
        b = np.array(self.evaluate(np.asarray(t) - dt))
        return (a - b) / (2 * dt)


class TabulatedSegment:
    """A `MotionSegment` sampled on a fine time grid and read by linear interpolation.

    A frame's map needs the curves at thousands of times within one readout;
    interpolating a few hundred samples over the span is several times cheaper
    than evaluating the spline at each, and off by well under 1e-3 px for any
    motion a camera makes (the error is ``h^2 |x''| / 8``: 0.1 ms spacing and
    1e5 px/s^2 give 1.3e-4 px). Times outside the span are evaluated exactly.
    """

    def __init__(self, segment: MotionSegment, t_lo: float, t_hi: float, samples: int = 257):
        self.segment = segment
        self.t_lo, self.t_hi = float(t_lo), float(max(t_hi, t_lo))
        self.times = np.linspace(self.t_lo, self.t_hi, samples)
        self.values = np.array(segment.evaluate(self.times))  # (4, samples)

    def evaluate(self, t):
        t = np.asarray(t, dtype=np.float64)
        if self.t_hi - self.t_lo < 1e-12 or t.size == 0 or t.min() < self.t_lo or t.max() > self.t_hi:
            return self.segment.evaluate(t)
        return tuple(np.interp(t, self.times, v) for v in self.values)


@dataclass
class MotionModel:
    """The whole clip's motion: one `MotionSegment` per shot, plus what was seen."""

    width: int
    height: int
    segments: list[MotionSegment]
    unmeasured_pairs: list[int] = field(default_factory=list)  # k: pair (k, k+1) gave nothing
    cuts: list[int] = field(default_factory=list)  # k: a cut between k and k+1
    inlier_fraction: float = 1.0

    @property
    def centre(self):
        return ((self.width - 1) / 2.0, (self.height - 1) / 2.0)

    def segment_for(self, k: int) -> MotionSegment:
        for seg in self.segments:
            if seg.first_frame <= k <= seg.last_frame:
                return seg
        raise IndexError(f"frame {k} is outside the fitted motion")

    def world_from_image(self, seg: MotionSegment, t, px, py):
        """World-plane coordinates of image point(s) seen at time(s) ``t``."""
        x, y, th, sg = seg.evaluate(t)
        cx, cy = self.centre
        vx, vy = px - cx, py - cy
        k = np.exp(-sg)
        c, s = np.cos(th), np.sin(th)
        return x + k * (c * vx + s * vy), y + k * (-s * vx + c * vy)

    def image_from_world(self, seg: MotionSegment, t, qx, qy):
        """Image position at time(s) ``t`` of world point(s) ``q``."""
        x, y, th, sg = seg.evaluate(t)
        cx, cy = self.centre
        dx, dy = qx - x, qy - y
        k = np.exp(sg)
        c, s = np.cos(th), np.sin(th)
        return cx + k * (c * dx - s * dy), cy + k * (s * dx + c * dy)


# --------------------------------------------------------------------------
# Fitting
# --------------------------------------------------------------------------

@dataclass
class FitSettings:
    """Knobs of the motion fit.

    knots_per_frame  knot density (4 follows vibration up to ~frame rate / 2)
    smoothness       weight of the second-difference penalty
    model            "similarity" (pan, tilt, roll, zoom) or "translation"
    iterations       Gauss-Newton / reweighting rounds
    """

    knots_per_frame: float = 4.0
    smoothness: float = 0.02
    model: str = "similarity"
    iterations: int = 4
    min_tracks: int = 8


@dataclass
class PairObservations:
    """Tracks between frames k and k+1 in full-resolution stored coordinates."""

    k: int
    p0: np.ndarray  # (n, 2)
    p1: np.ndarray  # (n, 2)
    cut: bool = False
    #: (n,) int64 identity of each track; a feature followed over several frames keeps one
    #: id, so the fit can remember that it once moved against the background (None: unknown)
    ids: np.ndarray | None = None
    #: how the pair was measured: "tracks" (features), or "global" (whole-frame phase
    #: correlation only: a shift, no row timing; weaker evidence)
    method: str = "tracks"


def _initial_weights(p0: np.ndarray, p1: np.ndarray) -> np.ndarray:
    """RANSAC similarity between the two point sets (Fischler & Bolles, 1981)."""
    if len(p0) < 4:
        return np.ones(len(p0))
    _, inliers = cv2.estimateAffinePartial2D(
        p0.astype(np.float32), p1.astype(np.float32), method=cv2.RANSAC, ransacReprojThreshold=3.0
    )
    if inliers is None:
        return np.ones(len(p0))
    w = inliers.ravel().astype(np.float64)
    return w if w.sum() >= 4 else np.ones(len(p0))


def split_shots(n_frames: int, pairs: list[PairObservations]) -> list[tuple[int, int]]:
    """Frame ranges of the shots between detected cuts."""
    cut_after = sorted(p.k for p in pairs if p.cut)
    shots, start = [], 0
    for k in cut_after:
        shots.append((start, k))
        start = k + 1
    shots.append((start, n_frames - 1))
    return shots


def fit_motion(
    pairs: list[PairObservations],
    clock: RowClock,
    width: int,
    settings: FitSettings | None = None,
) -> MotionModel:
    """Fit the clip's motion curves from timed tracks (one spline per shot)."""
    settings = settings or FitSettings()
    n_frames = len(clock.frame_times)
    shots = split_shots(n_frames, pairs)
    model = MotionModel(width=width, height=clock.height, segments=[])
    model.cuts = sorted(p.k for p in pairs if p.cut)
    inl, tot = 0.0, 0
    for first, last in shots:
        shot_pairs = [p for p in pairs if first <= p.k < last and not p.cut]
        seg, w_sum, n_obs = _fit_segment(shot_pairs, clock, width, first, last, settings)
        model.segments.append(seg)
        inl += w_sum
        tot += n_obs
    model.unmeasured_pairs = sorted(
        p.k for p in pairs if not p.cut and len(p.p0) < settings.min_tracks
    )
    model.inlier_fraction = inl / tot if tot else 0.0
    return model


def load_solver():
    """SciPy's sparse modules, imported on first use.

    Importing them costs about 0.2 s, a tenth of a short clip's transcode, so
    the module does not import them at load time; the streaming fitter calls
    this on its own thread while the first frames are still being decoded.
    """
    import scipy.sparse
    import scipy.sparse.linalg

    return scipy.sparse, scipy.sparse.linalg


def _second_difference(n: int):
    sp, _ = load_solver()
    return sp.diags([1.0, -2.0, 1.0], [0, 1, 2], shape=(max(n - 2, 0), n), format="csr")


def _fit_segment(pairs, clock: RowClock, width, first, last, settings: FitSettings):
    sp, spla = load_solver()
    interval = clock.median_interval()
    if not np.isfinite(interval) or interval <= 0:
        interval = 1.0 / 25
    spacing = interval / settings.knots_per_frame
    t_lo = clock.frame_times[first] - interval
    t_hi = clock.frame_times[last] + 2 * interval
    n_coef = int(np.ceil((t_hi - t_lo) / spacing)) + 3
    coef = np.zeros((4, n_coef))
    seg = MotionSegment(first, last, t_lo, spacing, coef)

    usable = [p for p in pairs if len(p.p0) >= settings.min_tracks]
    if not usable:
        return seg, 0.0, 0
    p0 = np.concatenate([p.p0 for p in usable]).astype(np.float64)
    p1 = np.concatenate([p.p1 for p in usable]).astype(np.float64)
    k0 = np.concatenate([np.full(len(p.p0), p.k) for p in usable])
    w0 = np.concatenate([_initial_weights(p.p0, p.p1) for p in usable])
    t0 = clock.row_time(k0, p0[:, 1])
    t1 = clock.row_time(k0 + 1, p1[:, 1])
    idx0, b0 = bspline_basis(t0, t_lo, spacing, n_coef)
    idx1, b1 = bspline_basis(t1, t_lo, spacing, n_coef)
    cx, cy = (width - 1) / 2.0, (clock.height - 1) / 2.0
    v0 = p0 - (cx, cy)
    v1 = p1 - (cx, cy)
    n = len(p0)
    radius = 0.5 * np.hypot(width, clock.height)
    n_curves = 4 if settings.model == "similarity" else 2

    # Penalty: second differences per curve; angles/log-zoom scaled to pixels.
    d2 = _second_difference(n_coef)
    pen_one = (d2.T @ d2).tocsr()
    scales = np.array([1.0, 1.0, radius, radius])[:n_curves]
    penalty = sp.block_diag([pen_one * (settings.smoothness * s * s) for s in scales], format="csr")
    ridge = sp.identity(n_curves * n_coef, format="csr") * 1e-9
    # Gauge: the world plane may be shifted, rotated or scaled freely (q -> s R q + d
    # with X, theta, sigma following), which leaves every image unchanged. Pin all
    # four curves to zero at the shot's first frame so the solution is unique.
    a_idx, a_w = bspline_basis(np.array([clock.frame_times[first]]), t_lo, spacing, n_coef)
    anchor_rows = []
    for curve in range(n_curves):
        row = np.zeros(n_curves * n_coef)
        row[curve * n_coef + a_idx[0]] = a_w[0] * np.sqrt(1e3) * scales[curve]
        anchor_rows.append(row)
    anchor = sp.csr_matrix(np.array(anchor_rows))
    ridge = ridge + (anchor.T @ anchor).tocsr()
    ridge_rot = None

    rows_x = np.arange(n)
    rows_y = np.arange(n) + n
    weights = w0.copy()
    weights[weights == 0] = 1e-3
    for it in range(settings.iterations):
        x0, y0, th0, sg0 = seg.evaluate(t0)
        x1, y1, th1, sg1 = seg.evaluate(t1)
        a0, a1 = np.exp(-sg0), np.exp(-sg1)
        c0, s0, c1, s1 = np.cos(th0), np.sin(th0), np.cos(th1), np.sin(th1)
        # A v with A = exp(-sigma) R(-theta)
        av0 = np.stack([a0 * (c0 * v0[:, 0] + s0 * v0[:, 1]), a0 * (-s0 * v0[:, 0] + c0 * v0[:, 1])], 1)
        av1 = np.stack([a1 * (c1 * v1[:, 0] + s1 * v1[:, 1]), a1 * (-s1 * v1[:, 0] + c1 * v1[:, 1])], 1)
        resid = np.stack([x0 - x1, y0 - y1], 1) + av0 - av1  # (n, 2)

        if it > 0:
            norm = np.hypot(resid[:, 0], resid[:, 1])
            scale = max(1.4826 * np.median(norm[w0 > 0]) if np.any(w0 > 0) else np.median(norm), 0.25)
            weights = 1.0 / (1.0 + (norm / (2.5 * scale)) ** 2)

        # Jacobian blocks (sparse): each residual touches 4 coefficients at t0 and at t1.
        data, ri, ci = [], [], []

        def add(rows, col_offset, vals0, vals1):
            ri.append(np.repeat(rows, 4)); ci.append((idx0 + col_offset).ravel()); data.append((b0 * vals0[:, None]).ravel())
            ri.append(np.repeat(rows, 4)); ci.append((idx1 + col_offset).ravel()); data.append((b1 * vals1[:, None]).ravel())

        ones = np.ones(n)
        add(rows_x, 0, ones, -ones)
        add(rows_y, n_coef, ones, -ones)
        if n_curves == 4:
            # d(A v)/d theta = exp(-sigma) * (-sin, cos; -cos, -sin) v
            dth0 = np.stack([a0 * (-s0 * v0[:, 0] + c0 * v0[:, 1]), a0 * (-c0 * v0[:, 0] - s0 * v0[:, 1])], 1)
            dth1 = np.stack([a1 * (-s1 * v1[:, 0] + c1 * v1[:, 1]), a1 * (-c1 * v1[:, 0] - s1 * v1[:, 1])], 1)
            add(rows_x, 2 * n_coef, dth0[:, 0], -dth1[:, 0])
            add(rows_y, 2 * n_coef, dth0[:, 1], -dth1[:, 1])
            add(rows_x, 3 * n_coef, -av0[:, 0], av1[:, 0])
            add(rows_y, 3 * n_coef, -av0[:, 1], av1[:, 1])
        jac = sp.csr_matrix(
            (np.concatenate(data), (np.concatenate(ri), np.concatenate(ci))),
            shape=(2 * n, n_curves * n_coef),
        )
        wv = np.concatenate([weights, weights])
        r = resid.T.ravel()  # x residuals then y residuals
        jtw = jac.T.multiply(wv).tocsr()
        lhs = jtw @ jac + penalty + ridge
        c_flat = coef[:n_curves].ravel()
        rhs = -(jtw @ r) - penalty @ c_flat - ridge @ c_flat
        if ridge_rot is not None:
            lhs = lhs + ridge_rot
            rhs = rhs - ridge_rot @ c_flat
        step = spla.spsolve(lhs.tocsc(), rhs)
        coef[:n_curves] = (c_flat + step).reshape(n_curves, n_coef)
        seg.coefficients = coef
        if np.max(np.abs(step[: 2 * n_coef])) < 1e-4 and it > 2:
            break
    return seg, float(np.sum(weights > 0.5)), n


def fit_residual(pairs, clock: RowClock, width: int, settings: FitSettings) -> tuple[float, int]:
    """Robust RMS misfit of the tracks to a fitted motion (used by self-calibration)."""
    model = fit_motion(pairs, clock, width, settings)
    sq, count = 0.0, 0
    for p in pairs:
        if p.cut or len(p.p0) < settings.min_tracks:
            continue
        seg = model.segment_for(p.k)
        t0 = clock.row_time(p.k, p.p0[:, 1])
        t1 = clock.row_time(p.k + 1, p.p1[:, 1])
        qx0, qy0 = model.world_from_image(seg, t0, p.p0[:, 0], p.p0[:, 1])
        qx1, qy1 = model.world_from_image(seg, t1, p.p1[:, 0], p.p1[:, 1])
        e = np.hypot(qx0 - qx1, qy0 - qy1)
        e = np.minimum(e, 3.0)  # bounded loss: outliers count but cannot dominate
        sq += float(np.sum(e * e))
        count += len(e)
    return (np.sqrt(sq / count) if count else float("nan")), count
