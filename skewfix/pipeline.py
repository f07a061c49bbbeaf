"""The correction job: decode -> proxy -> track -> fit -> maps -> remap planes -> encode.

By default one streaming pass (`StreamingWarper`): a decoding thread tracks
each frame's luma proxy, a fitting thread fits the motion in short windows,
a warping thread remaps the planes once their window is fitted, and the
calling thread encodes and muxes; small bounded queues join them (FFmpeg and
OpenCV release the GIL, so the stages overlap) and no stage holds the clip.

``--readout auto`` and ``--border crop`` need the whole clip's motion first:
an **analysis** pass keeps only the tracks (a few kB per frame), the motion
is fitted per shot, then the same render loop runs with a `FrameWarper`.
"""

from __future__ import annotations

import os
import queue
import threading
import time
from collections import deque
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from fractions import Fraction
from typing import Callable

import numpy as np

from skewfix.buffers import PlanePool
from skewfix.decode import VideoInfo, black_levels, open_source
from skewfix.errors import InputError, RuntimeProblem, UsageProblem
from skewfix.measure.motion_fit import line_order_note
from skewfix.models.choice import LensSpec, ModelChoice, choose_model
from skewfix.motion import FitSettings, MotionModel, PairObservations, ShotCurves, fit_motion
from skewfix.rowclock import RowClock, check_readout_fits
from skewfix.track import PairTracker, TrackerSettings
from skewfix.warp import StripAffines, WarpMap, correction_map, crop_zoom, reskew_map, warp_plane

Progress = Callable[[str, int, "int | None"], None]
IDENTITY_TOLERANCE_PX = 0.01  # a frame whose map moves nothing further is passed through untouched


def _quiet(stage: str, done: int, total):
    return None


@dataclass
class Analysis:
    """What the analysis pass learned: timing and tracks, no pixels."""

    info: VideoInfo
    frame_times: np.ndarray
    pts: list
    pairs: list[PairObservations]
    lost_frames: int = 0
    decode_errors: list[str] = field(default_factory=list)
    seconds: dict = field(default_factory=dict)
    frames: object = None  # the `skewfix.framerange.FrameRange` analysed (None: the whole clip)

    @property
    def n_frames(self) -> int:
        return len(self.frame_times)


@dataclass
class StageTimes:
    """Wall-clock seconds spent in each stage (threads overlap, so they need not add up)."""

    decode: float = 0.0
    track: float = 0.0
    fit: float = 0.0
    remap: float = 0.0
    encode: float = 0.0

    def as_dict(self):
        return dict(decode=self.decode, track=self.track, fit=self.fit, remap=self.remap, encode=self.encode)


def longest_run(ks) -> int:
    """Length of the longest run of consecutive numbers in ``ks``."""
    best = run = 0
    last = None
    for k in sorted(ks):
        run = run + 1 if last is not None and k == last + 1 else 1
        best, last = max(best, run), k
    return best


def expected_frames(info: VideoInfo) -> int | None:
    if info.frame_count:
        return info.frame_count
    if info.duration_s and info.rate:
        return int(round(info.duration_s * float(info.rate)))
    return None


def analyse(path: str, fps: Fraction | None = None, tracker: TrackerSettings | None = None,
            progress: Progress = _quiet, times: StageTimes | None = None, frames=None) -> Analysis:
    """Decode the clip once (only the ``frames`` asked for, a `skewfix.framerange.FrameRange`),
    tracking global motion between consecutive frames."""
    times = times or StageTimes()
    source = open_source(path, fps, frames)
    with source:
        info = source.info
        total = expected_frames(info)
        tr = PairTracker(tracker)
        pairs, frame_times, pts = [], [], []
        t_mark = time.perf_counter()
        for frame in source.frames():
            t_dec = time.perf_counter()
            times.decode += t_dec - t_mark
            obs = tr.push(frame.luma, frame.bit_depth)
            if obs is not None:
                pairs.append(obs)
            frame_times.append(frame.time)
            pts.append(frame.pts)
            t_mark = time.perf_counter()
            times.track += t_mark - t_dec
            progress("analyse", len(frame_times), total)
        lost = getattr(source, "lost_frames", 0)
        errors = list(getattr(source, "decode_errors", []))
    if not frame_times:
        raise InputError(f"{path}: no frame could be decoded")
    return Analysis(info, np.asarray(frame_times), pts, pairs, lost, errors, frames=frames)


def solve(analysis: Analysis, readout: float, line_order: str = "top-down",
          settings: FitSettings | None = None, times: StageTimes | None = None,
          choice: ModelChoice | None = None) -> tuple[RowClock, MotionModel]:
    """Fit the motion curves for the given readout (with the chosen model, else the
    settings'); returns the row clock and the model."""
    t0 = time.perf_counter()
    clock = analysis_clock(analysis, readout, line_order)
    settings = settings or FitSettings()
    if choice is not None:
        settings = replace(settings, kind=choice.kind)
    model = fit_motion(analysis.pairs, clock, analysis.info.width, settings)
    if choice is not None:
        model.model_reason = choice.reason
    if times is not None:
        times.fit += time.perf_counter() - t0
    return clock, model


def analysis_clock(analysis: Analysis, readout: float, line_order: str) -> RowClock:
    """The analysed clip's row clock, refusing a readout longer than its frame interval."""
    clock = RowClock(analysis.frame_times, analysis.info.height, readout, line_order)
    try:
        clock.check_readout_fits(analysis.info.frame_interval)
    except UsageProblem as exc:
        raise UsageProblem(f"{analysis.info.path}: {exc}") from None
    return clock


def choose_for_analysis(analysis: Analysis, request: str, lens: LensSpec, readout: float, line_order: str,
                        settings: FitSettings | None = None, allow_translation: bool = True) -> ModelChoice:
    """`skewfix.models.choice.choose_model` on an analysed clip at the given readout; a
    focal length that cannot be measured is refused naming the clip."""
    from skewfix.errors import MeasurementRefused

    clock = analysis_clock(analysis, readout, line_order)
    try:
        return choose_model(request, analysis.pairs, clock, analysis.info.width, lens, settings, allow_translation)
    except MeasurementRefused as exc:
        raise MeasurementRefused(f"{analysis.info.path}: {exc}") from None


def choose_with_readout(analysis: Analysis, request: str, lens: LensSpec, readout: float, line_order: str,
                        resolver=None, settings: FitSettings | None = None):
    """The motion model and the readout for an analysed clip.

    With a ``resolver(analysis, kind) -> (readout, line_order, origin)`` (a readout to
    measure, or a saved camera's to check against the clip), the model is chosen at no
    readout, the readout resolved with it, and a focal length estimated from the
    footage is measured again at the readout found. Returns
    (readout, line_order, origin or None, `ModelChoice`).
    """
    from skewfix.errors import MeasurementRefused

    if resolver is None:
        return readout, line_order, None, choose_for_analysis(analysis, request, lens, readout, line_order, settings)
    chosen = choose_for_analysis(analysis, request, lens, 0.0, line_order, settings, allow_translation=False)
    readout, line_order, origin = resolver(analysis, chosen.kind)
    order = line_order if line_order in ("top-down", "bottom-up") else "top-down"
    if getattr(chosen.kind, "focal_estimated", False):
        try:
            again = choose_for_analysis(analysis, "rotation", lens, readout, order, settings)
            chosen = ModelChoice(again.kind, f"{chosen.reason}; focal length measured again at the readout found: "
                                             f"{again.kind.lens.focal_px:.1f} px", chosen.misfits_px)
        except MeasurementRefused:
            chosen = ModelChoice(chosen.kind, f"{chosen.reason}; the focal length found at no readout is kept "
                                              "(it could not be measured again)", chosen.misfits_px)
    elif chosen.kind.name == "similarity" and request == "auto":
        # with the rows timed right, roll and zoom may turn out to explain nothing
        again = choose_for_analysis(analysis, request, lens, readout, order, settings)
        if getattr(again.kind, "translation_only", False):
            chosen = again
    return readout, line_order, origin, chosen


@dataclass
class RenderSettings:
    reference_line: str = "middle"
    border: str = "edge"
    direction: str = "correct"  # or "reskew"
    queue_depth: int = 4
    interpolation: str = "cubic"  # luma/RGB resampling: "cubic" (sharper) or "linear" (faster)


class FrameWarper:
    """Produces each frame's warp map and applies it to the planes."""

    def __init__(self, model: MotionModel, clock: RowClock, settings: RenderSettings, info: VideoInfo):
        self.model, self.clock, self.settings, self.info = model, clock, settings, info
        self.zoom = 1.0
        if settings.border == "crop" and settings.direction == "correct":
            maps = (self.map_for(k) for k in range(len(clock.frame_times)))
            self.zoom = crop_zoom(maps, info.width, info.height)

    # The render loop's interface: a warper with the whole clip's motion can map
    # any frame at once; `StreamingWarper` needs to look ahead first.
    def observe(self, frame) -> None:
        """Called for every decoded frame, in order, on the decoding thread."""

    def mappable(self, k: int, observed: int, finished: bool) -> bool:
        return True

    def accepts(self, k: int) -> bool:
        """Whether frame ``k`` has motion here (a file that grew since the analysis has more)."""
        return k < len(self.clock.frame_times)

    #: most decoded frames the render loop may hold while waiting for ``mappable``
    lookahead_limit: int | None = None

    def close(self) -> None:
        """Called when the decoder has delivered its last frame."""

    def cancel(self) -> None:
        """The render failed or was stopped: end any work of the warper's own, and wait for it."""

    def release_before(self, k: int) -> None:
        """Frames before ``k`` are done (a streaming warper may free their fits)."""

    @property
    def total(self) -> int | None:
        return len(self.clock.frame_times)

    def map_for(self, k: int) -> WarpMap:
        if self.settings.direction == "reskew":
            return reskew_map(self.model, self.clock, k, self.settings.reference_line)
        return correction_map(self.model, self.clock, k, self.settings.reference_line, zoom=self.zoom)

    def apply(self, k: int, planes, subsampling):
        wm = self.map_for(k)
        return self.apply_map(wm, planes, subsampling), wm

    #: where full-size maps and remapped planes come from (the render loop sets a shared one)
    pool: PlanePool | None = None

    def apply_map(self, wm: WarpMap, planes, subsampling):
        """Remap every plane at its own size and depth (identity maps copy nothing)."""
        if wm.is_identity(IDENTITY_TOLERANCE_PX):
            return planes
        pool = self.pool
        fills = black_levels(self.info, len(planes))
        strips = {}  # U and V share one set of strips
        out = []
        for plane, sub, fill in zip(planes, subsampling, fills):
            h, w = plane.shape[:2]
            key = (w, h, tuple(sub))
            if key not in strips:
                strips[key] = StripAffines.of(wm, w, h, sub)
            channels = plane.shape[2] if plane.ndim == 3 else 1
            # luma (and RGB) with cubic convolution; subsampled chroma bilinear (cheaper, and
            # chroma carries little fine detail)
            interp = self.settings.interpolation if tuple(sub) == (1, 1) else "linear"
            dst = None if pool is None else pool.take(plane.shape, plane.dtype)
            out.append(warp_plane(plane, wm, sub, "black" if self.settings.border == "black" else "edge",
                                  (fill,) * channels if channels > 1 else fill, interp, dst=dst, pool=pool,
                                  strips=strips[key]))
        return out


LOOKAHEAD_BYTES = 400 * 2**20  # full frames allowed to wait for their window's fit
FIRST_WINDOW = 8  # frames in the first fitted window (later ones double up to the full window)
# Frames per fitted window at most. The look-ahead (and so the peak memory) grows with it;
# 16 keeps a 240-frame 1080p fix within a few per cent of a 60-frame one (a 60-frame clip
# already reaches the steady look-ahead), for a few per cent more fitting than 32.
MAX_WINDOW = 16
NOT_CHECKED = object()  # a streamed fix's line order before the first frames were looked at
DECIDE_FRAMES = 24  # frames whose tracks choose the motion model of a streamed clip and check its line order
MARGIN = 4  # frames of context fitted on each side of a window (the spline needs a frame or two)


def window_for(info: VideoInfo, budget_bytes: int = LOOKAHEAD_BYTES) -> tuple[int, int]:
    """Frames per fitted window and context margin that keep the look-ahead in budget."""
    sample = 2 if info.bit_depth > 8 else 1
    chroma = 3.0 if info.is_rgb or "444" in info.pix_fmt else 2.0 if "422" in info.pix_fmt else 1.5
    frame_bytes = info.width * info.height * sample * chroma
    frame_bytes = getattr(info, "frame_bytes", None) or frame_bytes  # float planes (OpenEXR) say their own
    frames = max(10, int(budget_bytes // max(frame_bytes, 1)))
    margin = min(MARGIN, frames // 3)
    window = max(4, min(MAX_WINDOW, frames - 2 * margin))
    return window, margin


class StreamingWarper(FrameWarper):
    """Corrects while decoding: tracks each frame as it arrives and fits the motion
    in windows of ``window`` frames with ``margin`` frames of context on each
    side, on a thread of its own, so only about ``window + margin`` full frames
    ever wait in memory (see `window_for`).

    Each frame is mapped with exactly one window's fit; the correction depends
    only on the motion *within* that frame, so window boundaries leave no seam.
    The windows share one knot grid and each carries the gauge of the one
    before, so every shot's solved motion is one continuous spline
    (`skewfix.motion.ShotCurves`), as the motion file and report show it.

    A model other than the plain similarity (``model_request`` "auto" or
    "rotation") is chosen once, from the tracks of the first `DECIDE_FRAMES`
    frames (fewer for big frames: the look-ahead bounds them), before the
    first window is fitted.
    """

    def __init__(self, info: VideoInfo, readout: float, line_order: str, settings: RenderSettings,
                 fit: FitSettings | None = None, tracker: TrackerSettings | None = None,
                 window: int | None = None, margin: int | None = None, times: StageTimes | None = None,
                 model_request: str = "similarity", lens: LensSpec | None = None):
        self.info, self.settings, self.zoom = info, settings, 1.0
        self.readout, self.line_order = readout, line_order
        self.fit_settings = fit or FitSettings()
        self.model_request, self.lens = model_request, lens or LensSpec()
        self.choice: ModelChoice | None = None
        self.line_order_note = NOT_CHECKED  # then a note, or None (see `_check_line_order`)
        if model_request == "similarity" or self.fit_settings.kind is not None or self.fit_settings.model == "translation":
            kind = self.fit_settings.kind_for(info.width, info.height)
            reason = ("asked for (translation only)" if self.fit_settings.model == "translation" and
                      self.fit_settings.kind is None else
                      "asked for (--model similarity)" if model_request == "similarity" else "given")
            self.choice = ModelChoice(kind, reason, {})
        self.tracker = PairTracker(tracker)
        auto_window, auto_margin = window_for(info)
        self.window = window or auto_window
        self.margin = auto_margin if margin is None else margin
        self.first_window = min(FIRST_WINDOW, self.window)
        self.stage_times = times or StageTimes()
        # enough for one window and its context to be complete, so the fit can always start
        self.lookahead_limit = self.window + 2 * self.margin + 1
        self._cond = threading.Condition()
        self.frame_times: list[float] = []
        self.pts: list = []
        self._pairs: dict[int, PairObservations] = {}
        self.track_counts: dict[int, int] = {}
        self._observed = 0
        self._closed = False
        self._cancelled = False
        self._fitted_until = 0
        self._fit_error: BaseException | None = None
        self._windows: list[tuple[int, int, int, MotionModel, RowClock]] = []
        self.shots: list[ShotCurves] = []
        self.warnings: list[str] = []
        self.cuts: list[int] = []
        self.unmeasured: list[int] = []
        self.inliers: list[float] = []
        self.decide_frames = min(DECIDE_FRAMES, self.lookahead_limit - 1)
        self._fitter = threading.Thread(target=self._fit_loop, name="skewfix-fit", daemon=True)
        self._fitter.start()

    @property
    def total(self):
        return expected_frames(self.info)

    def accepts(self, k: int) -> bool:
        return True  # every decoded frame is tracked and fitted

    # -- decoding thread --------------------------------------------------
    def observe(self, frame) -> None:
        t0 = time.perf_counter()
        obs = self.tracker.push(frame.luma, frame.bit_depth)
        with self._cond:
            self.frame_times.append(frame.time)
            self.pts.append(frame.pts)
            if obs is not None:
                self._pairs[obs.k] = obs
                self.track_counts[obs.k] = len(obs.p0)
            self._observed += 1
            self._cond.notify_all()
        self.stage_times.track += time.perf_counter() - t0

    def close(self) -> None:
        """No more frames will be observed (end of stream, error or stop)."""
        with self._cond:
            self._closed = True
            self._cond.notify_all()

    def cancel(self) -> None:
        """Fit nothing more and wait for a fit in progress, so that no thread of ours is
        still inside OpenCV or SciPy when the caller (or the interpreter) moves on."""
        with self._cond:
            self._closed = self._cancelled = True
            self._cond.notify_all()
        if self._fitter is not threading.current_thread():
            self._fitter.join()

    # -- fitting thread ---------------------------------------------------
    def window_from(self, start: int) -> int:
        """Frames in the window that starts at frame ``start``.

        The first windows are short and double in size (8, 8, 16, ...),
        so the first frames reach the encoder after about 14 decoded frames
        rather than ``window + margin``; later windows are full size.
        """
        return max(1, min(self.window, max(self.first_window, start)))

    def _fit_loop(self) -> None:
        try:
            while True:
                with self._cond:
                    need = self._fitted_until + self.window_from(self._fitted_until) + self.margin
                    if self.choice is None or self.line_order_note is NOT_CHECKED:
                        need = max(need, self.decide_frames)
                    while not self._closed and self._observed < need:
                        self._cond.wait()
                    observed = self._observed
                    if self._cancelled or self._fitted_until >= observed:
                        return
                if self.choice is None:
                    self._choose_model(observed)
                if self.line_order_note is NOT_CHECKED:
                    self._check_line_order(observed)
                self._fit_next(observed)
        except BaseException as exc:  # noqa: BLE001 - reported to the warp thread
            with self._cond:
                self._fit_error = exc
                self._cond.notify_all()

    def _choose_model(self, observed: int) -> None:
        """Pick the motion model from the first frames' tracks (see the class docstring)."""
        from skewfix.errors import MeasurementRefused

        pairs, clock = self._first_frames(observed)
        try:
            self.choice = choose_model(self.model_request, pairs, clock, self.info.width, self.lens,
                                       self.fit_settings)
        except MeasurementRefused as exc:
            raise MeasurementRefused(f"{self.info.path}: {exc}") from None
        self.fit_settings = replace(self.fit_settings, kind=self.choice.kind)

    def _first_frames(self, observed: int):
        """The tracks and row clock of the first `decide_frames` frames (always the same frames,
        however the threads ran)."""
        upto = min(observed, self.decide_frames)
        with self._cond:
            times = np.asarray(self.frame_times[:upto])
            pairs = [p for k, p in self._pairs.items() if k < upto - 1]
        return pairs, RowClock(times, self.info.height, self.readout, self.line_order)

    def _check_line_order(self, observed: int) -> None:
        """Doubt the line order given when the first frames' motion fits the other one clearly
        better (`skewfix.measure.motion_fit.line_order_note`); None when it cannot tell."""
        pairs, clock = self._first_frames(observed)
        self.line_order_note = line_order_note(pairs, clock, self.info.width,
                                               replace(self.fit_settings, kind=self.choice.kind))

    def _knot_settings(self, times: np.ndarray) -> FitSettings:
        """The fit settings with the clip's one knot grid, fixed by the first window."""
        s = self.fit_settings
        if s.knot_spacing is None:
            interval = self.info.frame_interval or (float(np.median(np.diff(times))) if len(times) > 1 else 0.04)
            self.fit_settings = s = replace(s, knot_spacing=interval / s.knots_per_frame,
                                            knot_origin=float(times[0]) - interval)
        return s

    def _anchors(self, lo: int, a: int, local_cuts: list[int]) -> dict[int, np.ndarray]:
        """Gauge values carried over for the window's shots that began before frame ``a``."""
        anchors = {}
        starts = [0] + [k + 1 for k in local_cuts]
        for s in starts:
            f = s + lo
            if f >= a or not self.shots:
                continue
            shot = self.shots[-1]
            if shot.first_frame <= f <= shot.last_frame:
                anchors[s] = shot.segment().evaluate(np.array([self.frame_times[f]]))[:, 0]
        return anchors

    def _prior(self, lo: int, a: int):
        """``prior(k, p0) -> p1``: where the previous window's motion takes the tracks of
        pair ``k`` (window-local) for the pairs it fitted, so the two agree on the world."""
        if not self._windows:
            return None
        _, prev_b, prev_lo, prev_model, prev_clock = self._windows[-1]

        def prior(k_local: int, p0: np.ndarray):
            k = k_local + lo - prev_lo  # the previous window's numbering
            if k_local + lo >= a or k < 0 or k + 1 >= len(prev_clock.frame_times):
                return None
            try:
                seg = prev_model.segment_for(k)
            except IndexError:
                return None
            if seg.last_frame <= k:  # a cut right after frame k
                return None
            kind = prev_model.kind
            v0 = seg.evaluate(prev_clock.row_time(k, p0[:, 1]))
            p1 = p0.copy()
            for _ in range(2):  # the row that sees it in frame k+1 gives its time
                x, y = kind.transfer(v0, p0, seg.evaluate(prev_clock.row_time(k + 1, p1[:, 1])))
                p1 = np.stack([x, y], 1)
            return p1

        return prior

    def _fit_next(self, observed: int) -> None:
        t0 = time.perf_counter()
        a = self._fitted_until
        b = min(a + self.window_from(a), observed)
        if observed - b < self.margin // 2:  # do not leave a stub of a window at the end
            b = observed
        lo = max(0, a - self.margin)
        with self._cond:
            hi = min(self._observed, b + self.margin)
            times = np.asarray(self.frame_times[lo:hi])
            all_times = self.frame_times
            pairs = [PairObservations(p.k - lo, p.p0, p.p1, p.cut, p.ids, p.method) for k, p in self._pairs.items()
                     if lo <= k < hi - 1]
            for k in [k for k in self._pairs if k < b - self.margin]:
                del self._pairs[k]  # bounded memory: old tracks are no longer needed
        settings = self._knot_settings(times)
        clock = RowClock(times, self.info.height, self.readout, self.line_order)
        anchors = self._anchors(lo, a, sorted(p.k for p in pairs if p.cut))
        model = fit_motion(pairs, clock, self.info.width, settings, anchors=anchors, prior=self._prior(lo, a),
                           frame_offset=lo)
        model.model_reason = self.choice.reason
        for seg in model.segments:  # keep the part this window is responsible for
            first, last = max(seg.first_frame + lo, a), min(seg.last_frame + lo, b - 1)
            if first > last:
                continue
            continues = (self.shots and self.shots[-1].last_frame == first - 1
                         and seg.first_frame + lo < first)  # the shot began before this window's part
            if not continues:
                self.shots.append(ShotCurves(first, settings.knot_origin, settings.knot_spacing))
            self.shots[-1].add(seg, float(all_times[first]), last)
        with self._cond:
            self.inliers.append(model.inlier_fraction)
            if model.warnings and len(self.warnings) < 3:  # the first few are enough to act on
                self.warnings += model.warnings[:3 - len(self.warnings)]
            self._windows.append((a, b, lo, model, clock))
            self.cuts += [k + lo for k in model.cuts if a <= k + lo < b]
            self.unmeasured += [k + lo for k in model.unmeasured_pairs if a <= k + lo < b]
            self._fitted_until = b
            self._cond.notify_all()
        self.stage_times.fit += time.perf_counter() - t0

    # -- warping thread ---------------------------------------------------
    def mappable(self, k: int, observed: int, finished: bool) -> bool:
        """Whether frame ``k`` has its fit; once the input has ended, wait for it."""
        with self._cond:
            while k >= self._fitted_until:
                if self._fit_error is not None:
                    raise self._fit_error
                if not finished:
                    return False
                if not self._fitter.is_alive() and k >= self._fitted_until:
                    raise RuntimeProblem(f"{self.info.path}: frame {k} was decoded but never fitted")
                self._cond.wait(timeout=0.5)
            return True

    def map_for(self, k: int) -> WarpMap:
        with self._cond:
            windows = list(self._windows)
        for a, b, lo, model, clock in reversed(windows):
            if a <= k < b:
                return correction_map(model, clock, k - lo, self.settings.reference_line)
        raise IndexError(f"frame {k} has no fitted motion yet")

    def release_before(self, k: int) -> None:
        """Forget windows that end before frame ``k`` (bounded memory)."""
        with self._cond:
            self._windows = [w for w in self._windows if w[1] > k]

    def whole_model(self) -> tuple[RowClock, MotionModel]:
        """The clip's motion as one model (one continuous segment per shot)."""
        clock = RowClock(np.asarray(self.frame_times), self.info.height, self.readout, self.line_order)
        kind = self.choice.kind if self.choice else None
        model = MotionModel(self.info.width, self.info.height, [shot.segment() for shot in self.shots],
                            unmeasured_pairs=sorted(self.unmeasured), cuts=sorted(self.cuts),
                            inlier_fraction=float(np.mean(self.inliers)) if self.inliers else 0.0, kind=kind,
                            model_reason=self.choice.reason if self.choice else "", warnings=list(self.warnings))
        return clock, model


_END = object()


def _run_thread(target, out_q: queue.Queue, errors: list, name: str):
    def body():
        try:
            target()
        except BaseException as exc:  # noqa: BLE001 - handed to the main thread
            errors.append(exc)
        finally:
            out_q.put(_END)
    th = threading.Thread(target=body, name=name, daemon=True)
    th.start()
    return th


def render(path: str, sink, warper: FrameWarper, fps: Fraction | None = None, progress: Progress = _quiet,
           times: StageTimes | None = None, on_frame=None, stop: threading.Event | None = None,
           report: dict | None = None, source=None) -> int:
    """Decode, warp and encode every frame; copies other streams packet for packet.

    Three threads joined by bounded queues: decoding (plus tracking, for a
    `StreamingWarper`), warping (with the warper's look-ahead), and encoding
    on the calling thread. ``on_frame(frame, warp_map, planes_out)`` (the decoded
    frame, its map and the remapped planes) is called for
    every frame (maps, mattes, reports); ``report`` receives damaged-packet
    counts. ``source`` is ``path`` already opened (it is closed at the end).
    Returns the number of frames written.
    """
    times = times or StageTimes()
    stop = stop or threading.Event()
    source = source if source is not None else open_source(path, fps)
    depth = warper.settings.queue_depth
    # decoded and remapped planes are reused once encoded (no page faults per frame)
    pool = PlanePool(limit=(warper.lookahead_limit or 0) + 2 * depth + 4)
    source.pool = pool
    warper.pool = pool
    decoded: queue.Queue = queue.Queue(maxsize=depth)
    warped: queue.Queue = queue.Queue(maxsize=depth)
    errors: list = []
    total = warper.total
    container = getattr(source, "container", None)
    copy = container is not None and hasattr(sink, "copy_packet")

    def decode_stage():
        t = time.perf_counter()
        try:
            for kind, item in source.demux(copy_streams=copy):
                if stop.is_set():
                    return
                if kind == "frame":
                    times.decode += time.perf_counter() - t
                    warper.observe(item)  # tracking, for a streaming warper
                decoded.put((kind, item))
                t = time.perf_counter()
        finally:
            warper.close()

    def warp_stage():
        waiting: deque = deque()  # the look-ahead: frames decoded but not yet mappable
        observed, finished = 0, False
        limit = warper.lookahead_limit

        def take(item) -> None:
            nonlocal observed, finished
            if item is _END:
                finished = True
                return
            kind, obj = item
            if kind == "packet":
                warped.put(("packet", obj, None, None))
            elif warper.accepts(obj.index):
                waiting.append(obj)
                observed = obj.index + 1

        while not stop.is_set():
            # take in whatever the decoder has ready, so that it keeps decoding (and the next
            # window's tracks keep coming) while this window's frames are remapped and encoded
            while not finished and (limit is None or len(waiting) < limit):
                try:
                    take(decoded.get_nowait())
                except queue.Empty:
                    break
            # a full look-ahead waits for the fit (bounded memory) instead of decoding on;
            # once the input has ended, every waiting frame waits for its fit
            full = limit is not None and len(waiting) >= limit
            if waiting and warper.mappable(waiting[0].index, observed, finished or full):
                frame = waiting.popleft()
                t = time.perf_counter()
                planes, wm = warper.apply(frame.index, frame.planes, frame.subsampling)
                warper.release_before(frame.index)
                times.remap += time.perf_counter() - t
                warped.put(("frame", frame, planes, wm))
                continue
            if finished:
                return
            take(decoded.get())  # nothing to map yet: wait for the decoder

    with source:
        t_dec = _run_thread(decode_stage, decoded, errors, "skewfix-decode")
        t_warp = _run_thread(warp_stage, warped, errors, "skewfix-warp")
        written = 0
        try:
            while True:
                item = warped.get()
                if item is _END:
                    break
                kind, obj, planes, wm = item
                t = time.perf_counter()
                if kind == "packet":
                    sink.copy_packet(obj)
                    continue
                sink.write_planes(planes, obj.pts, obj.pix_fmt)  # opens a deferred sink: before on_frame
                if on_frame is not None:
                    on_frame(obj, wm, planes)
                pool.give(*obj.planes)  # the encoder has copied them: free for reuse
                if planes is not obj.planes:
                    pool.give(*planes)
                times.encode += time.perf_counter() - t
                written += 1
                progress("render", written, total)
        finally:
            stop.set()
            for q in (decoded, warped):  # unblock producers
                try:
                    while True:
                        q.get_nowait()
                except queue.Empty:
                    pass
            t_dec.join(timeout=5)
            t_warp.join(timeout=5)
        if report is not None:
            report["lost_frames"] = getattr(source, "lost_frames", 0)
            report["decode_errors"] = list(getattr(source, "decode_errors", []))
    if errors:
        exc = errors[0]
        if isinstance(exc, Exception):
            raise exc
        raise RuntimeProblem(f"{path}: interrupted")
    return written


@dataclass
class FixOptions:
    """Everything `fix_clip` needs beyond the two paths."""

    readout: float = 0.0
    readout_origin: str = "given"
    line_order: str = "top-down"
    reference_line: str = "middle"
    border: str = "edge"
    codec: str | None = None
    crf: int | None = None
    preset: str | None = None
    force: bool = False
    fps: Fraction | None = None
    fit: FitSettings = field(default_factory=FitSettings)
    tracker: TrackerSettings = field(default_factory=TrackerSettings)
    threads: int | None = None
    interpolation: str = "cubic"
    model: str = "auto"  # "auto", "similarity" or "rotation" (`skewfix.models.choice`)
    lens: LensSpec = field(default_factory=LensSpec)
    frames: object = None  # a `skewfix.framerange.FrameRange`: correct (and write) only those frames


@dataclass
class FixResult:
    output: str
    info: VideoInfo
    readout: float
    readout_origin: str
    line_order: str
    clock: RowClock
    model: MotionModel
    frames_written: int
    notes: list[str]
    times: StageTimes
    analysis: Analysis


def fix_clip(input_path: str, output_path: str, options: FixOptions, progress: Progress = _quiet,
             on_frame=None, readout_resolver=None, sink_factory=None) -> FixResult:
    """Remove the rolling shutter from INPUT and write OUTPUT whole (or not at all).

    ``readout_resolver(analysis, kind) -> (readout_s, line_order, origin)`` lets the
    caller measure the readout from the analysis (``--readout auto``) with the
    motion model chosen for the clip.
    """
    from skewfix.encode import check_output_path
    from skewfix.memory import limit_malloc_arenas

    limit_malloc_arenas()
    check_output_path(input_path, output_path, options.force)
    # opened once: probed here (refusing early, before any decoding), then streamed by the render
    source = open_source(input_path, options.fps, options.frames)
    with opencv_threads(opencv_threads_for_render()):
        try:
            return _fix_source(source, input_path, output_path, options, progress, on_frame, readout_resolver,
                               sink_factory)
        finally:
            source.close()


def opencv_threads_for_render(cores: int | None = None) -> int:
    """OpenCV's own worker threads while rendering: half the cores, at least one.

    The render already runs decoding, fitting, warping and encoding on threads
    of their own, and the encoder takes every core it is given; OpenCV's idle
    workers spin while they wait. On two cores, one OpenCV thread measured
    about 0.4 s less CPU per 60 frames of 1080p at the same speed
    (`scripts/bench_speed.py`, DEVELOPERS.md).
    """
    cores = cores or os.cpu_count() or 1
    return max(1, cores // 2)


@contextmanager
def opencv_threads(count: int):
    """Set OpenCV's thread count for a block, then put the caller's back."""
    import cv2

    before = cv2.getNumThreads()
    cv2.setNumThreads(count)
    try:
        yield
    finally:
        cv2.setNumThreads(before)


def _fix_source(source, input_path, output_path, options: FixOptions, progress, on_frame, readout_resolver,
                sink_factory) -> FixResult:
    from skewfix.encode import DeferredSink, VideoSink

    probe_info = source.info
    if progress is not None and readout_resolver is not None and hasattr(readout_resolver, "progress"):
        readout_resolver.progress = progress  # a readout measured here shows its search too
    if readout_resolver is None:
        try:
            check_readout_fits(options.readout, probe_info.frame_interval)
        except UsageProblem as exc:
            raise UsageProblem(f"{input_path}: {exc}") from None
    times = StageTimes()
    notes: list[str] = []
    settings = RenderSettings(options.reference_line, options.border, interpolation=options.interpolation)
    readout, line_order, origin = options.readout, options.line_order, options.readout_origin
    whole_clip = readout_resolver is not None or options.border == "crop"
    if whole_clip:
        # --readout auto and --border crop need the whole clip's motion first: analyse, then render
        analysis = analyse(input_path, options.fps, options.tracker, progress, times, options.frames)
        readout, line_order, resolved, choice = choose_with_readout(
            analysis, options.model, options.lens, readout, line_order, readout_resolver, options.fit)
        origin = resolved or origin
        clock, model = solve(analysis, readout, line_order, options.fit, times, choice)
        warper = FrameWarper(model, clock, settings, analysis.info)
        info = analysis.info
        if warper.zoom > 1.0:
            notes.append(f"crop border: the picture is enlarged {warper.zoom:.3f}x to hide missing edges")
    else:
        info = probe_info
        warper = StreamingWarper(info, readout, line_order, settings, options.fit, options.tracker, times=times,
                                 model_request=options.model, lens=options.lens)
        analysis = None
    report: dict = {}
    template = getattr(source, "container", None)  # the input's other streams are copied from it

    def open_output():
        # called with the first corrected picture: the first frame has told the rotation by then
        with source.io_lock:  # the decoding thread may be demuxing the template
            if sink_factory is not None:
                return sink_factory(info, template)
            return VideoSink(output_path, info, codec=options.codec, crf=options.crf, preset=options.preset,
                             source_container=template, threads=options.threads)

    sink = DeferredSink(open_output)
    try:
        written = render(input_path, sink, warper, options.fps, progress, times, on_frame, report=report,
                         source=source)
        if analysis is not None and written != analysis.n_frames:
            raise RuntimeProblem(f"{input_path}: the second pass decoded {written} frames, the first "
                                 f"{analysis.n_frames}; the file may be changing; nothing was written")
        if written == 0:
            raise InputError(f"{input_path}: no frame could be decoded")
        sink.finish()
        notes.extend(sink.notes)
    except BaseException:
        sink.abort()
        warper.cancel()  # ends a streaming warper's fitting thread before anything else happens
        raise
    if analysis is None:
        clock, model = warper.whole_model()
        analysis = Analysis(info, clock.frame_times, warper.pts, [], report.get("lost_frames", 0),
                            report.get("decode_errors", []))
    lost, errors = report.get("lost_frames", 0), report.get("decode_errors", [])
    if lost or errors:
        notes.append(f"{lost} frame(s) of the input lost (damaged file): " + "; ".join(errors[:3]))
    notes.append(f"motion model: {model.kind.summary()}" + (f" ({model.model_reason})" if model.model_reason else ""))
    notes.extend(model.warnings)
    order_note = line_order_note(analysis.pairs, clock, info.width, replace(options.fit or FitSettings(), kind=model.kind)) \
        if whole_clip else getattr(warper, "line_order_note", None)
    order_note = None if order_note is NOT_CHECKED else order_note
    notes.extend([order_note] if order_note else [])  # the line order doubted by the clip's motion
    if model.cuts:
        notes.append(f"{len(model.cuts)} cut(s) found after frame(s) {', '.join(map(str, model.cuts[:10]))}; "
                     "each shot was fitted on its own")
        if longest_run(model.cuts) >= 3:
            notes.append("cuts on three or more frames in a row: a picture that moves by half a frame or more "
                         "between frames looks like a cut to the tracker, and such frames are left uncorrected; "
                         "check the clip")
    if model.unmeasured_pairs:
        ks = model.unmeasured_pairs
        notes.append(f"no motion could be measured between {len(ks)} frame pair(s) "
                     f"(first after frame {ks[0]}); bridged smoothly")
    return FixResult(str(output_path), info, readout, origin, line_order, clock, model,
                     written, notes, times, analysis)
