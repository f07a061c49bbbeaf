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
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path
from typing import Iterator

import numpy as np

from skewfix.errors import InputError

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

    @property
    def frame_interval(self) -> float | None:
        return float(1 / self.rate) if self.rate else None


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


def frame_planes(frame) -> tuple[list[np.ndarray], list[tuple[int, int]]]:
    """Numpy arrays (copies) of each plane of an `av.VideoFrame` at native depth."""
    planes, subs = [], []
    for plane, (ch, nbytes, _bits) in zip(frame.planes, plane_layout(frame.format)):
        dtype = np.uint16 if nbytes == 2 else np.uint8
        row = plane.line_size // nbytes
        arr = np.frombuffer(plane, dtype=dtype).reshape(plane.height, row)
        arr = arr[:, : plane.width * ch]
        if ch > 1:
            arr = arr.reshape(plane.height, plane.width, ch)
        planes.append(np.array(arr))
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


class VideoSource:
    """A clip opened for streaming; iterate `frames()` (and `packets` for copy)."""

    def __init__(self, path: str | os.PathLike):
        import av

        self.path = str(path)
        _check_file(self.path)
        try:
            self._container = av.open(self.path, "r")
        except Exception as exc:  # av.error.* subclasses differ across versions
            raise InputError(f"{self.path}: not a readable video file ({_short(exc)})") from None
        videos = [s for s in self._container.streams if s.type == "video" and s.codec_context is not None]
        if not videos:
            self._container.close()
            audio = any(s.type == "audio" for s in self._container.streams)
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
        )
        self.lost_frames = 0
        self.decode_errors: list[str] = []

    @property
    def container(self):
        return self._container

    def close(self) -> None:
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

        Decode errors in single packets are counted (``lost_frames``) and skipped,
        so a truncated or partly corrupt file yields every decodable frame.
        """
        import av

        self.stream.thread_type = "AUTO"
        streams = list(self._container.streams) if copy_streams else [self.stream]
        index = 0
        t0 = None
        tb = self.stream.time_base
        try:
            packets = self._container.demux(*streams)
            while True:
                try:
                    packet = next(packets)
                except StopIteration:
                    break
                except av.error.FFmpegError as exc:
                    self.decode_errors.append(f"demux stopped after frame {index}: {_short(exc)}")
                    break
                if packet.stream.index != self.stream.index:
                    if packet.dts is not None:
                        yield "packet", packet
                    continue
                try:
                    frames = packet.decode()
                except av.error.FFmpegError as exc:
                    self.lost_frames += 1
                    self.decode_errors.append(f"undecodable packet near frame {index}: {_short(exc)}")
                    continue
                for frame in frames:
                    yield "frame", self._wrap(frame, index, tb, t0)
                    if t0 is None:
                        t0 = self._pts_time(frame, tb)
                    index += 1
        finally:
            pass

    @staticmethod
    def _pts_time(frame, tb):
        pts = frame.pts if frame.pts is not None else frame.dts
        return None if pts is None else Fraction(pts) * Fraction(tb)

    def _wrap(self, frame, index, tb, t0) -> DecodedFrame:
        t = self._pts_time(frame, tb)
        if t is None:
            rate = self.info.rate or Fraction(25)
            t = Fraction(index) / rate
        start = t0 if t0 is not None else t
        frame = self._convert(frame)
        planes, subs = frame_planes(frame)
        depth = max((c.bits for c in frame.format.components), default=8)
        return DecodedFrame(index, float(t - start), frame.pts, planes, subs, depth, self.info.is_rgb, frame.format.name)

    def frames(self) -> Iterator[DecodedFrame]:
        for kind, item in self.demux(copy_streams=False):
            if kind == "frame":
                yield item


def _short(exc: Exception) -> str:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return text[:160]


def open_source(path: str | os.PathLike, fps: Fraction | None = None):
    """Open a clip or a numbered image sequence (``name.%04d.ext``)."""
    text = str(path)
    if "%" in Path(text).name or "#" in Path(text).name:
        from skewfix.sequence import ImageSequenceSource

        return ImageSequenceSource(text, fps)
    return VideoSource(text)
