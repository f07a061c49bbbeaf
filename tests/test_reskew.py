"""Putting the skew back, warp maps and mattes: the round trips a compositor relies on.

The plate is a whip pan across scikit-image's bundled photographs rendered row by
row with a known rolling shutter by tests/truth.py (the published row-time formula,
nothing imported from skewfix), written losslessly as PNG, so
every difference measured here comes from the correction, not from a codec.
"""

from __future__ import annotations

import csv
import shutil
from fractions import Fraction

import cv2
import numpy as np
import pytest
import tifffile
from scipy import ndimage
from skimage.metrics import peak_signal_noise_ratio

import truth
from conftest import run_cli, write_sequence
from skewfix.cli import main
from skewfix.decode import VideoInfo
from skewfix.motion import MotionModel, MotionSegment, bspline_basis
from skewfix.motionfile import load_motion, save_motion
from skewfix.rowclock import RowClock, frame_times_from_rate

W, H, N = 320, 180, 10
RATE = Fraction(25)
READOUT = 0.030  # 75 % of the 40 ms frame interval
CAMERA = truth.whip_pan(60.0, fps=RATE, centre_s=0.2, duration_s=0.5, angle_deg=0.4)  # 1500 px/s at its peak
CENTRAL = 0.70


run = run_cli


def central(img: np.ndarray, keep: float = CENTRAL) -> np.ndarray:
    h, w = img.shape[:2]
    my, mx = int(round(h * (1 - keep) / 2)), int(round(w * (1 - keep) / 2))
    return img[my:h - my, mx:w - mx]


def central_psnr(test: np.ndarray, truth: np.ndarray) -> float:
    # PSNR as defined in scikit-image's metrics (10 log10 of peak^2 over MSE), 8-bit peak 255
    return float(peak_signal_noise_ratio(central(truth), central(test), data_range=255))


def read(path) -> np.ndarray:
    img = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    assert img is not None, path
    return img


def true_motion(clock: RowClock) -> MotionModel:
    """The truth's camera path as the motion model's B-spline (least squares on dense samples).

    tests/truth.py renders a view in which the world point at image point p at time t is
    p + pan(t) (its ``_sample``); the similarity model's pan_x and pan_y are that offset."""
    interval = 1 / float(RATE)
    spacing, t0 = interval / 8, -interval
    n_coef = int(np.ceil((clock.frame_times[-1] + 2 * interval - t0) / spacing)) + 3
    t = np.linspace(t0, clock.frame_times[-1] + 2 * interval, 2000)
    idx, weights = bspline_basis(t, t0, spacing, n_coef)
    basis = np.zeros((len(t), n_coef))
    np.put_along_axis(basis, idx, weights, axis=1)
    coef = np.zeros((4, n_coef))
    for i, curve in enumerate(CAMERA(t)):
        coef[i] = np.linalg.lstsq(basis, np.broadcast_to(curve, t.shape), rcond=None)[0]
    return MotionModel(W, H, [MotionSegment(0, N - 1, t0, spacing, coef)])


@pytest.fixture(scope="module")
def plate(tmp_path_factory):
    """Rolling-shutter plate and exact global-shutter views rendered by tests/truth.py (the
    published row-time formula, nothing imported from skewfix), fix (with maps, matte,
    motion) and reskew."""
    folder = tmp_path_factory.mktemp("plate")
    clip = truth.render_planar_clip(W, H, N, RATE, READOUT, CAMERA, noise=0.75, seed=2)
    clock = RowClock(frame_times_from_rate(N, RATE), H, READOUT, "top-down")
    rolling = list(clip.frames)
    rng = np.random.default_rng(2)
    views = [np.clip(np.rint(clip.global_view(float(clip.reference_time(k, (H - 1) / 2.0)))
                             + 0.75 * rng.standard_normal((H, W, 3))), 0, 255).astype(np.uint8) for k in range(N)]
    write_sequence(folder, "rs.{:04d}.png", rolling)
    write_sequence(folder, "gs.{:04d}.png", views)
    argv = ["fix", folder / "rs.%04d.png", folder / "fixed.%04d.png", "--fps", "25", "--readout", "30ms",
            "--border", "black", "--save-motion", folder / "m.json", "--save-motion-csv", folder / "m.csv",
            "--save-maps", folder / "maps", "--save-matte", folder / "matte.%04d.png", "--quiet"]
    assert main([str(a) for a in argv]) == 0
    # no --fps: a sequence takes its frame rate from the motion file
    assert main([str(a) for a in ["reskew", folder / "fixed.%04d.png", folder / "back.%04d.png",
                                  "--motion", folder / "m.json", "--quiet"]]) == 0
    info = VideoInfo("truth", W, H, "rgb24", 8, "png", None, RATE, 1 / RATE, N, None, is_sequence=True,
                     first_number=1, is_rgb=True)
    save_motion(folder / "truth.json", true_motion(clock), clock, "middle", info)
    return folder, rolling, views, clock


def test_fix_then_reskew_gives_back_the_plate(plate):
    folder, rolling, _, _ = plate
    scores = [central_psnr(cv2.cvtColor(read(folder / f"back.{k + 1:04d}.png"), cv2.COLOR_BGR2RGB), rolling[k])
              for k in range(N)]
    print("fix->reskew central PSNR (dB):", " ".join(f"{s:.1f}" for s in scores))
    # the project's target for the round trip's central part (common practice: beyond about
    # 30 dB PSNR a difference between two pictures is hard to see)
    assert min(scores) >= 32.0


def test_reskew_of_exact_global_views_gives_the_rolling_render(plate, capsys):
    folder, rolling, views, _ = plate
    untouched = [central_psnr(views[k], rolling[k]) for k in range(N)]
    report = ["global views against the rolling render, untouched: " + " ".join(f"{s:.1f}" for s in untouched)]
    for motion, name in (("truth.json", "true"), ("m.json", "solved")):
        code, err = run(capsys, "reskew", folder / "gs.%04d.png", folder / f"rs_{name}.%04d.png",
                        "--motion", folder / motion, "--quiet")
        assert code == 0, err
        scores = [central_psnr(cv2.cvtColor(read(folder / f"rs_{name}.{k + 1:04d}.png"), cv2.COLOR_BGR2RGB),
                               rolling[k]) for k in range(N)]
        report.append(f"reskew of global views with the {name} motion, central PSNR (dB): "
                      + " ".join(f"{s:.1f}" for s in scores))
        fastest = int(np.argmin(untouched))
        # measured here: about 39 dB at worst with either motion (noise 0.003 in each image);
        # the solved motion carries the fit's error, so it gets a little more room
        assert min(scores) >= (36.0 if name == "true" else 34.0)
        assert scores[fastest] >= untouched[fastest] + 8.0
    print("\n".join(report))


def test_saved_correction_map_reproduces_the_fix_output(plate):
    folder = plate[0]
    for k in range(N):
        name = f"correct_map.{k + 1:04d}.tif"
        as_file = tifffile.imread(folder / "maps" / name)  # reference TIFF reader: samples in file order
        assert as_file.dtype == np.float32 and as_file.shape == (H, W, 3)
        map_x, map_y = as_file[..., 0], as_file[..., 1]
        assert not as_file[..., 2].any()
        np.testing.assert_array_equal(read(folder / "maps" / name)[..., ::-1], as_file)  # OpenCV: BGR order
        source = read(folder / f"rs.{k + 1:04d}.png")
        remapped = cv2.remap(source, map_x, map_y, cv2.INTER_CUBIC, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
        fixed = read(folder / f"fixed.{k + 1:04d}.png")
        diff = np.abs(remapped.astype(int) - fixed.astype(int))
        assert diff.max() <= 1 and diff.mean() < 0.01


def test_reskew_map_undoes_the_correction_map(plate):
    # Compose the two maps with SciPy's map_coordinates (reference bilinear sampler):
    # reading the correction map at the reskew map's positions must give back the
    # identity, since reskew(correct(plate)) = plate.
    folder = plate[0]
    ys, xs = np.mgrid[0:H, 0:W].astype(np.float64)
    for k in (0, N // 2, N - 1):
        c = tifffile.imread(folder / "maps" / f"correct_map.{k + 1:04d}.tif")
        r = tifffile.imread(folder / "maps" / f"reskew_map.{k + 1:04d}.tif")
        cx = ndimage.map_coordinates(c[..., 0], [r[..., 1], r[..., 0]], order=1, mode="nearest")
        cy = ndimage.map_coordinates(c[..., 1], [r[..., 1], r[..., 0]], order=1, mode="nearest")
        err = np.hypot(central(cx) - central(xs), central(cy) - central(ys))
        assert err.max() < 0.1, (k, err.max())


def test_matte_marks_the_pixels_the_border_filled(plate):
    folder = plate[0]
    total = 0
    for k in range(N):
        matte = read(folder / f"matte.{k + 1:04d}.png")
        assert matte.dtype == np.uint8 and matte.ndim == 2 and set(np.unique(matte)) <= {0, 255}
        fixed = read(folder / f"fixed.{k + 1:04d}.png")
        filled = matte == 255
        total += int(filled.sum())
        # --border black: a matte pixel is black unless the cubic kernel (reach 2 px) still
        # touches the picture, so it is black 2 px inside the matte's edge ...
        deep = cv2.erode(matte, np.ones((5, 5), np.uint8), borderType=cv2.BORDER_REPLICATE) == 255
        assert not fixed[deep].any()
        # ... and away from the matte, black pixels (zero in every channel) are no more
        # common than in the plate itself (the photographs have some true black)
        near = cv2.dilate(matte, np.ones((5, 5), np.uint8)) == 255
        plate_black = (~read(folder / f"rs.{k + 1:04d}.png").any(axis=2)).mean()
        assert (~fixed.any(axis=2) & ~near).mean() <= plate_black + 0.002
        assert filled.mean() < 0.15
    assert total > 0  # a 1500 px/s whip pan at 30 ms readout leaves uncovered corners


def test_global_shutter_maps_are_the_identity(plate, tmp_path, capsys):
    # A global shutter (readout 0) needs no correction: each map holds its own pixel's
    # position, which pins the convention (pixel centres at integers, origin top-left).
    folder = plate[0]
    code, err = run(capsys, "fix", folder / "rs.%04d.png", tmp_path / "o.%04d.png", "--fps", "25",
                    "--readout", "0", "--save-maps", tmp_path / "maps", "--quiet")
    assert code == 0, err
    ys, xs = np.mgrid[0:H, 0:W]
    for name in ("correct_map.0001.tif", "reskew_map.0010.tif"):
        m = tifffile.imread(tmp_path / "maps" / name)
        np.testing.assert_allclose(m[..., 0], xs, atol=1e-4)
        np.testing.assert_allclose(m[..., 1], ys, atol=1e-4)


def test_motion_saved_by_fix_matches_the_camera(plate):
    # Physics: a pan at v px/s leans verticals by v * readout * (H-1) / H px between the top
    # and bottom rows (the row clock, skewfix/rowclock.py); the camera's true speed is known.
    folder, _, _, clock = plate
    _, clock2, reference_line, meta = load_motion(folder / "m.json")
    assert meta["frame_rate"] == RATE and meta["frame_count"] == N and meta["first_number"] == 1
    assert clock2.readout == pytest.approx(READOUT) and reference_line == "middle"
    rows = list(csv.DictReader((folder / "m.csv").open()))
    assert len(rows) == N
    for k, row in enumerate(rows):
        t_ref = float(clock.reference_time(k, "middle"))
        dt = 1e-4  # the truth path's horizontal speed, by a central difference
        speed = (float(CAMERA(t_ref + dt)[0]) - float(CAMERA(t_ref - dt)[0])) / (2 * dt)
        lean_true = -speed * READOUT * (H - 1) / H
        assert float(row["skew_x_px"]) == pytest.approx(lean_true, rel=0.15, abs=1.5), k


def test_reskew_refuses_a_clip_of_another_size_or_length(plate, tmp_path, capsys):
    folder, rolling, _, _ = plate
    small = tmp_path / "small"
    small.mkdir()
    write_sequence(small, "s.{:04d}.png", [cv2.resize(f, (160, 90)) for f in rolling])
    code, err = run(capsys, "reskew", small / "s.%04d.png", tmp_path / "o.%04d.png", "--motion", folder / "m.json")
    assert code == 1 and "160x90" in err and "same size" in err and len(err.strip().splitlines()) == 1
    short = tmp_path / "short"
    short.mkdir()
    for k in range(5):
        shutil.copy(folder / f"rs.{k + 1:04d}.png", short / f"s.{k + 1:04d}.png")
    code, err = run(capsys, "reskew", short / "s.%04d.png", tmp_path / "o.%04d.png", "--motion", folder / "m.json")
    assert code == 1 and "has 5 frames" in err and "covers 10" in err
    assert not list(tmp_path.glob("o.*"))
    code, err = run(capsys, "reskew", short / "s.%04d.png", tmp_path / "o.%04d.png", "--motion", tmp_path / "x.json")
    assert code == 1 and "no such motion file" in err


@pytest.mark.parametrize("extra, words", [(["--crf", "18"], "--crf applies to video output"),
                                          (["--codec", "h264"], "--codec applies to video output")])
def test_reskew_refuses_video_options_for_a_sequence_output(plate, capsys, extra, words):
    # common practice: an option that cannot take effect is refused, not silently dropped
    folder = plate[0]
    target = folder / "unused.%04d.png"
    code, err = run(capsys, "reskew", folder / "fixed.%04d.png", target, "--motion", folder / "m.json",
                    "--quiet", *extra)
    assert code == 2
    assert words in err and len(err.strip().splitlines()) == 1
    assert not list(folder.glob("unused.*"))


def test_reskew_refuses_depth_for_a_video_output(plate, capsys):
    folder = plate[0]
    code, err = run(capsys, "reskew", folder / "fixed.%04d.png", folder / "unused.mp4", "--motion",
                    folder / "m.json", "--depth", "16", "--quiet")
    assert code == 2 and "--depth applies to image-sequence output" in err
    assert not (folder / "unused.mp4").exists()
