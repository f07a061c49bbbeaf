"""Write corrected planes to a clip that matches the source.

`VideoSink` opens the output under a temporary name beside OUTPUT, encodes
frames built straight from remapped planes (same pixel format and depth as
the source where the encoder allows), copies the other streams packet for
packet, carries colour tags and timestamps over, and renames the file into
place only when everything has been written. `abort()` removes the partial
file; OUTPUT is never left half written.
"""

from __future__ import annotations

import os
from fractions import Fraction
from pathlib import Path

import numpy as np

from skewfix.decode import VideoInfo, plane_layout
from skewfix.errors import InputError, RuntimeProblem, UsageProblem, plain_media_error
from skewfix.files import make_folders, nearest_existing, partial_name, remove_folders

CODECS = {"h264": "libx264", "hevc": "libx265", "prores": "prores_ks", "ffv1": "ffv1"}
# source codec name -> encoder we use to match it
_MATCHING_ENCODER = {
    "h264": "libx264", "hevc": "libx265", "prores": "prores_ks", "ffv1": "ffv1",
    "mpeg4": "mpeg4", "mjpeg": "mjpeg", "vp9": "libvpx-vp9", "vp8": "libvpx", "av1": "libaom-av1",
    "png": "png", "rawvideo": "ffv1", "dnxhd": "dnxhd",
}
FALLBACK_ENCODER = "libx264"
_PRORES_PROFILES = {"proxy": "0", "lt": "1", "standard": "2", "hq": "3", "4444": "4", "4444 xq": "5", "4444xq": "5"}
DEFAULT_CRF = 16


def encoder_available(name: str) -> bool:
    import av

    try:
        av.codec.Codec(name, "w")
        return True
    except Exception:
        return False


def choose_encoder(info: VideoInfo, codec: str | None) -> tuple[str, str | None]:
    """The encoder to use and, when it is not the source's, a note saying so."""
    if codec:
        key = codec.lower()
        if key not in CODECS:
            raise UsageProblem(f"unknown codec {codec!r}: choose one of {', '.join(CODECS)}")
        return CODECS[key], None
    if info.is_sequence:
        return FALLBACK_ENCODER, f"an image sequence has no video codec to match; writing H.264 ({FALLBACK_ENCODER})"
    wanted = _MATCHING_ENCODER.get(info.codec)
    if wanted and encoder_available(wanted):
        return wanted, None
    return FALLBACK_ENCODER, (
        f"no encoder for the source codec {info.codec!r} here; writing H.264 ({FALLBACK_ENCODER}) instead"
    )


def choose_pix_fmt(encoder: str, source_fmt: str, bit_depth: int) -> tuple[str, str | None]:
    """Keep the source pixel format where the encoder takes it, else the nearest one."""
    import av

    supported = [f.name for f in (av.codec.Codec(encoder, "w").video_formats or [])]
    if not supported or source_fmt in supported:
        return source_fmt, None
    chroma = "444" if "444" in source_fmt else "422" if "422" in source_fmt else "420"
    deep = bit_depth > 8
    ranked = [f for f in supported if chroma in f and (("10" in f or "12" in f or "16" in f) == deep)]
    ranked += [f for f in supported if ("10" in f) == deep]
    ranked += supported
    choice = ranked[0]
    return choice, f"{encoder} cannot write {source_fmt}; writing {choice}"


def muxer_options(output: Path, info: VideoInfo) -> dict:
    """MP4/MOV: count the movie's edit lists in the video's own time base, not in the
    muxer's default 1/1000 s, so a clip that starts late keeps its exact timestamps."""
    if output.suffix.lower() in (".mp4", ".mov", ".m4v", ".3gp") and info.time_base:
        return {"movie_timescale": str(Fraction(info.time_base).denominator)}
    return {}


_UNFINISHED: set = set()  # sinks opened but neither finished nor aborted yet


def abort_unfinished() -> None:
    """Remove the temporary file of every sink not yet finished (the CLI calls this on
    Ctrl-C, which may strike after a sink is opened but before its caller guards it)."""
    for sink in list(_UNFINISHED):
        sink.abort()


class VideoSink:
    """An output clip being written; `finish()` renames it into place."""

    def __init__(self, output: str | os.PathLike, info: VideoInfo, *, codec: str | None = None,
                 crf: int | None = None, preset: str | None = None, source_container=None,
                 threads: int | None = None):
        import av

        self.output = Path(output)
        self.info = info
        self.notes: list[str] = []
        self.encoder, note = choose_encoder(info, codec)
        if note:
            self.notes.append(note)
        self.pix_fmt, note = choose_pix_fmt(self.encoder, info.pix_fmt, info.bit_depth)
        if note:
            self.notes.append(note)
        self.tmp = partial_name(self.output)  # the muxer creates the file
        _UNFINISHED.add(self)  # before the file exists, so a Ctrl-C at any point is cleaned up
        self._made_folders: list[Path] = []
        try:
            self._made_folders = make_folders(self.output.parent)  # OUTPUT's folder, when missing
            self.container = av.open(str(self.tmp), "w", options=muxer_options(self.output, info))
        except Exception as exc:
            self._remove_tmp()
            raise RuntimeProblem(f"{self.output}: cannot write here ({plain_media_error(exc)})") from None
        except BaseException:  # Ctrl-C or a kill while opening: leave nothing behind
            self._remove_tmp()
            raise
        try:
            self._add_video(crf, preset, threads)
            self._copy_map = {}
            if source_container is not None:
                self._add_copies(source_container)
        except BaseException:
            self.abort()
            raise
        self._frames = 0
        self._frames_by_format: dict = {}

    # -- setup ------------------------------------------------------------
    def _add_video(self, crf, preset, threads):
        info = self.info
        rate = info.rate or Fraction(25)
        try:
            stream = self.container.add_stream(self.encoder, rate=rate)
        except Exception as exc:
            raise UsageProblem(f"{self.output}: the {self.output.suffix or 'output'} container cannot hold "
                               f"{self.encoder} video ({plain_media_error(exc)}); pick another extension or --codec") from None
        stream.width, stream.height = info.width, info.height
        stream.pix_fmt = self.pix_fmt
        # The encoder counts in the source's time base so pts pass through
        # unchanged; the muxer picks its own stream time base and rescales.
        stream.codec_context.time_base = info.time_base
        cc = stream.codec_context
        for key, value in info.color.items():
            if value is not None:
                try:
                    setattr(cc, key, value)
                except Exception:
                    pass
        options = {}
        if self.encoder in ("libx264", "libx265"):
            options["crf"] = str(DEFAULT_CRF if crf is None else crf)
            options["preset"] = preset or "medium"
            if self.encoder == "libx265":
                options["x265-params"] = "log-level=error"
        elif self.encoder == "prores_ks":
            prof = (info.profile or "").strip().lower() if info.codec == "prores" else ""
            options["profile"] = _PRORES_PROFILES.get(prof, "3")
        elif self.encoder == "ffv1":
            options["level"] = "3"
        elif crf is not None:
            options["qscale"] = str(crf)
        if preset and self.encoder not in ("libx264", "libx265"):
            self.notes.append(f"--preset is ignored by {self.encoder}")
        stream.options = options
        if threads:
            cc.thread_count = threads
        if info.rotation:
            self._set_rotation(stream, info.rotation)
        self._set_timecode(stream)
        self.stream = stream

    def _set_timecode(self, stream):
        """Carry the source's start timecode over (moved on to a part's first frame): MOV and MP4
        muxers write it as a timecode track of their own, Matroska as a tag."""
        from skewfix.framerange import part_start_timecode

        timecode = part_start_timecode(self.info)
        if timecode:
            stream.metadata["timecode"] = timecode

    def _set_rotation(self, stream, degrees):
        """Carry the display rotation over (the pixels stay in stored orientation)."""
        if hasattr(stream, "set_display_rotation"):
            stream.set_display_rotation(degrees)
        else:  # older PyAV: the legacy tag, honoured by FFmpeg's mov muxer
            stream.metadata["rotate"] = str(degrees)
            self.notes.append("this PyAV cannot set a display matrix; rotation written as a legacy tag")

    def _add_copies(self, source):
        for s in source.streams:
            if s.type == "video" and s.index == self._source_video_index(source):
                continue
            if s.type == "data" and any(key.lower() == "timecode" for key in s.metadata):
                continue  # a timecode track: written anew from the video's timecode (_set_timecode)
            try:
                self._copy_map[s.index] = self.container.add_stream_from_template(s)
            except Exception as exc:
                self.notes.append(f"stream {s.index} ({s.type}) could not be copied: {plain_media_error(exc)}")

    @staticmethod
    def _source_video_index(source):
        return next(s.index for s in source.streams if s.type == "video")

    # -- writing ----------------------------------------------------------
    def write_planes(self, planes, pts, src_fmt: str):
        import av

        frame = self._frames_by_format.get(src_fmt)
        if frame is None:
            frame = self._frames_by_format[src_fmt] = av.VideoFrame(self.info.width, self.info.height, src_fmt)
        else:
            # one frame reused: fresh buffers every frame cost page faults. An encoder
            # that still holds the last picture (frame threads) makes this copy it first.
            frame.make_writable()
        fill_frame(frame, planes)
        if src_fmt != self.pix_fmt:
            frame = frame.reformat(format=self.pix_fmt)
        self.write_frame(frame, pts)

    def write_frame(self, frame, pts):
        frame.pts = pts if pts is not None else self._frames
        frame.time_base = self.info.time_base
        for key, value in self.info.color.items():
            if value is not None:
                try:
                    setattr(frame, key, value)
                except Exception:
                    pass
        for packet in self.stream.encode(frame):
            self.container.mux(packet)
        self._frames += 1

    def copy_packet(self, packet):
        out = self._copy_map.get(packet.stream.index)
        if out is None:
            return
        packet.stream = out
        self.container.mux(packet)

    # -- ending -----------------------------------------------------------
    def finish(self) -> Path:
        try:
            for packet in self.stream.encode():
                self.container.mux(packet)
            self.container.close()
        except Exception as exc:
            self.abort()
            raise RuntimeProblem(f"{self.output}: writing failed ({plain_media_error(exc)}); nothing was written") from None
        os.replace(self.tmp, self.output)
        _UNFINISHED.discard(self)
        return self.output

    def abort(self) -> None:
        try:
            self.container.close()
        except Exception:
            pass
        self._remove_tmp()
        _UNFINISHED.discard(self)

    def _remove_tmp(self):
        try:
            if self.tmp is not None:
                os.unlink(self.tmp)
        except FileNotFoundError:
            pass
        remove_folders(getattr(self, "_made_folders", []))
        self._made_folders = []

    @property
    def frames_written(self) -> int:
        return self._frames


class DeferredSink:
    """A sink that opens its output when the first picture is written.

    The encoder must know the display rotation before it writes a header, and
    a clip says it in the first decoded frame's side data; opening late saves
    decoding that frame twice (and opening the input a second time). Packets
    of other streams that arrive first are held (a few kB: the look-ahead's
    worth of audio) and copied once the output is open.
    """

    def __init__(self, opener):
        self._opener = opener
        self.sink = None
        self._held: list = []

    def _open(self):
        if self.sink is None:
            self.sink = self._opener()
            held, self._held = self._held, []
            for packet in held:
                self.copy_packet(packet)
        return self.sink

    @property
    def notes(self) -> list[str]:
        return list(self.sink.notes) if self.sink is not None else []

    def write_planes(self, planes, pts, src_fmt: str):
        self._open().write_planes(planes, pts, src_fmt)

    def copy_packet(self, packet):
        if self.sink is None:
            self._held.append(packet)
        elif hasattr(self.sink, "copy_packet"):
            self.sink.copy_packet(packet)

    def finish(self):
        return self._open().finish()

    def abort(self) -> None:
        self._held = []
        if self.sink is not None:
            self.sink.abort()

    @property
    def frames_written(self) -> int:
        return self.sink.frames_written if self.sink is not None else 0


def fill_frame(frame, planes) -> None:
    """Copy numpy planes into an `av.VideoFrame`'s (padded) plane buffers."""
    for arr, plane, (ch, nbytes, _b) in zip(planes, frame.planes, plane_layout(frame.format)):
        dtype = np.uint16 if nbytes == 2 else np.uint8
        dst = np.frombuffer(plane, dtype=dtype).reshape(plane.height, plane.line_size // nbytes)
        dst[:, : plane.width * ch] = arr.reshape(plane.height, plane.width * ch)


def check_output_path(input_path: str, output: str, force: bool) -> None:
    """Refuse OUTPUT == INPUT (also via links or other spellings) and existing OUTPUT without --force."""
    from skewfix.sequence import is_pattern

    out = Path(output)
    if not is_pattern(out):  # a sequence's files are checked by check_sequence_output
        try:
            same = Path(input_path).exists() and out.exists() and os.path.samefile(input_path, out)
        except OSError:
            same = False
        if same or os.path.realpath(input_path) == os.path.realpath(out):
            raise UsageProblem(f"{output}: OUTPUT is the same file as INPUT; the input is never overwritten")
        if out.exists() and not force:
            raise UsageProblem(f"{output}: already exists (add --force to replace it)")
    check_writable_file_path(output, may_create=True)


def check_writable_file_path(path: str | os.PathLike, label: str = "", may_create: bool = False) -> Path:
    """Refuse a file path that is a folder, or whose folder is not writable; a missing folder
    is refused too, unless ``may_create`` (it is then made when writing starts)."""
    out = Path(path)
    name = f"{label} {path}".strip()
    if out.is_dir():
        raise UsageProblem(f"{name}: is a folder; give a file name")
    parent = out.parent if str(out.parent) else Path(".")
    check_folder(parent, name, may_create)
    return out


def check_folder(folder: Path, name: str, may_create: bool) -> None:
    """Refuse a folder that cannot hold new files: missing (unless ``may_create`` and it can be
    made), in the way of a file, or not writable."""
    if not folder.is_dir() and not may_create:
        raise UsageProblem(f"{name}: folder {folder} does not exist")
    home = nearest_existing(folder)
    if not home.is_dir():
        raise UsageProblem(f"{name}: folder {folder} cannot be made: {home} is a file")
    if not os.access(home, os.W_OK):
        raise InputError(f"{name}: folder {home} is not writable")
