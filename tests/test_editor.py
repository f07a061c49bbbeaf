"""What an editor reaches for: part of a clip (--frames, timecodes), candidate readouts side by
side, an output folder that does not exist yet, --debug anywhere, plain error words."""

from __future__ import annotations

from fractions import Fraction

import av
import cv2
import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio

from conftest import decode_rgb, run_cli, write_sequence
from skewfix.errors import UsageProblem
from skewfix.framerange import frames_to_timecode, parse_frame_range, timecode_to_frames
from skewfix.synth.shutter import write_rgb_clip

run = run_cli
NTSC = Fraction(30000, 1001)


# --------------------------------------------------------------------------
# Timecodes
# --------------------------------------------------------------------------

@pytest.mark.parametrize("text,rate,frames", [
    ("00:00:04:00", Fraction(30), 120),  # 4 s at 30 frames a second
    ("00:00:16:00", Fraction(30), 480),
    ("00:00:01:00", Fraction(24000, 1001), 24),  # counted at the nominal 24 (SMPTE ST 12-1)
    # drop-frame at 30000/1001 (SMPTE ST 12-1): frame numbers 00 and 01 are skipped at each
    # minute but every tenth, so 00:01:00;02 directly follows 00:00:59;29 (frame 1799) ...
    ("00:00:59;29", NTSC, 1799),
    ("00:01:00;02", NTSC, 1800),
    # ... ten minutes hold 17 982 frames and an hour 107 892 (the standard's figures, from memory)
    ("00:10:00;00", NTSC, 17982),
    ("01:00:00;00", NTSC, 107892),
])
def test_timecodes_count_frames_as_the_standard_does(text, rate, frames):
    assert timecode_to_frames(text, rate) == frames
    assert frames_to_timecode(frames, rate, drop_frame=";" in text) == text  # and back


@pytest.mark.parametrize("text,words", [
    ("120", "FIRST-LAST"), ("480-120-3", "FIRST-LAST"), ("a-b", "neither"), ("-", "at least"),
    ("00:00:04-00:00:16", "neither"),
])
def test_frame_ranges_that_are_not_ranges_are_refused(text, words):
    with pytest.raises(UsageProblem, match=words):
        parse_frame_range(text)


def test_impossible_timecodes_are_refused():
    with pytest.raises(UsageProblem, match="frames 0-29"):
        timecode_to_frames("00:00:01:30", Fraction(30))
    with pytest.raises(UsageProblem, match="does not exist"):
        timecode_to_frames("00:01:00;00", NTSC)  # a dropped number
    with pytest.raises(UsageProblem, match="drop-frame"):
        timecode_to_frames("00:00:01;00", Fraction(25))


# --------------------------------------------------------------------------
# --frames on fix
# --------------------------------------------------------------------------

@pytest.fixture(scope="module")
def lossless_with_sound(clip_factory):
    """A 16-frame handheld clip in FFV1 (lossless: IETF RFC 9043) with AAC sound."""
    return clip_factory("handheld", 0.0, n_frames=16, codec="ffv1", suffix=".mkv", audio=True)[0]


def audio_packets(path):
    with av.open(str(path)) as c:
        stream = c.streams.audio[0]
        return [(float(p.pts * p.time_base), bytes(p)) for p in c.demux(stream) if p.size]


@pytest.mark.parametrize("frames", ["4-11", "00:00:00:03-00:00:00:10"], ids=["numbers", "timecodes"])
def test_fix_frames_writes_exactly_that_part_with_its_sound(lossless_with_sound, tmp_path, capsys, frames):
    # A global shutter (readout 0) has nothing to correct (fact of the trade) and FFV1 is
    # lossless, so the output must be the source's frames 4 to 11 (README: a video's frames are
    # numbered from 1; timecode 00:00:00:03 is frame 4), both included, bit for bit
    out = tmp_path / "new" / "part.mkv"  # its folder does not exist yet
    code, err = run(capsys, "fix", lossless_with_sound, out, "--readout", "0", "--frames", frames)
    assert code == 0, err
    assert "8 frames" in err and "frames 4 to 11" in err
    source, part = decode_rgb(lossless_with_sound), decode_rgb(out)
    assert len(part) == 8
    assert all(np.array_equal(a, b) for a, b in zip(part, source[3:11]))
    with av.open(str(out)) as c:
        assert [f.pts for f in c.decode(video=0)][0] == 0  # the part starts at its own time 0
    # the sound of the same stretch, moved by the same 3 frames: packets copied unchanged
    start, end = 3 / 30, 11 / 30  # the clip runs at 30 fps (conftest)
    wanted = [(t - start, data) for t, data in audio_packets(lossless_with_sound) if start <= t < end]
    got = audio_packets(out)
    assert [data for _, data in got] == [data for _, data in wanted] and len(got) >= 5
    assert np.allclose([t for t, _ in got], [t for t, _ in wanted], atol=1e-3)


def test_fix_frames_refuses_frames_the_clip_does_not_have(lossless_with_sound, tmp_path, capsys):
    code, err = run(capsys, "fix", lossless_with_sound, tmp_path / "o.mkv", "--readout", "0", "--frames", "11-17")
    assert code == 1 and "has 16 frames (1 to 16)" in err and "up to 17" in err
    assert list(tmp_path.iterdir()) == []


def test_sequence_frames_are_its_file_numbers(tmp_path, capsys):
    rng = np.random.default_rng(3)
    frames = [rng.integers(0, 256, (36, 64, 3), dtype=np.uint8) for _ in range(8)]
    write_sequence(tmp_path, "plate.{:04d}.png", frames, first=1001)
    code, err = run(capsys, "fix", tmp_path / "plate.%04d.png", tmp_path / "out" / "fixed.%04d.png",
                    "--readout", "0", "--fps", "24", "--frames", "1003-1006", "--quiet")
    assert code == 0, err
    written = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert written == [f"fixed.{n}.png" for n in range(1003, 1007)]  # numbered like the input's files
    for n in range(1003, 1007):  # readout 0 and PNG (lossless): the same pictures
        out = cv2.cvtColor(cv2.imread(str(tmp_path / "out" / f"fixed.{n}.png")), cv2.COLOR_BGR2RGB)
        assert np.array_equal(out, frames[n - 1001])
    code, err = run(capsys, "fix", tmp_path / "plate.%04d.png", tmp_path / "x.%04d.png", "--readout", "0",
                    "--fps", "24", "--frames", "12-14")
    assert code == 1 and "comes before the first frame, 1001" in err


def test_timecodes_count_from_the_clips_own_start_timecode(tmp_path, capsys):
    """A clip that carries a start timecode (cameras write one) is cut by its own timecodes."""
    rng = np.random.default_rng(5)
    frames = [rng.integers(0, 256, (48, 64, 3), dtype=np.uint8) for _ in range(10)]
    path = tmp_path / "tc.mkv"
    with av.open(str(path), "w") as out:
        out.metadata["timecode"] = "01:00:00:00"
        stream = out.add_stream("ffv1", rate=25)
        stream.width, stream.height, stream.pix_fmt = 64, 48, "yuv444p"
        for k, rgb in enumerate(frames):
            frame = av.VideoFrame.from_ndarray(rgb, format="rgb24")
            frame.pts = k
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)
    code, err = run(capsys, "fix", path, tmp_path / "part.mkv", "--readout", "0", "--quiet",
                    "--frames", "01:00:00:05-01:00:00:08")
    assert code == 0, err
    assert all(np.array_equal(a, b) for a, b in zip(decode_rgb(tmp_path / "part.mkv"), decode_rgb(path)[5:9]))
    assert len(decode_rgb(tmp_path / "part.mkv")) == 4
    code, err = run(capsys, "fix", path, tmp_path / "early.mkv", "--readout", "0", "--frames", "00:59:59:00-")
    assert code == 1 and "before the clip's start timecode 01:00:00:00" in err


def test_a_camera_mov_keeps_its_timecode_track_and_a_part_starts_later(tmp_path, capsys):
    """Cameras write MOV files with a timecode track; the output carries the timecode (a part's
    moved on to its first frame), written as a timecode track of its own by FFmpeg's muxer."""
    rng = np.random.default_rng(6)
    path = tmp_path / "A001.mov"
    with av.open(str(path), "w") as out:
        out.metadata["timecode"] = "01:00:00:00"  # FFmpeg's MOV muxer makes a timecode track of it
        stream = out.add_stream("libx264", rate=25)
        stream.width, stream.height, stream.pix_fmt = 96, 64, "yuv420p"
        for k in range(10):
            frame = av.VideoFrame.from_ndarray(rng.integers(0, 256, (64, 96, 3), dtype=np.uint8), format="rgb24")
            frame.pts = k
            for packet in stream.encode(frame):
                out.mux(packet)
        for packet in stream.encode():
            out.mux(packet)

    def timecodes(clip):
        with av.open(str(clip)) as c:
            return {s.type: s.metadata.get("timecode") for s in c.streams}

    assert timecodes(path) == {"video": "01:00:00:00", "data": "01:00:00:00"}
    for frames, name, expected in ((None, "whole.mov", "01:00:00:00"), ("4-9", "part.mov", "01:00:00:03")):
        code, err = run(capsys, "fix", path, tmp_path / name, "--readout", "0", "--quiet",
                        *(("--frames", frames) if frames else ()))
        assert code == 0, err
        assert timecodes(tmp_path / name) == {"video": expected, "data": expected}


# --------------------------------------------------------------------------
# preview: candidates side by side, and --frames
# --------------------------------------------------------------------------

def test_preview_candidates_side_by_side_the_right_one_is_closest_to_the_truth(truth_clip, tmp_path, capsys):
    readout, k = 0.024, 8
    clip = truth_clip("whip", readout, n_frames=16)  # rendered by tests/truth.py
    path, renderer = clip.path, clip.clip
    still = tmp_path / "looks" / "candidates.png"
    code, err = run(capsys, "preview", path, "--readout", "16ms,24ms,32ms", "--frame", k + 1, "--frames", "2-14",
                    "--out", still, "--quiet")
    assert code == 0, err
    panel = cv2.cvtColor(cv2.imread(str(still)), cv2.COLOR_BGR2RGB)
    w, h = renderer.width, renderer.height
    assert panel.shape == (h + 36, 4 * w + 3 * 8, 3)  # as shot and three candidates, 8 px apart
    truth = clip.global_view(k)  # frame number k + 1 is position k (README: video frames from 1)
    inner = (slice(h // 6, -h // 6), slice(w // 6, -w // 6))  # away from the filled edges

    def psnr(i):  # scikit-image's PSNR of panel i against the global-shutter truth
        img = panel[36:, i * (w + 8):i * (w + 8) + w]
        return peak_signal_noise_ratio(truth[inner], img[inner], data_range=255)

    scores = [psnr(i) for i in range(4)]
    assert scores[2] == max(scores), scores  # the true readout's correction looks most like the truth
    assert err.count("note: readout") == 3


# --------------------------------------------------------------------------
# The command line itself
# --------------------------------------------------------------------------

def test_debug_works_after_the_command_too(tmp_path, capsys):
    from skewfix.cli import main

    with pytest.raises(Exception) as raised:
        main(["fix", str(tmp_path / "nope.mp4"), str(tmp_path / "o.mp4"), "--readout", "10ms", "--debug"])
    assert "no such file" in str(raised.value)
    code, err = run(capsys, "fix", tmp_path / "nope.mp4", tmp_path / "o.mp4", "--readout", "10ms")
    assert code == 1 and err.count("\n") == 1 and "no such file" in err  # without it: one line


def test_ffmpeg_errors_come_in_plain_words(tmp_path, capsys):
    junk = tmp_path / "card.mp4"
    junk.write_bytes(np.random.default_rng(0).integers(0, 256, 4000, dtype=np.uint8).tobytes())
    code, err = run(capsys, "fix", junk, tmp_path / "o.mp4", "--readout", "10ms")
    assert code == 1 and err.startswith(f"skewfix: {junk}: ") and err.count("\n") == 1, err
    assert "Errno" not in err and "Invalid data found" not in err and "damaged" in err


def test_an_output_folder_made_for_a_run_that_fails_is_removed_again(tmp_path):
    from skewfix.decode import open_source
    from skewfix.encode import VideoSink

    clip = tmp_path / "in.mp4"
    write_rgb_clip(clip, [np.zeros((32, 48, 3), np.uint8)] * 3, Fraction(25))
    with open_source(clip) as source:
        sink = VideoSink(tmp_path / "a" / "b" / "out.mp4", source.info)
    assert (tmp_path / "a" / "b").is_dir()
    sink.abort()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.mp4"]


def test_measure_frames_measures_only_that_part(truth_clip, tmp_path, capsys):
    import json

    from skewfix.pipeline import analyse

    readout = 0.024
    path = truth_clip("whip", readout, n_frames=24).path  # rendered by tests/truth.py
    assert analyse(str(path), frames=parse_frame_range("4-19")).n_frames == 16
    code, err = run(capsys, "measure", path, "--method", "motion", "--frames", "4-19", "--json",
                    tmp_path / "m.json", "--quiet")
    assert code == 0, err
    result = json.loads((tmp_path / "m.json").read_text())
    assert result["frames_used"] and set(result["frames_used"]) <= set(range(4, 20))  # the clip's numbers
    # the motion method on a whip pan: within 15 % of the rendered readout (common practice)
    assert result["readout_ms"] == pytest.approx(readout * 1e3, rel=0.15)


def test_motion_of_a_part_carries_the_part_s_frame_numbers(lossless_with_sound, tmp_path, capsys):
    # README, "Frame numbers": the motion file and its table name frames as the clip does,
    # so a part written with --frames 4-11 starts at frame 4, not at 1
    import csv

    from skewfix.motionfile import load_motion

    code, err = run(capsys, "fix", lossless_with_sound, tmp_path / "p.mkv", "--readout", "10ms", "--frames", "4-11",
                    "--save-motion", tmp_path / "m.json", "--save-motion-csv", tmp_path / "m.csv", "--quiet")
    assert code == 0, err
    *_, meta = load_motion(tmp_path / "m.json")
    assert meta["first_number"] == 4 and meta["frame_count"] == 8
    assert [int(r["frame"]) for r in csv.DictReader((tmp_path / "m.csv").open())] == list(range(4, 12))
