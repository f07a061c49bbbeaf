"""The pan method on short synthetic H.264 clips with exact truth, and its parts
against reference libraries (SciPy, scikit-image)."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from skewfix.errors import MeasurementRefused
from skewfix.measure.pan import frame_slant, measure_pan, pair_speeds, plot_pan, profile_shift
from skewfix.synth.edges import render_pan_clip, vertical_edges_scene
from skewfix.synth.paths import Still

W, H = 320, 180
RATE = Fraction(30)
N_FRAMES = 20


@pytest.fixture(scope="module")
def pan_clip(tmp_path_factory):
    """Render (and cache) a pan across vertical edges: returns (path, camera path, clock)."""
    root = tmp_path_factory.mktemp("pan")
    cache: dict = {}

    def make(speeds, readout, line_order="top-down", tilt_deg=0.0, n_frames=N_FRAMES, hold_s=0.35,
             ramp_s=0.12, camera=None):
        key = (tuple(speeds), readout, line_order, tilt_deg, n_frames, hold_s, ramp_s, type(camera).__name__)
        if key not in cache:
            path = root / f"pan_{len(cache)}.mp4"
            _, clock, camera = render_pan_clip(path, W, H, RATE, n_frames, readout, speeds, line_order,
                                               tilt_deg, hold_s, ramp_s, camera)
            cache[key] = (str(path), camera, clock)
        return cache[key]

    return make


_ESTIMATES: dict = {}


def measured(path: str):
    """measure_pan(path), once per clip (several checks look at the same result)."""
    if path not in _ESTIMATES:
        _ESTIMATES[path] = measure_pan(path)
    return _ESTIMATES[path]


def test_profile_shift_against_scipy_and_scikit_image():
    # Reference: a row of scikit-image's bundled "camera" photograph moved by a
    # known sub-pixel amount with SciPy's ndimage.shift (cubic spline), and
    # scikit-image's phase_cross_correlation (Guizar-Sicairos et al., 2008),
    # which returns the shift that registers the moved profile back (minus ours).
    from scipy import ndimage
    from skimage import data
    from skimage.registration import phase_cross_correlation

    row = data.camera()[256].astype(np.float64)
    for true in (3.3, -7.62, 0.25, 12.9):
        moved = ndimage.shift(row, true, order=3, mode="nearest")  # moved(x) = row(x - true)
        ours, score = profile_shift(row, moved)
        theirs = -phase_cross_correlation(row, moved, upsample_factor=100, normalization=None)[0][0]
        assert ours == pytest.approx(true, abs=0.03)
        assert ours == pytest.approx(theirs, abs=0.25)
        assert score > 0.99


def test_frame_slant_of_a_sheared_chart_matches_scipy_affine():
    # Reference: SciPy's ndimage.affine_transform shears the bar chart by a known
    # amount (output row y, column x samples input column x - shear * (y - yc)).
    from scipy import ndimage

    chart = vertical_edges_scene(H, W + 80, markers=False)[..., 0] * 219 + 16
    yc = (H - 1) / 2.0
    for shear in (0.0, 0.05, -0.12):
        matrix = np.array([[1.0, 0.0], [-shear, 1.0]])
        offset = np.array([0.0, shear * yc + 40])
        sheared = ndimage.affine_transform(chart, matrix, offset=offset, output_shape=(H, W), order=3)
        slant, stderr, bands = frame_slant(sheared)
        assert slant == pytest.approx(shear, abs=0.002)
        assert bands >= 10 and stderr < 0.002


def test_pair_speeds_use_each_pairs_own_interval():
    # frame times come from timestamps (phones write variable frame
    # rates), so a pair 50 ms apart that moved 45 px went 900 px/s.
    from types import SimpleNamespace

    from skewfix.motion import PairObservations

    times = np.array([0.0, 0.033, 0.083, 0.116])
    p0 = np.column_stack([np.linspace(10, 300, 20), np.linspace(5, 170, 20)])
    moved = [p0 + [29.7, 0.0], p0 + [45.0, 0.0]]
    moved[1][:3, 0] += 80.0  # a few tracks on something moving on its own: the median ignores them
    pairs = [PairObservations(0, p0, moved[0]), PairObservations(1, p0, moved[1]),
             PairObservations(2, np.zeros((0, 2)), np.zeros((0, 2)))]
    analysis = SimpleNamespace(n_frames=4, frame_times=times, pairs=pairs)
    speeds = pair_speeds(analysis, band_shifts={1: 1.0, 2: 29.7})
    assert speeds[0] == pytest.approx(900.0)
    assert speeds[1] == pytest.approx(900.0)  # tracks win over the band shift
    assert speeds[2] == pytest.approx(900.0)  # no tracks: the band shift over 33 ms
    assert np.isnan(pair_speeds(analysis)[2])


@pytest.mark.parametrize("speed, readout, order", [
    (900.0, 0.020, "top-down"),
    (-1500.0, 0.015, "top-down"),
    (600.0, 0.024, "bottom-up"),
])
def test_one_way_pan_within_3_percent(pan_clip, speed, readout, order):
    # Target: the pan method within 3 % of the true readout on
    # synthetic H.264 clips; the line order is by the row clock's definition.
    path, _, _ = pan_clip([speed], readout, order)
    est = measured(path)
    assert est.method == "pan"
    assert est.readout_s == pytest.approx(readout, rel=0.03)
    assert est.line_order == order
    assert 0 < est.uncertainty_s < 0.03 * readout
    assert est.height == H and est.frame_interval == pytest.approx(1 / 30)
    assert len(est.frames_used) >= 15


def test_both_ways_pan_cancels_a_tilted_target(pan_clip):
    # A target leaning 1 degree: an edge at x0 on the middle row runs to
    # x0 + tan(1 deg) * (yc - y), i.e. -tan(1 deg) px per row (geometry).
    tilt = -math.tan(math.radians(1.0))
    readout = 0.020
    path, _, _ = pan_clip([900.0, -900.0], readout, tilt_deg=1.0, n_frames=30)
    est = measure_pan(path)
    assert est.readout_s == pytest.approx(readout, rel=0.03)
    assert est.line_order == "top-down"
    assert est.diagnostics["both_ways"]
    assert est.diagnostics["tilt_px_per_row"] == pytest.approx(tilt, rel=0.1)
    speeds = est.diagnostics["speeds_px_s"]
    assert (speeds > 0).sum() >= 3 and (speeds < 0).sum() >= 3

    # the same target panned one way only cannot be told from skew: the lean of
    # the target adds tilt * H / |v| to the readout (about 3.5 ms here)
    one_way, _, _ = pan_clip([900.0], readout, tilt_deg=1.0)
    biased = measure_pan(one_way)
    assert not biased.diagnostics["tilt_fitted"]
    expected_bias = abs(tilt) * H / 900.0
    assert abs(biased.readout_s - readout) == pytest.approx(expected_bias, rel=0.15)


def test_one_way_pan_at_two_speeds_also_cancels_the_tilt(pan_clip):
    # slant = tilt + v * readout / H: two speeds a factor 3 apart separate the two terms
    readout = 0.020
    path, _, _ = pan_clip([300.0, 900.0], readout, tilt_deg=1.0, n_frames=30)
    est = measure_pan(path)
    assert est.diagnostics["tilt_fitted"] and not est.diagnostics["both_ways"]
    assert est.readout_s == pytest.approx(readout, rel=0.03)
    assert est.diagnostics["tilt_px_per_row"] == pytest.approx(-math.tan(math.radians(1.0)), rel=0.15)


def test_skew_grows_linearly_with_readout(pan_clip):
    # Common practice: the lean of a steady pan is proportional
    # to the readout, so doubling the readout doubles the measured value.
    short = measured(pan_clip([900.0], 0.010)[0])
    long = measured(pan_clip([900.0], 0.020)[0])
    assert long.readout_s / short.readout_s == pytest.approx(2.0, rel=0.03)
    slope_short = short.diagnostics["slope_s_per_row"]
    slope_long = long.diagnostics["slope_s_per_row"]
    assert slope_long / slope_short == pytest.approx(2.0, rel=0.03)


def test_global_shutter_reads_zero(pan_clip):
    # Fact of the trade: a global-shutter sensor reads all rows at one instant,
    # so a pan leans nothing.
    est = measure_pan(pan_clip([900.0], 0.0)[0])
    assert est.readout_s < 2e-4
    assert est.line_order == "undetermined"


def test_frames_while_speeding_up_are_left_out(pan_clip):
    # The camera starts at rest, speeds up over 0.25 s, then holds 900 px/s; only
    # frames at the steady speed may be used (speeds from the path's own truth).
    readout = 0.020
    path, camera, clock = pan_clip([0.0, 900.0], readout, n_frames=30, hold_s=0.25, ramp_s=0.25)
    est = measure_pan(path)
    assert est.readout_s == pytest.approx(readout, rel=0.03)
    used = np.asarray(est.frames_used)
    assert used.size >= 6
    # truth over each used frame's readout and its neighbours' (pairs either side)
    for k in used:
        span = np.linspace(clock.frame_times[k - 1], clock.frame_times[k + 1] + readout, 20)
        speed = camera.velocity(span)
        assert np.all(np.abs(speed - 900.0) <= 0.05 * 900.0), k
    first_steady = int(np.ceil(0.5 * float(RATE)))
    assert used.min() >= first_steady - 1


def test_analysis_is_reused(pan_clip, monkeypatch):
    import skewfix.pipeline
    from skewfix.pipeline import analyse

    path = pan_clip([900.0], 0.020)[0]
    given = analyse(path)
    expected = measured(path).readout_s

    def no_second_analysis(*args, **kwargs):
        raise AssertionError("measure_pan analysed the clip again")

    monkeypatch.setattr(skewfix.pipeline, "analyse", no_second_analysis)
    assert measure_pan(path, given).readout_s == pytest.approx(expected, rel=1e-9)


def test_refuses_a_clip_without_a_steady_pan(pan_clip):
    path, _, _ = pan_clip([0.0], 0.020, camera=Still())
    with pytest.raises(MeasurementRefused) as info:
        measure_pan(path)
    message = str(info.value)
    assert "no steady pan" in message and "\n" not in message


def test_plot_curve_has_its_minimum_at_the_result(pan_clip, tmp_path):
    # The misfit curve is computed on its own regular grid (the result is also inserted, so the
    # marker can sit on it); its lowest point among the regular candidates must be within one grid
    # step of the result, and the misfit at the result must equal the weighted RMS of the fit's
    # residuals, recomputed here with NumPy's least squares (a reference library) from the
    # per-frame speeds and leans the estimate reports.
    est = measured(pan_clip([900.0], 0.020)[0])
    d = est.diagnostics
    cand, res = np.asarray(d["candidates_ms"]), np.asarray(d["residuals"])
    r_ms = est.readout_s * 1e3
    grid = np.abs(cand - r_ms) > 1e-9
    step = float(np.median(np.diff(cand[grid])))
    assert abs(cand[grid][np.argmin(res[grid])] - r_ms) <= step
    u, s, se = d["speeds_px_s"], d["slants_px_per_row"], d["slant_stderr"]
    w = 1.0 / np.maximum(se, 0.5 * np.median(se)) ** 2
    slope = np.linalg.lstsq(u[:, None] * np.sqrt(w)[:, None], s * np.sqrt(w), rcond=None)[0][0]
    assert abs(slope) * H * 1e3 == pytest.approx(r_ms, rel=1e-6)  # one way, one speed: no tilt fitted
    rms = np.sqrt(np.sum(w * (s - slope * u) ** 2) / np.sum(w)) * H
    assert res[~grid][0] == pytest.approx(rms, rel=1e-6)
    assert np.all(res[grid] >= res[~grid][0] - 1e-9)
    out = tmp_path / "pan.png"
    plot_pan(est, out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
