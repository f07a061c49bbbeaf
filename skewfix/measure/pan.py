"""Readout time from steady pans across vertical edges (README.md, "Finding a camera's readout
time", the second way).

A picture moving sideways at ``u`` px/s on a rolling shutter shows row ``y``
at ``t_k + readout * y / H`` (top-down), so an edge that is vertical in the
world leans by ``u * readout / H`` px per row; bottom-up flips the sign. The
speed itself does not depend on the readout: a point tracked from frame ``k``
to ``k + 1`` on the same row moved ``u * (t_{k+1} - t_k)``.

1. ``u`` per frame pair: the median horizontal track displacement of the
   analysis pass over the pair's interval (or, for a pair without tracks, the
   1-D shift of the middle row band between the frames);
2. the slant of each frame: the picture is cut into row bands, each band's
   column-mean profile is differentiated (edges) and its horizontal shift
   against the middle band found by 1-D phase correlation (Kuglin & Hines,
   1975) refined by Gauss-Newton on a cubic-spline interpolant (Lucas &
   Kanade, 1981, in one dimension); a robust straight line through the band
   shifts gives px per row;
3. frames are kept where the speed is steady (both neighbouring pairs agree)
   in runs of at least a few frames;
4. one line through (speed, slant) over the kept frames, weighted least
   squares: ``slant = tilt + sign * u * readout / H``. A pan at one speed
   cannot tell a tilted target from skew, so the tilt is taken as 0; pans
   both ways (or one way at speeds a factor 2 or more apart) fit the tilt and
   cancel it. The sign of the slope gives the line order.
"""

from __future__ import annotations

import math

import numpy as np

from skewfix.errors import InputError, MeasurementRefused
from skewfix.measure.result import ReadoutEstimate
from skewfix.rowclock import clip_frame_interval

__all__ = ["measure_pan", "plot_pan", "profile_shift", "frame_slant", "pair_speeds"]

# Smallest picture motion per frame for a frame to count as panning: with a
# readout of half the interval that is 1.5 px of lean over the height
# (common practice: well above the ~0.05 px precision of the band shifts).
_MIN_SHIFT_PER_FRAME_PX = 3.0
# Largest change of speed between a frame's two neighbouring pairs for the
# frame to count as steady (common practice).
_STEADY_TOLERANCE = 0.04
_MIN_RUN = 3          # consecutive steady frames that make a steady pan
_MIN_FRAMES = 4       # steady frames needed in all
_MIN_TRACKS = 8       # tracks for a pair speed from the tracker
_MIN_BAND_SCORE = 0.5  # correlation of a band with the middle band
_MIN_BANDS = 5
_SIGNIFICANCE = 3.0   # slope / its sigma needed to state a line order
# Relative floor on the uncertainty for what the frame-to-frame scatter cannot
# show (compression, the tracker's proxy, optics): set from the coverage table of
# scripts/bench_measure.py --coverage (30 random synthetic pans: median error about
# 0.08 %, so 0.15 % puts about two thirds within one sigma), not a published value.
_SYSTEMATIC_FRACTION = 0.0015


# ----------------------------------------------------------------------------
# 1-D shifts and per-frame slant
# ----------------------------------------------------------------------------
def profile_shift(reference: np.ndarray, moving: np.ndarray, max_shift: float | None = None):
    """Shift ``d`` (px) with ``moving(x + d) ~ gain * reference(x) + offset``, and a score.

    Whole-pixel peak by phase correlation with a Hann window (Kuglin & Hines,
    1975), then Gauss-Newton on a cubic-spline interpolant of ``moving`` for
    shift, gain and offset (Lucas & Kanade, 1981, in 1-D). The score is the
    correlation coefficient of the aligned profiles over their overlap
    (``nan`` shift when there is no overlap left).
    """
    from scipy.interpolate import CubicSpline

    ref = np.asarray(reference, dtype=np.float64)
    mov = np.asarray(moving, dtype=np.float64)
    n = len(ref)
    if n != len(mov) or n < 16:
        raise InputError("profiles must have the same length, at least 16 samples")
    limit = n // 3 if max_shift is None else int(min(max_shift, n // 3))
    window = np.hanning(n)
    fa = np.fft.rfft((ref - ref.mean()) * window)
    fb = np.fft.rfft((mov - mov.mean()) * window)
    cross = fb * np.conj(fa)
    cross /= np.abs(cross) + 1e-12 * np.max(np.abs(cross)) + 1e-300
    corr = np.fft.irfft(cross, n)
    lags = np.arange(n)
    lags[lags > n // 2] -= n
    corr[np.abs(lags) > limit] = -np.inf
    d = float(lags[int(np.argmax(corr))])

    spline = CubicSpline(np.arange(n), mov)
    margin = int(math.ceil(abs(d))) + 3
    xi = np.arange(margin, n - margin, dtype=np.float64)
    if len(xi) < 8:
        return float("nan"), 0.0
    target = ref[margin:n - margin]
    gain, offset = 1.0, 0.0
    for _ in range(12):
        m = spline(xi + d)
        g = spline(xi + d, 1)
        # moving(x + d) = gain * ref + offset  <=>  ref = (m - offset) / gain
        jac = np.stack([g, -target, -np.ones_like(xi)], axis=1)
        resid = m - gain * target - offset
        try:  # normal equations: a 3x3 system
            step = np.linalg.solve(jac.T @ jac, -(jac.T @ resid))
        except np.linalg.LinAlgError:
            return float("nan"), 0.0
        step[0] = float(np.clip(step[0], -1.0, 1.0))
        d += step[0]
        gain += step[1]
        offset += step[2]
        if abs(step[0]) < 1e-4 or abs(d) > limit + 2:
            break
    if abs(d) > limit + 2:
        return float("nan"), 0.0
    m = spline(xi + d)
    score = float(np.corrcoef(m, target)[0, 1]) if np.std(m) > 0 and np.std(target) > 0 else 0.0
    return float(d), score


def _band_edge_profiles(luma: np.ndarray, band_rows: int):
    """Row-band centres and the x-derivative of each band's column means."""
    img = np.asarray(luma, dtype=np.float64)
    h = img.shape[0]
    n_bands = h // band_rows
    top = (h - n_bands * band_rows) // 2
    cut = img[top:top + n_bands * band_rows]
    means = cut.reshape(n_bands, band_rows, -1).mean(axis=1)
    centres = top + band_rows * np.arange(n_bands) + (band_rows - 1) / 2.0
    return centres, np.diff(means, axis=1)


def _band_rows(height: int) -> int:
    return max(6, height // 24)


def frame_slant(luma: np.ndarray) -> tuple[float, float, int]:
    """Horizontal lean of the picture in px per row (+ = lower rows further right).

    Returns (slant, standard error, bands used); slant is ``nan`` when the
    frame holds no vertical edges that line up from band to band.
    """
    h = np.asarray(luma).shape[0]
    centres, profiles = _band_edge_profiles(luma, _band_rows(h))
    mid = len(centres) // 2
    shifts, scores = [], []
    for b in range(len(centres)):
        if b == mid:
            shifts.append(0.0)
            scores.append(1.0)
            continue
        d, score = profile_shift(profiles[mid], profiles[b])
        shifts.append(d)
        scores.append(score)
    shifts, scores = np.asarray(shifts), np.asarray(scores)
    keep = np.isfinite(shifts) & (scores >= _MIN_BAND_SCORE)
    if keep.sum() < _MIN_BANDS:
        return float("nan"), float("inf"), int(keep.sum())
    y = centres - centres[mid]
    for _ in range(2):  # one pass of outlier rejection (common practice: 4 robust sigmas)
        coef = np.polyfit(y[keep], shifts[keep], 1)
        resid = shifts - np.polyval(coef, y)
        spread = 1.4826 * np.median(np.abs(resid[keep])) + 0.01
        new_keep = keep & (np.abs(resid) <= 4.0 * spread)
        if new_keep.sum() < _MIN_BANDS or np.array_equal(new_keep, keep):
            break
        keep = new_keep
    coef = np.polyfit(y[keep], shifts[keep], 1)
    resid = shifts[keep] - np.polyval(coef, y[keep])
    dof = max(int(keep.sum()) - 2, 1)
    sxx = float(np.sum((y[keep] - y[keep].mean()) ** 2))
    stderr = math.sqrt(float(np.sum(resid ** 2)) / dof / sxx) if sxx > 0 else float("inf")
    return float(coef[0]), max(stderr, 1e-6), int(keep.sum())


# ----------------------------------------------------------------------------
# speeds and steady frames
# ----------------------------------------------------------------------------
def pair_speeds(analysis, band_shifts: dict[int, float] | None = None) -> np.ndarray:
    """Horizontal picture speed (px/s) of each frame pair ``(k, k+1)``; ``nan`` if unmeasured.

    The median of the tracks' horizontal displacement over the pair's own
    interval (frame timestamps, so variable frame rates are right); pairs
    with too few tracks fall back on ``band_shifts[k]`` (px) when given.
    """
    n = analysis.n_frames
    t = np.asarray(analysis.frame_times, dtype=np.float64)
    speeds = np.full(max(n - 1, 0), np.nan)
    for obs in analysis.pairs:
        k = obs.k
        if not 0 <= k < n - 1 or obs.cut:
            continue
        dt = t[k + 1] - t[k]
        if not dt > 0:
            continue
        if len(obs.p0) >= _MIN_TRACKS:
            speeds[k] = float(np.median(obs.p1[:, 0] - obs.p0[:, 0])) / dt
    if band_shifts:
        for k, shift in band_shifts.items():
            if 0 <= k < n - 1 and not np.isfinite(speeds[k]) and np.isfinite(shift) and t[k + 1] > t[k]:
                speeds[k] = shift / (t[k + 1] - t[k])
    return speeds


def steady_frames(speeds: np.ndarray, frame_times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Frames whose two neighbouring pairs agree on the speed, in runs of `_MIN_RUN` or more.

    Returns (frame indices, their speed: the mean of the two pairs, which
    is the speed at the middle of the frame's readout).
    """
    n = len(speeds) + 1
    t = np.asarray(frame_times, dtype=np.float64)
    ok = np.zeros(n, bool)
    frame_speed = np.full(n, np.nan)
    for k in range(1, n - 1):
        a, b = speeds[k - 1], speeds[k]
        if not (np.isfinite(a) and np.isfinite(b)) or a * b <= 0:
            continue
        mean = 0.5 * (a + b)
        interval = 0.5 * (t[k + 1] - t[k - 1])
        if abs(mean) * interval < _MIN_SHIFT_PER_FRAME_PX:
            continue
        if abs(a - b) <= _STEADY_TOLERANCE * abs(mean):
            ok[k] = True
            frame_speed[k] = mean
    keep = np.zeros(n, bool)
    k = 0
    while k < n:  # runs of consecutive steady frames going the same way
        if not ok[k]:
            k += 1
            continue
        j = k
        while j + 1 < n and ok[j + 1] and frame_speed[j + 1] * frame_speed[k] > 0:
            j += 1
        if j - k + 1 >= _MIN_RUN:
            keep[k:j + 1] = True
        k = j + 1
    idx = np.flatnonzero(keep)
    return idx, frame_speed[idx]


# ----------------------------------------------------------------------------
# the joint fit
# ----------------------------------------------------------------------------
def _tilt_separable(u: np.ndarray) -> tuple[bool, bool]:
    """(tilt can be fitted, panned both ways): the tilt is told from skew by
    frames panned both ways, or one way at speeds at least a factor 2 apart."""
    both = int(np.sum(u > 0)) >= _MIN_RUN and int(np.sum(u < 0)) >= _MIN_RUN
    speed = np.abs(u)
    slow = int(np.sum(speed <= 0.5 * speed.max()))
    return both or (slow >= _MIN_RUN and len(u) - slow >= _MIN_RUN), both


def _weighted_line(u, s, w, with_tilt: bool):
    """Weighted least squares ``s = tilt + slope * u``; returns (slope, tilt, covariance, residuals)."""
    cols = [u, np.ones_like(u)] if with_tilt else [u]
    a = np.stack(cols, axis=1)
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(a * sw[:, None], s * sw, rcond=None)
    resid = s - a @ coef
    dof = max(len(s) - len(coef), 1)
    chi2 = float(np.sum(w * resid ** 2)) / dof
    cov = np.linalg.inv((a * w[:, None]).T @ a) * max(chi2, 1.0)
    slope = float(coef[0])
    tilt = float(coef[1]) if with_tilt else 0.0
    return slope, tilt, cov, resid


def _residual_curve(u, s, w, height, order_sign, with_tilt, longest, best=None):
    """RMS lean misfit over the frame height (px) against candidate readouts."""
    candidates = np.linspace(0.0, longest, 241)
    if best is not None:  # the result itself, so the marked minimum is the result
        candidates = np.sort(np.append(candidates, best))
    out = np.empty_like(candidates)
    for i, r in enumerate(candidates):
        left = s - order_sign * u * r / height
        if with_tilt:
            left = left - np.sum(w * left) / np.sum(w)
        out[i] = math.sqrt(float(np.sum(w * left ** 2) / np.sum(w))) * height
    return candidates * 1e3, out


def _speed_band_shifts(path: str, analysis, fps):
    """Second pass over the frames: each frame's slant and the middle-band shift to the next frame."""
    from skewfix.decode import open_source

    slants, stderrs, mid_shifts = {}, {}, {}
    prev_mid = None
    with open_source(path, fps, analysis.frames) as source:
        for frame in source.frames():
            k = frame.index
            if k >= analysis.n_frames:
                break
            luma = frame.luma
            s, se, _ = frame_slant(luma)
            slants[k], stderrs[k] = s, se
            rows = _band_rows(luma.shape[0])
            top = (luma.shape[0] - rows) // 2
            mid = _band_edge_profiles(luma[top:top + rows], rows)[1][0]
            if prev_mid is not None:
                d, score = profile_shift(prev_mid, mid)
                mid_shifts[k - 1] = d if score >= _MIN_BAND_SCORE else float("nan")
            prev_mid = mid
    return slants, stderrs, mid_shifts


def _no_pan_message(speeds, analysis) -> str:
    finite = speeds[np.isfinite(speeds)]
    interval = clip_frame_interval(analysis.info.frame_interval, analysis.frame_times)
    if not finite.size:
        seen = "no frame pair could be tracked"
    else:
        fastest = float(np.max(np.abs(finite))) * interval
        seen = f"the picture moved at most {fastest:.1f} px per frame"
        if fastest >= _MIN_SHIFT_PER_FRAME_PX:
            seen += f", never at one speed (within {_STEADY_TOLERANCE:.0%}) for long enough"
    hint = ""
    if abs(int(analysis.info.rotation or 0)) % 180 == 90:
        hint = (" (this clip is stored rotated by 90 degrees: the sensor rows run up and down "
                "the screen, so pan along them, vertically on screen, across edges square to them)")
    return (f"no steady pan found ({seen}): the pan method needs at least {_MIN_FRAMES} frames in runs of "
            f"{_MIN_RUN} or more at a steady sideways speed of at least {_MIN_SHIFT_PER_FRAME_PX:g} px per "
            f"frame; pan steadily across vertical edges, ideally one way and then back{hint}")


def measure_pan(path: str, analysis=None, fps=None) -> ReadoutEstimate:
    """Measure the readout from steady pan(s) across vertical edges.

    ``analysis`` is the clip's `skewfix.pipeline.Analysis` (computed when
    None). Raises MeasurementRefused when the clip holds no steady pan or no
    vertical edges. Diagnostics: ``candidates_ms`` and ``residuals`` (RMS
    lean misfit in px over the frame height) for the residual plot, and the
    per-frame ``speeds_px_s`` and ``slants_px_per_row`` with the fitted
    ``tilt_px_per_row`` and ``slope_s_per_row``.
    """
    if analysis is None:
        from skewfix.pipeline import analyse

        analysis = analyse(path, fps)
    n = analysis.n_frames
    info = analysis.info
    height = int(info.height)
    t = np.asarray(analysis.frame_times, dtype=np.float64)
    interval = clip_frame_interval(info.frame_interval, t)
    if n < _MIN_FRAMES + 2 or not interval:
        raise MeasurementRefused(f"{n} frame(s) are too few for the pan method: it needs a steady pan "
                                 f"of at least {_MIN_FRAMES + 2} frames across vertical edges")

    slants, stderrs, mid_shifts = _speed_band_shifts(path, analysis, fps)
    speeds = pair_speeds(analysis, mid_shifts)
    frames, frame_speed = steady_frames(speeds, t)
    if len(frames) < _MIN_FRAMES:
        raise MeasurementRefused(_no_pan_message(speeds, analysis))
    s = np.array([slants.get(int(k), np.nan) for k in frames])
    se = np.array([stderrs.get(int(k), np.inf) for k in frames])
    good = np.isfinite(s) & np.isfinite(se)
    if good.sum() < _MIN_FRAMES:
        raise MeasurementRefused(
            f"the steady pan has {int(good.sum())} frame(s) with vertical edges that line up from top to "
            f"bottom (need {_MIN_FRAMES}): pan across long vertical edges (door frames, poles, a chart of "
            "vertical bars) that fill the frame height")
    frames, u, s, se = frames[good], frame_speed[good], s[good], se[good]
    notes: list[str] = []

    with_tilt, both_ways = _tilt_separable(u)
    w = 1.0 / np.maximum(se, 0.5 * float(np.median(se))) ** 2
    slope, tilt, cov, resid = _weighted_line(u, s, w, with_tilt)
    # frames that do not fit at all (a bump, a passer-by): one pass, common practice
    spread = 1.4826 * float(np.median(np.abs(resid))) + 1e-9
    bad = np.abs(resid) > 5.0 * spread + 3.0 * se
    if 0 < bad.sum() <= len(frames) // 4 and len(frames) - bad.sum() >= _MIN_FRAMES:
        notes.append(f"{int(bad.sum())} frame(s) left out for not fitting the others: "
                     f"{', '.join(map(str, frames[bad][:12]))}")
        frames, u, s, se, w = frames[~bad], u[~bad], s[~bad], se[~bad], w[~bad]
        with_tilt, both_ways = _tilt_separable(u)
        slope, tilt, cov, resid = _weighted_line(u, s, w, with_tilt)
    sigma_slope = math.sqrt(float(cov[0, 0]))

    readout = abs(slope) * height
    sigma = math.hypot(sigma_slope * height, _SYSTEMATIC_FRACTION * readout)
    if abs(slope) >= _SIGNIFICANCE * sigma_slope:
        order = "top-down" if slope > 0 else "bottom-up"
        notes.append(f"line order {order}: from the way the picture leans against the way it moves")
    else:
        order = "undetermined"
        notes.append(f"no lean above the noise: a global shutter, or a readout under about "
                     f"{_SIGNIFICANCE * sigma * 1e3:.2g} ms; line order undetermined")
    if with_tilt:
        how = "panned both ways" if both_ways else (
            f"panned at {np.abs(u).min():.0f} to {np.abs(u).max():.0f} px/s")
        notes.append(f"{how}: a target tilt of {tilt:+.4f} px per row "
                     f"({math.degrees(math.atan(tilt)):+.3f} degrees) was fitted and cancelled")
    else:
        notes.append("panned one way at one speed: the edges were taken as truly vertical; a tilted "
                     "target would bias the result, so pan both ways to cancel it")
    if readout - 3 * sigma > interval:
        raise MeasurementRefused(
            f"the lean implies a readout of {readout * 1e3:.1f} ms, longer than the frame interval "
            f"{interval * 1e3:.1f} ms: the edges are probably not vertical (pan both ways to cancel a "
            "tilted target) or the speed was not steady")
    if readout > interval:
        notes.append("the result is longer than the frame interval, within its uncertainty")

    sign = -1.0 if order == "bottom-up" else 1.0
    candidates, residuals = _residual_curve(u, s, w, height, sign, with_tilt,
                                            max(interval, 1.5 * readout), readout)
    diagnostics = {
        "candidates_ms": candidates,
        "residuals": residuals,
        "residual_label": "RMS lean misfit over the frame height (px)",
        "frames": frames.copy(),
        "speeds_px_s": u,
        "slants_px_per_row": s,
        "slant_stderr": se,
        "slope_s_per_row": slope,
        "tilt_px_per_row": tilt,
        "both_ways": both_ways,
        "tilt_fitted": with_tilt,
    }
    return ReadoutEstimate(readout, sigma, order, "pan", [int(k) for k in frames], height,
                           float(interval), diagnostics, notes)


# ----------------------------------------------------------------------------
# plot
# ----------------------------------------------------------------------------
def plot_pan(estimate: ReadoutEstimate, path, refused: str | None = None) -> None:
    """PNG to check a pan measurement by eye: lean against speed with the fitted line,
    and the misfit against candidate readouts with the minimum marked."""
    from skewfix.measure.plots import draw_residual_curve, new_figure, save_png

    d = estimate.diagnostics
    if not d or "speeds_px_s" not in d:
        raise ValueError("the estimate has no pan diagnostics to plot")
    fig, axes = new_figure(2, (9, 8))
    ax = axes[0]
    u = np.asarray(d["speeds_px_s"])
    s = np.asarray(d["slants_px_per_row"])
    ax.errorbar(u, s, yerr=np.asarray(d["slant_stderr"]), fmt="o", ms=4, color="C0",
                label="frames used")
    grid = np.linspace(min(0.0, u.min()), max(0.0, u.max()), 50)
    ax.plot(grid, d["tilt_px_per_row"] + d["slope_s_per_row"] * grid, color="C3",
            label="fitted line (slope = readout / rows)")
    ax.axhline(0, color="0.7", lw=0.8)
    ax.axvline(0, color="0.7", lw=0.8)
    ax.set_xlabel("picture speed (px/s, + = moving right)")
    ax.set_ylabel("lean (px per row)")
    ax.legend(loc="best", fontsize=8)
    draw_residual_curve(axes[1], estimate)
    from skewfix.measure.plots import mark_refused, title_for

    fig.suptitle(title_for(estimate, refused), fontsize=12)
    mark_refused(fig, refused)
    save_png(fig, path)
