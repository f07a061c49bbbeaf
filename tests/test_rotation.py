"""The camera-rotation model: geometry against OpenCV, and wide-lens clips against exact truth.

The clips come from tests/truth.py, which renders the published rolling-shutter
projection (row y of frame k exposed at t_k + readout * y / H; the pinhole
p ~ K R d with cv2.Rodrigues rotations) and imports nothing from skewfix, so a
convention error in the package cannot cancel out.
"""

from __future__ import annotations

import math

import cv2
import numpy as np
import pytest

import truth
from skewfix.errors import MeasurementRefused
from skewfix.models import make_kind
from skewfix.models.choice import LensSpec, choose_model, estimate_focal, parse_lens
from skewfix.models.rotation import Lens, focal_from_equivalent_mm, focal_from_hfov, rotate
from skewfix.pipeline import FixOptions, analyse, fix_clip
from skewfix.rowclock import RowClock
from skewfix.synth.residual import decode_rgb

W, H, FPS = 480, 270, 30


def test_focal_length_from_field_of_view_is_the_pinhole_relation():
    # Pinhole camera (Hartley & Zisserman, Multiple View Geometry, 2nd ed., sec. 6.1):
    # tan(hfov / 2) = (W / 2) / f, so 90 degrees gives f = W / 2 and 60 degrees f = W / (2 tan 30°).
    assert focal_from_hfov(1920, 90.0) == pytest.approx(960.0)
    assert focal_from_hfov(1920, 60.0) == pytest.approx(960.0 / math.tan(math.radians(30)))
    # 35 mm equivalent: the 36 mm long side of the 35 mm frame (ISO 516 / common practice); a 26 mm
    # equivalent lens sees 2 atan(18 / 26) = 69.4 degrees across the long side.
    f = focal_from_equivalent_mm(4000, 3000, 26.0)
    assert math.degrees(2 * math.atan(2000 / f)) == pytest.approx(math.degrees(2 * math.atan(18 / 26)))


def test_rotation_formula_agrees_with_opencv_rodrigues():
    # Reference: OpenCV's cv2.Rodrigues (rotation vector -> matrix), including a tiny angle.
    rng = np.random.default_rng(0)
    for r in list(rng.normal(0, 0.7, (5, 3))) + [np.array([1e-10, -2e-10, 3e-10])]:
        v = rng.normal(size=(3, 7))
        expected = cv2.Rodrigues(r.reshape(3, 1))[0] @ v
        got = np.array(rotate(r.reshape(3, 1), *v))
        np.testing.assert_allclose(got, expected, atol=1e-12)


def test_undistortion_agrees_with_opencv():
    # Reference: cv2.undistortPoints with Brown-Conrady radial terms (k1, k2) in OpenCV's convention.
    lens = Lens(focal_px=300.0, cx=239.5, cy=134.5, k1=-0.18, k2=0.04)
    pts = np.array([[10.0, 12.0], [470.0, 260.0], [240.0, 130.0], [100.0, 250.0]])
    x, y = lens.normalised(pts[:, 0], pts[:, 1])
    ref = cv2.undistortPoints(pts.reshape(-1, 1, 2), lens.matrix(), np.array([lens.k1, lens.k2, 0, 0]),
                              criteria=(cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)).reshape(-1, 2)
    np.testing.assert_allclose(np.stack([x, y], 1), ref, atol=1e-7)
    back = np.stack(lens.pixels(x, y), 1)
    np.testing.assert_allclose(back, pts, atol=1e-6)  # and distorting puts them back


def test_pure_rotation_is_the_homography_k_r_k_inverse():
    # A camera turning about its centre maps one view onto the other by H = K R1 R0^T K^-1
    # (Hartley & Zisserman, sec. 8.4.2); reference: cv2.warpPerspective of a bundled photograph.
    from skimage import data

    img = cv2.resize(data.astronaut(), (W, H), interpolation=cv2.INTER_AREA)
    kind = make_kind("rotation", W, H, focal_length_px=focal_from_hfov(W, 90.0))
    r0, r1 = np.array([0.02, -0.05, 0.01]), np.array([-0.01, 0.04, 0.03])
    k = kind.lens.matrix()
    hom = k @ cv2.Rodrigues(r1)[0] @ cv2.Rodrigues(r0)[0].T @ np.linalg.inv(k)
    expected = cv2.warpPerspective(img, hom, (W, H), flags=cv2.INTER_LINEAR)
    # our model: the output pixel p at r1 shows the world direction seen at p at r1, which was at
    # transfer(r1 -> r0) in the first view
    xs, ys = np.meshgrid(np.arange(W, dtype=np.float64), np.arange(H, dtype=np.float64))
    pts = np.stack([xs.ravel(), ys.ravel()], 1)
    sx, sy = kind.transfer(r1.reshape(3, 1), pts, r0.reshape(3, 1))
    ours = cv2.remap(img, sx.reshape(H, W).astype(np.float32), sy.reshape(H, W).astype(np.float32),
                     cv2.INTER_LINEAR)
    inner = (slice(30, H - 30), slice(40, W - 40))
    diff = np.abs(ours[inner].astype(int) - expected[inner].astype(int))
    assert np.percentile(diff, 99) <= 2 and diff.mean() < 0.3


@pytest.fixture(scope="module")
def wide_clip(tmp_path_factory):
    """A 90-degree lens sweeping in yaw with handheld shake on all three axes."""
    path = truth.RotationPath(sweep_peak_deg_s=60, sweep_centre_s=0.4, sweep_duration_s=0.6,
                              shake_deg=(0.3, 0.3, 0.2), seed=1)
    clip = truth.render_rotation_clip(W, H, 24, FPS, 0.024, 90.0, path, noise=1.0)
    src = tmp_path_factory.mktemp("wide") / "wide.mp4"
    truth.write_clip(src, clip.frames, FPS)
    return src, clip


def _residual(path, clip, frames=range(2, 22)):
    got = decode_rgb(path)
    return float(np.sqrt(np.mean([truth.residual_flow(got[k], clip.global_view(float(
        clip.reference_time(k, (H - 1) / 2)))) ** 2 for k in frames])))


def test_wide_lens_turning_is_corrected_by_the_rotation_and_not_by_the_similarity(wide_clip, tmp_path):
    src, clip = wide_clip
    out_rot, out_sim = tmp_path / "rot.mp4", tmp_path / "sim.mp4"
    res = fix_clip(str(src), str(out_rot), FixOptions(readout=0.024, model="rotation", lens=parse_lens(hfov="90")))
    fix_clip(str(src), str(out_sim), FixOptions(readout=0.024, model="similarity"))
    rot, sim, raw = _residual(out_rot, clip), _residual(out_sim, clip), _residual(src, clip)
    assert res.model.kind.name == "rotation" and res.model.kind.lens.focal_px == pytest.approx(clip.focal_px)
    # Measured: raw 0.98 px, similarity 0.72, rotation 0.05 (the encode's own floor is 0.03).
    assert rot < 0.12 and rot < sim / 5 and sim > 0.4 * raw


def test_focal_length_is_measured_from_a_turning_wide_lens(wide_clip):
    src, clip = wide_clip
    analysis = analyse(str(src))
    clock = RowClock(analysis.frame_times, H, 0.024)
    est = estimate_focal(analysis.pairs, clock, W, LensSpec())
    assert est.focal_px == pytest.approx(clip.focal_px, rel=0.03)
    assert est.uncertainty_px < 0.1 * est.focal_px
    # and --model auto takes the rotation, saying why
    choice = choose_model("auto", analysis.pairs, clock, W, LensSpec())
    assert choice.kind.name == "rotation" and "wide lens" in choice.reason


def test_a_narrow_lens_keeps_the_similarity_and_a_flat_scene_gives_no_focal_length(tmp_path):
    # A 30-degree lens panning: edges and centre move nearly alike, the similarity is right and
    # auto keeps it (common practice: the simpler model when both explain the tracks).
    path = truth.RotationPath(sweep_peak_deg_s=20, sweep_centre_s=0.4, sweep_duration_s=2.0,
                              shake_deg=(0.0, 0.0, 0.0), seed=2)
    clip = truth.render_rotation_clip(W, H, 16, FPS, 0.02, 30.0, path, noise=1.0)
    src = tmp_path / "narrow.mp4"
    truth.write_clip(src, clip.frames, FPS)
    analysis = analyse(str(src))
    clock = RowClock(analysis.frame_times, H, 0.02)
    assert choose_model("auto", analysis.pairs, clock, W, LensSpec()).kind.name == "similarity"
    # A flat scene translating (a plain pan across a distant wall, every point moving alike): no
    # focal length explains it better than another, so the measurement is refused, not guessed.
    flat = truth.render_planar_clip(W, H, 16, FPS, 0.02, truth.steady_pan(8, FPS), noise=1.0)
    src = tmp_path / "flat.mp4"
    truth.write_clip(src, flat.frames, FPS)
    analysis = analyse(str(src))
    with pytest.raises(MeasurementRefused, match="does not reveal the lens"):
        estimate_focal(analysis.pairs, RowClock(analysis.frame_times, H, 0.02), W, LensSpec())


def test_lens_distortion_is_removed_for_the_fit_and_put_back(tmp_path):
    # Brown-Conrady barrel distortion (k1 < 0) on a wide lens: with the distortion given the
    # correction keeps the lens look and reaches the truth (rendered with the same distortion).
    path = truth.RotationPath(sweep_peak_deg_s=60, sweep_centre_s=0.4, sweep_duration_s=0.6,
                              shake_deg=(0.3, 0.3, 0.2), seed=3)
    clip = truth.render_rotation_clip(W, H, 20, FPS, 0.024, 90.0, path, k1=-0.15, k2=0.02, noise=1.0)
    src = tmp_path / "barrel.mp4"
    truth.write_clip(src, clip.frames, FPS)
    with_lens, without = tmp_path / "with.mp4", tmp_path / "without.mp4"
    fix_clip(str(src), str(with_lens), FixOptions(readout=0.024, model="rotation",
                                                  lens=parse_lens(hfov="90", distortion="-0.15,0.02")))
    fix_clip(str(src), str(without), FixOptions(readout=0.024, model="rotation", lens=parse_lens(hfov="90")))
    frames = range(2, 18)
    good, bad = _residual(with_lens, clip, frames), _residual(without, clip, frames)
    assert good < 0.15 and good < 0.7 * bad


def test_reskew_with_a_rotation_motion_file_puts_the_rolling_shutter_back(wide_clip, tmp_path, capsys):
    # The VFX round trip with the rotation model: the motion solved from the wide clip, saved
    # (version 2, with the lens), applied by `reskew` to the exact global-shutter views, gives
    # back the rolling-shutter frames the truth renderer made.
    from conftest import run_cli, write_sequence
    from skewfix.motionfile import load_motion, save_motion

    src, clip = wide_clip
    result = fix_clip(str(src), str(tmp_path / "fixed.mp4"),
                      FixOptions(readout=0.024, model="rotation", lens=parse_lens(hfov="90")))
    motion = save_motion(tmp_path / "m.json", result.model, result.clock, "middle", result.info)
    model, *_ = load_motion(motion)
    assert model.kind.name == "rotation" and model.kind.lens.focal_px == pytest.approx(clip.focal_px)
    n = len(clip.frames)
    views = [clip.global_view(float(clip.reference_time(k, (H - 1) / 2))) for k in range(n)]
    write_sequence(tmp_path, "gs.{:04d}.png", views)
    code, err = run_cli(capsys, "reskew", tmp_path / "gs.%04d.png", tmp_path / "rs.%04d.png",
                        "--motion", motion, "--quiet")
    assert code == 0, err
    inner = (slice(30, H - 30), slice(40, W - 40))

    def psnr(a, b):
        return 10 * np.log10(255.0 ** 2 / np.mean((a[inner].astype(float) - b[inner].astype(float)) ** 2))

    back = [cv2.cvtColor(cv2.imread(str(tmp_path / f"rs.{k + 1:04d}.png")), cv2.COLOR_BGR2RGB) for k in range(n)]
    frames = range(3, n - 3)
    untouched = [psnr(views[k], clip.frames[k]) for k in frames]
    reskewed = [psnr(back[k], clip.frames[k]) for k in frames]
    print("reskew with the solved rotation, central PSNR (dB):", " ".join(f"{s:.1f}" for s in reskewed))
    print("global views untouched:", " ".join(f"{s:.1f}" for s in untouched))
    fastest = int(np.argmin(untouched))
    assert min(reskewed) >= 36.0 and reskewed[fastest] >= untouched[fastest] + 8.0


def test_the_command_line_reports_the_rotation_model(wide_clip, tmp_path, capsys):
    # `fix --model rotation --hfov 90`: the note, the report page and the CSV say which model was
    # used, and the CSV carries the rotation's curves in degrees.
    import csv

    from conftest import run_cli

    src, clip = wide_clip
    code, err = run_cli(capsys, "fix", src, tmp_path / "out.mp4", "--readout", "24ms", "--model", "rotation",
                        "--hfov", "90", "--report", tmp_path / "r.html", "--save-motion-csv", tmp_path / "m.csv",
                        "--save-maps", tmp_path / "maps", "--save-matte", tmp_path / "matte.%04d.png", "--quiet")
    assert code == 0, err
    n = len(clip.frames)
    assert len(list((tmp_path / "maps").glob("correct_map.*.tif"))) == n
    assert len(list((tmp_path / "maps").glob("reskew_map.*.tif"))) == n
    assert len(list(tmp_path.glob("matte.*.png"))) == n
    # the saved map moves pixels the way the rotation does: at the sweep's fastest frame the map is
    # far from the identity, and its x displacement grows towards the edges of the 90-degree view
    k = n // 2
    m = cv2.imread(str(tmp_path / "maps" / f"correct_map.{k + 1:04d}.tif"), cv2.IMREAD_UNCHANGED)
    dx = m[..., 2] - np.arange(W)[None, :]
    row = H // 4  # a row read well before the reference row
    assert abs(dx[row, 5] - dx[row, W // 2]) > 0.2 and abs(dx[row, W // 2]) > 1.0
    assert "motion model: 3-D rotation, focal length 240.0 px (given; 90.0° horizontal view)" in err
    page = (tmp_path / "r.html").read_text()
    assert "motion model" in page and "3-D rotation" in page
    rows = list(csv.DictReader((tmp_path / "m.csv").open()))
    assert {"rot_x_deg", "rot_y_deg", "rot_z_deg"} <= set(rows[0]) and len(rows) == len(clip.frames)
    # the yaw sweep turns the camera about its y axis: rot_y grows (60 deg/s peak, 0.6 s sweep;
    # the truth renderer's raised-cosine sweep covers peak * duration / 2 = 18 degrees)
    yaw = [float(r["rot_y_deg"]) for r in rows]
    true_yaw = np.degrees(np.linalg.norm(cv2.Rodrigues(clip.rotation(float(clip.reference_time(len(rows) - 1, (H - 1) / 2)))
                                                       @ clip.rotation(float(clip.reference_time(0, (H - 1) / 2))).T)[0]))
    assert abs(abs(yaw[-1] - yaw[0]) - true_yaw) < 0.5
