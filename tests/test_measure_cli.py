"""`skewfix measure` and `skewfix cameras` driven in-process through `skewfix.cli.main`."""

from __future__ import annotations

import hashlib
import json
import math
import os
import sys
import types
from fractions import Fraction

import pytest

from skewfix.cli import main
from skewfix.cli.measure import frame_ranges, parse_exposure
from skewfix.errors import MeasurementRefused, UsageProblem
from skewfix.synth.edges import render_pan_clip
from skewfix.synth.paths import Still

W, H = 320, 180
READOUT = 0.020
JSON_KEYS = {"readout_ms", "line_delay_us", "readout_fraction", "line_order", "uncertainty_ms",
             "method", "frames_used"}



@pytest.fixture(scope="module")
def clips(tmp_path_factory):
    root = tmp_path_factory.mktemp("measure_cli")
    pan, still = root / "steady_pan.mp4", root / "still.mp4"
    render_pan_clip(pan, W, H, Fraction(30), 20, READOUT, speeds_px_s=(900.0,))
    render_pan_clip(still, W, H, Fraction(30), 10, READOUT, camera=Still())
    return {"pan": str(pan), "still": str(still), "root": root}


def one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("skewfix: ")
    return err[0]


def sha256(path) -> str:
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def test_pan_measure_writes_json_plot_and_camera(clips, tmp_path, capsys, config_dir):
    out_json, out_png = tmp_path / "result.json", tmp_path / "result.png"
    before = sha256(clips["pan"])
    rc = main(["measure", clips["pan"], "--method", "pan", "--json", str(out_json), "--plot", str(out_png),
               "--save-camera", "test-body"])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    assert sha256(clips["pan"]) == before  # the input is never touched
    data = json.loads(out_json.read_text())
    assert JSON_KEYS <= set(data)
    # the pan method's accuracy target: within 3 % of the true readout (the renderer's truth)
    assert data["readout_ms"] == pytest.approx(READOUT * 1e3, rel=0.03)
    assert data["line_delay_us"] == pytest.approx(data["readout_ms"] * 1e3 / H)
    assert data["readout_fraction"] == pytest.approx(data["readout_ms"] / (1000 / 30))
    assert data["method"] == "pan" and data["line_order"] == "top-down"
    assert data["uncertainty_ms"] > 0 and len(data["frames_used"]) >= 10
    assert out_png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    assert not [n for n in os.listdir(tmp_path) if "partial" in n]  # written whole, no leftovers
    assert "readout" in captured.out and "pan" in captured.out
    assert frame_ranges(data["frames_used"]) in captured.out
    saved = (config_dir / "cameras" / "test-body.camera").read_text()
    assert "method: pan" in saved and "width: 320" in saved and "frame_rate: 30/1" in saved

    assert main(["cameras", "list"]) == 0
    listed = capsys.readouterr().out
    assert "test-body" in listed and "320x180" in listed
    assert main(["cameras", "show", "test-body"]) == 0
    shown = capsys.readouterr().out
    assert "steady_pan.mp4" in shown and "top-down" in shown
    assert main(["cameras", "remove", "test-body"]) == 0
    capsys.readouterr()
    assert main(["cameras", "remove", "test-body"]) == 2
    assert "no saved camera" in one_error_line(capsys)


@pytest.fixture
def motion_refuses(monkeypatch):
    """Stand-in for the motion method that refuses, as it must on a constant-velocity
    pan (the real method is tested in its own file)."""
    fake = types.ModuleType("skewfix.measure.motion_fit")

    def measure_motion(analysis, line_order=None, kind=None, progress=None):
        raise MeasurementRefused("the motion is too steady to reveal the readout")

    fake.measure_motion = measure_motion
    monkeypatch.setitem(sys.modules, "skewfix.measure.motion_fit", fake)


def test_auto_falls_back_to_pan_and_says_why(clips, tmp_path, capsys, motion_refuses):
    out_json = tmp_path / "auto.json"
    rc = main(["measure", clips["pan"], "--json", str(out_json)])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    assert json.loads(out_json.read_text())["method"] == "pan"
    assert "motion could not: the motion is too steady" in captured.err


def test_auto_tries_flicker_first_when_a_light_is_given(clips, tmp_path, capsys, motion_refuses):
    # a bar chart under steady light has no flicker bands: flicker refuses, then motion, then pan
    out_json = tmp_path / "auto.json"
    rc = main(["measure", clips["pan"], "--light-hz", "100", "--json", str(out_json)])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    assert json.loads(out_json.read_text())["method"] == "pan"
    assert "flicker could not" in captured.err and "motion could not" in captured.err


def test_auto_refusal_names_every_method_and_what_to_do(clips, capsys, motion_refuses, tmp_path):
    png = tmp_path / "refused.png"
    assert main(["measure", clips["still"], "--quiet", "--plot", str(png)]) == 1
    line = one_error_line(capsys)
    assert "no method could measure this clip" in line and "motion:" in line and "pan:" in line
    # what to do next: a test clip, a saved camera, or candidates compared by eye
    assert "flicker test" in line and "pan test" in line and "--readout NAME" in line
    assert "preview --readout 12ms,16ms,20ms" in line
    # the plot is written for a refusal too (PNG signature, ISO/IEC 15948)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def wall_24fps(tmp_path_factory):
    """A wall under a 100 Hz light (a lamp on 50 Hz mains: IEC 60038; the power goes as v^2, Joule's
    law, so twice the mains frequency) shot at 24 fps: f/fps = 4.17, the bands drift 4 Hz."""
    from skewfix.synth.flicker import render_flicker_clip

    clip = tmp_path_factory.mktemp("wall24") / "wall24.mp4"
    render_flicker_clip(clip, 320, 240, Fraction(24), 16, 0.020, 100.0, seed=3)
    return str(clip)


@pytest.mark.parametrize("given", ["50", "120"])
def test_wrong_light_frequency_is_refused_in_one_line(wall_24fps, tmp_path, capsys, given):
    png = tmp_path / "wrong.png"
    rc = main(["measure", wall_24fps, "--method", "flicker", "--light-hz", given, "--quiet", "--plot", str(png)])
    assert rc == 1
    line = one_error_line(capsys)
    assert "the bands drift as a 100 Hz light would" in line and "--light-hz 100" in line
    if given == "50":  # the mains frequency given instead of twice it
        assert "twice the mains frequency" in line
    assert png.read_bytes()[:4] == b"\x89PNG"  # the refused fit is drawn, marked


def test_light_hz_auto_says_which_and_why(wall_24fps, tmp_path, capsys):
    out_json = tmp_path / "auto.json"
    assert main(["measure", wall_24fps, "--method", "flicker", "--light-hz", "auto", "--json", str(out_json)]) == 0
    err = capsys.readouterr().err
    assert "--light-hz auto took 100 Hz" in err and "not with 120 Hz" in err
    # the renderer's truth: 20 ms (the flicker method's target, 0.5 %)
    assert json.loads(out_json.read_text())["readout_ms"] == pytest.approx(20.0, rel=0.005)


def test_flat_field_of_another_size_is_refused(wall_24fps, clips, capsys):
    assert main(["measure", wall_24fps, "--method", "flicker", "--light-hz", "100", "--flat", clips["pan"],
                 "--quiet"]) == 1
    assert "flat field" in one_error_line(capsys)


def test_bad_light_hz_is_a_usage_problem(wall_24fps, capsys):
    assert main(["measure", wall_24fps, "--light-hz", "mains", "--quiet"]) == 2
    assert "--light-hz" in one_error_line(capsys)


def test_quiet_prints_one_line(clips, capsys):
    assert main(["measure", clips["pan"], "--method", "pan", "--quiet"]) == 0
    captured = capsys.readouterr()
    lines = captured.out.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("readout ") and captured.err == ""


def test_pan_refusal_is_one_line(clips, capsys):
    rc = main(["measure", clips["still"], "--method", "pan", "--quiet"])
    assert rc == 1
    assert "no steady pan" in one_error_line(capsys)


@pytest.mark.parametrize("args, needle", [
    (["--method", "flicker"], "--light-hz"),
    (["--method", "sideways"], "--method"),
    (["--light-hz", "0"], "--light-hz"),
    (["--light-hz", "-100"], "--light-hz"),
    (["--exposure", "soon"], "exposure"),
    (["--save-camera", "../escape"], "camera name"),
    (["--save-camera", "auto"], "camera name"),
    (["--json", "/no/such/folder/x.json"], "does not exist"),
])
def test_usage_problems_exit_2_with_one_line(clips, capsys, args, needle):
    assert main(["measure", clips["pan"], "--quiet", *args]) == 2
    assert needle in one_error_line(capsys)


def test_report_path_may_not_be_the_clip(clips, capsys):
    before = sha256(clips["pan"])
    assert main(["measure", clips["pan"], "--quiet", "--json", clips["pan"]]) == 2
    assert "never overwritten" in one_error_line(capsys)
    assert sha256(clips["pan"]) == before


def test_missing_clip_exits_1(tmp_path, capsys):
    assert main(["measure", str(tmp_path / "nothing.mp4"), "--method", "pan", "--quiet"]) == 1
    assert "no such file" in one_error_line(capsys)


def test_flicker_clip_through_the_command(tmp_path, capsys):
    # Truth from the renderer (skewfix.synth.flicker): a 20 ms readout under a
    # 100 Hz light (mains at 50 Hz flickers at twice its frequency, IEC 60038).
    from skewfix.synth.flicker import render_flicker_clip

    clip = tmp_path / "wall.mp4"
    render_flicker_clip(clip, 320, 240, Fraction(25), 12, 0.020, 100.0)
    out_json = tmp_path / "wall.json"
    rc = main(["measure", str(clip), "--method", "flicker", "--light-hz", "100", "--exposure", "1/1000",
               "--json", str(out_json), "--plot", str(tmp_path / "wall.png")])
    captured = capsys.readouterr()
    assert rc == 0, captured.err
    data = json.loads(out_json.read_text())
    assert data["method"] == "flicker" and len(data["frames_used"]) == 12
    assert data["readout_ms"] == pytest.approx(20.0, rel=0.01)
    assert "seizure" in captured.err  # the caution is repeated when a flicker light is involved
    assert (tmp_path / "wall.png").read_bytes()[:4] == b"\x89PNG"


def test_help_carries_the_safety_caution(capsys):
    assert main(["measure", "--help"]) == 0
    text = capsys.readouterr().out.lower()
    for word in ("seizures", "photosensitive", "mains-powered", "qualified", "local"):
        assert word in text


def test_cameras_list_when_empty(capsys, config_dir):
    assert main(["cameras", "list"]) == 0
    assert "no saved cameras" in capsys.readouterr().out
    assert main(["cameras", "show", "nosuch"]) == 2
    assert "no saved camera called 'nosuch'" in one_error_line(capsys)


def test_exposure_and_frame_range_helpers():
    # a shutter speed of "1/1000" is one thousandth of a second (trade notation)
    assert parse_exposure("1/1000") == pytest.approx(1e-3)
    assert parse_exposure("1/48") == pytest.approx(1 / 48)
    assert parse_exposure("2ms") == pytest.approx(2e-3)
    assert parse_exposure("0.5") == pytest.approx(0.5e-3)  # a bare number is ms, as for --readout
    assert parse_exposure(None) is None
    for bad in ("1/0", "0", "-1ms", "fast"):
        with pytest.raises(UsageProblem):
            parse_exposure(bad)
    assert frame_ranges([1, 2, 3, 7, 9, 10]) == "1-3, 7, 9-10"
    assert frame_ranges([5]) == "5" and frame_ranges([]) == "none"


# --------------------------------------------------------------------------
# The motion model in measure's output, and a lens kept with a saved camera
# --------------------------------------------------------------------------

MODEL_KEYS = {"model", "model_reason", "focal_length_px", "focal_uncertainty_px", "focal_given"}


@pytest.fixture(scope="module")
def whip_clip(truth_clip):
    # a whip pan that speeds up and stops: the motion method can measure it (conftest renders
    # it with tests/truth.py, independent of skewfix, with a 20 ms readout at 30 fps)
    return str(truth_clip("whip", READOUT, n_frames=24).path)


def test_motion_json_names_the_model(whip_clip, tmp_path, capsys):
    out_json = tmp_path / "motion.json"
    assert main(["measure", whip_clip, "--method", "motion", "--json", str(out_json)]) == 0
    captured = capsys.readouterr()
    data = json.loads(out_json.read_text())
    assert JSON_KEYS | MODEL_KEYS <= set(data)
    # the renderer's truth: a 20 ms readout (5 %: the motion method's accuracy target)
    assert data["readout_ms"] == pytest.approx(READOUT * 1e3, rel=0.05)
    # the clip is a flat picture slid past the frame, which the similarity describes exactly
    # (tests/truth.py's planar clip), so auto keeps it: no focal length
    assert data["model"] == "similarity" and data["model_reason"]
    assert data["focal_length_px"] is None and data["focal_uncertainty_px"] is None
    assert data["focal_given"] is False
    model_lines = [line for line in captured.out.splitlines() if line.startswith("model ")]
    assert len(model_lines) == 1 and "similarity" in model_lines[0]


def test_flicker_and_pan_json_have_no_model(clips, tmp_path, capsys):
    out_json = tmp_path / "pan.json"
    assert main(["measure", clips["pan"], "--method", "pan", "--json", str(out_json), "--quiet"]) == 0
    data = json.loads(out_json.read_text())
    assert MODEL_KEYS <= set(data) and data["model"] is None and data["focal_length_px"] is None


def test_given_lens_is_measured_with_and_saved_with_the_camera(whip_clip, tmp_path, capsys, config_dir):
    out_json = tmp_path / "lens.json"
    # a narrow lens (20 degrees), through which the flat pan the renderer slides past the frame
    # looks almost the same as a turning camera, so the rotation measures the readout as well
    assert main(["measure", whip_clip, "--method", "motion", "--model", "rotation", "--hfov", "20",
                 "--lens-distortion", "-0.05,0.01", "--json", str(out_json), "--save-camera", "lensed"]) == 0
    captured = capsys.readouterr()
    data = json.loads(out_json.read_text())
    # pinhole relation f = (W/2) / tan(hfov/2) (Hartley & Zisserman, Multiple View Geometry, sec. 6.1)
    focal = (W / 2) / math.tan(math.radians(10))
    assert data["model"] == "rotation" and data["focal_length_px"] == pytest.approx(focal, rel=1e-9)
    assert data["focal_uncertainty_px"] is None and data["focal_given"] is True
    assert data["lens_distortion"] == pytest.approx([-0.05, 0.01])
    assert f"rotation, focal length {focal:.1f} px given" in captured.out
    saved = (config_dir / "cameras" / "lensed.camera").read_text()
    assert f"focal_length_px: {focal:.4f}" in saved and "hfov_deg: 20.0000" in saved
    assert "lens_distortion: -0.05,0.01" in saved
    assert main(["cameras", "show", "lensed"]) == 0
    shown = capsys.readouterr().out
    assert f"focal length {focal:.1f} px (20.0° horizontal view)" in shown and "k1=-0.05, k2=0.01" in shown

    # fix --readout NAME uses the saved lens when no lens option is given ...
    motion = tmp_path / "fixed.motion.json"
    assert main(["fix", whip_clip, str(tmp_path / "fixed.mp4"), "--readout", "lensed", "--model", "rotation",
                 "--save-motion", str(motion)]) == 0
    err = capsys.readouterr().err
    lens = json.loads(motion.read_text())["model"]
    assert lens["kind"] == "rotation" and lens["focal_length_px"] == pytest.approx(focal, rel=1e-6)
    assert lens["distortion"] == pytest.approx([-0.05, 0.01])
    assert f"its saved lens: focal length {focal:.1f} px" in err
    # ... and the options override it (a 90-degree view: f = W/2)
    motion = tmp_path / "wide.motion.json"
    assert main(["fix", whip_clip, str(tmp_path / "wide.mp4"), "--readout", "lensed", "--model", "rotation",
                 "--hfov", "90", "--save-motion", str(motion)]) == 0
    err = capsys.readouterr().err
    lens = json.loads(motion.read_text())["model"]
    assert lens["focal_length_px"] == pytest.approx(W / 2, rel=1e-9) and lens["distortion"] == [0.0, 0.0]
    assert "the lens options override its saved lens" in err


def test_an_estimated_focal_length_has_an_uncertainty_in_json():
    from skewfix.measure.result import ModelUsed, ReadoutEstimate
    from skewfix.models.rotation import Rotation

    kind = Rotation(W, H, 200.0, focal_estimated=True, focal_uncertainty_px=4.5)
    est = ReadoutEstimate(0.02, 0.001, "top-down", "motion", [0, 1], H, 1 / 30,
                          model=ModelUsed.from_kind(kind, "a wide lens turning"))
    data = est.to_json_dict()
    assert data["model"] == "rotation" and data["model_reason"] == "a wide lens turning"
    assert data["focal_length_px"] == 200.0 and data["focal_uncertainty_px"] == 4.5
    assert data["focal_given"] is False
    # pinhole relation again: hfov = 2 atan((W/2) / f) (Hartley & Zisserman, sec. 6.1)
    assert data["hfov_deg"] == pytest.approx(math.degrees(2 * math.atan(W / 2 / 200.0)))
    assert "± 4.5 px measured from the footage" in est.model.line()


@pytest.fixture(scope="module")
def wide_lens_clip(tmp_path_factory):
    """A 90-degree lens sweeping in yaw with a little shake, rendered by tests/truth.py (the
    pinhole p ~ K R d, row y exposed at t_k + readout * y / H; it imports nothing from skewfix)."""
    import truth

    path = truth.RotationPath(sweep_peak_deg_s=60, sweep_centre_s=0.4, sweep_duration_s=0.6,
                              shake_deg=(0.3, 0.3, 0.2), seed=1)
    clip = truth.render_rotation_clip(480, 270, 24, 30, 0.024, 90.0, path, noise=1.0)
    src = tmp_path_factory.mktemp("wide_lens") / "wide.mp4"
    truth.write_clip(src, clip.frames, 30)
    return str(src), clip


def test_focal_length_measured_by_measure_is_saved_and_used_by_fix(wide_lens_clip, tmp_path, capsys, config_dir):
    src, clip = wide_lens_clip
    out_json = tmp_path / "wide.json"
    assert main(["measure", src, "--method", "motion", "--json", str(out_json), "--save-camera", "wide"]) == 0
    captured = capsys.readouterr()
    data = json.loads(out_json.read_text())
    # the renderer's truth: a 24 ms readout through a 90-degree lens, f = W/2 = 240 px (pinhole relation,
    # Hartley & Zisserman sec. 6.1); auto sees the wide lens turning and measures its focal length
    assert data["model"] == "rotation" and "wide lens" in data["model_reason"]
    assert data["focal_given"] is False and 0 < data["focal_uncertainty_px"] < 0.1 * data["focal_length_px"]
    assert data["focal_length_px"] == pytest.approx(clip.focal_px, rel=0.05)
    assert data["readout_ms"] == pytest.approx(24.0, rel=0.05)
    assert "measured from the footage" in next(line for line in captured.out.splitlines()
                                               if line.startswith("model "))
    cam_text = (config_dir / "cameras" / "wide.camera").read_text()
    assert f"focal_length_px: {data['focal_length_px']:.4f}" in cam_text

    # fix --readout NAME with no lens option fits the saved lens (auto: a lens given, the rotation fits)
    motion = tmp_path / "wide.motion.json"
    assert main(["fix", src, str(tmp_path / "fixed.mp4"), "--readout", "wide", "--save-motion", str(motion)]) == 0
    err = capsys.readouterr().err
    model = json.loads(motion.read_text())["model"]
    assert model["kind"] == "rotation"
    assert model["focal_length_px"] == pytest.approx(data["focal_length_px"], rel=1e-4)
    assert "its saved lens" in err and "note: motion model: 3-D rotation" in err
