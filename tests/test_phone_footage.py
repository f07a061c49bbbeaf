"""Phone footage: variable frame rate, rotation metadata, odd sizes, 10-bit HDR.

Every clip is rendered here with a known rolling shutter (so each frame has an
exact global-shutter truth) and written with PyAV the way phones write them:
timestamps on a 90 kHz clock with irregular steps, a display rotation in the
stream's display matrix, sizes that are not multiples of 16 (or even of 2),
and 10-bit HEVC tagged BT.2020 / PQ. After `fix` the picture must be corrected
*in the stored orientation* (where the sensor rows are) and everything else
carried over: timestamps, rotation, size, pixel format and colour tags.
"""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import av
import numpy as np
import pytest
from hypothesis import assume, given, strategies as st

import truth
from skewfix.errors import UsageProblem
from skewfix.pipeline import FixOptions, fix_clip
from skewfix.rowclock import RowClock  # checked against the published formula below

READOUT = 0.024
PAN = truth.SteadyPan(400.0, 60.0)  # a lean of 400 * 0.024 = 9.6 px top to bottom (made here)
# the MPEG 90 kHz clock: time stamps count periods of the 27 MHz system clock / 300
# (ISO/IEC 13818-1 | ITU-T H.222.0, as ISO/IEC 11172-1 section 2.4.4.3 before it)
PHONE_CLOCK = Fraction(1, 90000)
# ITU-T H.273 code points: colour primaries 9 = ITU-R BT.2020 (Table 2), transfer characteristics
# 16 = SMPTE ST 2084 (PQ, Table 3), matrix coefficients 9 = BT.2020 non-constant luminance
# (Table 4); as tabulated by colour-science (COLOUR_PRIMARIES_ITUTH273 and its siblings).
# test_hdr_code_points_are_ffmpegs checks the matrix code against FFmpeg's own enumeration.
HDR_TAGS = {"color_primaries": 9, "color_trc": 16, "colorspace": 9}


def frame_times_from_rate(n: int, rate: Fraction) -> np.ndarray:
    return truth.clip_frame_times(n, rate)


class PhoneClip:
    """A rolling-shutter clip with its exact truth (rendered by tests/truth.py, independent of
    skewfix's row clock and model), written like a phone writes it."""

    def __init__(self, width: int, height: int, times: np.ndarray):
        self.clip = truth.PlanarClip(width, height, len(times), None, READOUT, PAN, frame_times=times)
        self.width, self.height = width, height

    def truth(self, k: int) -> np.ndarray:
        """The global-shutter view at frame k's middle row's instant (README: --reference-line)."""
        return self.clip.global_view(float(self.clip.reference_time(k, (self.height - 1) / 2)))

    def write(self, path: Path, pts, time_base: Fraction, rate: Fraction, *, codec="libx264", pix_fmt="yuv420p",
              rotation: int = 0, tags: dict | None = None, deep: bool = False) -> Path:
        tags = tags or {}
        with av.open(str(path), "w") as out:
            stream = out.add_stream(codec, rate=rate)
            stream.width, stream.height, stream.pix_fmt = self.width, self.height, pix_fmt
            stream.codec_context.time_base = time_base
            stream.time_base = time_base
            if codec in ("libx264", "libx265"):
                stream.options = {"crf": "10", "preset": "fast",
                                  **({"x265-params": "log-level=error"} if codec == "libx265" else {})}
            for key, value in tags.items():
                setattr(stream.codec_context, key, value)
            if rotation:
                stream.set_display_rotation(rotation)
            for k, p in enumerate(pts):
                img = self.clip.view(self.clip.row_times(k)) / 255.0  # float RGB in [0, 1]
                if deep:
                    rgb = av.VideoFrame.from_ndarray((np.clip(img, 0, 1) * 65535 + 0.5).astype(np.uint16), "rgb48le")
                else:
                    rgb = av.VideoFrame.from_ndarray((np.clip(img, 0, 1) * 255 + 0.5).astype(np.uint8), "rgb24")
                frame = rgb.reformat(format=pix_fmt)
                for key, value in tags.items():
                    setattr(frame, key, value)
                frame.pts, frame.time_base = int(p), time_base
                for packet in stream.encode(frame):
                    out.mux(packet)
            for packet in stream.encode():
                out.mux(packet)
        return path


def video_facts(path: Path) -> dict:
    with av.open(str(path)) as container:
        stream = container.streams.video[0]
        frames = list(container.decode(stream))
        cc = stream.codec_context
        return {
            "times": [f.pts * stream.time_base for f in frames],
            "size": (frames[0].width, frames[0].height),
            "rotation": frames[0].rotation,
            "pix_fmt": frames[0].format.name,
            "codec": cc.name,
            "stream_tags": {key: getattr(cc, key) for key in HDR_TAGS},
            "frame_tags": {key: getattr(frames[0], key) for key in HDR_TAGS},
            "first_luma": luma_samples(frames[0]),
            "rgb": [f.reformat(format="rgb24").to_ndarray() for f in frames],  # swscale copes with odd sizes
        }


def luma_samples(frame) -> np.ndarray:
    """The stored Y samples of a frame (uint16 for the 10-bit formats), without conversion."""
    plane = frame.planes[0]
    dtype = np.dtype("<u2" if frame.format.name.endswith(("10le", "12le", "16le")) else "u1")
    rows = np.frombuffer(plane, dtype).reshape(plane.height, plane.line_size // dtype.itemsize)
    return rows[:, : plane.width]


def assert_corrected(clip: PhoneClip, before: dict, after: dict, frames=(2, 4)) -> None:
    """Each frame is much closer to its global-shutter truth than the input was (common practice)."""
    for k in frames:
        view = clip.truth(k)
        was, now = truth.residual_flow(before["rgb"][k], view), truth.residual_flow(after["rgb"][k], view)
        assert now < min(0.5, 0.5 * was), (k, was, now)


def test_variable_frame_rate_keeps_its_timestamps(tmp_path):
    steps = [3000, 3400, 2700, 3900, 2400, 3100, 4200, 2200, 3300, 3000, 3500]  # 90 kHz ticks (made here)
    pts = np.concatenate([[0], np.cumsum(steps)])
    times = pts / 90000.0
    # a real VFR clip: frame times stray well away from k / (average rate)
    assert np.max(np.abs(times - frame_times_from_rate(len(pts), Fraction(30)))) > 5e-3
    clip = PhoneClip(320, 180, times)
    src = clip.write(tmp_path / "vfr.mp4", pts, PHONE_CLOCK, Fraction(30))
    out = tmp_path / "vfr_fixed.mp4"
    result = fix_clip(str(src), str(out), FixOptions(readout=READOUT))
    before, after = video_facts(src), video_facts(out)
    assert after["times"] == before["times"] == [Fraction(int(p), 90000) for p in pts]
    # the row clock was driven by the timestamps, not by k / fps (phones write variable frame rates: common practice)
    assert np.allclose(result.clock.frame_times, times, atol=1e-9)
    assert_corrected(clip, before, after, frames=(2, 5, 8))


def test_rotation_is_kept_and_rows_stay_stored_rows(tmp_path):
    clip = PhoneClip(320, 180, frame_times_from_rate(8, Fraction(30)))
    src = clip.write(tmp_path / "portrait.mp4", range(8), Fraction(1, 30), Fraction(30), rotation=90)
    out = tmp_path / "portrait_fixed.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=READOUT))
    before, after = video_facts(src), video_facts(out)
    assert before["rotation"] == 90  # what PyAV's display matrix gives back (made here)
    assert after["rotation"] == before["rotation"]
    assert after["size"] == before["size"] == (320, 180)  # stored, not turned to 180x320
    # the truth is in stored orientation: only a correction along stored rows matches it
    assert_corrected(clip, before, after)


@pytest.mark.parametrize("width,height,codec,pix_fmt,suffix", [
    (176, 144, "libx264", "yuv420p", ".mp4"),  # QCIF (ITU-T H.261/H.263 picture format, from memory)
    (1366, 768, "libx264", "yuv420p", ".mp4"),  # a common laptop panel size (common practice)
    (175, 143, "ffv1", "yuv420p", ".mkv"),  # odd both ways: FFV1 allows it (x264/x265 refuse odd 4:2:0)
])
def test_odd_sizes_are_kept(tmp_path, width, height, codec, pix_fmt, suffix):
    n = 6
    clip = PhoneClip(width, height, frame_times_from_rate(n, Fraction(30)))
    src = clip.write(tmp_path / f"odd{suffix}", range(n), Fraction(1, 30), Fraction(30), codec=codec,
                     pix_fmt=pix_fmt)
    out = tmp_path / f"odd_fixed{suffix}"
    fix_clip(str(src), str(out), FixOptions(readout=READOUT))
    before, after = video_facts(src), video_facts(out)
    assert after["size"] == before["size"] == (width, height)
    assert after["pix_fmt"] == before["pix_fmt"] and after["codec"] == before["codec"]
    assert len(after["times"]) == n
    assert_corrected(clip, before, after)


def test_ten_bit_hdr_keeps_its_colour_tags(tmp_path):
    n = 6
    clip = PhoneClip(320, 180, frame_times_from_rate(n, Fraction(30)))
    src = clip.write(tmp_path / "hdr.mp4", range(n), Fraction(1, 30), Fraction(30), codec="libx265",
                     pix_fmt="yuv420p10le", tags=HDR_TAGS, deep=True)
    out = tmp_path / "hdr_fixed.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=READOUT))
    before, after = video_facts(src), video_facts(out)
    # BT.2020 primaries and matrix (ITU-R BT.2020) and the PQ curve (SMPTE ST 2084) stay tagged
    assert before["stream_tags"] == before["frame_tags"] == HDR_TAGS
    assert after["stream_tags"] == HDR_TAGS and after["frame_tags"] == HDR_TAGS
    assert after["pix_fmt"] == "yuv420p10le" and after["codec"] == "hevc"
    # still 10-bit samples, not 8-bit ones in a 10-bit box: many distinct codes, some above 8-bit's 255
    assert after["first_luma"].max() > 255 and len(np.unique(after["first_luma"])) > 256
    assert_corrected(clip, before, after)


# --------------------------------------------------------------------------
# The row clock on phone timing (property-based)
# --------------------------------------------------------------------------

irregular_steps = st.lists(st.integers(min_value=1, max_value=9000), min_size=1, max_size=40)  # 90 kHz ticks


@given(irregular_steps, st.integers(min_value=2, max_value=4000), st.floats(min_value=0.0, max_value=0.05))
def test_rows_are_timed_from_each_frames_own_timestamp(steps, height, readout):
    times = np.concatenate([[0.0], np.cumsum(steps) / 90000.0])
    clock = RowClock(times, height, readout)
    k = np.arange(len(times))[:, None]
    rows = np.array([0, height // 2, height - 1])[None, :]
    # t(k, y) = t_k + readout * y / H (the row clock, skewfix/rowclock.py): the frame's own time, never k / fps
    assert np.allclose(clock.row_time(k, rows), times[:, None] + readout * rows / height, rtol=0, atol=1e-12)


@given(st.integers(min_value=2, max_value=4000), st.floats(min_value=0.0, max_value=0.05),
       st.floats(min_value=0.0, max_value=1.0))
def test_bottom_up_mirrors_top_down_and_skew_is_linear_in_readout(height, readout, where):
    # a sensor read bottom-up (or mounted upside down) reads row H-1-y when a top-down one
    # reads row y (fact of the trade); the lean grows linearly with the readout (fact of the trade)
    y = where * (height - 1)
    down = RowClock(np.array([0.0]), height, readout)
    up = RowClock(np.array([0.0]), height, readout, line_order="bottom-up")
    assert up.row_time(0, height - 1 - y) == pytest.approx(down.row_time(0, y), abs=1e-15)
    double = RowClock(np.array([0.0]), height, 2 * readout)
    assert double.row_time(0, y) == pytest.approx(2 * down.row_time(0, y), abs=1e-15)


@given(irregular_steps, st.floats(min_value=0.0, max_value=2.0))
def test_a_readout_fits_only_inside_the_frame_interval(steps, fraction):
    assume(not 1.0 < fraction < 1.0 + 1e-6)  # leave rounding at the boundary alone
    times = np.concatenate([[0.0], np.cumsum(steps) / 90000.0])
    interval = float(np.median(np.diff(times)))
    clock = RowClock(times, 1080, fraction * interval)
    # the readout fraction readout / frame interval is at most 1 (fact of the trade)
    if fraction <= 1.0:
        clock.check_readout_fits()
    else:
        with pytest.raises(UsageProblem, match="longer than the frame interval"):
            clock.check_readout_fits()


def test_hdr_code_points_are_ffmpegs(tmp_path):
    # FFmpeg, a general-purpose reference: its matrix-coefficient enumeration (exposed by PyAV)
    # numbers BT.2020 as H.273 does, and its MPEG transport-stream muxer counts time in 1/90000 s
    from av.video.reformatter import Colorspace

    assert Colorspace.BT2020 == HDR_TAGS["colorspace"]
    path = tmp_path / "clock.ts"
    with av.open(str(path), "w") as out:
        stream = out.add_stream("mpeg2video", rate=25)
        stream.width, stream.height, stream.pix_fmt = 64, 48, "yuv420p"
        for k in range(10):  # enough packets for the reader's probe
            frame = av.VideoFrame.from_ndarray(np.zeros((48, 64, 3), np.uint8), format="rgb24")
            frame = frame.reformat(format="yuv420p")
            frame.pts = k
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    with av.open(str(path)) as inp:
        assert inp.streams.video[0].time_base == PHONE_CLOCK
