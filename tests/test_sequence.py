"""Image sequences in and out: numbering, missing frames, depth, colour, whole-or-nothing writing."""

from __future__ import annotations

import os
from fractions import Fraction
from pathlib import Path

import av
import cv2
import numpy as np
import pytest
from skimage import data

from conftest import run_cli, write_sequence
from skewfix.decode import VideoInfo
from skewfix.encode import fill_frame
from skewfix.sequence import ImageSequenceSink, ImageSequenceSource, planes_to_rgb

W, H = 320, 180


run = run_cli


def astronaut_frames(n: int, bits: int) -> list[np.ndarray]:
    """n crops of scikit-image's astronaut photograph drifting right, RGB at 8 or 16 bit."""
    img = data.astronaut()
    frames = []
    rng = np.random.default_rng(7)
    for k in range(n):
        crop = img[100:100 + H, 40 + 3 * k:40 + 3 * k + W]
        if bits == 16:  # use the low byte too, so a truncation to 8 bits would show
            crop = crop.astype(np.uint16) * 257 + rng.integers(0, 200, crop.shape, dtype=np.uint16)
        frames.append(np.ascontiguousarray(crop))
    return frames


def read_rgb(path) -> np.ndarray:
    img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    assert img is not None, path
    return cv2.cvtColor(img, cv2.COLOR_BGR2RGB)


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_sixteen_bit_sequence_keeps_numbers_and_global_shutter_is_identity(tmp_path, capsys):
    # Fact of the trade: a global shutter (readout 0) reads every row at once,
    # so there is nothing to correct and a 16-bit plate must come back bit for bit.
    frames = astronaut_frames(8, 16)
    write_sequence(tmp_path, "plate.{:04d}.tif", frames, first=1001)
    code, err = run(capsys, "fix", tmp_path / "plate.####.tif", tmp_path / "fixed.%04d.tif",
                    "--readout", "0", "--fps", "24", "--quiet")
    assert code == 0, err
    written = sorted(p.name for p in tmp_path.glob("fixed.*.tif"))
    assert written == [f"fixed.{n:04d}.tif" for n in range(1001, 1009)]  # same first number as the input
    for k, rgb in enumerate(frames):
        out = read_rgb(tmp_path / f"fixed.{1001 + k:04d}.tif")
        assert out.dtype == np.uint16
        np.testing.assert_array_equal(out, rgb)
    assert leftovers(tmp_path) == []  # no staging folder left behind


def test_source_reads_in_numeric_order_with_rate_from_fps(tmp_path):
    frames = astronaut_frames(3, 8)
    write_sequence(tmp_path, "s.{}.png", frames, first=9)  # 9, 10, 11: numeric, not name, order
    src = ImageSequenceSource(tmp_path / "s.%d.png", Fraction(24000, 1001))
    assert src.info.is_sequence and src.info.first_number == 9 and src.info.frame_count == 3
    # NTSC-family rate 24000/1001 (SMPTE ST 12-1): frame k starts at k * 1001/24000 s.
    got = list(src.frames())
    assert [f.time for f in got] == pytest.approx([0.0, 1001 / 24000, 2 * 1001 / 24000], abs=1e-12)
    for f, rgb in zip(got, frames):
        np.testing.assert_array_equal(f.planes[0], rgb)
        assert f.is_rgb and f.subsampling == [(1, 1)] and f.bit_depth == 8


def test_missing_frame_is_named_and_nothing_is_written(tmp_path, capsys):
    frames = astronaut_frames(4, 8)
    write_sequence(tmp_path, "p.{:04d}.png", frames[:2], first=1)
    write_sequence(tmp_path, "p.{:04d}.png", frames[3:], first=4)  # 0003 is missing
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "o.%04d.png", "--readout", "5ms",
                    "--fps", "25")
    assert code == 1
    assert "p.0003.png" in err and "missing" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not list(tmp_path.glob("o.*")) and leftovers(tmp_path) == []


def test_no_matching_files_and_no_frame_rate(tmp_path, capsys):
    code, err = run(capsys, "fix", tmp_path / "none.%04d.png", tmp_path / "o.%04d.png", "--readout", "5ms",
                    "--fps", "25")
    assert code == 1 and "none.%04d.png" in err and "no files match" in err
    write_sequence(tmp_path, "p.{:04d}.png", astronaut_frames(2, 8), first=1)
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "o.%04d.png", "--readout", "5ms")
    assert code == 2 and "--fps" in err and len(err.strip().splitlines()) == 1


def write_planar_clip(path: Path, planes_per_frame, pix_fmt: str) -> None:
    """Encode raw planes losslessly with FFV1 (FFmpeg's lossless codec)."""
    with av.open(str(path), "w") as out:
        h, w = planes_per_frame[0][0].shape
        stream = out.add_stream("ffv1", rate=25)
        stream.width, stream.height, stream.pix_fmt = w, h, pix_fmt
        for i, planes in enumerate(planes_per_frame):
            frame = av.VideoFrame(w, h, pix_fmt)
            fill_frame(frame, planes)
            frame.pts = i
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)


def test_ten_bit_video_ramp_survives_to_16_bit_tiff(tmp_path, capsys):
    # ITU-R BT.709-6 / BT.2100 narrow range, 10 bit: black at code 64, nominal white at 940,
    # neutral chroma at 512. Every one of the 877 luma levels must land on its own 16-bit
    # level, in order, with black at 0 and white at 65535 (no banding, no truncation).
    w, h = 64, 32
    levels = 64 + np.arange(w * h) % 877
    y = levels.reshape(h, w).astype(np.uint16)
    chroma = np.full((h // 2, w // 2), 512, np.uint16)
    write_planar_clip(tmp_path / "ramp.mkv", [[y, chroma, chroma]] * 3, "yuv420p10le")
    code, err = run(capsys, "fix", tmp_path / "ramp.mkv", tmp_path / "r.%04d.tif", "--readout", "0", "--quiet")
    assert code == 0, err
    out = read_rgb(tmp_path / "r.0001.tif")  # video input: numbered from 1
    assert out.dtype == np.uint16
    green = out[..., 1].ravel()
    pairs = {int(a): int(b) for a, b in zip(levels, green)}
    mapped = np.array([pairs[v] for v in range(64, 941)])
    assert len(np.unique(mapped)) == 877 and np.all(np.diff(mapped) > 0)
    assert mapped[0] == 0 and mapped[-1] == 65535
    # textbook narrow-range scaling: (Y - 64) / 876 of full scale, rounded
    np.testing.assert_allclose(mapped, np.round((np.arange(64, 941) - 64) * 65535 / 876), atol=1)
    np.testing.assert_allclose(out[..., 0], out[..., 1], atol=1)  # neutral chroma: grey
    code, err = run(capsys, "fix", tmp_path / "ramp.mkv", tmp_path / "e.%04d.png", "--readout", "0",
                    "--depth", "8", "--quiet")
    assert code == 0, err
    eight = read_rgb(tmp_path / "e.0001.png")[..., 1].ravel()
    assert eight.dtype == np.uint8
    np.testing.assert_allclose(eight, np.round((levels - 64) * 255 / 876), atol=1)


def test_ten_bit_rgb_scales_to_full_16_bit_range(tmp_path, capsys):
    # Full-range depth change v * 65535 / 1023, rounded (common practice): 1023 must give
    # 65535; a 6-bit left shift would stop at 65472.
    w, h = 64, 16
    ramp = (np.arange(w * h) % 1024).reshape(h, w).astype(np.uint16)
    write_planar_clip(tmp_path / "rgb.mkv", [[ramp, ramp, ramp]] * 3, "gbrp10le")
    code, err = run(capsys, "fix", tmp_path / "rgb.mkv", tmp_path / "g.%04d.png", "--readout", "0", "--quiet")
    assert code == 0, err
    out = read_rgb(tmp_path / "g.0001.png")
    expected = np.round(ramp.astype(np.float64) * 65535 / 1023)
    for c in range(3):
        np.testing.assert_array_equal(out[..., c], expected)


def test_yuv_to_rgb_agrees_with_scikit_image():
    # Reference: scikit-image's ycbcr2rgb (ITU-R BT.601, narrow range: Y 16-235, Cb/Cr 16-240),
    # which is also the matrix FFmpeg assumes for untagged video. 4:4:4 planes, so no chroma
    # interpolation enters; at 16-bit output the two must agree to within one level.
    from skimage.color import ycbcr2rgb

    rng = np.random.default_rng(0)
    y = rng.integers(16, 236, (32, 48), dtype=np.uint8)
    cb, cr = (rng.integers(16, 241, (32, 48), dtype=np.uint8) for _ in range(2))
    info = VideoInfo("untagged.mkv", 48, 32, "yuv444p", 8, "ffv1", None, Fraction(25), Fraction(1, 25), None, None,
                     color={"colorspace": 2, "color_range": 0})  # 2 = unspecified (ITU-T H.273)
    ours = planes_to_rgb([y, cb, cr], "yuv444p", info, 16).astype(np.float64)
    ref = np.clip(ycbcr2rgb(np.dstack([y, cb, cr]).astype(np.float64)), 0, 1) * 65535
    assert np.abs(ours - ref).max() <= 1.0


def test_sink_writes_whole_or_not_at_all(tmp_path):
    frames = astronaut_frames(3, 8)
    info = VideoInfo("clip.mp4", W, H, "rgb24", 8, "png", None, Fraction(25), Fraction(1, 25), 3, None,
                     is_rgb=True)
    sink = ImageSequenceSink(str(tmp_path / "o.%04d.png"), info)
    for k, rgb in enumerate(frames[:2]):
        sink.write_planes([rgb], k, "rgb24")
    assert not list(tmp_path.glob("o.*"))  # nothing visible before finish
    sink.abort()
    assert os.listdir(tmp_path) == []  # and nothing at all after abort

    sink = ImageSequenceSink(str(tmp_path / "o.%04d.png"), info)
    for k, rgb in enumerate(frames):
        sink.write_planes([rgb], k, "rgb24")
    sink.finish()
    assert sorted(os.listdir(tmp_path)) == ["o.0001.png", "o.0002.png", "o.0003.png"]
    np.testing.assert_array_equal(read_rgb(tmp_path / "o.0003.png"), frames[2])


def test_existing_sequence_needs_force_and_is_replaced_whole(tmp_path, capsys):
    write_sequence(tmp_path, "p.{:04d}.png", astronaut_frames(3, 8), first=1)
    for n in (1, 2, 3, 4, 5):  # an older, longer render at the output name
        (tmp_path / f"o.{n:04d}.png").write_bytes(b"old")
    args = ["fix", tmp_path / "p.%04d.png", tmp_path / "o.%04d.png", "--readout", "0", "--fps", "25", "--quiet"]
    code, err = run(capsys, *args)
    assert code == 2 and "--force" in err
    assert (tmp_path / "o.0001.png").read_bytes() == b"old"
    code, err = run(capsys, *args, "--force")
    assert code == 0, err
    assert sorted(p.name for p in tmp_path.glob("o.*")) == ["o.0001.png", "o.0002.png", "o.0003.png"]
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "p.%04d.png", "--readout", "0",
                    "--fps", "25", "--force")
    assert code == 2 and "same sequence as INPUT" in err


def test_a_clip_with_a_hash_in_its_name_is_a_clip(clip_factory, tmp_path):
    """Take numbers like ``take#2`` are common in clip names (common practice); only a
    ``%04d`` field, or ``####`` in an image file's name, makes a numbered sequence."""
    import shutil

    from skewfix.pipeline import FixOptions, fix_clip
    from skewfix.sequence import is_pattern

    src, _renderer, _clock = clip_factory("steady", readout=0.02)
    take = tmp_path / "take#2.mp4"
    shutil.copy(src, take)
    assert not is_pattern(take) and is_pattern("plate.####.tif") and is_pattern("plate.%04d.png")
    result = fix_clip(str(take), str(tmp_path / "take#2_fixed.mp4"), FixOptions(readout=0.02))
    assert result.frames_written == 16 and (tmp_path / "take#2_fixed.mp4").exists()
