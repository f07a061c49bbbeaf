"""The motion method: the readout from the footage's own motion.

The displacement of a feature between frames ``k`` and ``k+1`` samples the
camera motion at the instants its rows were read, ``t(k, y)``. Only the right
readout puts every row of every frame on one smooth motion curve, so we fit
the motion (`skewfix.motion.fit_motion`) with sparse knots (1.5 per frame
interval, measured best on our benchmark against 1 and 2, so the curve cannot
bend within a frame to absorb a wrong row timing) for candidate readouts and
take the one with the least robust residual. The search runs over a *signed*
readout: negative values are a bottom-up scan.

Where a track was seen. Lucas–Kanade measures one translation for a window
of rows (Lucas & Kanade, 1981). Under a rolling shutter the displacement
changes along the rows whenever the speed changes between the two frames
(the lean changes), and to first order the window's translation is the
displacement at the window's centroid weighted by the squared image
gradient along the motion (the LK normal equations expanded about the
window centre), not at its centre. On a real scene that centroid sits
systematically above or below the corner (a mast against the sky), which
tilted the residual curve: the demo whip pan measured 18.28 ms against a true
18.5 ms. `rows_at_evidence` moves each track to that centroid before the
search (a second pass over the frames, the gradients only).

The estimate is the vertex of a least-squares parabola through the distinct
candidates nearest the minimum (the residual is locally quadratic in the
readout: Gauss-Newton); the residual is then evaluated at the vertex itself,
so the plot's lowest point is the result. The one-sigma uncertainty is a
delete-a-block jackknife over the frame pairs (Quenouille-Tukey, textbook):
tracks of one pair share the frame's errors, so a sum over tracks would
understate it.

Motion at constant velocity shifts every row by the same amount whatever the
readout, so the residual is flat: that is detected and refused rather than
guessed.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from skewfix.errors import MeasurementRefused
from skewfix.measure.result import ReadoutEstimate, refusal
from skewfix.motion import FitSettings, PairObservations, fit_residual, thin_tracks
from skewfix.rowclock import RowClock, clip_frame_interval

SEARCH_SETTINGS = FitSettings(knots_per_frame=1.5, smoothness=0.02, iterations=4)
MAX_TRACKS_PER_PAIR = 160
JACKKNIFE_BLOCKS = 8
# The jackknife's variance errs high on average (Efron & Stein, 1981); on the coverage
# table (scripts/bench_measure.py --coverage, seed 2026) the plain estimate put 87 % of 30
# clips within one sigma and 97 % within two; 0.8 gives 80 % and 97 %. Checked on fresh
# clips (seed 2027) before it was kept: see DEVELOPERS.md.
JACKKNIFE_SCALE = 0.8

STEADY_MESSAGE = (
    "the motion in this clip is too steady to reveal the readout (a constant-speed pan or a locked-off "
    "shot fits every readout equally well); use a shot whose motion changes, such as a whip pan that "
    "starts and stops or a handheld shot, or measure with --method flicker or --method pan"
)


def _quiet(stage, done, total):
    pass


def residual_curve(pairs, frame_times, height, width, signed_readouts, settings=SEARCH_SETTINGS, kind=None,
                   tick=None):
    """Sum of squared robust residuals and count for each signed readout candidate
    (with the given motion model, else the settings'); ``tick()`` after each fit."""
    if kind is not None:
        settings = replace(settings, kind=kind)
    sums, counts = [], []
    for r in signed_readouts:
        order = "top-down" if r >= 0 else "bottom-up"
        clock = RowClock(frame_times, height, abs(float(r)), order)
        rms, n = fit_residual(pairs, clock, width, settings)
        sums.append(rms * rms * n)
        counts.append(n)
        if tick is not None:
            tick()
    return np.array(sums), np.array(counts)


def parabola_vertex(x, y):
    """Vertex and second derivative of the least-squares parabola through the points
    (``x`` taken as distinct; the lowest point and 0 when the parabola opens downwards)."""
    a, b, c = np.polyfit(x, y, 2)
    if a <= 0:
        return float(x[np.argmin(y)]), 0.0
    return float(-b / (2 * a)), float(2 * a)


def _window_centroid_offsets(proxy: np.ndarray, points_px: np.ndarray, direction, window: int) -> np.ndarray:
    """Row offset (proxy px) of each point's LK window centroid, weighted by the squared
    gradient along ``direction`` (Scharr derivatives, as OpenCV's tracker uses)."""
    import cv2

    img = proxy.astype(np.float32)
    gx = cv2.Scharr(img, cv2.CV_32F, 1, 0)
    gy = cv2.Scharr(img, cv2.CV_32F, 0, 1)
    g = (direction[0] * gx + direction[1] * gy) ** 2
    h, w = img.shape
    rows = np.broadcast_to(np.arange(h, dtype=np.float32)[:, None], (h, w))
    mass = cv2.boxFilter(g, -1, (window, window), normalize=False, borderType=cv2.BORDER_REFLECT)
    moment = cv2.boxFilter(g * rows, -1, (window, window), normalize=False, borderType=cv2.BORDER_REFLECT)
    xi = np.clip(np.rint(points_px[:, 0]).astype(int), 0, w - 1)
    yi = np.clip(np.rint(points_px[:, 1]).astype(int), 0, h - 1)
    m = mass[yi, xi]
    off = np.where(m > 1e-6, moment[yi, xi] / np.maximum(m, 1e-6) - yi, 0.0)
    half = window // 2
    return np.clip(off, -half, half)


def rows_at_evidence(analysis, pairs, progress=_quiet):
    """The pairs with each track moved to the row where its displacement was measured
    (the LK window's gradient centroid along the pair's motion; module docstring).

    Reads the clip's frames once more (the luma only). Returns (pairs, note or None);
    when the frames cannot be read again the pairs come back unchanged with a note.
    """
    from skewfix.decode import open_source
    from skewfix.track import TrackerSettings, luma_proxy

    info = analysis.info
    s = TrackerSettings()
    by_k = {p.k: p for p in pairs}
    out = {}
    try:
        with open_source(info.path, getattr(info, "rate", None)) as source:
            for frame in source.frames():
                k = frame.index
                p = by_k.get(k)
                if p is not None and len(p.p0):
                    proxy, scale = luma_proxy(frame.luma, frame.bit_depth, s.proxy_size)
                    d = np.median(p.p1 - p.p0, axis=0)
                    norm = float(np.hypot(*d))
                    if norm > 1e-6:
                        sy = proxy.shape[0] / frame.luma.shape[0]
                        sx = proxy.shape[1] / frame.luma.shape[1]
                        pts = np.stack([(p.p0[:, 0] + 0.5) * sx - 0.5, (p.p0[:, 1] + 0.5) * sy - 0.5], 1)
                        dy = _window_centroid_offsets(proxy, pts, d / norm, s.window) / sy
                        shift = np.stack([np.zeros_like(dy), dy], 1)
                        out[k] = PairObservations(p.k, p.p0 + shift, p.p1 + shift, p.cut, p.ids, p.method)
                progress("motion: where tracks were seen", k + 1, analysis.n_frames)
                if k >= max(by_k, default=-1):
                    break
    except Exception as exc:  # the clip was readable once; a second read failing is only a caveat
        return pairs, f"tracks kept at their corners (the frames could not be read again: {exc})"
    return [out.get(p.k, p) for p in pairs], None


def _search(pairs, times, height, width, lo, hi, kind, tick):
    """Coarse, fine and finest candidates; (candidates, sums, counts, fine_step)."""
    coarse = np.linspace(lo, hi, 21 if lo < 0 < hi else 13)
    s_coarse, n_coarse = residual_curve(pairs, times, height, width, coarse, kind=kind, tick=tick)
    i = int(np.argmin(s_coarse))
    step = coarse[1] - coarse[0]
    fine = np.linspace(max(lo, coarse[i] - 1.5 * step), min(hi, coarse[i] + 1.5 * step), 9)
    s_fine, n_fine = residual_curve(pairs, times, height, width, fine, kind=kind, tick=tick)
    k = int(np.argmin(s_fine))
    fine_step = fine[1] - fine[0]
    # a last, denser look around the best fine candidate: a parabola is a fair model of the
    # residual only close to its minimum
    finest = np.linspace(max(lo, fine[k] - fine_step), min(hi, fine[k] + fine_step), 7)
    s_finest, n_finest = residual_curve(pairs, times, height, width, finest, kind=kind, tick=tick)
    cand = np.concatenate([coarse, fine, finest])
    sums = np.concatenate([s_coarse, s_fine, s_finest])
    counts = np.concatenate([n_coarse, n_fine, n_finest])
    # one point per candidate (the grids share points; a repeated point would weigh twice in the parabola)
    cand, first = np.unique(np.round(cand, 12), return_index=True)
    return cand, sums[first], counts[first], float(finest[1] - finest[0]), float(np.max(s_coarse))


def _vertex(cand, sums, lo, hi, finest_step):
    """The parabola through the 7 distinct candidates nearest the lowest one, within two
    finest steps of it on each side where the grid allows."""
    j = int(np.argmin(sums))
    near = np.abs(cand - cand[j]) <= 3.01 * finest_step
    if near.sum() < 3:
        near = np.argsort(np.abs(cand - cand[j]))[:3]
    best, curvature = parabola_vertex(cand[near], sums[near])
    return float(np.clip(best, lo, hi)), curvature


def _pair_blocks(pairs, blocks):
    ks = sorted({p.k for p in pairs})
    groups = np.array_split(np.asarray(ks), min(blocks, len(ks)))
    return [set(int(k) for k in g) for g in groups if len(g)]


def measure_motion(analysis, line_order: str | None = None, frame_interval: float | None = None,
                   kind=None, progress=_quiet, at_evidence: bool = True) -> ReadoutEstimate:
    """Estimate the readout from an `Analysis` of ordinary footage (method "motion"),
    fitting the given motion model (`skewfix.models`; default the similarity).

    ``progress(stage, done, total)`` is told about the second pass over the frames and
    each fit of the search; ``at_evidence`` moves the tracks to where they were measured
    first (`rows_at_evidence`).
    """
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
    notes = []
    if at_evidence:
        cached = getattr(analysis, "_rows_at_evidence", None)
        if cached is None:
            cached = rows_at_evidence(analysis, pairs, progress)
            try:
                analysis._rows_at_evidence = cached
            except AttributeError:
                pass
        pairs, note = cached
        if note:
            notes.append(note)
    lo = 0.0 if line_order == "top-down" else -interval
    hi = 0.0 if line_order == "bottom-up" else interval
    blocks = _pair_blocks(pairs, JACKKNIFE_BLOCKS)
    n_fits = (21 if lo < 0 < hi else 13) + 9 + 7 + 1 + len(blocks) * 6
    done = [0]

    def tick():
        done[0] += 1
        progress("motion: readout search", done[0], n_fits)

    cand, sums, counts, finest_step, s_far = _search(pairs, times, info.height, info.width, lo, hi, kind, tick)
    best, curvature = _vertex(cand, sums, lo, hi, finest_step)
    s_best, n_best = residual_curve(pairs, times, info.height, info.width, [best], kind=kind, tick=tick)
    cand = np.append(cand, best)
    sums = np.append(sums, s_best)
    order_idx = np.argsort(cand)
    cand, sums = cand[order_idx], sums[order_idx]
    s_min = float(np.min(sums))
    used = sorted({p.k for p in pairs} | {p.k + 1 for p in pairs})

    def estimate(uncertainty, order, notes_):
        return ReadoutEstimate(
            readout_s=abs(best), uncertainty_s=uncertainty, line_order=order, method="motion",
            frames_used=used, height=info.height, frame_interval=interval,
            diagnostics={"candidates_ms": cand * 1e3, "residuals": sums, "signed_best_ms": best * 1e3,
                         "finest_step_ms": finest_step * 1e3,
                         "residual_label": "sum of squared track misfits (px², each at most 3 px)"},
            notes=notes_)

    # Relative depth of the minimum: how much worse the readout-blind extremes fit.
    depth = (s_far - s_min) / max(s_min, 1e-12)
    if curvature <= 0 or depth < 0.02:
        raise refusal(f"{info.path}: {STEADY_MESSAGE}", estimate(float("inf"), "undetermined", notes))

    # delete-a-block jackknife over the pairs: the vertex again without each block, from six
    # candidates around the full result (the curve's shape near the minimum barely changes);
    # a block whose removal moves the minimum outside them is searched on the whole grid (not
    # counted in the progress: it happens only then)
    local = best + finest_step * np.array([-3.0, -1.5, -0.5, 0.5, 1.5, 3.0])
    local = np.clip(local, lo, hi)
    estimates = []
    for block in blocks:
        keep = [p for p in pairs if p.k not in block]
        s_loc, _ = residual_curve(keep, times, info.height, info.width, local, kind=kind, tick=tick)
        b, c = parabola_vertex(local, s_loc)
        if c > 0 and not local.min() <= b <= local.max():
            # the minimum left the six candidates: a parabola through them cannot say where it
            # went, so this block's minimum is found again on the whole search grid
            s_all, _ = residual_curve(keep, times, info.height, info.width, cand, kind=kind)
            b, c = _vertex(cand, s_all, lo, hi, finest_step)
        if c > 0:
            estimates.append(float(np.clip(b, lo - interval, hi + interval)))
    g = len(estimates)
    if g >= 3:
        e = np.asarray(estimates)
        uncertainty = JACKKNIFE_SCALE * float(np.sqrt((g - 1) / g * np.sum((e - e.mean()) ** 2)))
    else:
        uncertainty = float("inf")
    verdict = judge_uncertainty(best, uncertainty, interval)
    if verdict == "refuse":
        raise refusal(f"{info.path}: {STEADY_MESSAGE}", estimate(uncertainty, "undetermined", notes))
    if verdict == "weak":
        notes.append(f"the uncertainty is large ({uncertainty * 1e3:.2f} ms): most of the evidence comes "
                     "from a few frames; a longer take with more changes of motion, or a flicker or pan "
                     "test, would pin the readout down better")
    readout = abs(best)
    if readout >= 0.97 * interval:
        raise refusal(
            f"{info.path}: the best fit lies at the edge of the search (a readout of the whole frame "
            f"interval, {interval * 1e3:.2f} ms): the motion is too steady to reveal the readout, as a "
            "constant-speed pan is; measure with --method flicker or --method pan",
            estimate(uncertainty, "undetermined", notes)
        )
    if line_order:
        order = line_order
    elif readout < 2 * uncertainty:
        order = "undetermined"
    else:
        order = "top-down" if best > 0 else "bottom-up"
    if order == "undetermined":
        notes.append("the readout is too close to zero to tell the line order (a global shutter, or nearly)")
    return estimate(uncertainty, order, notes)


#: shares of the frame interval (common practice): an uncertainty above VAGUE_SHARE that cannot
#: tell the readout from zero is refused; one above WEAK_SHARE is reported with a note
VAGUE_SHARE, WEAK_SHARE = 0.1, 0.25


def judge_uncertainty(best: float, uncertainty: float, interval: float) -> str:
    """"refuse", "weak" or "sound" for a signed best readout and its jackknife uncertainty (s).

    Refused: no finite uncertainty, or more than a tenth of the frame interval while zero lies
    within two sigma (the clip cannot tell a rolling shutter from a global one). Weak, reported
    with a note: more than a quarter of the interval, but clear of zero (leaving out one stretch
    of frames moved the result far: the evidence sits in a few frames). Sound otherwise.
    """
    if not np.isfinite(uncertainty):
        return "refuse"
    if uncertainty > VAGUE_SHARE * interval and abs(best) < 2 * uncertainty:
        return "refuse"
    return "weak" if uncertainty > WEAK_SHARE * interval else "sound"


def auto_readout_resolver(line_order: str | None, progress=_quiet):
    """For ``fix --readout auto``: measure from the clip being fixed.

    ``resolve.progress`` may be replaced once a progress display exists (fix sets it, so the
    search shows its fits as ``measure`` does)."""

    def resolve(analysis, kind=None):
        est = measure_motion(analysis, line_order, kind=kind, progress=resolve.progress)
        order = est.line_order if est.line_order != "undetermined" else (line_order or "top-down")
        origin = (f"measured from this clip's motion: {est.readout_s * 1e3:.2f} ± "
                  f"{est.uncertainty_s * 1e3:.2f} ms")
        return est.readout_s, order, origin

    resolve.progress = progress
    return resolve


# a line order is doubted when the other order's fit leaves at most this share of its misfit
# (common practice: a clear margin; a clip whose motion cannot tell the orders apart gives ~1)
LINE_ORDER_DOUBT_RATIO = 0.6
LINE_ORDER_TRACKS = 30  # per pair: two fits of about 0.07 s on a streamed clip's first 24 frames


def line_order_note(pairs, clock: RowClock, width: int, settings: FitSettings | None = None) -> str | None:
    """One line when the clip's motion says the line order given is the wrong one, else None.

    The motion is fitted with the given readout in both orders; a wrong order doubles the
    lean it should remove (the rows are timed backwards), so when the other order fits
    clearly better (its misfit under `LINE_ORDER_DOUBT_RATIO` of the given one's) the given
    order is doubted. Motion that cannot tell (a steady pan, a locked-off shot) fits both alike.
    """
    if clock.readout <= 0:
        return None
    use = [p for p in pairs if not p.cut and len(p.p0) >= SEARCH_SETTINGS.min_tracks]
    if len(use) < 4:
        return None
    use = thin_tracks(use, LINE_ORDER_TRACKS)
    search = replace(SEARCH_SETTINGS, iterations=3, kind=(settings.kind if settings is not None else None),
                     model=(settings.model if settings is not None else SEARCH_SETTINGS.model))
    other = "bottom-up" if clock.line_order == "top-down" else "top-down"
    misfit = {}
    for order in (clock.line_order, other):
        c = RowClock(clock.frame_times, clock.height, clock.readout, order)
        rms, n = fit_residual(use, c, width, search)
        misfit[order] = rms
    given, flipped = misfit[clock.line_order], misfit[other]
    if not (np.isfinite(given) and np.isfinite(flipped)) or flipped >= LINE_ORDER_DOUBT_RATIO * given:
        return None
    return (f"the line order looks wrong: with --line-order {other} the clip's motion fits "
            f"{given / max(flipped, 1e-9):.1f}x better ({flipped:.2f} px against {given:.2f} px RMS); a wrong "
            f"order doubles the lean instead of removing it, so check the camera's line order")
