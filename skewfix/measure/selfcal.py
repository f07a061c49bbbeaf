"""Self-calibration: the readout from the footage's own motion.

The displacement of a feature between frames ``k`` and ``k+1`` samples the
camera motion at the instants its rows were read, ``t(k, y)``. Only the right
readout puts every row of every frame on one smooth motion curve, so we fit
the motion (`skewfix.motion.fit_motion`) with sparse knots — 1.5 per frame
interval, measured best on our benchmark against 1 and 2 — so the curve cannot
bend within a frame to absorb a wrong row timing) for candidate readouts and take the one with the least robust
residual. The search runs over a *signed* readout: negative values are a
bottom-up scan. The uncertainty comes from the curvature of the residual at
its minimum (the Gauss-Newton / Laplace approximation: var = 2 s^2 / S'').

Motion at constant velocity shifts every row by the same amount whatever the
readout, so the residual is flat: that is detected and refused rather than
guessed.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from skewfix.errors import MeasurementRefused
from skewfix.measure.result import ReadoutEstimate
from skewfix.motion import FitSettings, fit_residual, thin_tracks
from skewfix.rowclock import RowClock, clip_frame_interval

SEARCH_SETTINGS = FitSettings(knots_per_frame=1.5, smoothness=0.02, iterations=4)
MAX_TRACKS_PER_PAIR = 160

STEADY_MESSAGE = (
    "the motion in this clip is too steady to reveal the readout (a constant-speed pan or a locked-off "
    "shot fits every readout equally well); use a shot whose motion changes, such as a whip pan that "
    "starts and stops or a handheld shot, or measure with --method flicker or --method pan"
)


def residual_curve(pairs, frame_times, height, width, signed_readouts, settings=SEARCH_SETTINGS, kind=None):
    """Sum of squared robust residuals and count for each signed readout candidate
    (with the given motion model, else the settings')."""
    if kind is not None:
        settings = replace(settings, kind=kind)
    sums, counts = [], []
    for r in signed_readouts:
        order = "top-down" if r >= 0 else "bottom-up"
        clock = RowClock(frame_times, height, abs(float(r)), order)
        rms, n = fit_residual(pairs, clock, width, settings)
        sums.append(rms * rms * n)
        counts.append(n)
    return np.array(sums), np.array(counts)


def _parabola_vertex(x, y):
    """Vertex and second derivative of the least-squares parabola through points."""
    a, b, c = np.polyfit(x, y, 2)
    if a <= 0:
        return float(x[np.argmin(y)]), 0.0
    return float(-b / (2 * a)), float(2 * a)


def measure_motion(analysis, line_order: str | None = None, frame_interval: float | None = None,
                   kind=None) -> ReadoutEstimate:
    """Estimate the readout from an `Analysis` of ordinary footage (method "motion"),
    fitting the given motion model (`skewfix.models`; default the similarity)."""
    info = analysis.info
    times = analysis.frame_times
    interval = frame_interval or clip_frame_interval(info.frame_interval, times)
    pairs = [p for p in analysis.pairs if not p.cut and len(p.p0) >= SEARCH_SETTINGS.min_tracks]
    if len(pairs) < 6:
        raise MeasurementRefused(
            f"{info.path}: only {len(pairs)} frame pairs could be tracked; the motion method needs at "
            "least 6 consecutive trackable frames"
        )
    pairs = thin_tracks(pairs, MAX_TRACKS_PER_PAIR)
    lo = 0.0 if line_order == "top-down" else -interval
    hi = 0.0 if line_order == "bottom-up" else interval
    coarse = np.linspace(lo, hi, 21 if lo < 0 < hi else 13)
    s_coarse, n_coarse = residual_curve(pairs, times, info.height, info.width, coarse, kind=kind)
    i = int(np.argmin(s_coarse))
    step = coarse[1] - coarse[0]
    fine = np.linspace(max(lo, coarse[i] - 1.5 * step), min(hi, coarse[i] + 1.5 * step), 9)
    s_fine, n_fine = residual_curve(pairs, times, info.height, info.width, fine, kind=kind)
    k = int(np.argmin(s_fine))
    fine_step = fine[1] - fine[0]
    # a last, denser look around the best fine candidate: the residual curve can be
    # lopsided, and a parabola is only a fair model of it close to the minimum
    finest = np.linspace(max(lo, fine[k] - fine_step), min(hi, fine[k] + fine_step), 7)
    s_finest, _ = residual_curve(pairs, times, info.height, info.width, finest, kind=kind)
    candidates = np.concatenate([coarse, fine, finest])
    sums = np.concatenate([s_coarse, s_fine, s_finest])
    order_idx = np.argsort(candidates)
    candidates, sums = candidates[order_idx], sums[order_idx]
    j = int(np.argmin(sums))
    near = np.abs(candidates - candidates[j]) <= 1.01 * fine_step
    best, curvature = _parabola_vertex(candidates[near], sums[near])
    best = float(np.clip(best, lo, hi))
    n_obs = int(np.max(n_fine))
    s_min = float(np.min(sums))
    sigma2 = s_min / max(n_obs - 4 * len(times), 1)
    # Relative depth of the minimum: how much worse the readout-blind extremes fit.
    depth = (float(np.max(s_coarse)) - s_min) / max(s_min, 1e-12)
    uncertainty = float(np.sqrt(2 * sigma2 / curvature)) if curvature > 0 else float("inf")
    # Tracks are correlated (same frame, same row), so inflate by the tracks per pair.
    uncertainty *= np.sqrt(max(n_obs / len(pairs), 1.0)) / 4.0
    if not np.isfinite(uncertainty) or depth < 0.02 or uncertainty > 0.25 * interval:
        raise MeasurementRefused(f"{info.path}: {STEADY_MESSAGE}")
    readout = abs(best)
    if readout >= 0.97 * interval:
        raise MeasurementRefused(
            f"{info.path}: the best fit lies at the edge of the search (a readout of the whole frame "
            f"interval, {interval * 1e3:.2f} ms), so the motion does not pin the readout down; "
            "measure with --method flicker or --method pan"
        )
    if line_order:
        order = line_order
    elif readout < 2 * uncertainty:
        order = "undetermined"
    else:
        order = "top-down" if best > 0 else "bottom-up"
    notes = []
    if order == "undetermined":
        notes.append("the readout is too close to zero to tell the line order (a global shutter, or nearly)")
    used = sorted({p.k for p in pairs} | {p.k + 1 for p in pairs})
    return ReadoutEstimate(
        readout_s=readout, uncertainty_s=uncertainty, line_order=order, method="motion",
        frames_used=used, height=info.height, frame_interval=interval,
        diagnostics={"candidates_ms": candidates * 1e3, "residuals": sums, "signed_best_ms": best * 1e3},
        notes=notes,
    )


def auto_readout_resolver(line_order: str | None):
    """For ``fix --readout auto``: measure from the clip being fixed."""

    def resolve(analysis, kind=None):
        est = measure_motion(analysis, line_order, kind=kind)
        order = est.line_order if est.line_order != "undetermined" else (line_order or "top-down")
        origin = (f"measured from this clip's motion: {est.readout_s * 1e3:.2f} ± "
                  f"{est.uncertainty_s * 1e3:.2f} ms")
        return est.readout_s, order, origin

    return resolve
