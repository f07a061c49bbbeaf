"""Stream decoded frames as planes at their own size and bit depth.

`open_video` reads a clip with PyAV (FFmpeg) and yields `DecodedFrame`s whose
``planes`` are numpy views of the decoder's planes (luma full size, chroma
subsampled, uint16 for >8-bit formats), so no colour conversion happens.
Packets of other streams (audio, data) are passed through in file order so
the encoder can copy them. Image sequences are handled by
`skewfix.sequence` behind the same `FrameSource` interface.
"""

from __future__ import annotations

import os
import threading
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Iterator

import numpy as np

from skewfix.errors import InputError, plain_media_error

# Packed formats that cannot be remapped plane by plane are converted to these.
_PLANAR_FALLBACK = {8: "yuv420p", 10: "yuv420p10le", 12: "yuv420p12le", 16: "yuv420p16le"}


@dataclass
class VideoInfo:
    """What the encoder needs to write a matching output."""

    path: str
    width: int
    height: int
    pix_fmt: str
    bit_depth: int
    codec: str
    profile: str | None
    rate: Fraction | None
    time_base: Fraction
    frame_count: int | None
    duration_s: float | None
    rotation: int = 0
    color: dict = field(default_factory=dict)
    container: str = ""
    other_streams: int = 0
    has_audio: bool = False
    is_sequence: bool = False
    first_number: int | None = None
    is_rgb: bool = False
    start_timecode: str | None = None  # the clip's own timecode of its first frame, if it carries one
    first_index: int = 0  # with --frames: where the first frame delivered sits in the whole clip

    @property
    def frame_interval(self) -> float | None:
        return float(1 / self.rate) if self.rate else None


def black_levels(info: VideoInfo, n_planes: int) -> list[float]:
    """The value of black in each plane: 0 in RGB; in Y'CbCr, luma 0 (full range) or 16 (limited
    range) and chroma at its middle, 128, both scaled by 2^(bits-8) (ITU-R BT.601-7, BT.709-6
    section 4)."""
    top = (1 << info.bit_depth) - 1
    if info.is_rgb:
        return [0.0] * n_planes
    full = str(info.color.get("color_range")) in ("2", "JPEG", "ColorRange.JPEG") or info.pix_fmt.startswith("yuvj")
    shift = info.bit_depth - 8
    luma = 0.0 if full else float(16 << shift)
    mid = float(128 << shift) if shift >= 0 else top / 2.0
    return [luma] + [mid] * (n_planes - 1)


@dataclass
class DecodedFrame:
    """One frame: planes at native depth, its index, time (s) and raw pts."""

    index: int
    time: float
    pts: int | None
    planes: list[np.ndarray]
    subsampling: list[tuple[int, int]]
    bit_depth: int
    is_rgb: bool = False
    pix_fmt: str = "yuv420p"

    @property
    def luma(self) -> np.ndarray:
        """The plane the tracker looks at: Y, or a grey mix for RGB images."""
        if self.is_rgb:
            import cv2

            img = self.planes[0]
            if img.ndim == 3 and img.shape[2] >= 3:
                return cv2.cvtColor(img[..., :3], cv2.COLOR_RGB2GRAY)
            return img
        return self.planes[0]


def _check_file(path: str) -> None:
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a folder, not a clip (for stills use a numbered pattern like plate.%04d.tif)")
    if os.path.getsize(path) == 0:
        raise InputError(f"{path}: the file is empty")


def plane_layout(fmt) -> list[tuple[int, int, int]]:
    """Per plane: (channels, bytes per sample, bits) for a PyAV VideoFormat."""
    layout = {}
    for comp in fmt.components:
        ch, _, bits = layout.get(comp.plane, (0, 1, 0))
        layout[comp.plane] = (ch + 1, 2 if comp.bits > 8 else 1, max(bits, comp.bits))
    return [layout[i] for i in sorted(layout)]


def frame_planes(frame, pool=None) -> tuple[list[np.ndarray], list[tuple[int, int]]]:
    """Numpy arrays (copies) of each plane of an `av.VideoFrame` at native depth.

    With a `skewfix.buffers.PlanePool` the copies go into reused buffers.
    """
    planes, subs = [], []
    for plane, (ch, nbytes, _bits) in zip(frame.planes, plane_layout(frame.format)):
        dtype = np.uint16 if nbytes == 2 else np.uint8
        row = plane.line_size // nbytes
        arr = np.frombuffer(plane, dtype=dtype).reshape(plane.height, row)
        arr = arr[:, : plane.width * ch]
        if ch > 1:
            arr = arr.reshape(plane.height, plane.width, ch)
        if pool is None:
            planes.append(np.array(arr))
        else:
            copy = pool.take(arr.shape, arr.dtype)
            np.copyto(copy, arr)
            planes.append(copy)
        subs.append((max(1, round(frame.width / plane.width)), max(1, round(frame.height / plane.height))))
    return planes, subs


def _is_remappable(fmt) -> bool:
    """True when every plane stores whole samples (no packed YUYV or bit-packed)."""
    try:
        layout = plane_layout(fmt)
    except Exception:
        return False
    if fmt.name.startswith(("yuyv", "uyvy", "yvyu", "v210", "bayer", "pal8", "monob", "monow")):
        return False
    return len(layout) == len({c.plane for c in fmt.components}) and all(ch <= 4 for ch, _, _ in layout)


def _rotation_of(stream) -> int:
    """Display rotation in degrees from the stream's display matrix, if any."""
    for key in ("rotate",):
        if key in stream.metadata:
            try:
                return int(float(stream.metadata[key])) % 360
            except ValueError:
                pass
    return 0


def _start_timecode(container, stream) -> str | None:
    """The clip's timecode of its first frame (``timecode`` tag of the video, the file or a timecode track)."""
    for tags in [stream.metadata, container.metadata] + [s.metadata for s in container.streams]:
        for key, value in tags.items():
            if key.lower() == "timecode" and value:  # Matroska spells it TIMECODE
                return str(value).strip()
    return None


class VideoSource:
    """A clip opened for streaming; iterate `frames()` (and `packets` for copy).

    With ``frames`` (a `skewfix.framerange.FrameRange`) only those frames are
    delivered: numbered from 0, timed and timestamped from the first of them,
    with the other streams' packets of the same stretch of time, retimed
    alike; ``info`` then describes that part (``frame_count``, ``first_index``).
    """

    def __init__(self, path: str | os.PathLike, frames=None):
        import av

        self.path = str(path)
        _check_file(self.path)
        try:
            self._container = av.open(self.path, "r")
        except Exception as exc:  # av.error.* subclasses differ across versions
            if _mp4_index_missing(self.path):
                raise InputError(f"{self.path}: an MP4/MOV file without its index (moov box), which is written "
                                 "last: the file was probably cut short (copied only in part?); copy it again "
                                 "from the card") from None
            raise InputError(f"{self.path}: not a readable video file: {_short(exc)}") from None
        videos = [s for s in self._container.streams if s.type == "video" and s.codec_context is not None]
        if not videos:
            audio = any(s.type == "audio" for s in self._container.streams)  # before close() empties it
            self._container.close()
            what = "holds audio but no video" if audio else "holds no video stream"
            raise InputError(f"{self.path}: {what}")
        self.stream = videos[0]
        cc = self.stream.codec_context
        if not cc.width or not cc.height:
            self._container.close()
            raise InputError(f"{self.path}: the video stream has no picture size (damaged or not a video)")
        fmt = cc.format
        bit_depth = max((c.bits for c in fmt.components), default=8) if fmt else 8
        others = [s for s in self._container.streams if s.index != self.stream.index]
        rate = self.stream.average_rate or self.stream.guessed_rate
        duration = None
        if self.stream.duration is not None and self.stream.time_base:
            duration = float(self.stream.duration * self.stream.time_base)
        elif self._container.duration:
            duration = self._container.duration / 1e6
        self.info = VideoInfo(
            path=self.path,
            width=cc.width,
            height=cc.height,
            pix_fmt=fmt.name if fmt else "yuv420p",
            bit_depth=bit_depth,
            codec=cc.name,
            profile=cc.profile,
            rate=Fraction(rate) if rate else None,
            time_base=Fraction(self.stream.time_base) if self.stream.time_base else Fraction(1, 90000),
            frame_count=self.stream.frames or None,
            duration_s=duration,
            rotation=_rotation_of(self.stream),
            color={
                "color_range": cc.color_range,
                "colorspace": cc.colorspace,
                "color_primaries": cc.color_primaries,
                "color_trc": cc.color_trc,
            },
            container=self._container.format.name,
            other_streams=len(others),
            has_audio=any(s.type == "audio" for s in others),
            is_rgb=bool(fmt and (fmt.is_rgb if hasattr(fmt, "is_rgb") else fmt.name.startswith(("rgb", "bgr", "gbr")))),
            start_timecode=_start_timecode(self._container, self.stream),
        )
        self._listed_frames = self.info.frame_count
        self.span = None  # (first, last) positions in the clip with --frames; last None: to the end
        if frames is not None:
            try:
                self.span = frames.resolve(self.info, self.info.frame_count)
            except BaseException:
                self._container.close()
                raise
            self.frame_range = frames
            first, last = self.span
            self.info.first_index = first
            if last is not None:
                self.info.frame_count = last - first + 1
                self.info.duration_s = float(self.info.frame_count / self.info.rate) if self.info.rate else None
        self.lost_frames = 0
        self.decode_errors: list[str] = []
        # demux() may run on another thread: close() waits for the FFmpeg call in
        # flight, so a Ctrl-C on the main thread never frees the demuxer under it;
        # another thread that reads the container (a sink copying its streams) takes it too
        self.io_lock = threading.Lock()
        self._closed = False
        self.pool = None  # a PlanePool for the decoded planes (set by the render loop)

    @property
    def container(self):
        return self._container

    def close(self) -> None:
        with self.io_lock:
            self._closed = True
            self._container.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _convert(self, frame):
        if not _is_remappable(frame.format):
            depth = max((c.bits for c in frame.format.components), default=8)
            target = _PLANAR_FALLBACK.get(depth, "yuv420p16le" if depth > 8 else "yuv420p")
            frame = frame.reformat(format=target)
        return frame

    def demux(self, copy_streams: bool = False) -> Iterator[tuple[str, object]]:
        """Yield ("frame", DecodedFrame) and, if ``copy_streams``, ("packet", av.Packet).

        Decode errors in single packets are skipped, so a truncated or partly
        corrupt file yields every decodable frame; once the whole file has been
        read, ``lost_frames`` counts the frames it promised but did not deliver
        and ``decode_errors`` says where they went missing (`FrameLossCounter`).
        With a frame range, frames before it are decoded but not delivered, and
        reading stops once the other streams have caught up with its last frame.
        """
        import av

        # Slice threads only: FFmpeg's frame threads drop the frames decoded just
        # before a damaged packet and swallow its error, so losses would go unseen.
        self.stream.thread_type = "SLICE"
        streams = list(self._container.streams) if copy_streams else [self.stream]
        copy_streams = len(streams) > 1  # other streams to copy: read on after a range's last frame
        first, last = self.span or (0, None)
        index = 0  # position in the whole clip of the next decoded frame
        tb = self.stream.time_base
        window = _PacketWindow(self.info.frame_interval, self.span is not None)
        losses = FrameLossCounter(self.info.frame_interval, self._listed_frames, *self._end_time())
        packets = self._container.demux(*streams)
        first_error = ""
        while True:
            with self.io_lock:
                if self._closed:
                    return
                try:
                    packet = next(packets)
                except StopIteration:
                    break
                except av.error.FFmpegError as exc:
                    self.decode_errors.append(f"reading stopped after frame {index}: {_short(exc)}")
                    break
            if packet.stream.index != self.stream.index:
                if packet.dts is not None:
                    kept = window.take(packet)
                    yield from (("packet", p) for p in kept)
                    if window.done:
                        break
                continue
            if window.video_done:
                continue
            if packet.size:
                losses.packets += 1
            with self.io_lock:
                if self._closed:
                    return
                try:
                    frames = packet.decode()
                except av.error.FFmpegError as exc:
                    losses.failed += 1
                    if losses.failed == 1:
                        first_error = f"first decoder error near frame {index}: {_short(exc)}"
                    continue
            for frame in frames:
                if index == 0:
                    # display rotation lives in the frame's side data (display matrix);
                    # rows stay in the *stored* orientation, where the sensor read them
                    self.info.rotation = int(getattr(frame, "rotation", 0) or 0) % 360 or self.info.rotation
                pts_time = self._pts_time(frame, tb)
                losses.frame(None if pts_time is None else float(pts_time))
                index += 1
                if index - 1 < first:
                    window.passed(pts_time)
                    continue
                if last is not None and index - 1 > last:
                    continue
                if window.start is None:
                    window.begin(pts_time, frame.pts)
                    yield from (("packet", p) for p in window.held())
                yield "frame", self._wrap(frame, index - 1 - first, tb, window)
                if last is not None and index - 1 == last:
                    window.end(pts_time)
            if window.done or (window.video_done and not copy_streams):
                break
        if self.span is not None and (index <= (last if last is not None else first)):
            from skewfix.framerange import past_the_end

            raise InputError(past_the_end(self.info, index, self.frame_range, last if last is not None else first))
        self.lost_frames, where = losses.report(complete=not window.video_done)
        self.decode_errors[:0] = where + ([first_error] if losses.failed else [])

    def _end_time(self) -> tuple[float | None, bool]:
        """When the file says the picture ends (seconds) and whether that is the video's own figure."""
        stream, container = self.stream, self._container
        if stream.duration is not None and stream.time_base:
            return float((Fraction(stream.start_time or 0) + stream.duration) * Fraction(stream.time_base)), True
        if container.duration:
            return ((container.start_time or 0) + container.duration) / 1e6, False
        return None, False

    @staticmethod
    def _pts_time(frame, tb):
        pts = frame.pts if frame.pts is not None else frame.dts
        return None if pts is None else Fraction(pts) * Fraction(tb)

    def _wrap(self, frame, index, tb, window: "_PacketWindow") -> DecodedFrame:
        t = self._pts_time(frame, tb)
        if t is None:
            rate = self.info.rate or Fraction(25)
            t = Fraction(index) / rate
        start = window.start if window.start is not None else t
        pts = frame.pts
        if self.span is not None and pts is not None and window.start_pts is not None:
            pts -= window.start_pts  # a part of the clip starts at 0, as a clip of its own
        frame = self._convert(frame)
        planes, subs = frame_planes(frame, self.pool)
        depth = max((c.bits for c in frame.format.components), default=8)
        return DecodedFrame(index, float(t - start), pts, planes, subs, depth, self.info.is_rgb, frame.format.name)

    def frames(self) -> Iterator[DecodedFrame]:
        for kind, item in self.demux(copy_streams=False):
            if kind == "frame":
                yield item


class _PacketWindow:
    """Which packets of the other streams (audio, data) go with the frames delivered.

    For a whole clip: all of them, as they come. For a frame range: those whose
    time falls from the first delivered frame's time up to one frame interval
    after the last one's, moved earlier by the first frame's time (so sound and
    picture keep in step); packets read before the first frame is known wait
    in ``pending`` (only those not already earlier than a skipped frame).
    Reading ends (``done``) with the first packet of another stream past the end.
    """

    def __init__(self, interval: float | None, ranged: bool):
        self.interval, self.ranged = interval or 0.0, ranged
        self.start = None  # time (Fraction s) of the first delivered frame
        self.start_pts = None
        self.stop = None  # end of the delivered stretch (s), once the last frame is known
        self.video_done = False
        self.done = False
        self.pending: list = []

    @staticmethod
    def _time(packet):
        ts = packet.pts if packet.pts is not None else packet.dts
        return None if ts is None or not packet.time_base else Fraction(ts) * Fraction(packet.time_base)

    def passed(self, time) -> None:
        """A frame before the range was decoded at ``time``: earlier packets can go."""
        if time is None:
            return
        self.pending = [p for p in self.pending if (self._time(p) or 0) + self._duration(p) >= time]

    @staticmethod
    def _duration(packet):
        return Fraction(packet.duration or 0) * Fraction(packet.time_base or 0)

    def begin(self, time, pts) -> None:
        self.start = time if time is not None else Fraction(0)
        self.start_pts = pts

    def end(self, time) -> None:
        self.video_done = True
        self.stop = (time if time is not None else Fraction(0)) + Fraction(self.interval)

    def _shifted(self, packet):
        """The packet moved to the part's own time line, or None when it falls outside it."""
        t = self._time(packet)
        if t is None or t < self.start or (self.stop is not None and t >= self.stop):
            return None
        offset = round(self.start / Fraction(packet.time_base))
        if packet.pts is not None:
            packet.pts -= offset
        if packet.dts is not None:
            packet.dts -= offset
        return packet

    def take(self, packet) -> list:
        """The packets to pass on now (none, this one, or none until the range begins)."""
        if not self.ranged:
            return [packet]
        if self.start is None:
            self.pending.append(packet)
            return []
        if self.stop is not None:
            t = self._time(packet)
            if t is not None and t >= self.stop:
                self.done = True
        kept = self._shifted(packet)
        return [kept] if kept is not None else []

    def held(self) -> list:
        """Once the first frame is known: the waiting packets that belong to the part."""
        pending, self.pending = self.pending, []
        return [p for p in (self._shifted(p) for p in pending) if p is not None]


def _mp4_index_missing(path: str) -> bool:
    """True for an ISO media file (MP4/MOV) whose top-level boxes hold data but no ``moov`` (ISO/IEC 14496-12)."""
    seen = set()
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        offset = 0
        while offset + 8 <= size:
            fh.seek(offset)
            header = fh.read(16)
            length, kind = int.from_bytes(header[:4], "big"), header[4:8]
            if length == 1 and len(header) == 16:
                length = int.from_bytes(header[8:16], "big")
            if not kind.isalnum():  # not a box header: not an ISO media file
                break
            seen.add(kind)
            if length < 8:
                break
            offset += length
    return b"ftyp" in seen and b"mdat" in seen and b"moov" not in seen


class FrameLossCounter:
    """Counts the frames a damaged file promised but did not deliver, and says where.

    Evidence of loss is a packet that failed to decode or gave no picture, fewer
    frames than the file's own frame count, or a picture that stops well before
    the file's stated end. Only with such evidence are gaps in the timestamps
    (over 1.5 frame intervals) reported as places where frames went missing, so
    a variable frame rate on its own never reads as damage.
    """

    CONTAINER_SLACK_S = 0.5  # audio may outlast the picture when only the file's duration is known

    def __init__(self, interval: float | None, listed: int | None, end: float | None, end_is_video: bool):
        self.interval, self.listed, self.end, self.end_is_video = interval, listed, end, end_is_video
        self.packets = self.failed = self.frames = 0
        self.first = self.last = None
        self.gaps: list[tuple[int, float, int]] = []  # (frame before the gap, its time, frames missing)

    def frame(self, time: float | None) -> None:
        if time is not None:
            step = None if self.last is None else time - self.last
            if step is not None and self.interval and step > 1.5 * self.interval:
                self.gaps.append((self.frames - 1, self.last - self.first, round(step / self.interval) - 1))
            self.first = time if self.first is None else self.first
            self.last = time
        self.frames += 1

    def _missing_at_end(self, in_gaps: int) -> int:
        if self.listed:
            return max(self.listed - self.frames - in_gaps, 0)
        if self.end is None or self.last is None or not self.interval:
            return 0
        uncovered = self.end - self.last
        if not self.end_is_video and uncovered < self.CONTAINER_SLACK_S:
            return 0
        return max(round(uncovered / self.interval) - 1, 0)

    def report(self, complete: bool = True) -> tuple[int, list[str]]:
        """(frames lost, one line per place they went missing). ``complete``: the file was read
        to its end (reading that stopped early, after a frame range, can only see gaps and
        packets that failed)."""
        if not self.frames:
            return 0, []
        in_gaps = sum(n for _, _, n in self.gaps)
        at_end = self._missing_at_end(in_gaps) if complete else 0
        undelivered = max(self.packets - self.frames, self.failed) if complete else self.failed
        if not (undelivered or at_end or (self.listed and self.listed > self.frames)):
            return 0, []
        where = [f"{n} frame(s) missing after frame {k} ({t:.3f} s)" for k, t, n in self.gaps]
        if at_end:
            told = f"of the {self.listed} the file lists" if self.listed else \
                f"but the file runs to {self.end - self.first:.3f} s"
            where.append(f"{at_end} frame(s) missing at the end: the picture stops after frame {self.frames - 1} "
                         f"({self.last - self.first:.3f} s) {told} (a truncated file?)")
        lost = max(in_gaps + at_end, undelivered)
        if lost > in_gaps + at_end:
            where.append(f"{lost - in_gaps - at_end} packet(s) gave no picture")
        return lost, where


def _short(exc: Exception) -> str:
    """A decoder's error in plain words (`skewfix.errors.plain_media_error`)."""
    return plain_media_error(exc)


def open_source(path: str | os.PathLike, fps: Fraction | None = None, frames=None):
    """Open a clip or a numbered image sequence (``name.%04d.ext``); with ``frames`` (a
    `skewfix.framerange.FrameRange`) only that part of it."""
    from skewfix.sequence import ImageSequenceSource, is_pattern

    text = str(path)
    if is_pattern(text):
        return ImageSequenceSource(text, fps, frames)
    return VideoSource(text, frames)
