"""Saved cameras: the file round trip, the config folder, and the mode check of fix --readout NAME."""

from __future__ import annotations

import math
import os
from fractions import Fraction
from types import SimpleNamespace

import pytest

from skewfix.cameras import (
    HEADER,
    camera_path,
    camera_resolver,
    cameras_dir,
    list_cameras,
    load_camera,
    plan_readout,
    remove_camera,
    save_camera,
)
from skewfix.decode import VideoInfo
from skewfix.errors import InputError, UsageProblem
from skewfix.measure.result import ReadoutEstimate



def video_info(width=3840, height=2160, rate=Fraction(25), path="/clips/wall_100hz.mp4"):
    return VideoInfo(path=path, width=width, height=height, pix_fmt="yuv420p", bit_depth=8, codec="h264",
                     profile=None, rate=rate, time_base=Fraction(1, 12800), frame_count=50, duration_s=2.0)


def estimate(readout=0.0185, order="top-down", method="flicker", height=2160, interval=0.04):
    return ReadoutEstimate(readout, 0.00004, order, method, list(range(50)), height, interval,
                           notes=["bands drift between frames", "a second\nline"])


def test_round_trip_keeps_every_field(config_dir):
    # NTSC-family rates are the exact rationals 24000/1001 and 30000/1001
    # (SMPTE ST 12-1; from memory): the file must keep the fraction, not 29.97.
    info = video_info(1920, 1080, Fraction(30000, 1001))
    path = save_camera("deckcam-hd30", estimate(0.0185, height=1080, interval=1001 / 30000), info)
    assert path == config_dir / "cameras" / "deckcam-hd30.camera"
    text = path.read_text()
    assert text.splitlines()[0] == HEADER
    assert "frame_rate: 30000/1001" in text
    cam = load_camera("deckcam-hd30")
    assert cam.name == "deckcam-hd30"
    assert cam.readout_s == pytest.approx(0.0185, abs=1e-10)
    assert cam.uncertainty_s == pytest.approx(0.00004, abs=1e-10)
    assert cam.line_delay_s == pytest.approx(0.0185 / 1080, rel=1e-4)
    assert cam.line_order == "top-down" and cam.method == "flicker"
    assert (cam.width, cam.height) == (1920, 1080)
    assert cam.frame_rate == Fraction(30000, 1001)
    assert cam.clip == "wall_100hz.mp4"
    assert cam.measured and cam.measured[:4].isdigit()
    assert cam.notes == ["bands drift between frames", "a second line"]  # one line per note


def test_list_and_remove(config_dir):
    assert list_cameras() == []
    save_camera("zeta", estimate(0.010), video_info())
    save_camera("alpha", estimate(0.020, "bottom-up", "pan"), video_info())
    assert [c.name for c in list_cameras()] == ["alpha", "zeta"]
    removed = remove_camera("zeta")
    assert not removed.exists()
    assert [c.name for c in list_cameras()] == ["alpha"]
    with pytest.raises(UsageProblem, match="no saved camera called 'zeta'"):
        remove_camera("zeta")
    with pytest.raises(UsageProblem, match="no saved camera"):
        load_camera("zeta")


def test_saving_again_replaces_and_leaves_no_temporary_files(config_dir):
    save_camera("body", estimate(0.010), video_info())
    save_camera("body", estimate(0.012), video_info())
    assert load_camera("body").readout_s == pytest.approx(0.012)
    assert sorted(os.listdir(config_dir / "cameras")) == ["body.camera"]
    # written with the usual permissions, not a temporary file's private ones (common practice)
    mask = os.umask(0)
    os.umask(mask)
    assert (config_dir / "cameras" / "body.camera").stat().st_mode & 0o777 == 0o666 & ~mask


def test_config_folder_follows_xdg_then_home(monkeypatch, tmp_path):
    # XDG Base Directory Specification: $XDG_CONFIG_HOME, else ~/.config
    # (absolute paths only; a relative one is ignored).
    monkeypatch.delenv("SKEWFIX_CONFIG_DIR")
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "xdg"))
    assert cameras_dir() == tmp_path / "xdg" / "skewfix" / "cameras"
    monkeypatch.setenv("XDG_CONFIG_HOME", "relative/dir")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert cameras_dir() == tmp_path / "home" / ".config" / "skewfix" / "cameras"
    monkeypatch.delenv("XDG_CONFIG_HOME")
    assert cameras_dir() == tmp_path / "home" / ".config" / "skewfix" / "cameras"


def test_hand_edited_file_is_read(config_dir):
    folder = config_dir / "cameras"
    folder.mkdir(parents=True)
    (folder / "old-body.camera").write_text(
        "# written by hand\n\nskewfix camera v1\n# the readout from the maker's sheet\n"
        "readout_ms:   21.5\nline_order: bottom-up\nframe_rate: 24000/1001\nlens: 35mm\n"
        "note: first note\nnote: second note\n")
    cam = load_camera("old-body")
    assert cam.readout_s == pytest.approx(0.0215)
    assert cam.line_order == "bottom-up"
    assert cam.frame_rate == Fraction(24000, 1001)
    assert cam.width is None and cam.notes == ["first note", "second note"]


@pytest.mark.parametrize("text, problem", [
    ("readout_ms: 18\n", "header"),
    ("skewfix camera v9\nreadout_ms: 18\n", "format"),
    ("skewfix camera v1\nline_order: top-down\n", "readout_ms is missing"),
    ("skewfix camera v1\nreadout_ms: fast\n", "not a number"),
    ("skewfix camera v1\nreadout_ms: 18\nreadout_ms: 19\n", "line 3"),
    ("skewfix camera v1\nreadout_ms: 18\nline_order: sideways\n", "line_order"),
    ("skewfix camera v1\nreadout_ms 18\n", "line 2"),
    # the lens lines: a focal length and a field of view are positive, a view under 180 degrees
    ("skewfix camera v1\nreadout_ms: 18\nfocal_length_px: -5\n", "focal_length_px"),
    ("skewfix camera v1\nreadout_ms: 18\nfocal_length_px: 0\n", "more than 0"),
    ("skewfix camera v1\nreadout_ms: 18\nhfov_deg: 180\n", "less than 180"),
    ("skewfix camera v1\nreadout_ms: 18\nlens_distortion: a,b\n", "lens_distortion"),
    ("skewfix camera v1\nreadout_ms: 18\nlens_distortion: 1,2,3\n", "lens_distortion"),
])
def test_malformed_files_give_one_line(config_dir, text, problem):
    folder = config_dir / "cameras"
    folder.mkdir(parents=True)
    (folder / "broken.camera").write_text(text)
    with pytest.raises(InputError) as info:
        load_camera("broken")
    assert problem in str(info.value) and "\n" not in str(info.value)
    problems: list = []
    assert list_cameras(problems) == [] and problems[0][0] == "broken"


@pytest.mark.parametrize("name", ["", "../escape", "a/b", "auto", "AUTO", "1080p", ".hidden", "x" * 65, "sp ace"])
def test_bad_names_are_refused(name):
    with pytest.raises(UsageProblem, match="camera name"):
        camera_path(name)


def test_unknown_camera_for_fix_readout():
    with pytest.raises(UsageProblem) as info:
        camera_resolver("nosuch", None)
    assert str(info.value) == "not a duration or a saved camera: nosuch (skewfix cameras list shows saved ones)"


def test_resolver_warns_when_the_mode_differs():
    save_camera("deckcam-uhd25", estimate(0.0185), video_info(3840, 2160, Fraction(25)))
    readout, order, origin, resolver = camera_resolver("deckcam-uhd25", None)
    assert readout == pytest.approx(0.0185, abs=1e-10) and order == "top-down"
    same = SimpleNamespace(info=video_info(3840, 2160, Fraction(25)))
    r, o, text = resolver(same)
    assert r == pytest.approx(0.0185, abs=1e-10) and o == "top-down"
    assert "deckcam-uhd25" in text and "differ" not in text
    smaller = SimpleNamespace(info=video_info(1920, 1080, Fraction(25)))
    _, _, text = resolver(smaller)
    assert "3840x2160" in text and "1920x1080" in text and "resolution differs" in text
    faster = SimpleNamespace(info=video_info(3840, 2160, Fraction(50)))
    assert "frame rate differs" in resolver(faster)[2]
    both = SimpleNamespace(info=video_info(1920, 1080, Fraction(30000, 1001)))
    assert "resolution and frame rate differ" in resolver(both)[2]


def test_line_order_from_the_command_line_wins():
    save_camera("upside", estimate(0.02, "bottom-up"), video_info())
    _, order, origin, resolver = camera_resolver("upside", None)
    assert order == "bottom-up"
    _, order, origin, resolver = camera_resolver("upside", "top-down")
    assert order == "top-down" and "overrides" in origin
    save_camera("unsure", estimate(0.02, "undetermined"), video_info())
    _, order, origin, _ = camera_resolver("unsure", None)
    assert order == "top-down" and "assumed" in origin


def test_fix_readout_plan_routes_names_to_saved_cameras():
    from skewfix.cameras import readout_plan

    save_camera("rig-b", estimate(0.0123), video_info())
    seconds, order, origin, resolver = readout_plan("rig-b", None)
    assert seconds == pytest.approx(0.0123, abs=1e-10) and resolver is not None
    assert readout_plan("12.3ms", None)[0] == pytest.approx(0.0123)  # a duration stays a duration
    with pytest.raises(UsageProblem, match="not a duration or a saved camera"):
        readout_plan("rig-c", None)


# --------------------------------------------------------------------------
# The lens kept with a camera
# --------------------------------------------------------------------------

def lens_estimate(focal=1450.0, sigma=12.0, given=False, distortion=(-0.12, 0.03), width=3840):
    from skewfix.measure.result import ModelUsed

    est = estimate(method="motion")
    hfov = math.degrees(2 * math.atan(width / 2 / focal))
    est.model = ModelUsed("rotation", "a wide lens turning", "3-D rotation", focal, None if given else sigma,
                          given, hfov, distortion)
    return est


def test_lens_round_trip(config_dir):
    path = save_camera("phone-4k30", lens_estimate(), video_info())
    text = path.read_text()
    assert "focal_length_px: 1450.0000" in text and "lens_distortion: -0.12,0.03" in text
    cam = load_camera("phone-4k30")
    assert cam.focal_length_px == pytest.approx(1450.0)
    # pinhole relation hfov = 2 atan((W/2) / f) (Hartley & Zisserman, Multiple View Geometry, sec. 6.1)
    assert cam.hfov_deg == pytest.approx(math.degrees(2 * math.atan(1920 / 1450.0)), abs=1e-4)
    assert cam.lens_distortion == pytest.approx((-0.12, 0.03))
    spec = cam.lens_spec()
    # the saved field of view is used, so a clip of another size gets the focal length scaled
    assert spec.focal_for(3840, 2160) == pytest.approx(1450.0) and spec.focal_for(1920, 1080) == pytest.approx(725.0)
    assert spec.distortion == pytest.approx((-0.12, 0.03))
    assert any("measured from the footage, ± 12.0 px" in note for note in cam.notes)
    assert "focal length 1450.0 px" in cam.lens_text() and "k1=-0.12" in cam.lens_text()


def test_a_measurement_without_a_lens_saves_none(config_dir):
    from skewfix.measure.result import ModelUsed

    est = estimate(method="motion")
    est.model = ModelUsed("similarity", "no sign of a wide lens turning")  # the similarity has no lens
    text = save_camera("narrow", est, video_info()).read_text()
    assert "focal_length_px" not in text and "hfov_deg" not in text and "lens_distortion" not in text
    cam = load_camera("narrow")
    assert cam.focal_length_px is None and cam.lens_spec() is None and cam.lens_text() == "-"


def test_old_camera_file_without_lens_lines_loads(config_dir):
    folder = config_dir / "cameras"
    folder.mkdir(parents=True)
    (folder / "old.camera").write_text("skewfix camera v1\nname: old\nreadout_ms: 18.5\nline_order: top-down\n"
                                       "method: flicker\nwidth: 3840\nheight: 2160\nframe_rate: 25/1\n")
    cam = load_camera("old")
    assert cam.readout_s == pytest.approx(0.0185)
    assert cam.focal_length_px is None and cam.hfov_deg is None and cam.lens_distortion is None
    assert cam.lens_spec() is None
    plan = plan_readout("old", None)
    assert not plan.lens.given and "lens" not in plan.origin


def test_hand_written_field_of_view_is_a_lens(config_dir):
    folder = config_dir / "cameras"
    folder.mkdir(parents=True)
    (folder / "wide.camera").write_text("skewfix camera v1\nreadout_ms: 10\nhfov_deg: 90\n")
    spec = load_camera("wide").lens_spec()
    # a 90-degree view puts the edge at one focal length from the centre: f = W/2 (pinhole relation)
    assert spec.focal_for(1920, 1080) == pytest.approx(960.0)


def test_saved_lens_is_used_unless_the_options_give_one(config_dir):
    from skewfix.models.choice import parse_lens

    save_camera("phone-4k30", lens_estimate(), video_info())
    plan = plan_readout("phone-4k30", None)
    assert plan.lens.focal_for(3840, 2160) == pytest.approx(1450.0)
    assert plan.lens.distortion == pytest.approx((-0.12, 0.03))
    assert "its saved lens: focal length 1450.0 px" in plan.origin
    given = parse_lens(hfov="90")
    plan = plan_readout("phone-4k30", None, given)
    assert plan.lens == given and "the lens options override its saved lens" in plan.origin
    # the readout itself is unchanged either way, and the mode check still names the lens
    assert plan.seconds == pytest.approx(0.0185, abs=1e-10)
    plan = plan_readout("phone-4k30", None)
    text = plan.resolver(SimpleNamespace(info=video_info(1920, 1080, Fraction(25))))[2]
    assert "resolution differs" in text and "check the readout and the lens" in text
    # a duration or auto keep whatever lens the options gave (none: an empty one)
    assert not plan_readout("10ms", None).lens.given
    assert plan_readout("10ms", None, given).lens == given
