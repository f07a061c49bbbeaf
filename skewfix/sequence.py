"""Numbered image sequences in and out: PNG and TIFF at 8 or 16 bit, OpenEXR at half or float.

A sequence is named by a pattern with one frame-number field: ``%04d`` (or
``%d``, unpadded) in printf style, or a run of ``#`` (``plate.####.tif``: one
``#`` per digit). Reading:

* the frames are the files whose names match the pattern, in numeric order from
  the lowest number found; a gap is an error naming the missing file, and no
  matching file at all is an error naming the pattern;
* an image file carries no frame rate, so one must be given (``--fps``, or the
  motion file for ``reskew``); frame ``k`` is timed ``k / rate``;
* a PNG/TIFF file is read with ``cv2.imread(IMREAD_UNCHANGED)`` and handed on as
  one packed RGB plane (``rgb24`` or ``rgb48le``); grey images become RGB and an
  alpha channel is dropped;
* an OpenEXR file (`skewfix.exr`) is handed on as one float32 plane per
  channel (R, G, B, A and any others), unclipped.

Writing (`ImageSequenceSink`): frames are numbered like the input sequence
(same first number) or, for a video input, from 1 (the first frame of a clip
is frame 1: `first_frame_number`). ``depth`` is 8 or 16 bits; by default it keeps the source's
depth, and anything deeper than 8 bits (10- or 12-bit video) goes to 16 bits.
Depth changes scale to the full range, ``round(v * (2**out - 1) / (2**in - 1))``
(so 10-bit 1023 becomes 65535; a bit shift would stop at 65472). YUV video is
converted to RGB at full precision here (`yuv_to_rgb`), not through 8 bits.
An OpenEXR output keeps an EXR input's channels and pixel types (``depth`` 16
sets them to half, 32 to float); from any other input it holds R, G, B code
values scaled to 0..1 (no transfer curve is undone), half up to 10-bit
sources and float beyond. Float planes are never written to PNG, TIFF or
video (they would have to be clipped): an EXR input needs an EXR output.

Files are written under a hidden folder beside the output and moved into
place only once every frame has been written (`StagedSequence`); on failure
the folder is removed and no output file appears.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
import threading
from dataclasses import dataclass, replace
from fractions import Fraction
from pathlib import Path
from typing import Iterator

import cv2
import numpy as np

from skewfix.decode import DecodedFrame, VideoInfo, black_levels
from skewfix.errors import InputError, RuntimeProblem, UsageProblem
from skewfix.exr import FLOAT_PLANES  # no OpenEXR import: the bindings load on first use
from skewfix.framerange import VIDEO_FIRST_NUMBER, first_frame_number  # noqa: F401  (re-exported)
from skewfix.rowclock import frame_times_from_rate, parse_rate

IMAGE_EXTENSIONS = (".png", ".tif", ".tiff")
FLOAT_EXTENSIONS = (".exr",)
DEPTHS = (8, 16)

_PRINTF_FIELD = re.compile(r"%(0?)(\d*)d")
_HASH_FIELD = re.compile(r"#+")


# clip containers: a ``#`` in such a name is part of the name (take#2.mp4), not a frame number
_CLIP_EXTENSIONS = (".mp4", ".mov", ".m4v", ".mkv", ".webm", ".avi", ".mxf", ".mts", ".m2ts", ".ts")


def is_pattern(path: str | os.PathLike) -> bool:
    """True when ``path`` names a numbered sequence: a ``%04d`` field, or ``####`` in a file
    name that is not a clip's (``take#2.mp4`` is a clip)."""
    name = Path(str(path)).name
    if "%" in name:
        return True
    return "#" in name and Path(name).suffix.lower() not in _CLIP_EXTENSIONS


@dataclass(frozen=True)
class FramePattern:
    """A parsed sequence pattern: folder, text before and after the number, zero padding."""

    text: str
    folder: Path
    prefix: str
    suffix: str
    padding: int

    @property
    def extension(self) -> str:
        return os.path.splitext("frame" + self.suffix)[1].lower()

    def name_for(self, number: int) -> str:
        return f"{self.prefix}{number:0{self.padding}d}{self.suffix}" if self.padding else \
            f"{self.prefix}{number}{self.suffix}"

    def path_for(self, number: int) -> Path:
        return self.folder / self.name_for(number)

    def number_in(self, name: str) -> int | None:
        """The frame number of file ``name``, or None when it is not part of this sequence."""
        if not (name.startswith(self.prefix) and name.endswith(self.suffix)):
            return None
        digits = name[len(self.prefix): len(name) - len(self.suffix)]
        if not digits.isdigit():
            return None
        number = int(digits)
        return number if self.name_for(number) == name else None

    def numbers_present(self) -> list[int]:
        """Sorted frame numbers of the files of this sequence that exist now."""
        if not self.folder.is_dir():
            return []
        found = (self.number_in(entry.name) for entry in os.scandir(self.folder) if entry.is_file())
        return sorted(n for n in found if n is not None)

    def same_sequence(self, other: "FramePattern") -> bool:
        return (os.path.realpath(self.folder) == os.path.realpath(other.folder)
                and (self.prefix, self.suffix) == (other.prefix, other.suffix))


def parse_pattern(text: str | os.PathLike) -> FramePattern:
    """Split ``plate.%04d.tif`` or ``plate.####.tif`` into its parts; exactly one number field."""
    text = str(text)
    path = Path(text)
    name = path.name
    fields = list(_PRINTF_FIELD.finditer(name)) + list(_HASH_FIELD.finditer(name))
    if len(fields) != 1 or name.count("%") > 1:
        raise UsageProblem(f"{text}: a sequence name needs exactly one frame-number field, "
                           "like plate.%04d.tif or plate.####.tif")
    field = fields[0]
    if field.group(0).startswith("%"):
        padding = int(field.group(2)) if field.group(2) else 0
    else:
        padding = len(field.group(0))
    folder = path.parent if str(path.parent) else Path(".")
    return FramePattern(text, folder, name[: field.start()], name[field.end():], padding)


def check_image_format(pattern: FramePattern) -> None:
    """Refuse file types other than PNG, TIFF and OpenEXR with a one-line reason (and OpenEXR
    when its bindings are not installed)."""
    ext = pattern.extension
    if ext in FLOAT_EXTENSIONS:
        from skewfix.exr import openexr

        try:
            openexr()
        except UsageProblem as exc:
            raise UsageProblem(f"{pattern.text}: {exc}") from None
        return
    if ext not in IMAGE_EXTENSIONS:
        raise UsageProblem(f"{pattern.text}: image sequences must be PNG, TIFF or OpenEXR "
                           f"({', '.join(IMAGE_EXTENSIONS + FLOAT_EXTENSIONS)}), "
                           f"not {ext or 'a name without extension'}")


def is_float_sequence(path: str | os.PathLike) -> bool:
    """True for a numbered OpenEXR sequence name (float planes)."""
    return is_pattern(path) and parse_pattern(path).extension in FLOAT_EXTENSIONS


def float_output_problem(output: str) -> UsageProblem:
    return UsageProblem(f"{output}: an OpenEXR input is written as OpenEXR (e.g. plate.%04d.exr): its "
                        "float values would be clipped in PNG, TIFF or video")


def check_float_output(input_path: str, output: str) -> None:
    """An OpenEXR input's float planes go only to an OpenEXR output (never clipped to integers)."""
    if is_float_sequence(input_path) and not is_float_sequence(output):
        raise float_output_problem(output)


def find_frame_numbers(pattern: FramePattern) -> list[int]:
    """The input frame numbers, first to last; a gap or no file at all is an `InputError`."""
    if not pattern.folder.is_dir():
        raise InputError(f"{pattern.text}: folder {pattern.folder} does not exist")
    numbers = pattern.numbers_present()
    if not numbers:
        raise InputError(f"{pattern.text}: no files match this pattern")
    present = set(numbers)
    missing = [n for n in range(numbers[0], numbers[-1] + 1) if n not in present]
    if missing:
        more = f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""
        raise InputError(f"{pattern.text}: frame {missing[0]} is missing: "
                         f"{pattern.path_for(missing[0])} not found{more}")
    return numbers


def read_image_rgb(path: Path) -> np.ndarray:
    """One PNG/TIFF as an HxWx3 RGB array, uint8 or uint16."""
    img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    if img is None:
        raise InputError(f"{path}: cannot be read as an image")
    if img.dtype not in (np.uint8, np.uint16):
        raise InputError(f"{path}: {img.dtype} samples are not handled (8- or 16-bit integer images only)")
    if img.ndim == 2 or img.shape[2] == 1:
        return cv2.cvtColor(img.reshape(img.shape[0], img.shape[1]), cv2.COLOR_GRAY2RGB)
    if img.shape[2] == 4:
        return cv2.cvtColor(img, cv2.COLOR_BGRA2RGB)
    if img.shape[2] == 3:
        return cv2.cvtColor(img, cv2.COLOR_BGR2RGB)
    raise InputError(f"{path}: {img.shape[2]}-channel images are not handled")


def _as_rate(fps) -> Fraction:
    rate = Fraction(fps) if isinstance(fps, (int, Fraction)) else parse_rate(str(fps))
    if rate <= 0:
        raise UsageProblem(f"frame rate must be positive, not {fps}")
    return rate


class ImageSequenceSource:
    """A numbered image sequence opened like a clip (the `VideoSource` interface); with
    ``frames`` (a `skewfix.framerange.FrameRange`) only those files are read."""

    def __init__(self, pattern: str | os.PathLike, fps=None, frames=None):
        self.pattern = parse_pattern(pattern)
        check_image_format(self.pattern)
        if fps is None:
            raise UsageProblem(f"{self.pattern.text}: an image sequence has no frame rate of its own; "
                               "give one with --fps (e.g. 24 or 24000/1001)")
        rate = _as_rate(fps)
        self.numbers = find_frame_numbers(self.pattern)
        first_index = 0
        if frames is not None:  # resolved against the whole sequence's numbers
            whole = VideoInfo(path=self.pattern.text, width=0, height=0, pix_fmt="", bit_depth=8, codec="",
                              profile=None, rate=rate, time_base=Fraction(1) / rate, frame_count=len(self.numbers),
                              duration_s=None, is_sequence=True, first_number=self.numbers[0])
            first_index, last_index = frames.resolve(whole, len(self.numbers))
            self.numbers = self.numbers[first_index:last_index + 1]
        self.is_float = self.pattern.extension in FLOAT_EXTENSIONS
        first = self._read(self.pattern.path_for(self.numbers[0]))
        self._signature = self._signature_of(first)
        n = len(self.numbers)
        self.times = frame_times_from_rate(n, rate)
        common = dict(path=self.pattern.text, profile=None, rate=rate, time_base=Fraction(1) / rate,
                      frame_count=n, duration_s=float(n / rate), container="image sequence", is_sequence=True,
                      first_number=self.numbers[0], is_rgb=True,
                      first_index=first_index)
        if self.is_float:
            from skewfix.exr import ExrInfo

            h, w = first.shape
            self.info = ExrInfo(width=w, height=h, pix_fmt=FLOAT_PLANES,
                                bit_depth=32 if "float" in first.types else 16, codec="exr",
                                names=first.names, types=first.types, header=first.header, **common)
        else:
            depth = 16 if first.dtype == np.uint16 else 8
            self.info = VideoInfo(width=first.shape[1], height=first.shape[0],
                                  pix_fmt="rgb48le" if depth == 16 else "rgb24", bit_depth=depth,
                                  codec="tiff" if self.pattern.extension.startswith(".tif") else "png", **common)
        self.lost_frames = 0
        self.decode_errors: list[str] = []
        self.io_lock = threading.Lock()  # as a video source's (nothing here is shared between threads)

    def _read(self, path: Path):
        if self.is_float:
            from skewfix.exr import read_exr

            return read_exr(path)
        return read_image_rgb(path)

    def _signature_of(self, image) -> tuple:
        """What every frame must share with the first: size and sample type (and EXR channels)."""
        if self.is_float:
            return image.shape, image.names
        return image.shape[:2], image.dtype

    def _describe(self, signature) -> str:
        shape, kind = signature
        what = ", ".join(kind) if self.is_float else str(kind)
        return f"{shape[1]}x{shape[0]} {what}"

    def close(self) -> None:
        return None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def frames(self) -> Iterator[DecodedFrame]:
        for k, number in enumerate(self.numbers):
            path = self.pattern.path_for(number)
            if not path.exists():
                raise InputError(f"{self.pattern.text}: frame {number} is missing: {path} not found")
            img = self._read(path)
            signature = self._signature_of(img)
            if signature != self._signature:
                raise InputError(f"{path}: {self._describe(signature)} differs from the first "
                                 f"frame ({self._describe(self._signature)})")
            if self.is_float:
                from skewfix.exr import ExrFrame

                yield ExrFrame(k, float(self.times[k]), k, img.planes, [(1, 1)] * len(img.planes),
                               self.info.bit_depth, True, self.info.pix_fmt, names=img.names)
            else:
                yield DecodedFrame(k, float(self.times[k]), k, [img], [(1, 1)], self.info.bit_depth, True,
                                   self.info.pix_fmt)

    def demux(self, copy_streams: bool = False) -> Iterator[tuple[str, object]]:
        """Yield ("frame", DecodedFrame); a sequence has no other streams to copy."""
        for frame in self.frames():
            yield "frame", frame


# --------------------------------------------------------------------------
# Depth and colour
# --------------------------------------------------------------------------

# Luma weights (Kr, Kb) by matrix-coefficients code (ITU-T H.273, as FFmpeg's AVColorSpace):
# BT.709-6, FCC (47 CFR 73.682), BT.470BG / BT.601-7 (625 and 525), SMPTE 240M, BT.2020-2.
_LUMA_WEIGHTS = {1: (0.2126, 0.0722), 4: (0.30, 0.11), 5: (0.299, 0.114), 6: (0.299, 0.114),
                 7: (0.212, 0.087), 9: (0.2627, 0.0593), 10: (0.2627, 0.0593)}
_DEFAULT_WEIGHTS = (0.299, 0.114)  # untagged: BT.601, as FFmpeg's swscale assumes


def rescale_depth(arr: np.ndarray, from_bits: int, to_bits: int) -> np.ndarray:
    """Integer samples to another depth over the full range: round(v * (2^to-1) / (2^from-1))."""
    dtype = np.uint16 if to_bits > 8 else np.uint8
    if from_bits == to_bits:
        return arr.astype(dtype, copy=False)
    scale = ((1 << to_bits) - 1) / ((1 << from_bits) - 1)
    return np.rint(arr.astype(np.float64) * scale).astype(dtype)


def quantise(rgb: np.ndarray, bits: int) -> np.ndarray:
    """Float RGB in [0, 1] to integers at ``bits`` (rounded, clipped)."""
    top = (1 << bits) - 1
    return np.rint(np.clip(rgb, 0.0, 1.0) * top).astype(np.uint16 if bits > 8 else np.uint8)


def _luma_weights(color: dict) -> tuple[float, float]:
    code = color.get("colorspace") if color else None
    try:
        return _LUMA_WEIGHTS.get(int(code), _DEFAULT_WEIGHTS)
    except (TypeError, ValueError):
        return _DEFAULT_WEIGHTS


def yuv_to_rgb(y: np.ndarray, cb: np.ndarray, cr: np.ndarray, bit_depth: int, full_range: bool,
               weights: tuple[float, float]) -> np.ndarray:
    """Y'CbCr planes (chroma at any subsampled size) to float32 R'G'B' in [0, 1].

    Narrow range: Y' black/white at 16/235 and chroma 16..240 scaled by 2^(bits-8)
    (ITU-R BT.601-7, BT.709-6 section 4); full range over 0..2^bits-1. Chroma is
    upsampled bilinearly to the luma size (centred siting).
    """
    h, w = y.shape
    if cb.shape != y.shape:
        cb = cv2.resize(cb.astype(np.float32), (w, h), interpolation=cv2.INTER_LINEAR)
        cr = cv2.resize(cr.astype(np.float32), (w, h), interpolation=cv2.INTER_LINEAR)
    y, cb, cr = (p.astype(np.float32) for p in (y, cb, cr))
    step = float(1 << (bit_depth - 8)) if bit_depth >= 8 else 1.0
    if full_range:
        top = float((1 << bit_depth) - 1)
        yn, cbn, crn = y / top, (cb - (1 << (bit_depth - 1))) / top, (cr - (1 << (bit_depth - 1))) / top
    else:
        yn, cbn, crn = (y - 16 * step) / (219 * step), (cb - 128 * step) / (224 * step), (cr - 128 * step) / (224 * step)
    kr, kb = weights
    r = yn + 2 * (1 - kr) * crn
    b = yn + 2 * (1 - kb) * cbn
    g = (yn - kr * r - kb * b) / (1 - kr - kb)
    return np.stack([r, g, b], axis=-1)


def planes_to_rgb(planes: list[np.ndarray], pix_fmt: str, info: VideoInfo, bits: int) -> np.ndarray:
    """Decoded or remapped planes as one HxWx3 RGB image at ``bits`` (8 or 16).

    Packed and planar RGB are rescaled exactly; planar Y'CbCr goes through
    `yuv_to_rgb` with the clip's matrix and range tags; float planes (OpenEXR)
    are clipped and sRGB-encoded for viewing (`skewfix.exr.display_rgb`); any
    other layout is converted by FFmpeg's swscale to ``rgb48le`` first.
    """
    if pix_fmt == FLOAT_PLANES:
        from skewfix.exr import display_rgb

        return display_rgb(planes, tuple(getattr(info, "names", ())) or ("R", "G", "B"), bits)
    import av

    fmt = av.VideoFormat(pix_fmt)
    src_bits = max(c.bits for c in fmt.components)
    if pix_fmt in ("rgb24", "rgb48le"):
        return rescale_depth(planes[0][..., :3], src_bits, bits)
    if pix_fmt.startswith("gbrp") and len(planes) >= 3:
        return rescale_depth(np.stack([planes[2], planes[0], planes[1]], axis=-1), src_bits, bits)
    if _planar_yuv(pix_fmt, planes):
        return quantise(_yuv_planes_to_unit(planes, pix_fmt, info, src_bits), bits)
    return rescale_depth(_swscale_rgb48(planes, pix_fmt), 16, bits)


def planes_to_unit_rgb(planes: list[np.ndarray], pix_fmt: str, info: VideoInfo) -> np.ndarray:
    """Integer planes as HxWx3 float32 R'G'B' code values over 0..1, not clipped (a YUV
    source's values outside the RGB cube stay outside) and never through 8 bits."""
    import av

    fmt = av.VideoFormat(pix_fmt)
    src_bits = max(c.bits for c in fmt.components)
    top = float((1 << src_bits) - 1)
    if pix_fmt in ("rgb24", "rgb48le"):
        return planes[0][..., :3].astype(np.float32) / top
    if pix_fmt.startswith("gbrp") and len(planes) >= 3:
        return np.stack([planes[2], planes[0], planes[1]], axis=-1).astype(np.float32) / top
    if _planar_yuv(pix_fmt, planes):
        return _yuv_planes_to_unit(planes, pix_fmt, info, src_bits)
    return _swscale_rgb48(planes, pix_fmt).astype(np.float32) / 65535.0


def _planar_yuv(pix_fmt: str, planes) -> bool:
    return pix_fmt.startswith(("yuv", "yuvj")) and len(planes) >= 3 and all(p.ndim == 2 for p in planes[:3])


def _yuv_planes_to_unit(planes, pix_fmt: str, info: VideoInfo, src_bits: int) -> np.ndarray:
    full = black_levels(replace(info, pix_fmt=pix_fmt, bit_depth=src_bits, is_rgb=False), 1)[0] == 0.0
    return yuv_to_rgb(planes[0], planes[1], planes[2], src_bits, full, _luma_weights(info.color))


def _swscale_rgb48(planes, pix_fmt: str) -> np.ndarray:
    import av

    from skewfix.encode import fill_frame

    frame = av.VideoFrame(planes[0].shape[1], planes[0].shape[0], pix_fmt)
    fill_frame(frame, planes)
    return frame.reformat(format="rgb48le").to_ndarray()


# --------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------

def check_sequence_output(input_path: str, output: str, force: bool) -> FramePattern:
    """Refuse a sequence OUTPUT that is the INPUT sequence, lives in a folder that cannot be written
    (or made), or exists without --force."""
    pattern = parse_pattern(output)
    check_image_format(pattern)
    if is_pattern(input_path) and parse_pattern(input_path).same_sequence(pattern):
        raise UsageProblem(f"{output}: OUTPUT is the same sequence as INPUT; the input is never overwritten")
    from skewfix.encode import check_folder

    check_folder(pattern.folder, output, may_create=True)  # a missing folder is made at commit
    existing = pattern.numbers_present()
    if existing and not force:
        raise UsageProblem(f"{output}: {len(existing)} file(s) of this sequence already exist, e.g. "
                           f"{pattern.path_for(existing[0])} (add --force to replace the sequence)")
    return pattern


class StagedSequence:
    """Numbered files written under a hidden folder and moved into place by `commit()`.

    The staging folder sits beside the target folder (same file system, so the
    moves are renames). With ``force``, files of the same sequence left over
    from an earlier run are removed at commit, so the result is one sequence.
    A target folder that does not exist yet (with its missing parents) is
    made at commit; until then the files wait beside its nearest existing parent.
    """

    def __init__(self, pattern: FramePattern, first_number: int, force: bool = False):
        from skewfix.files import nearest_existing

        self.pattern, self.first_number, self.force = pattern, first_number, force
        self._numbers: list[int] = []
        home = nearest_existing(pattern.folder)
        if not home.is_dir():
            raise UsageProblem(f"{pattern.text}: folder {pattern.folder} cannot be made: {home} is a file")
        if not force and pattern.numbers_present():
            raise UsageProblem(f"{pattern.text}: files of this sequence already exist (add --force to replace them)")
        try:
            self.stage = Path(tempfile.mkdtemp(prefix=f".{pattern.prefix or 'frames'}partial-", dir=home))
        except OSError as exc:
            raise RuntimeProblem(f"{pattern.text}: cannot write in {home} ({exc.strerror})") from None

    def write(self, index: int, image: np.ndarray) -> None:
        """Write frame ``index`` (0-based) with OpenCV's channel order (BGR); to an ``.exr``
        name a one-channel image is written as one half channel ``Y`` (8-bit 255 is 1.0)."""
        if self.pattern.extension in FLOAT_EXTENSIONS and image.ndim == 2:
            from skewfix.exr import write_exr

            scale = 1.0 / 255.0 if image.dtype == np.uint8 else 1.0
            plane = image.astype(np.float32) * scale
            self.write_with(index, lambda target: write_exr(target, ("Y",), [plane], ("half",)))
            return

        def save(target: Path) -> None:
            number = self.first_number + index
            try:
                ok = cv2.imwrite(str(target), image)
            except cv2.error as exc:
                raise RuntimeProblem(f"{self.pattern.path_for(number)}: could not be written "
                                     f"({exc.msg.strip()})") from None
            if not ok:
                raise RuntimeProblem(f"{self.pattern.path_for(number)}: could not be written")

        self.write_with(index, save)

    def write_with(self, index: int, save) -> None:
        """Stage frame ``index`` (0-based) by calling ``save(path)`` with its staging path."""
        number = self.first_number + index
        save(self.stage / self.pattern.name_for(number))
        self._numbers.append(number)

    @property
    def count(self) -> int:
        return len(self._numbers)

    def commit(self) -> Path:
        """Move every staged file into place; returns the target folder."""
        folder = self.pattern.folder
        folder.mkdir(parents=True, exist_ok=True)
        stale = set(self.pattern.numbers_present()) - set(self._numbers) if self.force else set()
        for number in self._numbers:
            name = self.pattern.name_for(number)
            os.replace(self.stage / name, folder / name)
        for number in stale:
            os.unlink(self.pattern.path_for(number))
        shutil.rmtree(self.stage, ignore_errors=True)
        return folder

    def discard(self) -> None:
        shutil.rmtree(self.stage, ignore_errors=True)


def default_depth(info: VideoInfo) -> int:
    """Keep the source's depth: 8-bit stays 8, anything deeper goes to 16."""
    return 8 if info.bit_depth <= 8 else 16


class ImageSequenceSink:
    """Corrected frames as a PNG/TIFF/OpenEXR sequence; same methods as `VideoSink` minus
    ``copy_packet``."""

    def __init__(self, output: str, info: VideoInfo, depth: int | None = None, force: bool = False,
                 first_number: int | None = None):
        self.pattern = parse_pattern(output)
        check_image_format(self.pattern)
        self.info = info
        self.is_float = self.pattern.extension in FLOAT_EXTENSIONS
        if self.is_float:
            from skewfix.exr import output_types

            self.names, self.types = output_types(info, depth)
            self.header = dict(getattr(info, "header", {}) or {})
            self.depth = 32 if "float" in self.types else 16
        else:
            if info.pix_fmt == FLOAT_PLANES:
                raise float_output_problem(output)
            if depth is not None and depth not in DEPTHS:
                raise UsageProblem(f"--depth must be 8 or 16, not {depth}")
            self.depth = depth or default_depth(info)
        if first_number is None:
            first_number = first_frame_number(info)
        self.notes: list[str] = []
        if info.has_audio:
            self.notes.append("the audio is not carried into an image sequence")
        if info.rotation:
            self.notes.append(f"the source's {info.rotation}° rotation tag is not applied: "
                              "images are written in the stored orientation")
        if not self.is_float and self.depth < info.bit_depth:
            self.notes.append(f"writing {self.depth}-bit images from a {info.bit_depth}-bit source")
        if self.is_float and info.pix_fmt == FLOAT_PLANES and "half" in self.types and \
                "float" in getattr(info, "types", ()):
            self.notes.append("writing half-float channels from a float source (about 3 significant digits)")
        self._staged = StagedSequence(self.pattern, first_number, force)
        self._frames = 0

    def write_planes(self, planes, pts, src_fmt: str) -> None:
        if self.is_float:
            from skewfix.exr import write_exr

            if src_fmt == FLOAT_PLANES:
                channels = list(planes)
            else:
                rgb = planes_to_unit_rgb(planes, src_fmt, self.info)
                channels = [rgb[..., 0], rgb[..., 1], rgb[..., 2]]
            self._staged.write_with(self._frames, lambda target: write_exr(target, self.names, channels,
                                                                           self.types, self.header))
        else:
            rgb = planes_to_rgb(planes, src_fmt, self.info, self.depth)
            self._staged.write(self._frames, cv2.cvtColor(rgb, cv2.COLOR_RGB2BGR))
        self._frames += 1

    def finish(self) -> Path:
        if not self._frames:
            self.abort()
            raise RuntimeProblem(f"{self.pattern.text}: no frame to write; nothing was written")
        try:
            return self._staged.commit()
        except OSError as exc:
            self.abort()
            raise RuntimeProblem(f"{self.pattern.text}: could not move the frames into place ({exc})") from None

    def abort(self) -> None:
        self._staged.discard()

    @property
    def frames_written(self) -> int:
        return self._frames


def open_sink(input_path: str, output: str, info: VideoInfo, *, codec=None, crf=None, preset=None,
              depth: int | None = None, force: bool = False, threads=None, template=None):
    """The sink for OUTPUT: an image sequence for a pattern, else a clip (copying a clip INPUT's other streams).

    ``template`` is INPUT's open container, if the caller has one (saves opening it again).
    """
    if is_pattern(output):
        if codec is not None:
            raise UsageProblem("--codec applies to video output; an image sequence takes its type from "
                               "the file extension (.png, .tif, .exr)")
        return ImageSequenceSink(output, info, depth=depth, force=force)
    if info.pix_fmt == FLOAT_PLANES:
        raise float_output_problem(output)
    if depth is not None:
        raise UsageProblem("--depth applies to image-sequence output (e.g. plate.%04d.tif)")
    from skewfix.encode import VideoSink

    if info.is_sequence:
        return VideoSink(output, info, codec=codec, crf=crf, preset=preset, threads=threads)
    if template is not None:
        return VideoSink(output, info, codec=codec, crf=crf, preset=preset, source_container=template,
                         threads=threads)
    import av

    with av.open(input_path) as template:
        return VideoSink(output, info, codec=codec, crf=crf, preset=preset, source_container=template,
                         threads=threads)
