"""Checks of the independent ground-truth renderer (tests/truth.py) against outside truth."""

from __future__ import annotations

import math
import subprocess
import sys
from fractions import Fraction
from pathlib import Path

import av
import cv2
import numpy as np
import pytest
from scipy.ndimage import uniform_filter1d
from skimage.registration import phase_cross_correlation

import truth

W, H = 320, 180
HFOV = 60.0


def test_renderer_imports_nothing_from_the_package():
    # The point of truth.py: a convention error in skewfix cannot cancel out against it.
    code = ("import sys; sys.path.insert(0, sys.argv[1]); import truth; "
            "bad = [m for m in sys.modules if m.split('.')[0] == 'skewfix']; "
            "assert not bad, bad")
    subprocess.run([sys.executable, "-c", code, str(Path(__file__).parent)], check=True)


def test_rodrigues_matches_opencv():
    # Reference library: cv2.Rodrigues.
    rng = np.random.default_rng(1)
    vecs = np.concatenate([rng.normal(0, 1.0, (20, 3)), rng.normal(0, 1e-7, (3, 3)), np.zeros((1, 3)),
                           [[0, 3.1, 0], [1e-3, 0, 0]]])
    ours = truth.rodrigues(vecs)
    for v, R in zip(vecs, ours):
        assert np.allclose(R, cv2.Rodrigues(v.reshape(3, 1))[0], atol=1e-12), v


@pytest.mark.parametrize("hfov, expected", [(90.0, W / 2), (60.0, W / 2 * math.sqrt(3))])
def test_focal_length_from_field_of_view(hfov, expected):
    # Pinhole relation tan(hfov/2) = (W/2)/f (Hartley & Zisserman, Multiple View Geometry, ch. 6);
    # tan 45 deg = 1, tan 30 deg = 1/sqrt(3).
    assert truth.focal_from_hfov(W, hfov) == pytest.approx(expected, rel=1e-12)
    K = truth.camera_matrix(W, H, hfov)
    assert (K[0, 2], K[1, 2]) == ((W - 1) / 2, (H - 1) / 2)


def test_lines_on_the_sphere_land_where_the_pinhole_model_says():
    # Pinhole projection x = cx + f tan(longitude), y = cy + f tan(latitude) on the centre
    # row / column (Hartley & Zisserman, ch. 6), y down; measured as the centroid of dark lines
    # drawn on a plain equirectangular panorama at longitude +20 deg and latitude +10 deg.
    s = 400.0
    wp, hp = round(2 * math.pi * s), round(math.pi * s)
    u = np.arange(wp) + 0.5
    v = np.arange(hp) + 0.5
    lon = u / wp * 2 * math.pi - math.pi
    lat = v / hp * math.pi - math.pi / 2
    dark = (np.exp(-0.5 * ((lon - math.radians(20)) * s / 2.0) ** 2)[None, :]
            + np.exp(-0.5 * ((lat - math.radians(10)) * s / 2.0) ** 2)[:, None])
    pano = np.repeat(truth._to_uint8(220 - 180 * np.clip(dark, 0, 1))[..., None], 3, axis=2)
    still = truth.RotationPath(sweep_peak_deg_s=0.0, shake_deg=(0, 0, 0))
    clip = truth.render_rotation_clip(W, H, 1, 30, 0.0, HFOV, still, panorama=pano)
    img = 220.0 - clip.frames[0][..., 1].astype(float)
    f, cx, cy = clip.focal_px, clip.K[0, 2], clip.K[1, 2]
    row = img[int(cy)]  # longitude atan2(x_n, 1) is the same on every row
    x_exp = cx + f * math.tan(math.radians(20))
    xs = np.arange(W)
    near = np.abs(xs - x_exp) < 12
    x_meas = np.sum(xs[near] * row[near]) / np.sum(row[near])
    col = img[:, int(round(cx))]
    y_exp = cy + f * math.tan(math.radians(10)) / math.cos(math.atan((round(cx) - cx) / f))
    ys = np.arange(H)
    near = np.abs(ys - y_exp) < 12
    y_meas = np.sum(ys[near] * col[near]) / np.sum(col[near])
    assert abs(x_meas - x_exp) < 0.1, (x_meas, x_exp)
    assert abs(y_meas - y_exp) < 0.1, (y_meas, y_exp)


def test_distorted_pixel_rays_reproject_onto_their_pixels():
    # Reference library: cv2.projectPoints applies Brown-Conrady (k1, k2) in OpenCV's convention;
    # the renderer's rays of every stored pixel must project back onto that pixel.
    K = truth.camera_matrix(W, H, 80.0)
    k1, k2 = -0.25, 0.06
    rays = truth.pixel_rays(K, W, H, k1, k2).reshape(-1, 3)
    back, _ = cv2.projectPoints(rays, np.zeros(3), np.zeros(3), K, np.array([k1, k2, 0, 0]))
    ys, xs = np.mgrid[0:H, 0:W]
    err = back.reshape(-1, 2) - np.stack([xs.ravel(), ys.ravel()], axis=-1)
    assert np.max(np.abs(err)) < 1e-6
    plain = truth.pixel_rays(K, W, H).reshape(-1, 3)
    assert np.max(np.abs(plain - rays)) > 0.05  # the distortion did something


@pytest.fixture(scope="module")
def shaky_sweep():
    return truth.RotationPath(sweep_peak_deg_s=90.0, sweep_centre_s=0.1, sweep_duration_s=0.3,
                              shake_deg=(0.4, 0.4, 0.3), seed=3)


@pytest.mark.parametrize("kind", ["rotation", "planar"])
def test_global_shutter_frame_equals_the_global_view(kind, shaky_sweep):
    # Fact of the trade: a global shutter exposes all rows at one instant.
    fps = Fraction(30000, 1001)
    if kind == "rotation":
        clip = truth.render_rotation_clip(W, H, 3, fps, 0.0, HFOV, shaky_sweep)
    else:
        subject = truth.crossing_subject(W, H, 0.1, fraction=0.15)
        clip = truth.render_planar_clip(W, H, 3, fps, 0.0, truth.whip_pan(30, fps, 0.05, 0.1), subject)
    assert clip.frame_times[2] == pytest.approx(2 * 1001 / 30000, abs=1e-15)
    for k in (1, 2):
        assert np.array_equal(clip.frames[k], clip.global_view(clip.frame_times[k]))
    assert not np.array_equal(clip.frames[1], clip.frames[2])  # the camera did move


@pytest.mark.parametrize("line_order", ["top-down", "bottom-up"])
@pytest.mark.parametrize("kind", ["rotation", "planar"])
def test_each_row_is_the_global_view_at_its_own_instant(kind, line_order, shaky_sweep):
    # The published row clock: row y starts at t_k + readout*y/H (top-down) or
    # t_k + readout*(H-1-y)/H (bottom-up); the moving subject is rolled as well.
    readout = 0.02
    if kind == "rotation":
        clip = truth.render_rotation_clip(W, H, 2, 30, readout, HFOV, shaky_sweep, line_order=line_order)
    else:
        subject = truth.crossing_subject(W, H, 0.1, fraction=0.25)
        clip = truth.render_planar_clip(W, H, 2, 30, readout, truth.whip_pan(30, 30, 0.05, 0.1), subject,
                                        line_order=line_order)
    k = 1
    first = 0 if line_order == "top-down" else H - 1
    assert clip.reference_time(k, first) == pytest.approx(clip.frame_times[k])
    assert clip.reference_time(k, H - 1 - first) == pytest.approx(clip.frame_times[k] + readout * (H - 1) / H)
    for y in (0, 37, 90, 151, H - 1):
        view = clip.global_view(clip.reference_time(k, y))
        assert np.array_equal(clip.frames[k][y], view[y]), y
    assert not np.array_equal(clip.frames[k], clip.global_view(clip.frame_times[k]))


@pytest.mark.parametrize("shake", [(0.0, 0.0, 0.0), (0.4, 0.4, 0.5)])
def test_views_of_a_rotating_camera_are_related_by_the_homography(shake):
    # Hartley & Zisserman, the homography of a camera rotating about its centre:
    # x1 = K R1 R0^T K^-1 x0 (pure yaw, then yaw with shake on all three axes).
    path = truth.RotationPath(sweep_peak_deg_s=90.0, sweep_centre_s=0.2, sweep_duration_s=0.4,
                              shake_deg=shake, seed=5)
    clip = truth.render_rotation_clip(W, H, 1, 30, 0.0, HFOV, path)
    t0, t1 = 0.15, 0.2
    v0, v1 = clip.global_view(t0), clip.global_view(t1)
    K, Ki = clip.K, np.linalg.inv(clip.K)
    R0, R1 = clip.rotation(t0), clip.rotation(t1)
    assert np.degrees(np.linalg.norm(cv2.Rodrigues(R1 @ R0.T)[0])) > 2.0  # a real turn (> 9 px)

    def error(Hm):
        warped = cv2.warpPerspective(v0, Hm, (W, H), flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)
        inner = (slice(30, H - 30), slice(50, W - 50))
        return np.mean(np.abs(warped[inner].astype(float) - v1[inner]))

    right = error(K @ R1 @ R0.T @ Ki)
    wrong = error(K @ R0 @ R1.T @ Ki)  # the opposite turn
    assert right < 2.0, right
    assert wrong > 5 * right, (right, wrong)


def _vertical_stripes(width, height, seed=0):
    """A scene that is the same on every row: random vertical edges of all widths."""
    rng = np.random.default_rng(seed)
    profile = cv2.GaussianBlur(rng.uniform(0, 255, (1, width)).astype(np.float32), (0, 0), 1.2)
    profile = (profile - profile.mean()) * (60 / profile.std()) + 128
    return np.repeat(np.repeat(truth._to_uint8(profile), height, axis=0)[..., None], 3, axis=2)


@pytest.mark.parametrize("line_order", ["top-down", "bottom-up"])
def test_vertical_edges_lean_by_speed_times_readout(line_order):
    # Fact of the trade: under a steady horizontal pan at v px/s a vertical edge leans by
    # v * readout * (H-1)/H px from the top row to the bottom row, the shift growing linearly
    # down the frame and with the readout.  Measured from the image: every sixth row against
    # the top row by phase correlation (scikit-image's phase_cross_correlation as the
    # reference, Hann-windowed, common practice), then a straight line through the shifts.
    v = 1500.0
    scene = _vertical_stripes(3 * W, H + 64)
    window = np.hanning(W)
    rows = np.arange(0, H, 6)
    for readout in (0.0, 0.006, 0.012, 0.024):
        clip = truth.render_planar_clip(W, H, 1, 30, readout, truth.SteadyPan(v), scene=scene,
                                        line_order=line_order)
        gray = clip.frames[0][..., 1].astype(float)
        shifts = np.array([phase_cross_correlation(gray[:1] * window, gray[y:y + 1] * window,
                                                   upsample_factor=100)[0][1] for y in rows])
        slope, offset = np.polyfit(rows, shifts, 1)
        lean = slope * (H - 1)
        expected = v * readout * (H - 1) / H * (1 if line_order == "top-down" else -1)
        assert abs(lean - expected) < 0.03, (readout, lean, expected)
        assert np.max(np.abs(slope * rows + offset - shifts)) < 0.15  # straight, not bent


def test_motion_blur_is_the_box_average_over_the_exposure():
    # The exposure integral of a steady pan at v px/s is a box of length v * exposure along the
    # motion: compare with scipy.ndimage.uniform_filter1d on the sharp global view at the middle
    # of each row's exposure, and find the box length that fits best.
    v, exposure = 900.0, 0.01  # 9 px of blur
    readout = 0.015
    clip = truth.render_planar_clip(W, H, 2, 30, readout, truth.SteadyPan(v), exposure=exposure)
    k = 1
    assert clip.subsample_count(clip.row_times(k)) * 0.5 > v * exposure  # sub-samples < 0.5 px apart
    rows = [20, 90, 160]
    errors = {}
    for size in range(3, 18, 2):
        err = []
        for y in rows:
            sharp = clip.global_view(clip.reference_time(k, y) + exposure / 2, exposure=0.0)[y].astype(float)
            box = uniform_filter1d(sharp, size, axis=0)
            err.append(clip.frames[k][y, 20:W - 20].astype(float) - box[20:W - 20])
        errors[size] = float(np.sqrt(np.mean(np.square(err))))
    assert min(errors, key=errors.get) == 9, errors
    assert errors[9] < 1.5, errors
    assert errors[7] > 2 * errors[9] and errors[11] > 2 * errors[9], errors
    sharp_clip = truth.render_planar_clip(W, H, 2, 30, readout, truth.SteadyPan(v))
    assert not np.array_equal(sharp_clip.frames[k], clip.frames[k])


def test_subject_mask_covers_the_subject_and_the_asked_fraction():
    # The subject covers the fraction of the frame asked for (common practice for a benchmark
    # matte: exact coverage, then dilated by a few px); outside the dilated mask the view with
    # the subject equals the view of the same background without it.
    fraction = 0.25
    pan = truth.whip_pan(20, 30, 0.1, 0.2)
    subject = truth.crossing_subject(W, H, 0.2, fraction=fraction, rightward=False)
    clip = truth.render_planar_clip(W, H, 1, 30, 0.01, pan, subject)
    bare = truth.render_planar_clip(W, H, 1, 30, 0.01, pan, None, scene=clip.scene)
    t = 0.1
    exact = clip.subject_mask(t, dilate=0)
    w, h = clip.subject_size
    assert exact.sum() == pytest.approx(fraction * W * H, rel=0.03)
    assert (w + 2) * (h + 2) >= exact.sum() >= w * h
    mask = clip.subject_mask(t, dilate=3)
    assert mask.sum() <= (w + 2 + 6) * (h + 2 + 6)
    differs = np.abs(clip.global_view(t).astype(int) - bare.global_view(t)).max(axis=2) > 0
    assert not np.any(differs & ~mask)
    assert np.mean(differs[exact]) > 0.9
    # it sits where its path says (centre within the mask's pixel quantisation), and crosses
    # leftward in the image while the camera pans right
    centres = []
    for t in (0.05, 0.15):
        m = clip.subject_mask(t, dilate=0)
        cols, rows = np.nonzero(m.any(axis=0))[0], np.nonzero(m.any(axis=1))[0]
        x, y = ((cols[0] + cols[-1]) / 2, (rows[0] + rows[-1]) / 2)
        px, py = subject.path(t)
        assert abs(x - px) <= 0.75 and abs(y - py) <= 0.75, (t, x, y, px, py)
        centres.append(x)
    assert centres[1] < centres[0] - 50


def test_written_clip_decodes_to_the_frames(tmp_path, shaky_sweep):
    # Reference: FFmpeg through PyAV decodes what was encoded; frame count and rate survive,
    # and the pictures match up to the 4:2:0 chroma loss (FFV1 itself is lossless, RFC 9043).
    fps = Fraction(24000, 1001)
    clip = truth.render_rotation_clip(W, H, 4, fps, 0.01, HFOV, shaky_sweep)
    for name, codec in (("c.mkv", "ffv1"), ("c.mp4", "libx264")):
        path = tmp_path / name
        truth.write_clip(path, clip.frames, fps, codec=codec)
        with av.open(str(path)) as src:
            stream = src.streams.video[0]
            got = [f.to_ndarray(format="rgb24") for f in src.decode(stream)]
            assert stream.average_rate == fps
        assert len(got) == 4
        for a, b in zip(got, clip.frames):
            assert np.mean(np.abs(a.astype(float) - b)) < 4.0


def test_residual_flow_sees_shear_and_ignores_a_shift():
    # A known deformation made with cv2.warpAffine (reference library): a horizontal shear of s px
    # over the frame height has, after median removal, RMS flow 0.76 * s / sqrt(12) over the
    # central 76 % of rows (uniform spread); a whole-frame shift leaves nothing.
    base = truth.photo_mosaic(W, H, tile_height=160, seed=2)
    s = 4.0
    shear = np.array([[1.0, s / H, -s / H * (H - 1) / 2], [0.0, 1.0, 0.0]])
    sheared = cv2.warpAffine(base, shear, (W, H), flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)
    shifted = cv2.warpAffine(base, np.array([[1.0, 0, 2.5], [0, 1.0, -1.5]]), (W, H),
                             flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)
    expected = 0.76 * s / math.sqrt(12)
    assert truth.residual_flow(sheared, base) == pytest.approx(expected, rel=0.15)
    assert truth.residual_flow(shifted, base) < 0.1
    # a mask leaves pixels out: masking the lower half halves the spread of the shear
    lower = np.zeros((H, W), bool)
    lower[H // 2:] = True
    assert truth.residual_flow(sheared, base, mask=lower) == pytest.approx(expected / 2, rel=0.2)
