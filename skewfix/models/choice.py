"""Which motion model a clip needs, and its lens's focal length when nobody gave it.

**Focal length from the footage.** A camera turning about its centre moves the
edges of a wide picture faster than its middle (at 90 degrees of horizontal
view, twice as fast at the edges for a pan); only the right focal length
makes one rotation explain every track of a frame pair. We fit the rotation
model for candidate focal lengths (log-spaced fields of view from 20 to 150
degrees on a quick look at fewer tracks, then finer around the best on the full
sample) and take the vertex of a parabola through the bounded track misfit near
its minimum, where the misfit is measured once more; the uncertainty is the
curvature's (the Laplace approximation ``var = 2 s^2 / S''``, as for the
readout). A plain pan (or a narrow lens) leaves the misfit flat: the focal
length is then *not observable* and we say so instead of guessing.

**Model choice** (``--model auto``). The similarity is tried against the
rotation. Without a lens given, the rotation must explain the tracks with an
RMS misfit at least `ROTATION_GAIN_UNSEEN` times lower and its focal length
must be observable: that is the price of its estimated focal length (the
similarity keeps every narrow-lens clip). With a lens given, the rotation has
fewer curves than the similarity (three against four) and is kept unless the
similarity fits clearly better (a zoom, say).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace

import numpy as np

from skewfix.errors import MeasurementRefused, UsageProblem
from skewfix.models.base import MotionKind, make_kind
from skewfix.models.rotation import Rotation, focal_from_equivalent_mm, focal_from_hfov

MODELS = ("auto", "similarity", "rotation")
ROTATION_GAIN_UNSEEN = 0.8  # rotation's RMS misfit must be this share of the similarity's (no lens given)
SIMILARITY_GAIN_GIVEN = 0.9
TRANSLATION_GAIN = 1.05  # without roll and zoom the RMS misfit may be this much larger (two curves fewer)  # with a lens given, the similarity needs this share of the rotation's
MAX_TRACKS_PER_PAIR = 120
MAX_PAIRS = 40
QUICK_PAIRS, QUICK_TRACKS = 16, 60  # the first look at which model fits
FOCAL_RELATIVE_LIMIT = 0.10  # a focal length known worse than this (1 sigma) is "not observable"


@dataclass(frozen=True)
class LensSpec:
    """What the user said about the lens (any of the ways), resolved per frame size."""

    hfov_deg: float | None = None
    focal_mm_equivalent: float | None = None
    focal_px: float | None = None
    distortion: tuple[float, float] = (0.0, 0.0)

    @property
    def given(self) -> bool:
        return any(v is not None for v in (self.hfov_deg, self.focal_mm_equivalent, self.focal_px))

    def focal_for(self, width: int, height: int) -> float | None:
        if self.focal_px is not None:
            return float(self.focal_px)
        if self.hfov_deg is not None:
            return focal_from_hfov(width, self.hfov_deg)
        if self.focal_mm_equivalent is not None:
            return focal_from_equivalent_mm(width, height, self.focal_mm_equivalent)
        return None

    def rotation(self, width: int, height: int, focal_px: float | None = None, **extra) -> Rotation:
        return Rotation(width, height, focal_px or self.focal_for(width, height), distortion=self.distortion,
                        **extra)

    def as_dict(self) -> dict:
        return {k: v for k, v in (("hfov_deg", self.hfov_deg), ("focal_mm_equivalent", self.focal_mm_equivalent),
                                  ("focal_px", self.focal_px)) if v is not None} | (
            {"distortion": list(self.distortion)} if any(self.distortion) else {})


_FOCAL = re.compile(r"^\s*([0-9]*\.?[0-9]+)\s*(mm|px)\s*$", re.IGNORECASE)


def parse_lens(hfov: str | float | None = None, focal_length: str | None = None,
               distortion: str | None = None) -> LensSpec:
    """``--hfov 92``, ``--focal-length 26mm`` (35 mm equivalent) or ``1450px``,
    ``--lens-distortion -0.12,0.03``; one-line `UsageProblem` for anything else."""
    if hfov is not None and focal_length is not None:
        raise UsageProblem("give the lens as --hfov or as --focal-length, not both")
    spec = LensSpec()
    if hfov is not None:
        try:
            value = float(hfov)
        except ValueError:
            raise UsageProblem(f"--hfov must be a horizontal field of view in degrees, not {hfov!r}") from None
        if not 1.0 <= value < 179.0:
            raise UsageProblem(f"--hfov must be between 1 and 179 degrees, not {hfov!r}")
        spec = replace(spec, hfov_deg=value)
    if focal_length is not None:
        match = _FOCAL.match(str(focal_length))
        if not match or float(match.group(1)) <= 0:
            raise UsageProblem(f"--focal-length must be like 26mm (35 mm equivalent) or 1450px, not {focal_length!r}")
        value, unit = float(match.group(1)), match.group(2).lower()
        spec = replace(spec, **({"focal_mm_equivalent": value} if unit == "mm" else {"focal_px": value}))
    if distortion is not None:
        parts = [p.strip() for p in str(distortion).split(",")]
        try:
            values = [float(p) for p in parts]
        except ValueError:
            values = []
        if len(values) not in (1, 2) or not all(math.isfinite(v) and abs(v) < 10 for v in values):
            raise UsageProblem(f"--lens-distortion must be K1 or K1,K2 (OpenCV's radial terms), not {distortion!r}")
        spec = replace(spec, distortion=(values[0], values[1] if len(values) > 1 else 0.0))
    return spec


def _sample(pairs, max_pairs: int = MAX_PAIRS, max_tracks: int = MAX_TRACKS_PER_PAIR, seed: int = 0):
    """At most ``max_pairs`` evenly chosen pairs of at most ``max_tracks`` tracks."""
    from skewfix.motion import thin_tracks

    pairs = [p for p in pairs if not p.cut and len(p.p0) >= 8]
    if len(pairs) > max_pairs:
        pick = np.linspace(0, len(pairs) - 1, max_pairs).round().astype(int)
        pairs = [pairs[i] for i in pick]
    return thin_tracks(pairs, max_tracks, seed)


def _quick(settings):
    """Fit settings for a first look, where no precision is needed: at most 2 knots a frame
    and 3 rounds (a few times cheaper)."""
    return replace(settings, knots_per_frame=min(settings.knots_per_frame, 2.0),
                   iterations=min(settings.iterations, 3))


def _look_misfits(pairs, clock, width, kind: MotionKind, settings, keep: float = 0.8,
                  bound: float = 3.0) -> tuple[float, float]:
    """From one fit: the RMS transfer error (px, each track at most ``bound``) of the world's
    tracks, and the same over their best ``keep`` share (a few tracks of a subject left among
    them cannot make a model with more curves look needed)."""
    from skewfix.motion import fit_motion, transfer_errors

    settings = replace(settings, kind=kind)
    model = fit_motion(pairs, clock, width, settings)
    e = np.sort(np.minimum(transfer_errors(model, pairs, clock, settings, background_only=True), bound))
    if not e.size:
        return float("nan"), float("nan")
    best = e[: max(1, int(keep * len(e)))]
    return float(np.sqrt(np.mean(e * e))), float(np.sqrt(np.mean(best * best)))


def _misfit(pairs, clock, width, kind: MotionKind, settings) -> tuple[float, int]:
    from skewfix.motion import fit_residual

    return fit_residual(pairs, clock, width, replace(settings, kind=kind))


@dataclass
class FocalEstimate:
    focal_px: float
    uncertainty_px: float
    misfit_px: float
    candidates_px: np.ndarray
    misfits: np.ndarray


def estimate_focal(pairs, clock, width: int, lens: LensSpec, settings=None) -> FocalEstimate:
    """The focal length (px) that lets one camera rotation explain the tracks; raises
    `MeasurementRefused` when the footage cannot tell (see the module docstring)."""
    from skewfix.motion import FitSettings

    settings = settings or FitSettings()
    height = clock.height
    pairs = _sample(pairs)
    if len(pairs) < 4:
        raise MeasurementRefused("too few trackable frame pairs to measure the lens's focal length")

    def sums(focals, use, fit_settings):
        out, count = [], 0
        for f in focals:
            rms, count = _misfit(use, clock, width, lens.rotation(width, height, f), fit_settings)
            out.append(rms * rms * count)
        return np.array(out), count

    # the coarse pass only brackets the minimum: a quick look (fewer pairs, tracks, knots and
    # rounds) is enough; the fine pass and its parabola use the full sample and settings
    look = _sample(pairs, QUICK_PAIRS, QUICK_TRACKS)
    coarse = np.array([focal_from_hfov(width, a) for a in np.geomspace(150.0, 20.0, 11)])
    s_coarse, _ = sums(coarse, look, _quick(settings))
    i = int(np.argmin(s_coarse))
    lo, hi = coarse[max(i - 1, 0)], coarse[min(i + 1, len(coarse) - 1)]
    fine = np.geomspace(lo, hi, 7)
    totals, n_obs = sums(fine, pairs, settings)
    j = int(np.argmin(totals))
    near = np.abs(np.log(fine / fine[j])) <= 1.01 * np.log(fine[1] / fine[0])
    x0 = math.log(fine[j])
    x = np.log(fine[near]) - x0  # centred: a well-conditioned parabola
    a, b, _ = np.polyfit(x, totals[near], 2) if len(np.unique(x)) >= 3 else (0.0, 0.0, 0.0)
    s_min = float(totals[j])
    best_log = x0 + (-b / (2 * a) if a > 0 else 0.0)
    best = float(math.exp(np.clip(best_log, x0 + x.min(), x0 + x.max())))
    sigma2 = s_min / max(n_obs - 3 * len(pairs) * 4, 1)
    # tracks of one pair share its errors: inflate by the tracks per pair, as for the readout
    log_sd = math.sqrt(2 * sigma2 / (2 * a)) * math.sqrt(max(n_obs / len(pairs), 1.0)) / 4.0 if a > 0 else math.inf
    uncertainty = best * log_sd
    depth = (float(np.max(s_coarse)) - float(np.min(s_coarse))) / max(float(np.min(s_coarse)), 1e-12)
    at_edge = fine[j] <= coarse[0] * (1 + 1e-9) or fine[j] >= coarse[-1] * (1 - 1e-9)  # the search's ends
    if at_edge or not math.isfinite(uncertainty) or uncertainty > FOCAL_RELATIVE_LIMIT * best or depth < 0.05:
        raise MeasurementRefused(
            "the footage does not reveal the lens's focal length (a plain pan, a narrow lens or too little "
            "turning); give it with --hfov or --focal-length, or use --model similarity")
    rms, _ = _misfit(pairs, clock, width, lens.rotation(width, height, best), settings)  # at the estimate
    if not math.isfinite(rms):
        rms = math.sqrt(s_min / max(n_obs, 1))
    return FocalEstimate(best, uncertainty, rms, fine, totals)


@dataclass
class ModelChoice:
    kind: MotionKind
    reason: str
    misfits_px: dict


def choose_model(request: str, pairs, clock, width: int, lens: LensSpec, settings=None,
                 allow_translation: bool = True) -> ModelChoice:
    """The motion model for a clip: ``request`` is "auto", "similarity" or "rotation".

    ``allow_translation=False`` keeps roll and zoom: for a first choice made before the
    readout is known, when a wrong row timing makes the comparison unreliable.
    """
    from skewfix.motion import FitSettings

    if request not in MODELS:
        raise UsageProblem(f"--model must be one of {', '.join(MODELS)}, not {request!r}")
    settings = settings or FitSettings()
    height = clock.height
    if settings.kind is not None:  # a caller that fixed the model keeps it
        return ModelChoice(settings.kind, "given", {})
    if settings.model == "translation":
        return ModelChoice(settings.kind_for(width, height), "asked for (translation only)", {})
    similarity = make_kind("similarity", width, height)
    if request == "similarity":
        return ModelChoice(similarity, "asked for (--model similarity)", {})
    if request == "rotation" and lens.given:
        return ModelChoice(lens.rotation(width, height), "asked for (--model rotation), lens given", {})
    sample = _sample(pairs)
    if request == "rotation":
        est = estimate_focal(sample, clock, width, lens, settings)  # refuses when not observable
        kind = lens.rotation(width, height, est.focal_px, focal_estimated=True, focal_uncertainty_px=est.uncertainty_px)
        return ModelChoice(kind, f"asked for (--model rotation); focal length measured from the footage: "
                                 f"{est.focal_px:.0f} ± {est.uncertainty_px:.0f} px", {"rotation": est.misfit_px})
    if len(sample) < 4:
        return ModelChoice(similarity, "too few tracked frame pairs to compare models", {})
    # the comparisons need no precision: fewer pairs, tracks and knots (a few times cheaper)
    look = _sample(pairs, QUICK_PAIRS, QUICK_TRACKS)
    look_settings = _quick(settings)
    sim_rms, sim_best_rms = _look_misfits(look, clock, width, similarity, look_settings)
    if lens.given:
        rotation = lens.rotation(width, height)
        rot_rms, _ = _misfit(look, clock, width, rotation, look_settings)
        misfits = {"similarity": sim_rms, "rotation": rot_rms}
        if sim_rms < SIMILARITY_GAIN_GIVEN * rot_rms:
            return ModelChoice(similarity, f"the similarity fits better ({sim_rms:.2f} px against the lens's "
                                           f"rotation {rot_rms:.2f} px RMS)", misfits)
        return ModelChoice(rotation, f"the lens is given and its rotation fits ({rot_rms:.2f} px RMS against "
                                     f"{sim_rms:.2f} px for the similarity)", misfits)
    # no lens: a quick look at a few fields of view before paying for the focal search
    quick = {a: _misfit(look, clock, width, lens.rotation(width, height, focal_from_hfov(width, a)),
                        look_settings)[0] for a in (60.0, 90.0, 120.0)}
    best_quick = min(quick.values())
    misfits = {"similarity": sim_rms, **{f"rotation at {a:.0f} deg": v for a, v in quick.items()}}
    def flat(reason: str) -> ModelChoice:
        """The similarity, or the plain translation when roll and zoom explain nothing."""
        if not allow_translation:
            return ModelChoice(similarity, reason, misfits)
        translation = make_kind("similarity", width, height, translation_only=True)
        shift_rms = _look_misfits(look, clock, width, translation, look_settings)[1]
        full_rms = sim_best_rms
        misfits["translation (best 80 %)"], misfits["similarity (best 80 %)"] = shift_rms, full_rms
        if shift_rms <= TRANSLATION_GAIN * full_rms:
            return ModelChoice(translation, f"{reason}; the camera only pans and tilts: without roll and zoom "
                                            f"the fit is as good ({shift_rms:.2f} px RMS against {full_rms:.2f} "
                                            "over the best 80 % of the tracks)", misfits)
        return ModelChoice(similarity, reason, misfits)

    if best_quick > ROTATION_GAIN_UNSEEN * sim_rms:
        return flat(f"no sign of a wide lens turning: the similarity fits as well "
                    f"({sim_rms:.2f} px RMS; a rotation at best {best_quick:.2f} px)")
    try:
        est = estimate_focal(sample, clock, width, lens, settings)
    except MeasurementRefused:
        return flat("the focal length could not be measured from the footage, so the similarity is kept")
    rotation = lens.rotation(width, height, est.focal_px, focal_estimated=True, focal_uncertainty_px=est.uncertainty_px)
    sim_rms, _ = _misfit(sample, clock, width, similarity, settings)  # compared on the same footing
    misfits["similarity"], misfits["rotation"] = sim_rms, est.misfit_px
    if est.misfit_px > ROTATION_GAIN_UNSEEN * sim_rms:
        return flat(f"the rotation fits only a little better ({est.misfit_px:.2f} against "
                    f"{sim_rms:.2f} px RMS), not enough for an estimated lens")
    return ModelChoice(rotation, f"a wide lens turning: the rotation fits {est.misfit_px:.2f} px RMS against "
                                 f"{sim_rms:.2f} px for the similarity; focal length measured from the footage, "
                                 f"{est.focal_px:.0f} ± {est.uncertainty_px:.0f} px "
                                 f"({rotation.lens.hfov_deg(width):.1f}° horizontal view)", misfits)
