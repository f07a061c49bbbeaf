"""OpenEXR images: floating-point plates and maps, read and written unclipped.

An EXR frame is handed on as one float32 plane per channel (`FLOAT_PLANES`),
in the order R, G, B, A (those present) and then the other channels by name;
every plane is remapped at full size like an RGB image, so the values are
never quantised or clipped (a half channel is widened to float32 exactly and
narrowed back when written). What is kept from the input file: every
channel's name and pixel type (HALF or FLOAT), the compression, the data and
display windows and the other header attributes. Only scan-line or tiled
single-part images whose channels are all full-size can be read (no deep
data, no subsampled luminance/chroma channels).

Half floats hold magnitudes up to 65504 (the largest finite half, IEEE 754
binary16, as the OpenEXR documentation gives it); a resampled value beyond
that (cubic overshoot next to a very bright pixel) is written as ±65504
rather than as infinity.

The tracker needs an 8-bit picture: `tracking_luma` takes the Rec. 709
luminance of linear R, G, B (ITU-R BT.709-6, table 3 weights
0.2126/0.7152/0.0722), clips it to 0..1 and applies the sRGB transfer curve
(IEC 61966-2-1) — used only to follow the motion, never written.

The OpenEXR bindings (the ``OpenEXR`` package) are optional: ``pip install
'skewfix[exr]'``; without them an ``.exr`` name is refused with one line.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from skewfix.decode import DecodedFrame, VideoInfo
from skewfix.errors import InputError, RuntimeProblem, UsageProblem

#: the ``pix_fmt`` of a frame whose planes are float32 channels (not an FFmpeg format)
FLOAT_PLANES = "float-planes"
EXR_EXTENSION = ".exr"
HALF_MAX = 65504.0  # largest finite IEEE 754 binary16 value
#: --depth for EXR output: 16 is half, 32 is float
FLOAT_DEPTHS = {16: "half", 32: "float"}
_ORDER = ("R", "G", "B", "A")
_HEADER_SET_HERE = ("channels",)


def openexr():
    """The ``OpenEXR`` module, or a `UsageProblem` saying how to install it."""
    try:
        import OpenEXR
    except ImportError:
        raise UsageProblem("OpenEXR (.exr) needs the OpenEXR bindings: pip install 'skewfix[exr]' "
                           "(or pip install OpenEXR)") from None
    return OpenEXR


def ordered_names(names) -> tuple[str, ...]:
    """R, G, B, A first (those present), then the other channels by name."""
    names = list(names)
    return tuple([n for n in _ORDER if n in names] + sorted(n for n in names if n not in _ORDER))


@dataclass
class ExrImage:
    """One EXR image: float32 planes with their channel names and pixel types ("half"/"float")."""

    names: tuple[str, ...]
    types: tuple[str, ...]
    planes: list[np.ndarray]
    header: dict = field(default_factory=dict)

    @property
    def shape(self) -> tuple[int, int]:
        return self.planes[0].shape


def read_exr(path: str | Path) -> ExrImage:
    """Read a single-part EXR file's channels as float32 planes (`InputError` when it cannot)."""
    module = openexr()
    path = Path(path)
    try:
        with module.File(str(path), separate_channels=True) as f:
            if len(f.parts) > 1:
                raise InputError(f"{path}: multi-part OpenEXR files are not handled ({len(f.parts)} parts); "
                                 "write the plate as one part")
            header = dict(f.header())
            channels = f.channels()
            if not channels:
                raise InputError(f"{path}: has no image channels")
            names = ordered_names(channels)
            planes, types = [], []
            for name in names:
                channel = channels[name]
                if channel.xSampling != 1 or channel.ySampling != 1:
                    raise InputError(f"{path}: channel {name} is subsampled ({channel.xSampling}x"
                                     f"{channel.ySampling}); only full-size channels are handled")
                pixels = channel.pixels
                if pixels is None or pixels.ndim != 2:
                    raise InputError(f"{path}: channel {name} holds no flat image (deep data is not handled)")
                if pixels.dtype == np.float16:
                    types.append("half")
                elif pixels.dtype == np.float32:
                    types.append("float")
                else:
                    raise InputError(f"{path}: channel {name} holds {pixels.dtype} samples; "
                                     "only HALF and FLOAT channels are handled")
                planes.append(np.ascontiguousarray(pixels, dtype=np.float32))
    except (RuntimeError, ValueError, TypeError, OSError) as exc:
        raise InputError(f"{path}: cannot be read as OpenEXR ({str(exc).strip() or type(exc).__name__})") from None
    for name, plane in zip(names, planes):
        if plane.shape != planes[0].shape:
            raise InputError(f"{path}: channel {name} is {plane.shape[1]}x{plane.shape[0]}, "
                             f"the others {planes[0].shape[1]}x{planes[0].shape[0]}")
    return ExrImage(names, tuple(types), planes, {k: v for k, v in header.items() if k not in _HEADER_SET_HERE})


def as_pixel_type(plane: np.ndarray, pixel_type: str) -> np.ndarray:
    """A plane as float16 (finite values limited to ±`HALF_MAX`) or float32."""
    if pixel_type == "half":
        return np.clip(plane, -HALF_MAX, HALF_MAX).astype(np.float16)
    return np.ascontiguousarray(plane, dtype=np.float32)


def write_exr(path: str | Path, names, planes, types, header: dict | None = None) -> None:
    """Write planes as one EXR image, each channel at its pixel type ("half" or "float").

    ``header`` holds attributes to keep (the input's compression, windows, ...);
    without one the image is a ZIP-compressed scan-line file.
    """
    module = openexr()
    head = {"compression": module.ZIP_COMPRESSION, "type": module.scanlineimage}
    head.update(header or {})
    channels = {name: as_pixel_type(plane, kind) for name, plane, kind in zip(names, planes, types)}
    try:
        with module.File(head, channels) as f:
            f.write(str(path))
    except (RuntimeError, ValueError, OSError) as exc:
        raise RuntimeProblem(f"{path}: could not be written as OpenEXR ({str(exc).strip()})") from None


# --------------------------------------------------------------------------
# Frames for the render loop
# --------------------------------------------------------------------------

_LUMINANCE = (0.2126, 0.7152, 0.0722)  # ITU-R BT.709-6 table 3


def srgb_encode(linear: np.ndarray) -> np.ndarray:
    """The sRGB transfer curve (IEC 61966-2-1) of linear values, clipped to 0..1."""
    v = np.clip(linear, 0.0, 1.0)
    return np.where(v <= 0.0031308, 12.92 * v, 1.055 * np.power(v, 1 / 2.4) - 0.055).astype(np.float32)


def display_rgb(planes, names, bits: int = 8) -> np.ndarray:
    """An HxWx3 integer picture of float planes to look at (stills, reports): R, G, B (or a
    grey channel) clipped to 0..1 and sRGB-encoded; scene-linear values above 1 saturate."""
    rgb = [planes[names.index(c)] for c in ("R", "G", "B")] if all(c in names for c in "RGB") else \
        [planes[names.index("Y")] if "Y" in names else planes[0]] * 3
    top = (1 << bits) - 1
    return np.rint(srgb_encode(np.stack(rgb, axis=-1)) * top).astype(np.uint16 if bits > 8 else np.uint8)


def tracking_luma(planes, names) -> np.ndarray:
    """8-bit luma for the tracker: Rec. 709 luminance of R, G, B (or Y, or the first
    channel), sRGB-encoded."""
    if all(c in names for c in "RGB"):
        r, g, b = (planes[names.index(c)] for c in "RGB")
        y = _LUMINANCE[0] * r + _LUMINANCE[1] * g + _LUMINANCE[2] * b
    else:
        y = planes[names.index("Y")] if "Y" in names else planes[0]
    return np.rint(srgb_encode(y) * 255.0).astype(np.uint8)


@dataclass
class ExrFrame(DecodedFrame):
    """A decoded EXR frame: ``planes`` are float32 channels named ``names``."""

    names: tuple[str, ...] = ()

    @property
    def luma(self) -> np.ndarray:
        return tracking_luma(self.planes, self.names)


@dataclass
class ExrInfo(VideoInfo):
    """`VideoInfo` of an EXR sequence: the channels, their pixel types and the header to keep."""

    names: tuple[str, ...] = ()
    types: tuple[str, ...] = ()
    header: dict = field(default_factory=dict)

    @property
    def frame_bytes(self) -> int:
        """Bytes of one decoded frame (float32 planes), for the render's look-ahead budget."""
        return self.width * self.height * 4 * len(self.names)


def float_planes_of(info: VideoInfo) -> bool:
    return info.pix_fmt == FLOAT_PLANES


def output_types(info: VideoInfo, depth: int | None) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """Channel names and pixel types for an EXR output of frames described by ``info``.

    An EXR source keeps its channels and types (``depth`` 16 or 32 sets them all to
    half or float); any other source gives R, G, B at half up to 10 bits, else float.
    """
    if depth is not None and depth not in FLOAT_DEPTHS:
        raise UsageProblem(f"--depth for OpenEXR output must be 16 (half) or 32 (float), not {depth}")
    if isinstance(info, ExrInfo) and info.names:
        types = info.types if depth is None else (FLOAT_DEPTHS[depth],) * len(info.names)
        return info.names, types
    kind = FLOAT_DEPTHS[depth] if depth else ("half" if info.bit_depth <= 10 else "float")
    return ("R", "G", "B"), (kind,) * 3
