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


# --------------------------------------------------------------------------
# The motion model and the lens on the command line
# --------------------------------------------------------------------------

BAD_LENS = [
    (("--hfov", "0"), "--hfov"),
    (("--hfov", "abc"), "--hfov"),
    (("--focal-length", "26"), "--focal-length"),  # a focal length needs its unit: 26mm or 26px
    (("--focal-length", "-3mm"), "--focal-length"),
    (("--lens-distortion", "a,b"), "--lens-distortion"),
    (("--model", "wobble"), "--model"),
    (("--hfov", "60", "--focal-length", "26mm"), "--focal-length"),  # one lens, given one way
]


@pytest.mark.parametrize("args,option", BAD_LENS, ids=[" ".join(a) for a, _ in BAD_LENS])
def test_bad_model_and_lens_options(small_clip, tmp_path, capsys, args, option):
    # common practice: 2 for a wrong command line, one line naming the option, nothing written
    assert main(["fix", str(small_clip), str(tmp_path / "o.mp4"), "--readout", "10ms", *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("skewfix: ") and option in err[0], err
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("command", [
    ("measure", "{clip}", "--method", "motion"),
    ("preview", "{clip}", "--readout", "10ms", "--out", "{tmp}/still.png"),
    ("batch", "{clip}", "--out", "{tmp}/out", "--readout", "10ms"),
])
@pytest.mark.parametrize("args,option", [(("--hfov", "abc"), "hfov"), (("--model", "wobble"), "model"),
                                         (("--lens-distortion", "a,b"), "lens-distortion")])
def test_other_commands_refuse_bad_lens_options(small_clip, tmp_path, capsys, command, args, option):
    # the same options on measure, preview and batch: exit 2, one line naming the option (common practice)
    argv = [part.format(clip=small_clip, tmp=tmp_path) for part in command] + list(args)
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and option in err[0], err
    assert list(tmp_path.iterdir()) == []


def test_help_explains_the_focal_length_forms(capsys):
    assert main(["fix", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.replace("│", " ").split())
    for words in ("--model", "--hfov", "--lens-distortion", "mm is the 35 mm-equivalent figure phone makers quote"):
        assert words in text, words


@pytest.mark.parametrize("argv", [
    ("fix", "{clip}", "{tmp}/o.mp4", "--readout", "10ms", "--crf", "abc"),
    ("fix", "{clip}", "{tmp}/o.mp4", "--readout", "10ms", "--depth", "16bit"),
    ("reskew", "{clip}", "{tmp}/o.mp4", "--motion", "{tmp}/m.json", "--crf", "1.5"),
    ("batch", "{clip}", "--out", "{tmp}/out", "--readout", "10ms", "--workers", "two"),
])
def test_a_whole_number_option_given_something_else(small_clip, tmp_path, capsys, argv):
    # common practice: exit 2, one line that names the option and repeats what was typed
    argv = [part.format(clip=small_clip, tmp=tmp_path) for part in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and argv[-2] in err[0] and f"not {argv[-1]!r}" in err[0], err
    assert "valid integer" not in err[0]  # the type checker's words, not ours
    assert list(tmp_path.iterdir()) == []


def test_option_placeholders_say_what_to_give(capsys):
    """An on/off option takes no value, so its help must not show one (typer would print
    ``<bool>``), --help itself included; an option that takes one names what to give, not a
    Python type (POSIX.1 "Utility Argument Syntax" shows an option-argument only for options
    that take one, by a name that says what it is; from memory). Every command's help."""
    for command in ([], ["fix"], ["measure"], ["reskew"], ["preview"], ["batch"], ["cameras"],
                    ["cameras", "list"], ["demo"]):
        assert main([*command, "--help"]) == 0
        text = capsys.readouterr().out
        assert "--help" in text and "<bool>" not in text, command
        # an option that takes a value names it (TIME, FILE.json...), not its Python type
        assert "<str>" not in text.split("Options")[-1] and "<int>" not in text, command


def motion_document(path):
    import json

    return json.loads(path.read_text())


def test_fix_with_the_similarity_writes_a_version_2_motion_file(small_clip, tmp_path, capsys):
    out, motion = tmp_path / "o.mp4", tmp_path / "o.motion.json"
    assert main(["fix", str(small_clip), str(out), "--readout", "20ms", "--model", "similarity",
                 "--save-motion", str(motion), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert out.stat().st_size > 1000
    doc = motion_document(motion)
    assert doc["version"] == 2 and doc["model"]["kind"] == "similarity"
    # the pipeline's note says which model was fitted and why; fix prints every note
    assert "note: motion model: 2-D similarity" in err and "asked for" in err


def test_fix_with_the_rotation_and_a_field_of_view(small_clip, tmp_path, capsys):
    import math

    out, motion = tmp_path / "o.mp4", tmp_path / "o.motion.json"
    assert main(["fix", str(small_clip), str(out), "--readout", "20ms", "--model", "rotation", "--hfov", "60",
                 "--save-motion", str(motion), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert out.stat().st_size > 1000
    doc = motion_document(motion)
    assert doc["version"] == 2 and doc["model"]["kind"] == "rotation"
    width = doc["source"]["width"]
    assert width == 320  # conftest's small clips
    # pinhole relation f = (W/2) / tan(hfov/2) (Hartley & Zisserman, Multiple View Geometry, sec. 6.1)
    assert doc["model"]["focal_length_px"] == pytest.approx((width / 2) / math.tan(math.radians(30)), rel=1e-9)
    assert "note: motion model: 3-D rotation" in err
