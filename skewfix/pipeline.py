"""The correction job: decode -> proxy -> track -> fit -> maps -> remap planes -> encode.

Two streaming passes over the input, neither holding the clip in memory:

* **analysis** decodes each frame, reduces its luma to a proxy and tracks it
  against the previous one, keeping only the tracks (a few kB per frame);
* the motion is fitted for each shot with the row clock;
* **render** decodes again on one thread, remaps the planes on a second and
  encodes and muxes on the calling thread, joined by small bounded queues
  (FFmpeg and OpenCV release the GIL, so the stages overlap).
"""

from __future__ import annotations

import queue
import threading
import time
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Callable

import cv2
import numpy as np

from skewfix.decode import VideoInfo, open_source
from skewfix.errors import InputError, RuntimeProblem
from skewfix.motion import FitSettings, MotionModel, PairObservations, fit_motion
from skewfix.rowclock import RowClock
from skewfix.track import PairTracker, TrackerSettings
from skewfix.warp import WarpMap, correction_map, crop_zoom, outside_matte, remap_plane, reskew_map

Progress = Callable[[str, int, "int | None"], None]


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


def expected_frames(info: VideoInfo) -> int | None:
    if info.frame_count:
        return info.frame_count
    if info.duration_s and info.rate:
        return int(round(info.duration_s * float(info.rate)))
    return None


def analyse(path: str, fps: Fraction | None = None, tracker: TrackerSettings | None = None,
            progress: Progress = _quiet, times: StageTimes | None = None) -> Analysis:
    """Decode the clip once, tracking global motion between consecutive frames."""
    times = times or StageTimes()
    source = open_source(path, fps)
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
    return Analysis(info, np.asarray(frame_times), pts, pairs, lost, errors)


def solve(analysis: Analysis, readout: float, line_order: str = "top-down",
          settings: FitSettings | None = None, times: StageTimes | None = None) -> tuple[RowClock, MotionModel]:
    """Fit the motion curves for the given readout; returns the row clock and the model."""
    t0 = time.perf_counter()
    clock = RowClock(analysis.frame_times, analysis.info.height, readout, line_order)
    clock.check_readout_fits(analysis.info.frame_interval)
    model = fit_motion(analysis.pairs, clock, analysis.info.width, settings)
    if times is not None:
        times.fit += time.perf_counter() - t0
    return clock, model


def black_levels(info: VideoInfo, n_planes: int) -> list[float]:
    """The value of black in each plane (limited-range YUV unless tagged full)."""
    top = (1 << info.bit_depth) - 1
    if info.is_rgb:
        return [0.0] * n_planes
    full = str(info.color.get("color_range")) in ("2", "JPEG", "ColorRange.JPEG") or info.pix_fmt.startswith("yuvj")
    shift = info.bit_depth - 8
    luma = 0.0 if full else float(16 << shift)
    mid = float(128 << shift) if shift >= 0 else top / 2.0
    return [luma] + [mid] * (n_planes - 1)


@dataclass
class RenderSettings:
    reference_line: str = "middle"
    border: str = "edge"
    direction: str = "correct"  # or "reskew"
    queue_depth: int = 4


class FrameWarper:
    """Produces each frame's warp map and applies it to the planes."""

    def __init__(self, model: MotionModel, clock: RowClock, settings: RenderSettings, info: VideoInfo):
        self.model, self.clock, self.settings, self.info = model, clock, settings, info
        self.zoom = 1.0
        if settings.border == "crop" and settings.direction == "correct":
            maps = (self.map_for(k) for k in range(len(clock.frame_times)))
            self.zoom = crop_zoom(maps, info.width, info.height)

    def map_for(self, k: int) -> WarpMap:
        if self.settings.direction == "reskew":
            return reskew_map(self.model, self.clock, k, self.settings.reference_line)
        return correction_map(self.model, self.clock, k, self.settings.reference_line, zoom=self.zoom)

    def apply(self, k: int, planes, subsampling):
        wm = self.map_for(k)
        if wm.is_identity():
            return planes, wm
        fills = black_levels(self.info, len(planes))
        out = []
        for plane, sub, fill in zip(planes, subsampling, fills):
            h, w = plane.shape[:2]
            mx, my = wm.full(w, h, sub)
            channels = plane.shape[2] if plane.ndim == 3 else 1
            out.append(remap_plane(plane, mx, my, "black" if self.settings.border == "black" else "edge",
                                   (fill,) * channels if channels > 1 else fill))
        return out, wm


_END = object()


def _run_thread(target, out_q: queue.Queue, errors: list):
    def body():
        try:
            target()
        except BaseException as exc:  # noqa: BLE001 - handed to the main thread
            errors.append(exc)
        finally:
            out_q.put(_END)
    th = threading.Thread(target=body, daemon=True)
    th.start()
    return th


def render(path: str, sink, warper: FrameWarper, fps: Fraction | None = None, progress: Progress = _quiet,
           times: StageTimes | None = None, on_frame=None, stop: threading.Event | None = None) -> int:
    """Second pass: decode, warp and encode every frame; copies other streams.

    ``on_frame(k, warp_map, planes_out)`` is called for every frame (maps,
    mattes, reports). Returns the number of frames written.
    """
    times = times or StageTimes()
    stop = stop or threading.Event()
    source = open_source(path, fps)
    depth = warper.settings.queue_depth
    decoded: queue.Queue = queue.Queue(maxsize=depth)
    warped: queue.Queue = queue.Queue(maxsize=depth)
    errors: list = []
    total = len(warper.clock.frame_times)
    container = getattr(source, "container", None)
    copy = container is not None and hasattr(sink, "copy_packet")

    def decode_stage():
        t = time.perf_counter()
        for kind, item in source.demux(copy_streams=copy):
            if stop.is_set():
                return
            times.decode += time.perf_counter() - t
            decoded.put((kind, item))
            t = time.perf_counter()

    def warp_stage():
        while True:
            item = decoded.get()
            if item is _END:
                return
            kind, obj = item
            if kind == "frame":
                if obj.index >= total:
                    continue
                t = time.perf_counter()
                planes, wm = warper.apply(obj.index, obj.planes, obj.subsampling)
                times.remap += time.perf_counter() - t
                warped.put(("frame", obj, planes, wm))
            else:
                warped.put(("packet", obj, None, None))
            if stop.is_set():
                return

    with source:
        t_dec = _run_thread(decode_stage, decoded, errors)
        t_warp = _run_thread(warp_stage, warped, errors)
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
                if on_frame is not None:
                    on_frame(obj.index, wm, planes)
                sink.write_planes(planes, obj.pts, obj.pix_fmt)
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

    ``readout_resolver(analysis) -> (readout_s, line_order, origin)`` lets the
    caller measure the readout from the analysis (``--readout auto``).
    """
    from skewfix.encode import VideoSink, check_output_path

    check_output_path(input_path, output_path, options.force)
    with open_source(input_path, options.fps) as probe:  # refuse early, before any decoding
        interval = probe.info.frame_interval
        if readout_resolver is None and interval and options.readout > interval * (1 + 1e-9):
            RowClock(np.array([0.0, interval]), probe.info.height, options.readout).check_readout_fits(interval)
    times = StageTimes()
    analysis = analyse(input_path, options.fps, options.tracker, progress, times)
    notes: list[str] = []
    readout, line_order, origin = options.readout, options.line_order, options.readout_origin
    if readout_resolver is not None:
        readout, line_order, origin = readout_resolver(analysis)
    clock, model = solve(analysis, readout, line_order, options.fit, times)
    if analysis.lost_frames or analysis.decode_errors:
        notes.append(f"{analysis.lost_frames} damaged packet(s) skipped; "
                     + "; ".join(analysis.decode_errors[:3]))
    if model.cuts:
        notes.append(f"{len(model.cuts)} cut(s) found after frame(s) {', '.join(map(str, model.cuts[:10]))}; "
                     "each shot was fitted on its own")
    if model.unmeasured_pairs:
        ks = model.unmeasured_pairs
        notes.append(f"no motion could be measured between {len(ks)} frame pair(s) "
                     f"(first after frame {ks[0]}); bridged smoothly")
    warper = FrameWarper(model, clock, RenderSettings(options.reference_line, options.border), analysis.info)
    if warper.zoom > 1.0:
        notes.append(f"crop border: the picture is enlarged {warper.zoom:.3f}x to hide missing edges")
    if sink_factory is not None:
        sink = sink_factory(analysis.info)
    else:
        import av

        with av.open(input_path) as template:
            sink = VideoSink(output_path, analysis.info, codec=options.codec, crf=options.crf,
                             preset=options.preset, source_container=template, threads=options.threads)
    notes.extend(sink.notes)
    try:
        written = render(input_path, sink, warper, options.fps, progress, times, on_frame)
        if written != analysis.n_frames:
            raise RuntimeProblem(f"{input_path}: the second pass decoded {written} frames, the first "
                                 f"{analysis.n_frames}; the file may be changing; nothing was written")
        sink.finish()
    except BaseException:
        sink.abort()
        raise
    return FixResult(str(output_path), analysis.info, readout, origin, line_order, clock, model,
                     written, notes, times, analysis)
