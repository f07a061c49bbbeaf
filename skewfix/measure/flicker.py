"""Readout time from the flicker bands of a light (README.md, "Finding a camera's readout
time", the first way).

A light whose intensity varies at ``f`` Hz paints horizontal bands on a rolling
shutter sensor, because each row starts its exposure at its own time
``t(k, y) = t_k + readout * y / H`` (top-down; ``H - 1 - y`` for bottom-up).
In the log of the per-row mean luminance the bands are a sinusoid in ``y`` with
``kappa = f * readout`` cycles per frame height (a band period of
``H / (f * readout)`` rows), whose phase moves from frame to frame by
``2 pi f (t_{k+1} - t_k)``.

The fit, all frames jointly:

1. log of the row profiles (a power-law transfer curve and the multiplicative
   gradient/vignetting of the wall become additive);
2. nuisance removed by projection: a low-order Legendre polynomial in ``y`` per
   frame (lighting gradient, vignetting, exposure changes); when the bands
   drift between frames, also a free per-row profile common to all frames (the
   wall's texture and the lens falloff), after re-aligning the frames for small
   vertical camera shake;
3. a coarse scan of ``kappa`` over ``(0, f * frame_interval]`` (a readout no
   longer than the frame interval) by the energy a per-frame sinusoid explains
   (a periodogram with the nuisance projected out), then a nonlinear least
   squares refinement of ``kappa`` with the per-frame amplitudes and phases
   of the fundamental and two harmonics profiled out (variable projection;
   Brent's method on the profiled sum of squares);
4. one-sigma uncertainty: the largest of (Jacobian with the residual
   variance; a Newey-West sandwich along the rows; a delete-a-block jackknife
   over frames), combined with the spread over background models and a small
   allowance for compression;
5. the line order from the direction in which the band phase moves between
   frames against the light's phase ``2 pi f t_k``; when ``f / fps`` is (near)
   a whole number the bands stand still and the order is undetermined.

Exposure integrates the light (a box filter), so band contrast falls as
``|sinc(f * exposure)|`` and vanishes at exposures of ``n / f``. A square-wave
(PWM) light has harmonics, and so do the log and the camera's transfer curve:
the readout comes from the fundamental, and the second and third harmonics
(at the same row frequency times 2 and 3) are fitted alongside so that they do
not pull it. The coarse scan uses the fundamental alone, the strongest
component, so a harmonic is never taken for it.

Safety: flickering and strobing test lights can trigger seizures in people
with photosensitive epilepsy; mains-powered light rigs are for qualified hands.
"""

from __future__ import annotations

import math

import numpy as np

from skewfix.errors import InputError, MeasurementRefused
from skewfix.measure.result import ReadoutEstimate, refusal

__all__ = ["measure_flicker", "row_profiles_from_luma", "plot_flicker"]

# Smallest number of band cycles over the frame height that can be told from
# a smooth background (below this the bands are one broad swell).
_KAPPA_MIN = 0.35
# Coarse scan step, cycles per frame height (about 1/25 of a resolution cell).
_KAPPA_STEP = 0.04
# Legendre degree of the per-frame background.
_DEG_PER_FRAME = (3, 4, 5)  # still bands: the background carries vignetting and
                            # gradient; the middle one is used, the spread is
                            # its model error
_DEG_COMMON = (0, 1)        # drifting bands: the common profile carries them;
                            # per frame only what shake and exposure change
# Smallest share of the band energy that changes from frame to frame before the
# common-profile fit is tried (1 - |mean exp(i 2 pi f t_k)|^2).
_MIN_DRIFT = 0.02
# Relative tolerance of the light's frequency (from memory: EN 50160 keeps the
# mains within +-1 % of nominal for 99.5 % of a year on interconnected grids;
# LED drivers are usually crystal or mains locked).
_LIGHT_TOL = 0.01
# Detection thresholds (common practice: a signal well above the noise floor).
_MIN_F_STAT = 30.0       # band energy per fitted parameter over noise variance
_MIN_R2 = 0.25           # fraction of the detrended variance the bands explain
_ORDER_CHI2 = 25.0       # five sigma between the two line orders
# Largest relative one-sigma uncertainty still reported as a measurement.
_MAX_REL_SIGMA = 0.10
# Type B allowance (GUM, JCGM 100:2008: uncertainty evaluated by means other
# than statistics) for what H.264 inter-frame prediction does to faint band
# changes, which no statistic of one clip shows. Relative, 1 sigma. Set from the
# coverage table (scripts/bench_measure.py --coverage: over 30 random synthetic
# clips, libx264 CRF 18, the median error is about 0.02 %); 0.1 % before put over
# 90 % of them within one sigma, which said less than the method knows.
_COMPRESSION_FLOOR = 0.0002
# Type B allowance (GUM, as above) when the bands stand still and no flat field is
# given: the wall's own smooth shading at the band scale repeats in every frame like
# the bands and no statistic can see it. On this project's synthetic walls with 2 %
# shading (skewfix.synth.flicker.wall_shading; scripts/bench_measure.py --only shaded)
# it moved results by up to 0.24 %. Relative, 1 sigma.
_STILL_SHADING_FLOOR = 0.0025
# Type B allowance when the bands drift but little over the clip (under half of their
# energy changes between frames): the profile common to all frames then holds most of
# the bands, and inter-frame compression of the small moving part moved results by up to
# about 0.1 % on this project's synthetic clips (scripts/bench_measure.py, the 720p
# 23.976 fps clip under 120 Hz: -0.11 %). Relative, 1 sigma.
_LITTLE_DRIFT_FLOOR = 0.001
# Harmonics fitted with the fundamental (the readout comes from the fundamental).
_HARMONICS = 3

_SAFETY = ("flickering or strobing lights can trigger photosensitive seizures, "
           "and mains-powered light rigs are for qualified hands")


# ----------------------------------------------------------------------------
# profiles
# ----------------------------------------------------------------------------
def row_profiles_from_luma(luma: np.ndarray, band: float = 0.5,
                           black_level: float = 0.0) -> np.ndarray:
    """Per-row mean of a central column band of a luma plane, as float64.

    ``luma`` is (H, W) for one frame or (n_frames, H, W) for a stack; the
    result is (H,) or (n_frames, H). ``band`` is the fraction of the width kept
    around the centre (the corners carry the most vignetting).
    ``black_level`` is subtracted from the means: the code value of black, 16
    for limited-range 8-bit video (64 for 10-bit; ITU-R BT.709 coding ranges,
    from memory). With it the flicker fit sees light that is a pure power of
    the scene's, so wall shading and bands separate exactly in the log.
    """
    a = np.asarray(luma)
    if a.ndim not in (2, 3):
        raise InputError("luma must be a 2-D frame or a 3-D stack of frames")
    if not 0 < band <= 1:
        raise ValueError("band must be in (0, 1]")
    w = a.shape[-1]
    keep = max(1, int(round(w * band)))
    c0 = (w - keep) // 2
    return a[..., c0:c0 + keep].mean(axis=-1, dtype=np.float64) - float(black_level)


# ----------------------------------------------------------------------------
# small numerical helpers
# ----------------------------------------------------------------------------
def _legendre_basis(y, height, degree):
    """Orthonormal basis (len(y), degree+1) of polynomials in the row."""
    x = 2.0 * (np.asarray(y, float) + 0.5) / height - 1.0
    v = np.polynomial.legendre.legvander(x, degree)
    q, _ = np.linalg.qr(v)
    return q


def _project_out(a, basis):
    """Remove from each row of ``a`` (…, m) its component in span(basis)."""
    return a - (a @ basis) @ basis.T


def _sin_basis(kappa, y, height, basis, harmonics=1):
    """Projected cos/sin columns at ``kappa`` cycles per height and its
    harmonics: (2 * harmonics, m), fundamental first."""
    ph = 2.0 * np.pi * kappa * (np.asarray(y, float) / height)
    cols = []
    for h in range(1, harmonics + 1):
        cols += [np.cos(h * ph), np.sin(h * ph)]
    return _project_out(np.stack(cols), basis)


def _explained_scan(kappas, r, y, height, basis):
    """Energy explained by a free per-frame sinusoid at each kappa."""
    out = np.empty(len(kappas))
    yy = np.asarray(y, float) / height
    for i0 in range(0, len(kappas), 256):
        kk = np.asarray(kappas[i0:i0 + 256], float)
        ph = 2.0 * np.pi * kk[:, None] * yy[None, :]
        c = _project_out(np.cos(ph), basis)
        s = _project_out(np.sin(ph), basis)
        gcc = np.einsum("ij,ij->i", c, c)
        gss = np.einsum("ij,ij->i", s, s)
        gcs = np.einsum("ij,ij->i", c, s)
        det = gcc * gss - gcs ** 2
        u = c @ r.T
        v = s @ r.T
        num = gss[:, None] * u ** 2 - 2 * gcs[:, None] * u * v + gcc[:, None] * v ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            e = num.sum(axis=1) / det
        # near kappa -> 0 the sinusoid merges with the polynomial: no evidence
        e[~np.isfinite(e) | (det < 1e-9 * (gcc * gss + 1e-300))] = 0.0
        out[i0:i0 + 256] = e
    return out


def _fit_at(kappa, r, y, height, basis, harmonics=1):
    """Per-frame least-squares cos/sin coefficients at ``kappa`` (and its
    harmonics); returns coefficients (n, 2*harmonics), model, residual."""
    x = _sin_basis(kappa, y, height, basis, harmonics)   # (2h, m)
    g = x @ x.T
    coef = np.linalg.lstsq(g, x @ r.T, rcond=1e-12)[0].T  # (n, 2h)
    model = coef @ x
    return coef, model, r - model


def _explained_at(kappa, r, y, height, basis, harmonics=1):
    """Energy of ``r`` explained by the per-frame sinusoids at ``kappa``."""
    x = _sin_basis(kappa, y, height, basis, harmonics)
    g = x @ x.T
    u = x @ r.T                                           # (2h, n)
    try:
        return float(np.sum(np.linalg.solve(g, u) * u))
    except np.linalg.LinAlgError:
        return 0.0


def _hac_variance(score, lags):
    """Newey-West (Bartlett) long-run variance of the sum of ``score``."""
    s = np.asarray(score, float)
    v = float(s @ s)
    for lag in range(1, min(lags, len(s) - 1) + 1):
        v += 2.0 * (1.0 - lag / (lags + 1.0)) * float(s[:-lag] @ s[lag:])
    return max(v, 0.0)


def _estimate_shifts(q, max_shift):
    """Per-frame vertical shift of the scene (texture) between frames, rows.

    Returns (shifts, reliable). Frame k is modelled as ``T(y - s_k)``. Only
    the high-pass part of the log profile is used (the broad flicker bands are
    filtered out). Shifts are relative to the mean position.
    """
    from scipy.interpolate import CubicSpline
    from scipy.ndimage import gaussian_filter1d
    from scipy.optimize import minimize_scalar

    n, h = q.shape
    hp = q - gaussian_filter1d(q, sigma=3.0, axis=1, mode="nearest")
    m = int(max_shift) + 3
    if h < 8 * m or n < 2:
        return np.zeros(n), False
    core = slice(m, h - m)
    y = np.arange(h, dtype=float)
    shifts = np.zeros(n)
    lags = np.arange(-int(max_shift), int(max_shift) + 1)  # whole rows: |lag| < m, so plain slices
    for _ in range(3):
        aligned = np.empty_like(hp)
        for k in range(n):
            aligned[k] = np.interp(y + shifts[k], y, hp[k])
        ref = aligned.mean(axis=0)
        spline = CubicSpline(y, ref)
        ref_energy = float(np.sum(ref[core] ** 2))
        new = np.zeros(n)
        for k in range(n):
            target = hp[k, core]
            costs = [np.sum((target - ref[m - L:h - m - L]) ** 2) for L in lags]
            l0 = lags[int(np.argmin(costs))]
            res = minimize_scalar(
                lambda s_: float(np.sum((target - spline(y[core] - s_)) ** 2)),
                bounds=(l0 - 1.0, l0 + 1.0), method="bounded",
                options={"xatol": 1e-3})
            new[k] = res.x
        new -= new.mean()
        shifts = new
    # reliable when the scene's own detail dominates what is left over
    left = np.empty_like(hp)
    for k in range(n):
        left[k] = hp[k] - spline(y - shifts[k])
    left_energy = float(np.sum(left[:, core] ** 2)) / n
    reliable = ref_energy > 10.0 * left_energy
    return shifts, reliable


def _no_bands_message(light_hz, exposure_s, global_hint):
    period_ms = 1e3 / light_hz
    why = []
    if exposure_s is not None and exposure_s > 0:
        s = abs(np.sinc(light_hz * exposure_s))
        if s < 0.2:
            why.append(
                f"the exposure {exposure_s * 1e3:.3g} ms is (near) a whole multiple "
                f"of the flicker period 1/f = {period_ms:.3g} ms, which cancels the bands")
    if not why:
        why.append(f"the exposure may be a whole multiple of the flicker period "
                   f"1/f = {period_ms:.3g} ms, or the light may not flicker at "
                   f"{light_hz:g} Hz")
    if global_hint:
        why.append("the frames change brightness with the light but the rows do not, "
                   "so the camera may have a global shutter (readout 0), which shows none")
    else:
        why.append("a camera with a global shutter (readout 0) shows none either")
    return ("no flicker bands found (band contrast below the noise): " + "; ".join(why)
            + "; shoot at a fast shutter (1/1000 s or faster) on a plain, evenly lit wall "
            "under the flickering light (note: " + _SAFETY + ")")


def _wrap(x, period):
    return (x + period / 2.0) % period - period / 2.0


# ----------------------------------------------------------------------------
# line order
# ----------------------------------------------------------------------------
def _line_order(z, t, light_hz, frame_interval, centred, sigma_z2):
    """Decide the line order from the frame-to-frame band phase.

    ``z`` holds each frame's complex band amplitude at row 0 (phase of the
    light seen by row 0). Top-down puts ``z_k ~ Z exp(+i 2 pi f' t_k)``,
    bottom-up ``z_k ~ Z exp(-i 2 pi f' t_k)``, with ``f'`` within the light's
    tolerance of ``light_hz``. Returns (order, notes, info).
    """
    n = len(z)
    f = float(light_hz)
    fps = 1.0 / frame_interval
    ratio = f / fps
    info = {"f_over_fps": ratio}
    if n < 3:
        return "undetermined", [f"line order undetermined: {n} frame(s) cannot show the "
                                "bands drifting"], info
    beat = _wrap(f, fps)                         # top-down drift, Hz
    sep = abs(_wrap(2.0 * beat, fps))             # top-down vs bottom-up drift
    tol = _LIGHT_TOL * f
    duration = float(np.ptp(t))
    info.update(beat_hz=beat, separation_hz=sep)
    whole = abs(ratio - round(ratio)) < 1e-6
    if sep <= 2.0 * tol or duration * sep < 0.5:
        if whole:
            why = (f"the bands stand still (f/fps = {ratio:.6g} is a whole number), so "
                   "the line order is undetermined")
        elif abs(ratio - round(ratio)) < 0.25:
            why = (f"the bands nearly stand still (f/fps = {ratio:.6g}; their drift of "
                   f"{abs(beat):.3g} Hz is within the light's frequency tolerance), so "
                   "the line order is undetermined")
        else:
            why = (f"the bands alternate (f/fps = {ratio:.6g} is near a half-whole "
                   "number), so both line orders look alike: undetermined")
        return "undetermined", [why + "; shoot at a frame rate where f/fps is not near a "
                                "whole or half-whole number to get the order"], info

    tt = t - t[0]
    step = 1.0 / (20.0 * max(duration, 1e-3))
    fgrid = np.arange(f * (1 - _LIGHT_TOL), f * (1 + _LIGHT_TOL) + step, step)
    best = {}
    for sign, name in ((1.0, "top-down"), (-1.0, "bottom-up")):
        w = np.exp(1j * sign * 2 * np.pi * fgrid[:, None] * tt[None, :])
        if centred:
            w = w - w.mean(axis=1, keepdims=True)
        ww = np.sum(np.abs(w) ** 2, axis=1)
        proj = np.abs(w.conj() @ z) ** 2 / np.maximum(ww, 1e-300)
        i = int(np.argmax(proj))
        rss = float(np.sum(np.abs(z) ** 2) - proj[i])
        best[name] = (rss, float(fgrid[i]))
    (b_name, (b_rss, b_f)), (w_name, (w_rss, _)) = sorted(best.items(), key=lambda kv: kv[1][0])
    dof = max(2 * n - 3, 1)
    scale = max(1.0, b_rss / (dof * sigma_z2)) if sigma_z2 > 0 else 1.0
    chi = (w_rss - b_rss) / (sigma_z2 * scale) if sigma_z2 > 0 else 0.0
    info.update(rss_top_down=best["top-down"][0], rss_bottom_up=best["bottom-up"][0],
                order_chi2=chi, light_hz_fit=b_f)
    if chi > _ORDER_CHI2:
        return b_name, [f"line order {b_name} from the band drift between frames "
                        f"(light fitted at {b_f:.4g} Hz)"], info
    return "undetermined", ["line order undetermined: the band drift does not tell the two "
                            "orders apart clearly (too few frames or too much noise)"], info


# ----------------------------------------------------------------------------
# the light's frequency, from the drift of the bands between frames
# ----------------------------------------------------------------------------
# The light frequencies people film under (from memory: IEC 60038 mains at 50 and 60 Hz; a
# lamp on AC flickers at twice the mains frequency, so 100 and 120 Hz).
USUAL_LIGHT_HZ = (100.0, 120.0)


def _drift_misfit(z, t, nu, centred):
    """What is left of the frame amplitudes ``z`` after the best ``Z exp(i 2 pi nu t)``
    (per drift frequency ``nu``, Hz, signed; an array)."""
    nu = np.atleast_1d(np.asarray(nu, float))
    w = np.exp(1j * 2 * np.pi * nu[:, None] * (t - t[0])[None, :])
    if centred:
        w = w - w.mean(axis=1, keepdims=True)
    ww = np.sum(np.abs(w) ** 2, axis=1)
    proj = np.where(ww > 1e-9, np.abs(w.conj() @ z) ** 2 / np.maximum(ww, 1e-300), 0.0)
    return float(np.sum(np.abs(z) ** 2)) - proj


def frequency_evidence(z, t, sigma_z2, centred, candidates_hz):
    """How well each candidate light frequency explains the band drift between frames.

    Frame ``k``'s band phase moves with the light's, ``exp(+-i 2 pi f t_k)`` (the sign is the
    line order), so the drift per frame fixes ``f`` modulo the frame rate. Each candidate is
    tried in both orders within the light's tolerance; its misfit is compared with the best
    free drift (a fine scan over one frame rate) in units of the amplitudes' noise
    (chi-square). Returns (chi2 per candidate, the best free drift in Hz, its chi2 against
    no drift at all).
    """
    n = len(z)
    tt = np.asarray(t, float)
    duration = float(np.ptp(tt)) if n > 1 else 0.0
    if n < 3 or duration <= 0:
        return {f: 0.0 for f in candidates_hz}, 0.0, 0.0
    from scipy.optimize import minimize_scalar

    fps = (n - 1) / duration
    step = 1.0 / (20.0 * duration)

    def lowest(grid):
        """The least misfit over a grid of drifts, refined between its neighbours (Brent)."""
        m = _drift_misfit(z, tt, grid, centred)
        i = int(np.argmin(m))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        if hi - lo <= 0:
            return float(grid[i]), float(m[i])
        sol = minimize_scalar(lambda nu: float(_drift_misfit(z, tt, [nu], centred)[0]), bounds=(lo, hi),
                              method="bounded", options={"xatol": 1e-6 * step})
        return (float(sol.x), float(sol.fun)) if sol.fun < m[i] else (float(grid[i]), float(m[i]))

    best_nu, best = lowest(np.arange(-fps / 2, fps / 2 + step, step))
    dof = max(2 * n - 3, 1)
    scale = max(1.0, best / (dof * sigma_z2)) if sigma_z2 > 0 else 1.0
    unit = sigma_z2 * scale if sigma_z2 > 0 else max(best / dof, 1e-300)
    out = {}
    for f in candidates_hz:
        grid = np.arange(f * (1 - _LIGHT_TOL), f * (1 + _LIGHT_TOL) + step, step)
        m = min(lowest(grid)[1], lowest(-grid[::-1])[1])
        out[f] = max(m - best, 0.0) / unit
    still = float(_drift_misfit(z, tt, [0.0], centred)[0]) if not centred else best
    return out, best_nu, max(still - best, 0.0) / unit


def _frequency_verdict(z, t, sigma_z2, centred, f_given, frame_interval):
    """(refusal message or None, note, the drift in Hz) on the light frequency given, from the
    band drift."""
    cands = [f_given] + [f for f in USUAL_LIGHT_HZ if abs(f - f_given) > 1e-9]
    chi, drift, moving = frequency_evidence(z, t, sigma_z2, centred, cands)
    fps = 1.0 / frame_interval
    if moving < _ORDER_CHI2 and not centred:
        return None, drift, (f"the bands stand still, so the light's frequency could not be checked "
                      f"(any whole multiple of the {fps:.5g} fps frame rate looks alike); "
                      "lights on AC mains flicker at twice its frequency: 100 Hz, not 50 (120, not 60)")
    if chi[f_given] <= _ORDER_CHI2:
        return None, drift, (f"the band drift ({abs(drift):.3g} Hz modulo the frame rate) agrees with a "
                      f"{f_given:g} Hz light")
    fits = [f for f in USUAL_LIGHT_HZ if chi.get(f, np.inf) <= _ORDER_CHI2]
    half = (" (lights flicker at twice the mains frequency)" if any(abs(f - 2 * f_given) < 1e-6 for f in fits)
            else "")
    if fits:
        return (f"the bands drift as a {fits[0]:g} Hz light would, not as {f_given:g} Hz{half}: "
                f"give --light-hz {fits[0]:g} (or --light-hz auto)"), drift, None
    return (f"the bands drift by {abs(drift):.3g} Hz modulo the {fps:.5g} fps frame rate, which a "
            f"{f_given:g} Hz light cannot give (it would drift {abs(_wrap(f_given, fps)):.3g} Hz): check "
            "--light-hz, or try --light-hz auto"), drift, None


# ----------------------------------------------------------------------------
# the estimator
# ----------------------------------------------------------------------------
def measure_flicker(
    row_profiles: np.ndarray,
    frame_times: np.ndarray,
    light_hz: float,
    frame_interval: float,
    exposure_s: float | None = None,
    check_light: bool = True,
    flat_profile: np.ndarray | None = None,
) -> ReadoutEstimate:
    """Measure the readout time from flicker bands, fitting all frames jointly.

    row_profiles   (n_frames, H) per-row mean luminance of each frame, full
                   stored height (see ``row_profiles_from_luma``; pass its
                   ``black_level`` for limited-range video)
    frame_times    (n_frames,) start time of each frame, seconds (from the
                   timestamps; need not be evenly spaced)
    light_hz       intensity frequency of the light: 100 or 120 for mains
                   lighting on 50 or 60 Hz, or an LED driver's rate
    frame_interval nominal frame interval, seconds; the readout searched is at
                   most this
    exposure_s     shutter time if known (only used to explain a failure and
                   to note the expected band contrast ``|sinc(f*exposure)|``)
    check_light    refuse when the band drift between frames contradicts ``light_hz``
                   (`frequency_evidence`); a note says what was checked
    flat_profile   (H,) row profile of a flat-field take of the same wall (steady light, or
                   an exposure of a whole number of flicker periods), divided out first, so
                   that the wall's own shading cannot pass for still bands

    Raises MeasurementRefused when there are no bands to measure. Filming the
    test clip: flickering/strobing lights can trigger photosensitive seizures;
    mains-powered light rigs are for qualified hands.
    """
    p = np.asarray(row_profiles, dtype=np.float64)
    if p.ndim == 1:
        p = p[None, :]
    if p.ndim != 2:
        raise InputError("row_profiles must be (n_frames, height)")
    n, height = p.shape
    t = np.asarray(frame_times, dtype=np.float64).reshape(-1)
    if len(t) != n:
        raise InputError(f"{n} row profiles but {len(t)} frame times")
    if n < 1 or height < 32:
        raise InputError("need at least one frame of at least 32 rows")
    if not (np.all(np.isfinite(p)) and np.all(np.isfinite(t))):
        raise InputError("row profiles and frame times must be finite")
    f = float(light_hz)
    if not f > 0:
        raise InputError("the light frequency must be positive")
    if not frame_interval > 0:
        raise InputError("the frame interval must be positive")
    frame_interval = float(frame_interval)
    level = float(np.median(p))
    if not level > 0:
        raise MeasurementRefused(
            "the frames are black: light the wall and shoot again (fast shutter, "
            "e.g. 1/1000 s or faster, on a plain, evenly lit wall)")

    kappa_max = f * frame_interval                  # readout fraction at most 1
    if kappa_max <= _KAPPA_MIN * 1.5:
        raise MeasurementRefused(
            f"a {f:g} Hz light cannot paint even one band within a frame interval of "
            f"{frame_interval * 1e3:.3g} ms: use a faster-flickering light (an LED driver "
            "at several hundred Hz), shot at a fast shutter on a plain, evenly lit wall")

    q_all = np.log(np.maximum(p, level * 1e-3))
    if flat_profile is not None:
        flat = np.asarray(flat_profile, dtype=np.float64).reshape(-1)
        if flat.shape != (height,) or not np.all(np.isfinite(flat)):
            raise InputError(f"the flat field has {flat.size} rows, the clip {height}: use a flat-field "
                             "take of the same camera mode")
        if not np.median(flat) > 0:
            raise InputError("the flat field is black: shoot it under the same light as the test clip")
        q_all = q_all - np.log(np.maximum(flat, np.median(flat) * 1e-3))[None, :]
    tt = t - t[0]
    theta = 2.0 * np.pi * f * tt
    drift_frac = 1.0 - abs(np.mean(np.exp(1j * theta))) ** 2 if n > 1 else 0.0
    kappas = np.arange(_KAPPA_MIN, kappa_max + 1e-12, _KAPPA_STEP)
    if kappas[-1] < kappa_max:
        kappas = np.append(kappas, kappa_max)
    rows_all = np.arange(height)

    # ---- candidate fits ------------------------------------------------------
    # (a) a smooth background per frame: works when the bands stand still; its
    #     model error is estimated from how the result moves with the degree.
    per_frame = [_solve(q_all, rows_all, height, d, False, kappas, kappa_max)
                 for d in _DEG_PER_FRAME]
    cands = []
    main = per_frame[len(per_frame) // 2]
    ks = [c["kappa"] for c in per_frame if c["ok"]]
    if main["ok"]:
        main["sys"] = 0.5 * (max(ks) - min(ks))
        cands.append(main)
    # (b) when the bands move between frames: a free profile common to all
    #     frames (texture, vignetting, gradient: no model error from them).
    shift_note = None
    if n >= 3 and drift_frac >= _MIN_DRIFT:
        shifts = np.zeros(n)
        q_c, rows_c = q_all, rows_all
        max_shift = max(2, int(round(0.02 * height)))
        s_est, reliable = _estimate_shifts(q_all, max_shift)
        if reliable and np.max(np.abs(s_est)) > 0.05:
            shifts = s_est
            margin = int(math.ceil(np.max(np.abs(shifts)))) + 2
            rows_c = np.arange(margin, height - margin)
            yfull = np.arange(height, dtype=float)
            q_c = np.stack([np.interp(rows_c + shifts[k], yfull, q_all[k]) for k in range(n)])
            shift_note = (f"frames re-aligned for vertical shake of up to "
                          f"{np.max(np.abs(shifts)):.2g} rows")
        com = [_solve(q_c, rows_c, height, d, True, kappas, kappa_max, shifts)
               for d in _DEG_COMMON]
        if com[-1]["ok"]:
            ks = [c["kappa"] for c in com if c["ok"]]
            com[-1]["sys"] = 0.5 * (max(ks) - min(ks))
            cands.append(com[-1])

    if not cands:
        best = main
        global_hint = _global_shutter_hint(q_all, theta, best["sigma2"], len(rows_all))
        if best.get("why") == "too wide":
            raise MeasurementRefused(
                f"the bands are wider than the frame (under {_KAPPA_MIN:g} cycles over "
                f"the height): a readout under about {_KAPPA_MIN / f * 1e3:.2g} ms cannot be "
                f"measured with a {f:g} Hz light; use a faster-flickering light, at a fast "
                "shutter on a plain, evenly lit wall")
        raise MeasurementRefused(_no_bands_message(f, exposure_s, global_hint))

    for c in cands:
        c["jack"] = _frame_jackknife(c, height, kappas, kappa_max)

    def total(c):
        return math.hypot(max(c["sigma"], c["jack"]), c["sys"])

    if len(cands) == 2 and total(cands[1]) < 3.0 * total(cands[0]):
        best = cands[1]          # free of background model error: preferred
    else:
        best = min(cands, key=total)
    common = best["common"]

    notes: list[str] = []
    if shift_note and common:
        notes.append(shift_note)
    if len(best["used"]) < n:
        out = sorted(set(range(n)) - set(best["used"].tolist()))
        notes.append(f"{len(out)} frame(s) left out as outliers: {', '.join(map(str, out))}")

    kappa = best["kappa"]
    sigma_kappa = math.hypot(total(best), _COMPRESSION_FLOOR * kappa)
    if not common and flat_profile is None:
        sigma_kappa = math.hypot(sigma_kappa, _STILL_SHADING_FLOOR * kappa)
    moving_share = 1.0 - abs(np.mean(np.exp(2j * np.pi * f * (t[best["used"]] - t[best["used"]][0])))) ** 2
    if common and moving_share < 0.5:
        sigma_kappa = math.hypot(sigma_kappa, _LITTLE_DRIFT_FLOOR * kappa)
    if sigma_kappa > _MAX_REL_SIGMA * kappa:
        if common:
            why = ("the bands are too faint or too few against what changes between "
                   "frames (shake, moving texture, compression)")
        else:
            why = ("the bands stand still and the wall's own shading is not smooth "
                   "(texture?), so the two cannot be told apart")
        too_uncertain = (
            f"flicker bands found but the readout is uncertain by "
            f"{sigma_kappa / kappa:.0%}: {why}; shoot at a fast shutter (1/1000 s or "
            "faster) on a plain, evenly lit wall, at a frame rate where f/fps is not a "
            "whole number so the bands drift")
        try:  # the fit as far as it got, for --plot (marked refused)
            partial = _flicker_estimate(best, cands, total, t, f, frame_interval, height, kappas, kappa_max,
                                        common, flat_profile, exposure_s, notes, sigma_kappa)[0]
        except Exception:  # noqa: BLE001 - a fit this poor may not describe itself; refuse all the same
            partial = None
        raise refusal(too_uncertain, partial)
    estimate, verdict, drift_hz = _flicker_estimate(best, cands, total, t, f, frame_interval, height, kappas,
                                                    kappa_max, common, flat_profile, exposure_s, notes, sigma_kappa)
    if check_light and verdict:
        exc = refusal(verdict, estimate)
        exc.drift_hz = drift_hz
        raise exc
    return estimate


def _flicker_estimate(best, cands, total, t, f, frame_interval, height, kappas, kappa_max, common, flat_profile,
                      exposure_s, notes, sigma_kappa):
    """The `ReadoutEstimate` of the chosen fit (line order, notes, plot diagnostics), the light
    frequency's verdict (a refusal message or None) and the drift it was judged on."""
    kappa = best["kappa"]
    readout = kappa / f
    sigma_readout = sigma_kappa / f
    if kappa > kappa_max - 0.5 * _KAPPA_STEP:
        notes.append("the fit sits at the longest readout searched (the frame interval): "
                     "check --light-hz (a light at twice the rate stated doubles the readout)")

    # ---- line order ----------------------------------------------------------
    # complex band amplitude per frame at sensor row 0: band = Re(z e^{i 2 pi kappa y/H});
    # frames re-aligned by s_k see sensor row y + s_k
    used = best["used"]
    coef = best["coef"]
    z = (coef[:, 0] - 1j * coef[:, 1]) * np.exp(-2j * np.pi * kappa * best["shifts"] / height)
    xb = _sin_basis(kappa, best["y"], height, best["basis"], _HARMONICS)
    ginv = np.linalg.pinv(xb @ xb.T)
    sigma_z2 = best["sigma2"] * float(ginv[0, 0] + ginv[1, 1])
    verdict, drift_hz, light_note = _frequency_verdict(z, t[used], sigma_z2, common, f, frame_interval)
    order, order_notes, order_info = _line_order(z, t[used], f, frame_interval, common,
                                                 sigma_z2)
    notes.extend(order_notes)
    if light_note:
        notes.append(light_note)

    if common:
        notes.append("bands drift between frames: the profile common to all frames "
                     "(wall texture, vignetting, gradient) was removed before fitting")
        keep = 1.0 - abs(np.mean(np.exp(2j * np.pi * f * (t[used] - t[used][0])))) ** 2
        if keep < 0.5:
            notes.append(f"the bands drift little over the clip (only {keep:.0%} of their "
                         "energy changes between frames): inter-frame compression can bias "
                         f"this by a few tenths of a percent (the uncertainty includes {_LITTLE_DRIFT_FLOOR:.1%} for it); "
                         "a longer clip helps")
    elif flat_profile is not None:
        notes.append("bands (nearly) still: the flat field was divided out and a smooth background "
                     "fitted per frame")
    else:
        notes.append("bands (nearly) still: a smooth background was fitted per frame, so the wall's own "
                     f"faint shading at the band scale can pass for bands (a few tenths of a percent: the "
                     f"uncertainty includes {_STILL_SHADING_FLOOR:.2%} for it); "
                     "give --flat (the same wall under steady light) or shoot at a frame rate at which the "
                     "bands drift (f/fps not a whole number, e.g. 24 or 30 fps under a 100 Hz light)")
    if exposure_s is not None and exposure_s > 0:
        sf = abs(float(np.sinc(f * exposure_s)))
        if sf < 0.5:
            notes.append(f"exposure {exposure_s * 1e3:.3g} ms keeps only {sf:.0%} of the band "
                         "contrast (|sinc(f*exposure)|): a faster shutter gives cleaner bands")

    # per-frame band phase for the plot: with the common profile removed, put
    # back the part of the bands that every frame shares (locked-phase fit)
    z_plot = z
    phase_kind = "band phase"
    if common and order == "undetermined":
        phase_kind = "phase of the moving part of the bands"
    elif common:
        sign = -1.0 if order == "bottom-up" else 1.0
        f_use = order_info.get("light_hz_fit", f)
        w = np.exp(1j * sign * 2 * np.pi * f_use * (t[used] - t[used][0]))
        wc = w - w.mean()
        if np.sum(np.abs(wc) ** 2) > 1e-12:
            zz = np.sum(z * wc.conj()) / np.sum(np.abs(wc) ** 2)
            z_plot = z + zz * w.mean()

    # amplitude of the fundamental in log luminance; a profile common to all
    # frames takes away the part of the bands that does not move, a share
    # |mean exp(i 2 pi f t_k)|^2 of their energy, which is put back here
    rms_z = float(np.sqrt(np.mean(np.abs(z) ** 2)))
    if common:
        keep = 1.0 - abs(np.mean(np.exp(2j * np.pi * f * (t[used] - t[used][0])))) ** 2
        band_amplitude = rms_z / math.sqrt(max(keep, 1e-12))
    else:
        band_amplitude = rms_z

    diagnostics = {
        "rows": best["y"],
        "band_measured": best["r"],
        "band_model": best["model"],
        "frame_times": t[used],
        "amplitude": np.abs(z_plot),
        "band_amplitude": band_amplitude,
        "phase": np.angle(z_plot),
        "phase_kind": phase_kind,
        "cycles_per_height": kappa,
        "band_period_rows": height / kappa,
        "light_hz": f,
        "scan_readout_s": kappas / f,
        "scan_explained": best["scan"] / best["total"] if best["total"] > 0 else best["scan"],
        "shift_rows": best["shifts"],
        "fit_mode": "common-profile" if common else "per-frame",
        "background_degree": best["degree"],
        "r2": best["r2"],
        "f_stat": best["f_stat"],
        "residual_rms": math.sqrt(best["ssr"] / max(best["res"].size, 1)),
        "sigma_white_s": best["sigma_white"] / f,
        "sigma_hac_s": best["sigma_hac"] / f,
        "sigma_model_s": best["sys"] / f,
        "sigma_jackknife_s": best["jack"] / f,
        "sigma_compression_s": _COMPRESSION_FLOOR * kappa / f,
        "candidates": {("common-profile" if c["common"] else "per-frame"):
                       (c["kappa"] / f, total(c) / f) for c in cands},
        "line_order_info": order_info,
    }
    estimate = ReadoutEstimate(
        readout_s=readout,
        uncertainty_s=sigma_readout,
        line_order=order,
        method="flicker",
        frames_used=[int(i) for i in used],
        height=height,
        frame_interval=frame_interval,
        diagnostics=diagnostics,
        notes=notes,
    )
    return estimate, verdict, drift_hz


def _global_shutter_hint(q, theta, sigma2, m):
    """True when whole frames change brightness in step with the light."""
    n = q.shape[0]
    if n < 3:
        return False
    fm = q.mean(axis=1)
    fm = fm - fm.mean()
    a = np.stack([np.cos(theta), np.sin(theta)], axis=1)
    a = a - a.mean(axis=0)
    noise = math.sqrt(max(sigma2, 0.0) / m) + 1e-12
    if np.linalg.matrix_rank(a, tol=1e-6) == 2:
        cf, *_ = np.linalg.lstsq(a, fm, rcond=None)
        amp = float(np.hypot(*cf))
        return amp > 10 * noise and amp > 1e-3
    return float(np.std(fm)) > max(10 * noise, 1e-3)


def _frame_jackknife(c, height, kappas, kappa_max, blocks=6):
    """Delete-a-block jackknife over contiguous groups of frames (Quenouille-
    Tukey, textbook): catches errors that differ from frame to frame, such as
    inter-frame compression, which the row-wise sandwich does not see."""
    q = c["q"]
    n = q.shape[0]
    if n < blocks:
        return 0.0
    groups = np.array_split(np.arange(n), blocks)
    ks = []
    for g in groups:
        keep = np.setdiff1d(np.arange(n), g)
        sub = _solve(q[keep], c["y"], height, c["degree"], c["common"], kappas, kappa_max,
                     c["shifts"][keep], drop_outliers=False)
        if sub["ok"]:
            ks.append(sub["kappa"])
    if len(ks) < 3:
        return 0.0
    ks = np.asarray(ks)
    return float(math.sqrt((len(ks) - 1) / len(ks) * np.sum((ks - ks.mean()) ** 2)))


def _solve(q, rows, height, degree, common, kappas, kappa_max, shifts=None,
           drop_outliers=True):
    """One joint fit of all frames; returns a dict (``ok`` False: no bands)."""
    from scipy.optimize import minimize_scalar

    n = q.shape[0]
    y = np.asarray(rows, dtype=float)
    basis = _legendre_basis(y, height, degree)
    shifts = np.zeros(n) if shifts is None else np.asarray(shifts, float)

    def detrend(qq):
        r = qq - qq.mean(axis=0) if common else qq
        return _project_out(r, basis)

    def refine(r_data, k0, lo, hi, nh):
        """Nonlinear least squares in kappa with the per-frame amplitudes and
        phases profiled out (variable projection): Brent's method on the
        profiled sum of squares, then the Jacobian of the residual vector."""
        lo, hi = max(lo, _KAPPA_MIN), min(hi, kappa_max)
        if hi - lo < 1e-9:
            lo, hi = k0 - 1e-6, k0 + 1e-6
        energy = float(np.sum(r_data ** 2))
        sol = minimize_scalar(
            lambda k: energy - _explained_at(k, r_data, y, height, basis, nh),
            bounds=(lo, hi), method="bounded", options={"xatol": 1e-9 * max(hi, 1.0)})
        k = float(sol.x)
        h = 1e-5 * max(k, 1e-3)
        jac = (_fit_at(k + h, r_data, y, height, basis, nh)[2]
               - _fit_at(k - h, r_data, y, height, basis, nh)[2]).ravel() / (2 * h)
        return k, jac

    def fit(r_data):
        # coarse: the fundamental alone (the strongest component: no octave error)
        scan = _explained_scan(kappas, r_data, y, height, basis)
        k0 = float(kappas[int(np.argmax(scan))])
        k1, _ = refine(r_data, k0, k0 - 2 * _KAPPA_STEP, k0 + 2 * _KAPPA_STEP, 1)
        # fine: fundamental plus harmonics (the log, the transfer curve and PWM
        # lights all make harmonics; left out, they pull the fundamental)
        k2, jac = refine(r_data, k1, 0.85 * k1, 1.15 * k1, _HARMONICS)
        return scan, k2, jac

    used = np.arange(n)
    r = detrend(q)
    scan, kappa, jac = fit(r)
    # drop frames that do not fit at all (a flash, a cut, a bump): common practice
    _, _, res0 = _fit_at(kappa, r, y, height, basis, _HARMONICS)
    frame_rms = np.sqrt(np.mean(res0 ** 2, axis=1))
    bad = frame_rms > 5.0 * float(np.median(frame_rms)) + 1e-12
    if drop_outliers and n >= 4 and 0 < bad.sum() <= n // 4:
        used = np.flatnonzero(~bad)
        q, shifts = q[used], shifts[used]
        n = len(used)
        common = common and n >= 3
        r = detrend(q)
        scan, kappa, jac = fit(r)

    coef, model, res = _fit_at(kappa, r, y, height, basis, _HARMONICS)
    m = len(y)
    ssr = float(np.sum(res ** 2))
    n_frames_eff = n - 1 if common else n
    n_par = n_frames_eff * (degree + 1) + 2 * _HARMONICS * n_frames_eff + 1
    dof = max(n_frames_eff * m - n_par, 1)
    sigma2 = ssr / dof
    explained = float(np.sum(model ** 2))
    total = float(np.sum(r ** 2))
    r2 = explained / total if total > 0 else 0.0
    f_stat = (explained / (2 * _HARMONICS * max(n_frames_eff, 1))) / max(sigma2, 1e-300)

    # one-sigma uncertainty: Jacobian with the residual variance, and a
    # Newey-West sandwich along the rows (residuals of neighbouring rows and
    # of different frames correlate: compression, texture); the larger wins
    jtj = float(jac @ jac)
    var_white = sigma2 / jtj if jtj > 0 else math.inf
    score = (jac.reshape(n, m) * res).sum(axis=0)
    var_hac = _hac_variance(score, max(8, m // 20)) / jtj ** 2 if jtj > 0 else math.inf
    sigma = math.sqrt(max(var_white, var_hac))

    ok = f_stat >= _MIN_F_STAT and r2 >= _MIN_R2 and math.isfinite(sigma)
    why = None
    if not ok:
        why = "no bands"
    elif kappa < _KAPPA_MIN + 0.5 * _KAPPA_STEP:
        ok, why = False, "too wide"
    return dict(ok=ok, why=why, kappa=kappa, sigma=sigma, sigma_white=math.sqrt(var_white),
                sigma_hac=math.sqrt(var_hac), sys=0.0, coef=coef, model=model, res=res, r=r,
                used=used, scan=scan, total=total, r2=r2, f_stat=f_stat, sigma2=sigma2,
                ssr=ssr, basis=basis, y=y, shifts=shifts, common=common, degree=degree,
                q=q, jack=0.0)


# ----------------------------------------------------------------------------
# plot
# ----------------------------------------------------------------------------
def plot_flicker(estimate: ReadoutEstimate, path, refused: str | None = None) -> None:
    """Write a PNG to check a flicker measurement by eye.

    Top: the measured band profile (detrended log luminance per row) of a few
    frames with the fitted sinusoid. Middle: the scan of explained band energy
    over the candidate readouts, the result marked. Bottom: the band phase of
    each frame against time with what each line order predicts.
    """
    from skewfix.measure.plots import new_figure, save_png

    d = estimate.diagnostics
    if not d or "band_measured" not in d:
        raise ValueError("the estimate has no flicker diagnostics to plot")
    rows = d["rows"]
    meas = d["band_measured"]
    model = d["band_model"]
    n = meas.shape[0]
    fig, axes = new_figure(3, (10, 10))

    ax = axes[0]
    picks = np.unique(np.linspace(0, n - 1, min(n, 4)).round().astype(int))
    spread = 2.5 * float(np.max(np.abs(model))) if np.max(np.abs(model)) > 0 else 1.0
    for j, k in enumerate(picks):
        off = -j * spread
        ax.plot(rows, model[k] + off, color="C3", lw=4.0, alpha=0.45,
                label="fitted bands" if j == 0 else None)
        ax.plot(rows, meas[k] + off, color="k", lw=0.7,
                label="measured (detrended)" if j == 0 else None)
        ax.text(rows[-1] + 0.01 * (rows[-1] - rows[0]), off,
                f"frame {estimate.frames_used[k]}", va="center", fontsize=8)
    ax.set_xlim(rows[0], rows[-1] + 0.09 * (rows[-1] - rows[0]))
    ax.set_xlabel("row (stored orientation, 0 = top)")
    ax.set_ylabel("log luminance, frames offset")
    ax.set_title(f"band period {d['band_period_rows']:.1f} rows "
                 f"({d['cycles_per_height']:.4f} cycles per frame height), "
                 f"{d['fit_mode']} fit", loc="left", fontsize=10)
    ax.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, fontsize=8,
              frameon=False)

    ax = axes[1]
    ax.plot(np.asarray(d["scan_readout_s"]) * 1e3, d["scan_explained"], color="C0")
    ax.axvline(estimate.readout_s * 1e3, color="C3", ls="--",
               label=f"result {estimate.readout_s * 1e3:.3f} ms")
    ax.set_xlabel("candidate readout (ms)")
    ax.set_ylabel("share of detrended variance\nexplained by the fundamental")
    ax.legend(loc="upper right", fontsize=8)

    ax = axes[2]
    t = np.asarray(d["frame_times"])
    ph = np.unwrap(np.asarray(d["phase"]))
    ax.plot(t, ph - ph[0], "o", color="C0", ms=4,
            label="measured " + d.get("phase_kind", "band phase"))
    f = d["light_hz"]
    info = d.get("line_order_info", {})
    fl = info.get("light_hz_fit", f)
    if d.get("phase_kind", "band phase") == "band phase":
        for sign, name, col in ((1, "top-down", "C2"), (-1, "bottom-up", "C1")):
            pred = _wrap(sign * 2 * np.pi * fl * (t - t[0]), 2 * np.pi)
            ax.plot(t, np.unwrap(pred), "-", color=col, lw=1, label=f"{name} predicts")
    else:
        ax.set_title("bands (nearly) still: the phase cannot tell the line order",
                     loc="left", fontsize=10)
    ax.set_xlabel("frame time (s)")
    ax.set_ylabel("phase (rad, unwrapped)")
    ax.legend(loc="best", fontsize=8)

    from skewfix.measure.plots import mark_refused, title_for

    fig.suptitle(f"flicker ({f:g} Hz): " + title_for(estimate, refused).split(": ", 1)[1], fontsize=13)
    mark_refused(fig, refused)
    save_png(fig, path)


def measure_flicker_auto(row_profiles, frame_times, frame_interval, exposure_s=None, flat_profile=None):
    """``--light-hz auto``: the readout under whichever usual light frequency (`USUAL_LIGHT_HZ`)
    the band drift between frames agrees with; a note says which and why.

    Each usual frequency is fitted and checked against the drift (`frequency_evidence`).
    When exactly one agrees it is taken. When the bands stand still both may agree: at a
    frame rate that divides one of them and not the other (25 fps: 100 Hz stands still,
    120 Hz would drift) still bands pick that one; otherwise the frequency cannot be told
    and the measurement is refused. When none agrees, the drift still allows the lowest
    frequency ``n * fps +- drift`` whose readout fits in the frame interval, which is taken
    with a note (an LED driver's own rate, say).
    """
    results, refusals, drifts = {}, {}, {}
    for f in USUAL_LIGHT_HZ:
        try:
            results[f] = measure_flicker(row_profiles, frame_times, f, frame_interval, exposure_s,
                                         check_light=True, flat_profile=flat_profile)
        except MeasurementRefused as exc:
            refusals[f] = str(exc)
            drifts[f] = getattr(exc, "drift_hz", None)
    fps = 1.0 / frame_interval
    if len(results) == 1:
        f, est = next(iter(results.items()))
        other = next(g for g in USUAL_LIGHT_HZ if g != f)
        est.notes.insert(0, f"--light-hz auto took {f:g} Hz: the band drift agrees with it and not with "
                            f"{other:g} Hz at {fps:.5g} fps")
        return est
    if len(results) == 2:
        a, b = (results[f] for f in USUAL_LIGHT_HZ)
        still = {f: abs(f / fps - round(f / fps)) < 1e-3 for f in USUAL_LIGHT_HZ}
        seen_still = all("stand still" in " ".join(e.notes) for e in results.values())
        if seen_still and sum(still.values()) == 1:
            f = next(g for g, s in still.items() if s)
            est = results[f]
            est.notes = [n for n in est.notes if "could not be checked" not in n]
            est.notes.insert(0, f"--light-hz auto took {f:g} Hz: the bands stand still, which at {fps:.5g} fps "
                                f"only a {f:g} Hz light does")
            return est
        raise refusal(
            f"--light-hz auto cannot tell a 100 Hz from a 120 Hz light here (readout "
            f"{a.readout_s * 1e3:.3f} or {b.readout_s * 1e3:.3f} ms): the bands drift alike for both at "
            f"{fps:.5g} fps; give --light-hz (100 on 50 Hz mains, 120 on 60 Hz), or shoot at a frame rate "
            "at which they differ (24, 25 or 30 fps)", a)
    # neither usual frequency: the drift itself, modulo the frame rate
    drift = next((d for d in drifts.values() if d is not None), None)
    if drift is None:
        raise refusal("--light-hz auto: " + next(iter(refusals.values())), None)
    drift = abs(drift)
    # the lowest n * fps +- drift giving a readout of at most the frame interval: try a few upwards
    options = sorted({n * fps + s * drift for n in range(1, 80) for s in (-1.0, 1.0) if n * fps + s * drift > 0})
    for f in options:
        try:
            est = measure_flicker(row_profiles, frame_times, f, frame_interval, exposure_s,
                                  check_light=True, flat_profile=flat_profile)
        except MeasurementRefused:
            continue
        est.notes.insert(0, f"--light-hz auto took {f:.4g} Hz: neither 100 nor 120 Hz fits the band drift "
                            f"({drift:.3g} Hz modulo the frame rate); {f:.4g} Hz is the lowest frequency that "
                            f"does with a readout under the frame interval, and {fps:.5g} Hz more or less fit too "
                            "(an LED driver's own rate?): give --light-hz if you know it")
        return est
    raise refusal("--light-hz auto: no light frequency fits the band drift; give --light-hz", None)
