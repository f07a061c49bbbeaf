"""Correction accuracy against exact ground truth.

Renders rolling-shutter clips from known camera paths, runs the correction
pipeline, and compares each corrected frame with the exact global-shutter view
at its reference instant. Prints one table: the residual for the corrected
clip, the uncorrected clip and the metric's floor (the exact global-shutter
views themselves, through the same H.264 encode), their ratio, the target and
whether it was met; then a small table of fix times for the two motion models.

The first four rows (0.x) render with `skewfix.synth` over scikit-image's
bundled photographs and score with `skewfix.synth.residual`. Every other row
renders with `tests/truth.py`, the ground-truth renderer that imports nothing
from skewfix, and scores with its `residual_flow`:

* A  a 90-degree lens turning (yaw sweep with handheld yaw/pitch/roll shake)
* B  a whip pan with a subject crossing the other way (background scored)
* C  a motion-blurred whip pan (exposure half the frame interval)
* D  a long shot: the streamed solution must be one segment with no step
* E  fast tilts, both directions, both line orders

    python scripts/bench_accuracy.py [--frames N] [--sections 0ABCDES]
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from types import SimpleNamespace
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import av
import cv2
import numpy as np

from skewfix.errors import SkewfixError
from skewfix.measure.motion_fit import auto_readout_resolver
from skewfix.models.choice import parse_lens
from skewfix.motion import FitSettings
from skewfix.pipeline import FixOptions, fix_clip
from skewfix.synth.paths import Handheld, SteadyPan, WhipPan
from skewfix.synth.residual import clip_residual, decode_rgb, psnr
from skewfix.synth.scenes import photo_panorama
from skewfix.synth.shutter import render_clip, to_uint8, write_rgb_clip
from skewfix.warp import correction_map

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
import truth  # noqa: E402  (tests/truth.py: the independent ground-truth renderer)

CENTRAL = 0.76  # the share of each axis the residual metric looks at (truth.residual_flow's default)


# --------------------------------------------------------------------------- the original rows

def scenario(name, camera, rate, readout, frames, tmp, fit=None, width=960, height=540):
    scene = photo_panorama(int(height * 1.5), 9000)
    slug = "".join(ch if ch.isalnum() else "_" for ch in name)
    src = tmp / f"{slug}.mp4"
    renderer, clock = render_clip(src, scene, camera, width, height, rate, frames, readout,
                                  origin=(width * 0.8, height * 0.75), audio=readout == 0)
    truths = [renderer.global_view(float(clock.reference_time(k))) for k in range(frames)]
    floor_clip = tmp / f"{slug}_truth.mp4"
    write_rgb_clip(floor_clip, (to_uint8(t, 0.004, np.random.default_rng(1)) for t in truths), rate, crf=10)
    out = tmp / f"{slug}_fixed.mp4"
    t0 = time.perf_counter()
    fix_clip(str(src), str(out), FixOptions(readout=readout, force=True, fit=fit or FitSettings()))
    seconds = time.perf_counter() - t0
    fixed, orig, floor = decode_rgb(out), decode_rgb(src), decode_rgb(floor_clip)
    inner = range(2, frames - 2)  # the ends have one-sided tracks only
    truth8 = [to_uint8(t) for t in truths]
    row = {
        "scenario": name,
        "corrected_px": clip_residual(fixed, truth8, inner),
        "uncorrected_px": clip_residual(orig, truth8, inner),
        "floor_px": clip_residual(floor, truth8, inner),
        "fix_s": seconds,
    }
    if readout == 0:
        row["min_psnr_db"] = min(psnr(fixed[k], orig[k]) for k in range(frames))
        with av.open(str(out)) as c:
            row["audio_kept"] = any(s.type == "audio" for s in c.streams)
        row["frames_kept"] = len(fixed) == frames
    return row


def original_rows(tmp, n):
    rows = [
        scenario("whip pan 23.976 fps, 19 ms, 175 px/frame", WhipPan(peak_px_s=175 * 24000 / 1001, centre_s=n / 2 / 23.976,
                 duration_s=0.9), Fraction(24000, 1001), 0.019, n, tmp),
        scenario("handheld 30 fps, 24 ms, 7-11 Hz + roll", Handheld(amplitude_px=10.0, roll_rad=0.01),
                 Fraction(30), 0.024, n, tmp),
        scenario("handheld, translation-only model", Handheld(amplitude_px=10.0, roll_rad=0.01),
                 Fraction(30), 0.024, n, tmp, fit=FitSettings(model="translation")),
        scenario("global shutter 25 fps, fast pan, audio", SteadyPan(vx_px_s=2500.0), Fraction(25), 0.0, n, tmp),
    ]
    out = []
    for i, r in enumerate(rows, 1):
        extra = f"fix {r['fix_s']:.1f} s"
        if "min_psnr_db" in r:
            extra += (f"; min PSNR vs input {r['min_psnr_db']:.1f} dB, audio kept {r['audio_kept']}, "
                      f"frames kept {r['frames_kept']}")
        out.append(Row(f"0.{i}", r["scenario"], r["corrected_px"], r["uncorrected_px"], r["floor_px"], None, "-",
                       None, extra))
    return out


# --------------------------------------------------------------------------- helpers

@dataclass
class Row:
    key: str
    scenario: str
    corrected: float | None
    uncorrected: float | None
    floor: float | None
    chain: float | None
    target: str
    ok: bool | None  # None: no target (reference rows)
    detail: str = ""

    @property
    def ratio(self):
        if self.corrected is None or not self.floor:
            return None
        return self.corrected / self.floor


def decode(path) -> list[np.ndarray]:
    with av.open(str(path)) as container:
        return [frame.to_ndarray(format="rgb24") for frame in container.decode(video=0)]


FIX_CRF = 16  # fix's default x264 quality (README: "--crf ... default CRF 16")


def through_encode(frames, path, fps, crf=10) -> list[np.ndarray]:
    """The frames written with truth.write_clip (x264, CRF 10 unless told) and decoded again."""
    truth.write_clip(path, frames, fps, crf=crf)
    return decode(path)


def flow_rms(frames, truths, indices, masks=None) -> float:
    """RMS over frames of truth.residual_flow (px)."""
    values = [truth.residual_flow(frames[k], truths[k], None if masks is None else masks[k]) for k in indices]
    return float(math.sqrt(np.mean(np.square(values))))


def reference_times(clip) -> list[float]:
    """Each frame's reference instant: the middle row's, as `fix --reference-line middle`."""
    return [float(clip.reference_time(k, (clip.height - 1) / 2.0)) for k in range(len(clip.frame_times))]


@dataclass
class Fixed:
    result: object | None
    frames: list | None
    seconds: float
    refusal: str | None = None


def run_fix(src, out, options, resolver=None) -> Fixed:
    t0 = time.perf_counter()
    try:
        result = fix_clip(str(src), str(out), options, readout_resolver=resolver)
    except SkewfixError as exc:
        return Fixed(None, None, time.perf_counter() - t0, str(exc).splitlines()[0])
    seconds = time.perf_counter() - t0
    return Fixed(result, decode(out), seconds)


class Truthed:
    """A rendered clip with its source file, its truth views and their floor."""

    def __init__(self, clip, tmp, slug, fps, views=None):
        self.clip, self.fps = clip, fps
        self.n = len(clip.frame_times)
        self.src = tmp / f"{slug}.mp4"
        truth.write_clip(self.src, clip.frames, fps, crf=10)
        self.t_ref = reference_times(clip)
        self.views = views if views is not None else [clip.global_view(t) for t in self.t_ref]
        self.inner = range(2, self.n - 2)  # the ends have one-sided tracks only
        self.orig = decode(self.src)
        floor_frames = through_encode(self.views, tmp / f"{slug}_truth.mp4", fps)
        # the floor's frames encoded once more, as fix's output is (x264 at fix's default CRF)
        self.floor_frames = floor_frames
        self.chain_frames = through_encode(floor_frames, tmp / f"{slug}_chain.mp4", fps, crf=FIX_CRF)
        self.rescore(None)

    def rescore(self, masks) -> None:
        """Score the floors and the uncorrected clip (and later ``score``) leaving ``masks`` out."""
        self.masks = masks
        self.floor = flow_rms(self.floor_frames, self.views, self.inner, masks)
        self.chain = flow_rms(self.chain_frames, self.views, self.inner, masks)
        self.uncorrected = flow_rms(self.orig, self.views, self.inner, masks)

    def score(self, fixed: Fixed) -> float | None:
        return None if fixed.frames is None else flow_rms(fixed.frames, self.views, self.inner, self.masks)


def model_text(result) -> str:
    """The model fix used, and any cuts or bridged pairs it found (none are in these clips)."""
    model = result.model
    kind = model.kind
    text = "translation" if getattr(kind, "translation_only", False) else kind.name
    if kind.name == "rotation":
        text = f"rotation f={kind.lens.focal_px:.1f} px ({'estimated' if kind.focal_estimated else 'given'})"
    if model.cuts:
        text += f"; {len(model.cuts)} cut(s) found"
    if model.unmeasured_pairs:
        text += f"; {len(model.unmeasured_pairs)} pair(s) bridged"
    return text


def within(measured, true, share) -> bool:
    return abs(measured - true) <= share * abs(true)


def pct(measured, true) -> float:
    return 100.0 * (measured - true) / true


# --------------------------------------------------------------------------- A: a wide lens turning

def similarity_bound(clip, indices, central=CENTRAL) -> float:
    """Lower bound of any similarity-per-row correction, from the truth geometry.

    For each output frame, every pixel ``p`` of the global view at the reference instant
    sees the direction ``d = R(t_ref)^T K^-1 p``; the rolling-shutter frame saw it at
    ``s`` with ``s_y`` the row whose own instant images ``d`` there (a fixed point,
    iterated to 1e-6 px). Per output row, the least-squares 2-D similarity
    ``s ~ [[a, -b], [b, a]] p + t`` is fitted over the metric's region (the central
    ``central`` of each axis) and the RMS of what is left is taken over all those pixels.
    """
    h, w = clip.height, clip.width
    my, mx = int(round(h * (1 - central) / 2)), int(round(w * (1 - central) / 2))
    ys, xs = np.mgrid[my:h - my, mx:w - mx].astype(np.float64)
    rays = clip.rays[my:h - my, mx:w - mx].reshape(-1, 3)
    sq, count = 0.0, 0
    for k in indices:
        t_ref = float(clip.reference_time(k, (h - 1) / 2.0))
        d = rays @ clip.rotation(t_ref)  # rows: R^T ray
        srow = ys.ravel().copy()
        for _ in range(60):
            s = clip.project(d, clip.reference_time(k, srow))
            step = np.max(np.abs(s[:, 1] - srow))
            srow = s[:, 1]
            if step < 1e-6:
                break
        s = s.reshape(ys.shape + (2,))
        for i in range(ys.shape[0]):
            px, py = xs[i], ys[i]
            one, zero = np.ones_like(px), np.zeros_like(px)
            a = np.concatenate([np.stack([px, -py, one, zero], 1), np.stack([py, px, zero, one], 1)])
            b = np.concatenate([s[i, :, 0], s[i, :, 1]])
            coef = np.linalg.lstsq(a, b, rcond=None)[0]
            r = a @ coef - b
            sq += float(r @ r)
            count += px.size
    return math.sqrt(sq / count)


def rows_a(tmp, n):
    w, h, fps, readout, hfov = 640, 360, 30, 0.024, 90.0
    path = truth.RotationPath(sweep_peak_deg_s=120.0, sweep_centre_s=n / 2 / fps, sweep_duration_s=0.8,
                              shake_deg=(0.5, 0.5, 0.3), seed=3)
    clip = truth.render_rotation_clip(w, h, n, fps, readout, hfov, path)
    tc = Truthed(clip, tmp, "a_rotation", fps)
    lens = parse_lens(hfov="90")
    rows = []

    def fixed_row(key, name, fixed, target, judge, detail=""):
        corrected = tc.score(fixed)
        if fixed.refusal:
            rows.append(Row(key, name, None, tc.uncorrected, tc.floor, tc.chain, target, False,
                            f"refused: {fixed.refusal}"))
            return None
        ok = judge(corrected, fixed.result)
        rows.append(Row(key, name, corrected, tc.uncorrected, tc.floor, tc.chain, target, ok,
                        (detail(fixed.result) if callable(detail) else detail) or model_text(fixed.result)))
        return corrected

    base = dict(readout=readout, force=True)
    f1 = run_fix(tc.src, tmp / "a1.mp4", FixOptions(model="rotation", lens=lens, **base))
    f2 = run_fix(tc.src, tmp / "a2.mp4", FixOptions(model="auto", **base))
    f3 = run_fix(tc.src, tmp / "a3.mp4", FixOptions(model="similarity", **base))
    bound = similarity_bound(clip, tc.inner)
    c1 = tc.score(f1)
    fixed_row("A1", "90° lens turning: rotation, lens given", f1, "≤1.5x floor, ≤A4/2",
              lambda c, r: c <= 1.5 * tc.chain and c <= 0.5 * bound)

    def focal_detail(r):
        if r.model.kind.name != "rotation":
            return f"{model_text(r)} chosen: no focal length (truth {clip.focal_px:.1f} px)"
        f = r.model.kind.lens.focal_px
        return f"focal {f:.1f} px vs truth {clip.focal_px:.1f} px ({pct(f, clip.focal_px):+.2f} %)"

    fixed_row("A2", "90° lens turning: auto, no lens", f2, "focal ±3 %, ≤2x floor",
              lambda c, r: (r.model.kind.name == "rotation" and within(r.model.kind.lens.focal_px, clip.focal_px, 0.03)
                            and c <= 2 * tc.chain), focal_detail)
    fixed_row("A3", "90° lens turning: similarity", f3, "- (compare A4)", lambda c, r: None)
    rows.append(Row("A4", "best similarity per row (truth geometry)", bound, None, None, None,
                    "lower bound", None, "geometric RMS px, not a flow residual"))

    resolver = auto_readout_resolver(None)
    f5a = run_fix(tc.src, tmp / "a5a.mp4", FixOptions(model="rotation", lens=lens, force=True), resolver)
    f5b = run_fix(tc.src, tmp / "a5b.mp4", FixOptions(model="auto", force=True), resolver)

    def readout_detail(r):
        return (f"readout {r.readout * 1e3:.3f} ms {r.line_order} vs {readout * 1e3:.3f} "
                f"({pct(r.readout, readout):+.2f} %); {model_text(r)}")

    fixed_row("A5a", "90° lens: readout auto, lens given", f5a, "readout ±1 %",
              lambda c, r: within(r.readout, readout, 0.01) and r.line_order == "top-down", readout_detail)
    fixed_row("A5b", "90° lens: readout auto, no lens", f5b, "readout ±2 %",
              lambda c, r: within(r.readout, readout, 0.02) and r.line_order == "top-down", readout_detail)
    return rows, {"A1": c1, "A4": bound}


# --------------------------------------------------------------------------- B: subject over a whip pan

def corrected_with(result, frames) -> list[np.ndarray]:
    """``frames`` remapped with the correction maps of ``result``'s solved motion (cubic)."""
    out = []
    for k, img in enumerate(frames):
        mx, my = correction_map(result.model, result.clock, k).full()
        out.append(cv2.remap(img, mx, my, cv2.INTER_CUBIC, borderMode=cv2.BORDER_REPLICATE))
    return out


def exact_similarity(result, pan):
    """The true pan as a similarity model on ``result``'s knot grid (no roll, no zoom): what a
    perfect motion estimate would hand the remapper."""
    from skewfix.motion import MotionModel, MotionSegment, bspline_basis

    seg = result.model.segments[0]
    t = np.linspace(seg.knot_start, seg.knot_start + (seg.n_coef - 3) * seg.knot_spacing, 20 * seg.n_coef)
    idx, weights = bspline_basis(t, seg.knot_start, seg.knot_spacing, seg.n_coef)
    basis = np.zeros((len(t), seg.n_coef))
    np.put_along_axis(basis, idx, weights, axis=1)
    x, y = pan(t)
    coef = np.zeros_like(seg.coefficients)
    coef[0] = np.linalg.lstsq(basis, np.asarray(x) * np.ones_like(t), rcond=None)[0]
    coef[1] = np.linalg.lstsq(basis, np.asarray(y) * np.ones_like(t), rcond=None)[0]
    model = MotionModel(result.model.width, result.model.height,
                        [MotionSegment(0, len(result.clock.frame_times) - 1, seg.knot_start, seg.knot_spacing, coef)])
    return SimpleNamespace(model=model, clock=result.clock)


def rows_b(tmp, n):
    w, h, fps, readout = 480, 270, 30, 0.024
    pan = truth.whip_pan(40.0, fps, centre_s=n / 2 / fps, duration_s=0.8)
    rows = []
    # the same camera path without the subject: its rolling-shutter frames through the same
    # encode, its global views and their floor (the scene is shared with the subject clips)
    bare = truth.render_planar_clip(w, h, n, fps, readout, pan, subject=None, seed=5)
    bg = Truthed(bare, tmp, "b_bare", fps)
    t_ref = bg.t_ref
    for frac, label in ((1 / 4, "1/4"), (1 / 3, "1/3")):
        slug = f"b_{label.replace('/', '_')}"
        subject = truth.crossing_subject(w, h, duration_s=n / fps, fraction=frac, rightward=True)
        clip = truth.render_planar_clip(w, h, n, fps, readout, pan, subject=subject, scene=bare.scene, seed=5)
        views = [clip.global_view(t) for t in t_ref]
        masks = [clip.subject_mask(t, dilate=30) for t in t_ref]
        src = tmp / f"{slug}.mp4"
        truth.write_clip(src, clip.frames, fps, crf=10)
        fixed = run_fix(src, tmp / f"{slug}_fixed.mp4", FixOptions(readout=readout, force=True))
        name = f"whip 40 px/f, {label} subject: background"
        if fixed.refusal:
            rows.append(Row("B", name, None, bg.uncorrected, bg.floor, bg.chain, "≤1.5x floor", False,
                            f"refused: {fixed.refusal}"))
        else:
            c = flow_rms(corrected_with(fixed.result, bg.orig), bg.views, bg.inner)
            # the floor of this measurement: the same frames remapped with the exact motion
            exact = flow_rms(corrected_with(exact_similarity(fixed.result, pan), bg.orig), bg.views, bg.inner)
            rows.append(Row("B", name, c, bg.uncorrected, bg.floor, bg.chain, "≤1.5x exact",
                            c <= 1.5 * max(bg.floor, exact),
                            f"subject-free frames, solved motion; {model_text(fixed.result)}; "
                            f"with the exact motion {exact:.3f} px (c/exact {c / exact:.2f})"))
            orig = decode(src)
            rows.append(Row("B ref", "  the real output, subject masked (dilate 30)",
                            flow_rms(fixed.frames, views, bg.inner, masks), flow_rms(orig, views, bg.inner, masks),
                            bg.floor, bg.chain, "-", None, "floor: the subject-free one"))
        auto = run_fix(src, tmp / f"{slug}_auto.mp4", FixOptions(model="similarity", force=True),
                       auto_readout_resolver(None))
        if auto.refusal:
            rows.append(Row("B", f"  {label} subject: readout auto", None, bg.uncorrected, bg.floor, bg.chain,
                            "readout ±3 %", False, f"refused: {auto.refusal}"))
        else:
            r = auto.result
            c = flow_rms(corrected_with(r, bg.orig), bg.views, bg.inner)
            rows.append(Row("B", f"  {label} subject: readout auto (background)", c, bg.uncorrected, bg.floor,
                            bg.chain,
                            "readout ±3 %", within(r.readout, readout, 0.03) and r.line_order == "top-down",
                            f"readout {r.readout * 1e3:.3f} ms {r.line_order} vs {readout * 1e3:.3f} "
                            f"({pct(r.readout, readout):+.2f} %)"))
    return rows


# --------------------------------------------------------------------------- C: motion blur

def rows_c(tmp, n):
    w, h, fps, readout, exposure = 480, 270, 30, 0.020, 1 / 60
    pan = truth.whip_pan(40.0, fps, centre_s=n / 2 / fps, duration_s=0.8)
    clip = truth.render_planar_clip(w, h, n, fps, readout, pan, exposure=exposure, seed=7)
    t_ref = reference_times(clip)
    views = [clip.global_view(t, exposure=exposure) for t in t_ref]
    tc = Truthed(clip, tmp, "c_blur", fps, views=views)
    fixed = run_fix(tc.src, tmp / "c_fixed.mp4", FixOptions(readout=readout, force=True))
    name = "whip 40 px/f, exposure 1/60 s, 20 ms"
    if fixed.refusal:
        return [Row("C", name, None, tc.uncorrected, tc.floor, tc.chain, "≤1.3x, none bridged", False,
                    f"refused: {fixed.refusal}")]
    c = tc.score(fixed)
    bridged = len(fixed.result.model.unmeasured_pairs)
    return [Row("C", name, c, tc.uncorrected, tc.floor, tc.chain, "≤1.3x, none bridged",
                c <= 1.3 * tc.chain and bridged == 0,
                f"{bridged} pair(s) bridged (unmeasured); floor: the blurred views; {model_text(fixed.result)}")]


# --------------------------------------------------------------------------- D: continuity over windows

@dataclass(frozen=True)
class PathSum:
    """The sum of several camera paths (each ``t -> (x, y)``)."""

    parts: tuple

    def __call__(self, t):
        x = y = 0.0
        for part in self.parts:
            px, py = part(t)
            x, y = x + np.asarray(px, dtype=np.float64), y + np.asarray(py, dtype=np.float64)
        return x, y


JUMP_LIMIT_PX = 0.5  # "no step": the solved frame-to-frame pan_x within this of the truth's


def rows_d(tmp, n_long=120):
    w, h, fps, readout = 640, 360, 30, 0.024
    peak = 45.0 * fps
    parts = tuple(truth.SpeedBumpPan(peak, c, 0.7, 0.0 if i % 2 == 0 else 180.0)
                  for i, c in enumerate((0.6, 1.6, 2.6, 3.5)))
    path = PathSum(parts + (truth.Shake2D(3.0, seed=2),))
    clip = truth.render_planar_clip(w, h, n_long, fps, readout, path, seed=9)
    tc = Truthed(clip, tmp, "d_long", fps)
    fixed = run_fix(tc.src, tmp / "d_fixed.mp4", FixOptions(readout=readout, force=True))
    name = f"{n_long} frames: whips back and forth + shake"
    target = f"1 segment, jump ≤{JUMP_LIMIT_PX} px"
    if fixed.refusal:
        return [Row("D", name, None, tc.uncorrected, tc.floor, tc.chain, target, False,
                    f"refused: {fixed.refusal}")]
    model = fixed.result.model
    c = tc.score(fixed)
    segments = len(model.segments)
    t_ref = np.array(tc.t_ref)
    if "pan_x_px" not in model.kind.curves:
        return [Row("D", name, c, tc.uncorrected, tc.floor, tc.chain, target, False,
                    f"{segments} segment(s); {model_text(fixed.result)} has no pan_x")]
    i = model.kind.curves.index("pan_x_px")
    worst, where = 0.0, -1
    for seg in model.segments:
        ks = np.arange(seg.first_frame, seg.last_frame + 1)
        solved = seg.evaluate(t_ref[ks])[i]
        true = np.asarray(path(t_ref[ks])[0])
        err = np.abs(np.diff(solved) - np.diff(true))
        if err.size and err.max() > worst:
            worst, where = float(err.max()), int(ks[np.argmax(err)])
    return [Row("D", name, c, tc.uncorrected, tc.floor, tc.chain, target,
                segments == 1 and worst <= JUMP_LIMIT_PX,
                f"{segments} segment(s); largest pan_x step error {worst:.3f} px (frames {where}->{where + 1})")]


# --------------------------------------------------------------------------- E: fast tilts

def rows_e(tmp, n):
    w, h, fps, readout = 640, 360, 30, 0.024
    rows = []
    for rate in (20, 70, 140):
        for direction in ("down", "up"):
            for order in ("top-down", "bottom-up"):
                slug = f"e_{rate}_{direction}_{order}"
                clip = truth.render_planar_clip(w, h, n, fps, readout, truth.fast_tilt(rate, direction, fps),
                                                line_order=order, seed=11)
                tc = Truthed(clip, tmp, slug, fps)
                fixed = run_fix(tc.src, tmp / f"{slug}_fixed.mp4",
                                FixOptions(readout=readout, line_order=order, force=True))
                name = f"tilt {direction} {rate} rows/f, {order}"
                if fixed.refusal:
                    rows.append(Row("E", name, None, tc.uncorrected, tc.floor, tc.chain, "corrected ≤ uncorr/10", False,
                                    f"refused: {fixed.refusal}"))
                    continue
                # rows the frame never saw (a tilt read against the motion stretches the picture)
                # are filled from the border: not scored, in the corrected, the floors or the uncorrected
                unseen = [clip.unseen_mask(k, tc.t_ref[k]) for k in range(tc.n)]
                tc.rescore(unseen)
                c = tc.score(fixed)
                # "converges": corrected, to a tenth of the skew at most; the ratio to the chain
                # floor is printed beside it (no target of its own)
                rows.append(Row("E", name, c, tc.uncorrected, tc.floor, tc.chain, "corrected ≤ uncorr/10",
                                c <= 0.1 * tc.uncorrected, model_text(fixed.result)))
    return rows


# --------------------------------------------------------------------------- speed: rotation vs similarity

def speed_table(tmp, n=30, runs=2):
    w, h, fps, readout = 1920, 1080, 30, 0.024
    path = truth.RotationPath(sweep_peak_deg_s=120.0, sweep_centre_s=n / 2 / fps, sweep_duration_s=0.8,
                              shake_deg=(0.5, 0.5, 0.3), seed=3)
    clip = truth.render_rotation_clip(w, h, n, fps, readout, 90.0, path)
    src = tmp / "speed_1080.mp4"
    truth.write_clip(src, clip.frames, fps, crf=10)
    del clip
    options = {"rotation": FixOptions(readout=readout, model="rotation", lens=parse_lens(hfov="90"), force=True),
               "similarity": FixOptions(readout=readout, model="similarity", force=True)}
    times = {name: [] for name in options}
    for _ in range(runs):
        for name, opt in options.items():
            t0 = time.perf_counter()
            fix_clip(str(src), str(tmp / f"speed_{name}.mp4"), opt)
            times[name].append(time.perf_counter() - t0)
    best = {name: min(v) for name, v in times.items()}
    ratio = best["rotation"] / best["similarity"]
    lines = [f"fix_clip wall time, {w}x{h}, {n} frames, runs alternating, best of {runs}",
             f"{'model':12s} {'runs s':>16s} {'best s':>7s}"]
    for name, v in times.items():
        lines.append(f"{name:12s} {' '.join(f'{x:7.2f}' for x in v):>16s} {best[name]:7.2f}")
    lines.append(f"rotation / similarity = {ratio:.3f}  (target ≤ 1.15: {'ok' if ratio <= 1.15 else 'MISS'})")
    return lines


# --------------------------------------------------------------------------- output

def fmt(v, spec="7.3f"):
    return f"{v:{spec}}" if v is not None else f"{'-':>{int(spec.split('.')[0])}s}"


def print_table(rows):
    head = (f"{'row':5s} {'scenario':46s} {'corrected':>9s} {'uncorr':>7s} {'floor':>6s} {'ratio':>6s} "
            f"{'chain':>6s} {'c/chn':>5s}  {'target':22s} {'':4s}  detail")
    print(head)
    print("-" * len(head))
    for r in rows:
        status = "-" if r.ok is None else ("ok" if r.ok else "MISS")
        vs_chain = r.corrected / r.chain if r.corrected is not None and r.chain else None
        print(f"{r.key:5s} {r.scenario[:46]:46s} {fmt(r.corrected, '9.3f')} {fmt(r.uncorrected)} "
              f"{fmt(r.floor, '6.3f')} {fmt(r.ratio, '6.2f')} {fmt(r.chain, '6.3f')} {fmt(vs_chain, '5.2f')}  "
              f"{r.target:22s} {status:4s}  {r.detail}")


NOTES = """\
notes:
* px: RMS residual optical flow against the exact global-shutter view at each frame's reference
  instant (middle row), textured pixels of the central 76 %, median flow removed, inner frames
  (the first and last two left out). Rows 0.x: skewfix.synth's metric and renderer; all others:
  tests/truth.py (renderer and residual_flow, DIS flow of Kroeger et al., 2016, in OpenCV).
* floor: the truth views through the same encode as the source clips (truth.write_clip, x264
  CRF 10) and decoded; ratio = corrected/floor. The corrected clips are encoded twice (the
  source, then fix's own output at its default CRF 16), so "chain" is the floor's frames encoded
  once more with write_clip at CRF 16, c/chn = corrected/chain; targets on a written output are
  judged on the chain (a second, independent check: the truth views passed through
  `fix --readout 0`, which re-encodes and moves nothing, score as the chain does). B's
  background is remapped in memory with no second encode: it is judged on the same frames
  remapped with the exact motion ("exact").
* A: 640x360, 30 fps, 24 ms top-down, 90° horizontal view, yaw sweep peaking at 120°/s plus
  yaw/pitch/roll shake of 0.5/0.5/0.3° at 4-10 Hz. A4 is geometric, no flow: per output row the
  least-squares 2-D similarity from the global view's pixels to where the rolling-shutter frame
  saw them (truth R(t) and K), RMS of the remainder over the same central 76 %. "≤A4/2" is this
  script's reading of "clearly below the bound".
* B: 480x270, 30 fps, 24 ms; the subject crosses 20 %->80 % of the width rightwards while the
  picture moves left. Background: the same camera path rendered without the subject (same scene),
  its frames through the same encode, corrected with the motion solved from the subject clip
  (correction_map(...).full(), cv2.remap cubic), against the subject-free views.
* C: 480x270, 30 fps; floor and truth are the global views blurred over the same exposure.
* D: 640x360, 30 fps, 24 ms, default streaming fix; step error = max over consecutive frames of
  |solved pan_x(t_ref,k+1) - pan_x(t_ref,k) - (true difference)|; the 0.5 px limit is this script's.
* E: 640x360, 30 fps, 24 ms, constant-speed tilt (down moves the picture up); "converges" is
  read as: corrected, with at most a tenth of the uncorrected residual left. Rows of the global
  view that the frame never saw (a tilt read against the motion stretches the picture, by 1.39x at
  140 rows/f) are left out of every column: only the border can fill them."""


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--frames", type=int, default=36)
    ap.add_argument("--sections", default="0ABCDES", help="which parts to run (0 = the original rows, S = speed)")
    args = ap.parse_args(argv)
    n = args.frames
    sections = args.sections.upper()
    rows, speed, seconds = [], None, {}
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        for key, make in (("0", lambda: original_rows(tmp, n)), ("A", lambda: rows_a(tmp, n)[0]),
                          ("B", lambda: rows_b(tmp, n)), ("C", lambda: rows_c(tmp, n)),
                          ("D", lambda: rows_d(tmp)), ("E", lambda: rows_e(tmp, 30))):
            if key in sections:
                t0 = time.perf_counter()
                rows += make()
                seconds[key] = time.perf_counter() - t0
        if "S" in sections:
            t0 = time.perf_counter()
            speed = speed_table(tmp)
            seconds["S"] = time.perf_counter() - t0
    print_table(rows)
    print(NOTES)
    if speed:
        print()
        print("\n".join(speed))
    print()
    print("section seconds: " + ", ".join(f"{k} {v:.0f}" for k, v in seconds.items()))
    return 0


if __name__ == "__main__":
    sys.exit(main())
