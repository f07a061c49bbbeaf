"""The fix command's errors: one line, the right exit status, nothing lost."""

import hashlib
import subprocess
import sys

import pytest

from skewfix.cli import main


def run(*args):
    proc = subprocess.run([sys.executable, "-m", "skewfix", *map(str, args)], capture_output=True, text=True, timeout=120)
    return proc.returncode, proc.stdout, proc.stderr


@pytest.fixture(scope="module")
def small_clip(clip_factory):
    return clip_factory("handheld", 0.02, n_frames=8)[0]


@pytest.mark.parametrize("readout,code,needle", [
    ("-3ms", 2, "negative"),
    ("fast!", 2, "not a duration"),
    ("50ms", 2, "longer than the frame interval"),  # 30 fps: frames last 33.3 ms
])
def test_bad_readout(small_clip, tmp_path, readout, code, needle):
    rc, out, err = run("fix", small_clip, tmp_path / "o.mp4", "--readout", readout)
    assert rc == code, err
    assert needle in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o.mp4").exists()


def test_output_equal_to_input_is_refused(small_clip):
    before = hashlib.sha256(small_clip.read_bytes()).hexdigest()
    rc, _, err = run("fix", small_clip, small_clip, "--readout", "10ms", "--force")
    assert rc == 2 and "same file as INPUT" in err
    assert hashlib.sha256(small_clip.read_bytes()).hexdigest() == before


def test_existing_output_needs_force(small_clip, tmp_path):
    out = tmp_path / "exists.mp4"
    out.write_bytes(b"keep me")
    rc, _, err = run("fix", small_clip, out, "--readout", "10ms")
    assert rc == 2 and "--force" in err
    assert out.read_bytes() == b"keep me"
    rc, _, err = run("fix", small_clip, out, "--readout", "10ms", "--force", "--quiet")
    assert rc == 0, err
    assert out.stat().st_size > 1000


def test_missing_and_unreadable_inputs(tmp_path):
    rc, _, err = run("fix", tmp_path / "nope.mp4", tmp_path / "o.mp4", "--readout", "10ms")
    assert rc == 1 and "no such file" in err and "Traceback" not in err
    fake = tmp_path / "notes.mp4"
    fake.write_text("this is not a video\n")
    rc, _, err = run("fix", fake, tmp_path / "o.mp4", "--readout", "10ms")
    assert rc == 1 and "not a readable video" in err and "Traceback" not in err


def test_unknown_codec_and_border(small_clip, tmp_path):
    assert main(["fix", str(small_clip), str(tmp_path / "o.mp4"), "--readout", "5", "--codec", "vp7"]) == 2
    assert main(["fix", str(small_clip), str(tmp_path / "o.mp4"), "--readout", "5", "--border", "mirror"]) == 2
    assert main(["fix", str(small_clip), str(tmp_path / "o.mp4"), "--readout", "5", "--line-order", "sideways"]) == 2
    assert not (tmp_path / "o.mp4").exists()


def test_missing_option_is_a_usage_error(small_clip, tmp_path, capsys):
    assert main(["fix", str(small_clip), str(tmp_path / "o.mp4")]) == 2
    err = capsys.readouterr().err
    assert "--readout" in err and len(err.strip().splitlines()) == 1
