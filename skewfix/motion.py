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

import numpy as np

from skewfix.background import choose_background
from skewfix.banded import BandedSystem, grouped_gram, scatter_vector
from skewfix.models import MotionKind, make_kind
from skewfix.rowclock import RowClock


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
    coefficients: np.ndarray  # (n_curves, n_coef), in the order of the model's ``curves``

    @property
    def n_coef(self) -> int:
        return self.coefficients.shape[1]

    def evaluate(self, t) -> np.ndarray:
        """The curves at times ``t``: an array (n_curves, *t.shape)."""
        idx, w = bspline_basis(t, self.knot_start, self.knot_spacing, self.n_coef)
        return (self.coefficients[:, idx] * w).sum(axis=-1)

    def tabulated(self, t_lo: float, t_hi: float, samples: int = 257) -> "TabulatedSegment":
        """This segment sampled on [t_lo, t_hi], for evaluating at many times in a short span."""
        return TabulatedSegment(self, t_lo, t_hi, samples)


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
        self.values = segment.evaluate(self.times)  # (n_curves, samples)

    def evaluate(self, t) -> np.ndarray:
        t = np.asarray(t, dtype=np.float64)
        if self.t_hi - self.t_lo < 1e-12 or t.size == 0 or t.min() < self.t_lo or t.max() > self.t_hi:
            return self.segment.evaluate(t)
        return np.stack([np.interp(t, self.times, v) for v in self.values])


class ShotCurves:
    """One shot's curves put together from consecutive fits on a shared knot grid.

    A streamed clip is fitted in overlapping windows whose knot grids share
    ``origin`` and ``spacing`` and whose gauge is carried from one window to
    the next (`fit_motion`'s ``anchors``). Each window then hands over the
    coefficients from the start of the frames it is responsible for, so the
    shot's curves are one spline with no jump at the window borders.
    """

    def __init__(self, first_frame: int, origin: float, spacing: float):
        self.first_frame = self.last_frame = first_frame
        self.origin, self.spacing = float(origin), float(spacing)
        self.base = 0  # global knot index of coefficients[:, 0]
        self.coefficients: np.ndarray | None = None

    def _index(self, t: float) -> int:
        return int(np.floor((t - self.origin) / self.spacing + 1e-9))

    def add(self, seg: MotionSegment, t_from: float, last_frame: int) -> None:
        """Take ``seg``'s coefficients for times from ``t_from`` on (frames up to ``last_frame``)."""
        offset = int(round((seg.knot_start - self.origin) / self.spacing))
        if self.coefficients is None:
            self.base, self.coefficients = offset, seg.coefficients.copy()
        else:
            start = max(self._index(t_from), offset, self.base)
            keep = self.coefficients[:, :start - self.base]
            self.coefficients = np.concatenate([keep, seg.coefficients[:, start - offset:]], axis=1)
        self.last_frame = last_frame

    def segment(self) -> MotionSegment:
        return MotionSegment(self.first_frame, self.last_frame, self.origin + self.base * self.spacing,
                             self.spacing, self.coefficients)


@dataclass
class MotionModel:
    """The whole clip's motion: one `MotionSegment` per shot, the model that reads
    the curves (`skewfix.models`), plus what was seen."""

    width: int
    height: int
    segments: list[MotionSegment]
    unmeasured_pairs: list[int] = field(default_factory=list)  # k: pair (k, k+1) gave nothing
    cuts: list[int] = field(default_factory=list)  # k: a cut between k and k+1
    inlier_fraction: float = 1.0
    kind: MotionKind | None = None
    #: why this model was used (for notes, reports and measure --json)
    model_reason: str = ""
    #: what the fit found doubtful (shown as notes)
    warnings: list[str] = field(default_factory=list)
    #: per fitted pair k, which of its tracks were taken for the static world (not saved)
    background: dict[int, np.ndarray] = field(default_factory=dict, repr=False)

    def __post_init__(self):
        if self.kind is None:
            self.kind = make_kind("similarity", self.width, self.height)

    @property
    def centre(self):
        return ((self.width - 1) / 2.0, (self.height - 1) / 2.0)

    def segment_for(self, k: int) -> MotionSegment:
        for seg in self.segments:
            if seg.first_frame <= k <= seg.last_frame:
                return seg
        raise IndexError(f"frame {k} is outside the fitted motion")

    def world_from_image(self, seg, t, px, py) -> tuple:
        """The world point(s) seen at image point(s) (px, py) at time(s) ``t``."""
        return self.kind.to_world(seg.evaluate(t), px, py)

    def image_from_world(self, seg, t, world) -> tuple[np.ndarray, np.ndarray]:
        """Image position at time(s) ``t`` of world point(s) ``world``."""
        return self.kind.to_image(seg.evaluate(t), world)


# --------------------------------------------------------------------------
# Fitting
# --------------------------------------------------------------------------

@dataclass
class FitSettings:
    """Knobs of the motion fit.

    knots_per_frame  knot density (4 follows vibration up to ~frame rate / 2)
    smoothness       weight of the second-difference penalty
    model            "similarity" (pan, tilt, roll, zoom) or "translation" (pan, tilt only);
                     ignored when ``kind`` is given
    kind             the motion model (`skewfix.models.MotionKind`), e.g. a lens's rotation
    iterations       Gauss-Newton / reweighting rounds
    knot_spacing     seconds between knots (default: the frame interval / knots_per_frame)
    knot_origin      a time on the knot grid: windows of one streamed clip share one grid
    """

    knots_per_frame: float = 4.0
    smoothness: float = 0.02
    model: str = "similarity"
    iterations: int = 4
    min_tracks: int = 8
    kind: MotionKind | None = None
    knot_spacing: float | None = None
    knot_origin: float | None = None

    def kind_for(self, width: int, height: int) -> MotionKind:
        if self.kind is not None:
            return self.kind
        return make_kind("similarity", width, height, translation_only=self.model == "translation")


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


def thin_tracks(pairs: list[PairObservations], limit: int, seed: int = 0) -> list[PairObservations]:
    """The pairs with at most ``limit`` tracks each (an even random choice, in order; the
    tracks keep their ids), for searches that fit the same tracks many times."""
    rng = np.random.default_rng(seed)
    out = []
    for p in pairs:
        if len(p.p0) > limit:
            keep = np.sort(rng.choice(len(p.p0), limit, replace=False))
            p = PairObservations(p.k, p.p0[keep], p.p1[keep], p.cut, None if p.ids is None else p.ids[keep], p.method)
        out.append(p)
    return out


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
    anchors: dict[int, np.ndarray] | None = None,
    prior=None,
    frame_offset: int = 0,
) -> MotionModel:
    """Fit the clip's motion curves from timed tracks (one spline per shot).

    The tracks that follow the static world are chosen consistently over each
    shot first (`skewfix.background.choose_background`); ``prior(k, p0) -> p1``
    predicts the world's tracks of pair ``k`` from an earlier fit (a streamed
    clip's previous window). ``anchors`` maps a shot's first frame to the gauge
    curves' values at that frame's start time (a streamed clip carries its
    gauge from one window to the next); without one, the gauge curves start at zero.
    ``frame_offset`` is added to frame numbers in warnings (a window's first frame).
    """
    settings = settings or FitSettings()
    kind = settings.kind_for(width, clock.height)
    n_frames = len(clock.frame_times)
    shots = split_shots(n_frames, pairs)
    model = MotionModel(width=width, height=clock.height, segments=[], kind=kind)
    model.cuts = sorted(p.k for p in pairs if p.cut)
    inl, tot = 0.0, 0
    for first, last in shots:
        shot_pairs = [p for p in pairs if first <= p.k < last and not p.cut]
        anchor = None if anchors is None else anchors.get(first)
        seg, w_sum, n_obs, warning, masks = _fit_segment(shot_pairs, clock, kind, first, last, settings, anchor,
                                                         prior)
        model.segments.append(seg)
        model.background.update(masks)
        if warning:
            model.warnings.append(f"frames {first + frame_offset}-{last + frame_offset}: {warning}")
        inl += w_sum
        tot += n_obs
    model.unmeasured_pairs = sorted(
        p.k for p in pairs if not p.cut and len(p.p0) < settings.min_tracks
    )
    model.inlier_fraction = inl / tot if tot else 0.0
    return model


def second_difference_penalty(n: int, scale: float = 1.0):
    """Rows, columns and values of scale * D^T D, D the (n-2) x n second-difference matrix
    (rows 1, -2, 1): the spline's roughness penalty, a band two wide."""
    taps = np.array([1.0, -2.0, 1.0])
    r = np.arange(max(n - 2, 0))
    a, b = np.meshgrid(np.arange(3), np.arange(3), indexing="ij")
    rows = (r[:, None, None] + a).ravel()
    cols = (r[:, None, None] + b).ravel()
    values = np.broadcast_to(scale * taps[:, None] * taps[None, :], (len(r), 3, 3)).ravel()
    return rows, cols, values


def _apply_second_difference_penalty(x: np.ndarray) -> np.ndarray:
    """D^T D x for the second-difference matrix D, without forming it."""
    if len(x) < 3:
        return np.zeros_like(x)
    return np.convolve(np.diff(x, 2), [1.0, -2.0, 1.0])


def knot_grid(clock: RowClock, first: int, last: int, settings: FitSettings) -> tuple[float, float, int]:
    """(knot_start, knot_spacing, n_coef) covering frames first..last with a frame to spare
    before and two after; on the shared grid of ``settings.knot_origin`` when set."""
    interval = clock.median_interval()
    if not np.isfinite(interval) or interval <= 0:
        interval = 1.0 / 25
    spacing = settings.knot_spacing or interval / settings.knots_per_frame
    t_lo = clock.frame_times[first] - interval
    if settings.knot_origin is not None:
        t_lo = settings.knot_origin + np.floor((t_lo - settings.knot_origin) / spacing) * spacing
    t_hi = clock.frame_times[last] + 2 * interval
    n_coef = int(np.ceil((t_hi - t_lo) / spacing)) + 3
    return float(t_lo), float(spacing), n_coef


GLOBAL_PAIR_WEIGHT = 0.2  # weight of a whole-frame-shift pair's points against a feature track's


class _Track:
    """The usable tracks of one shot, stacked, with their times and spline bases."""

    def __init__(self, pairs, clock: RowClock, seg: MotionSegment):
        self.p0 = np.concatenate([p.p0 for p in pairs]).astype(np.float64)
        self.p1 = np.concatenate([p.p1 for p in pairs]).astype(np.float64)
        self.k = np.concatenate([np.full(len(p.p0), p.k) for p in pairs])
        # a whole-frame shift (no features) says nothing about the rows' own times: it counts
        # as a weak measurement, so it bridges a blurred pair without bending the curves
        self.strength = np.concatenate([np.full(len(p.p0), GLOBAL_PAIR_WEIGHT if p.method == "global" else 1.0)
                                        for p in pairs])
        self.t0 = clock.row_time(self.k, self.p0[:, 1])
        self.t1 = clock.row_time(self.k + 1, self.p1[:, 1])
        self.idx0, self.b0 = bspline_basis(self.t0, seg.knot_start, seg.knot_spacing, seg.n_coef)
        self.idx1, self.b1 = bspline_basis(self.t1, seg.knot_start, seg.knot_spacing, seg.n_coef)

    def __len__(self):
        return len(self.p0)


def _spline_from_samples(times, values, seg: MotionSegment, weight: float = 1e-3) -> np.ndarray:
    """Penalised least-squares spline coefficients (n_curves, n_coef) through samples."""
    idx, w = bspline_basis(times, seg.knot_start, seg.knot_spacing, seg.n_coef)
    system = BandedSystem(seg.n_coef, 3)
    starts, blocks, _ = grouped_gram(w[:, None, :], idx[:, 0], np.ones(len(times)))
    system.add_blocks(starts, blocks)
    system.add_entries(*second_difference_penalty(seg.n_coef, weight))
    system.add_diagonal(1e-9)
    rhs = np.stack([scatter_vector(seg.n_coef, idx[:, 0], w * np.asarray(v)[:, None]) for v in values], axis=1)
    return system.solve(rhs).T


def _fit_segment(pairs, clock: RowClock, kind: MotionKind, first, last, settings: FitSettings, anchor=None,
                 prior=None):
    t_lo, spacing, n_coef = knot_grid(clock, first, last, settings)
    n_curves = kind.n_curves
    coef = np.zeros((n_curves, n_coef))
    anchor_values = np.zeros(n_curves) if anchor is None else np.asarray(anchor, dtype=np.float64)
    coef[:] = anchor_values[:, None]  # a start near the truth for models that are not linear
    seg = MotionSegment(first, last, t_lo, spacing, coef)

    usable = [p for p in pairs if len(p.p0) >= settings.min_tracks]
    if not usable:
        return seg, 0.0, 0, "", {}
    tracks = _Track(usable, clock, seg)
    n = len(tracks)
    background = choose_background(kind, usable, prior)
    w0 = np.concatenate(background.weights)
    active = list(kind.active)
    n_act = len(active)
    scales = kind.curve_scales()

    # The unknowns in knot-major order (knot c of curve active[pos] is unknown c * n_act + pos),
    # so every track's constraints and the penalty fall in a band (`skewfix.banded`).
    n_unknowns = n_act * n_coef
    s_lo = np.minimum(tracks.idx0[:, 0], tracks.idx1[:, 0])
    off0, off1 = tracks.idx0 - s_lo[:, None], tracks.idx1 - s_lo[:, None]
    span = int(max(off0.max(), off1.max())) + 1  # knots one track reaches, from its first
    width = span * n_act
    fixed = BandedSystem(n_unknowns, width - 1)
    # Penalty: second differences per curve, each curve scaled to pixels.
    pen_rows, pen_cols, pen_values = second_difference_penalty(n_coef)
    pen_weight = np.array([settings.smoothness * scales[c] ** 2 for c in active])
    for pos in range(n_act):
        fixed.add_entries(pen_rows * n_act + pos, pen_cols * n_act + pos, pen_values * pen_weight[pos])
    fixed.add_diagonal(1e-9)  # a ridge
    # Gauge: the world's own frame is free (a similarity's plane may be shifted, rotated and
    # scaled; a rotation's world may be turned), which leaves every image unchanged. Pin the
    # gauge curves at the shot's first frame (to zero, or to the values carried over).
    a_idx, a_w = bspline_basis(np.array([clock.frame_times[first]]), t_lo, spacing, n_coef)
    gauge_rows = []  # (unknowns, weights, target) of each pinned curve
    for pos, curve in enumerate(active):
        if curve in kind.gauge:
            index = a_idx[0] * n_act + pos
            w_a = a_w[0] * np.sqrt(1e3) * scales[curve]
            gauge_rows.append((index, w_a, anchor_values[curve] * np.sqrt(1e3) * scales[curve]))
            fixed.add_entries(*np.meshgrid(index, index, indexing="ij"), np.outer(w_a, w_a))

    # the start for a non-linear model comes from the world's tracks only, not a subject's
    world_pairs = [PairObservations(p.k, p.p0[w > 0], p.p1[w > 0]) for p, w in zip(usable, background.weights)]
    guess = kind.initial_frame_values(world_pairs, clock, first, last, anchor_values)
    if guess is not None:
        times, values = guess
        coef[:] = _spline_from_samples(times, values, seg)
        seg.coefficients = coef

    weights = w0.copy()
    weights[weights == 0] = 1e-3
    weights *= tracks.strength
    for it in range(settings.iterations):
        v0 = seg.evaluate(tracks.t0)
        v1 = seg.evaluate(tracks.t1)
        resid, jac0, jac1 = kind.constraint(v0, tracks.p0, v1, tracks.p1)
        bad = ~np.all(np.isfinite(resid), axis=1)
        resid[bad] = 0.0
        jac0[bad] = 0.0
        jac1[bad] = 0.0
        m = resid.shape[1]
        if it > 0:
            norm = np.sqrt(np.sum(resid * resid, axis=1))
            good = (w0 > 0) & ~bad
            scale = max(1.4826 * np.median(norm[good]) if np.any(good) else np.median(norm), 0.25)
            weights = 1.0 / (1.0 + (norm / (2.5 * scale)) ** 2)
            # tracks not taken for the world count only once the fit itself agrees with them
            weights[(w0 == 0) & (norm > 3.0 * scale)] = 0.0
            weights *= tracks.strength
        weights[bad] = 0.0

        # each residual touches 4 knots of each curve at t0 and 4 at t1: its row of the
        # Jacobian over the track's own run of knots, in the knot-major order
        local = np.zeros((n, span, m, n_act))
        rows = np.arange(n)
        for q in range(4):
            local[rows, off0[:, q]] += tracks.b0[:, q, None, None] * jac0[:, :, active]
            local[rows, off1[:, q]] += tracks.b1[:, q, None, None] * jac1[:, :, active]
        local = local.transpose(0, 2, 1, 3).reshape(n, m, width)
        starts, blocks, vectors = grouped_gram(local, s_lo * n_act, weights, resid)
        system = fixed.copy()
        system.add_blocks(starts, blocks)
        c_flat = coef[active].T.ravel()
        smooth = np.stack([pen_weight[pos] * _apply_second_difference_penalty(coef[c])
                           for pos, c in enumerate(active)], axis=1).ravel()
        rhs = -scatter_vector(n_unknowns, starts, vectors) - smooth - 1e-9 * c_flat
        for index, w_a, target in gauge_rows:
            rhs[index] -= w_a * (w_a @ c_flat[index] - target)
        step = system.solve(rhs)
        coef[active] = (c_flat + step).reshape(n_coef, n_act).T
        seg.coefficients = coef
    masks = dict(zip((p.k for p in usable), (w > 0 for w in background.weights)))
    return seg, float(np.sum(weights > 0.5)), n, background.warning, masks


def transfer_errors(model: MotionModel, pairs, clock: RowClock, settings: FitSettings,
                    background_only: bool = False) -> np.ndarray:
    """Per track, how far (px) the fitted motion carries p0 from where p1 was seen
    (only the tracks the fit took for the static world, if ``background_only``)."""
    out = []
    for p in pairs:
        if p.cut or len(p.p0) < settings.min_tracks:
            continue
        p0, p1 = p.p0, p.p1
        mask = model.background.get(p.k) if background_only else None
        if mask is not None and mask.any():
            p0, p1 = p0[mask], p1[mask]
        seg = model.segment_for(p.k)
        v0 = seg.evaluate(clock.row_time(p.k, p0[:, 1]))
        v1 = seg.evaluate(clock.row_time(p.k + 1, p1[:, 1]))
        x, y = model.kind.transfer(v0, p0, v1)
        e = np.hypot(x - p1[:, 0], y - p1[:, 1])
        out.append(np.where(np.isfinite(e), e, np.inf))
    return np.concatenate(out) if out else np.zeros(0)


def fit_residual(pairs, clock: RowClock, width: int, settings: FitSettings, bound: float = 3.0) -> tuple[float, int]:
    """Robust RMS misfit (px) of the tracks to a fitted motion (self-calibration, model choice).

    Only the tracks taken for the static world count (a subject's are left out, the same set
    whatever the readout), each up to ``bound`` px: outliers count but cannot dominate.
    """
    model = fit_motion(pairs, clock, width, settings)
    e = np.minimum(transfer_errors(model, pairs, clock, settings, background_only=True), bound)
    return (float(np.sqrt(np.mean(e * e))) if e.size else float("nan")), int(e.size)
