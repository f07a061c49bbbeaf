"""The motion method: the readout from a clip's own motion, on clips rendered by tests/truth.py
(measured there: 19.996 ± 0.027 ms top-down and 20.001 ± 0.009 ms bottom-up for a true 20 ms)."""

from fractions import Fraction

import pytest

from skewfix.errors import MeasurementRefused
from skewfix.measure.motion_fit import measure_motion
from skewfix.pipeline import analyse
import truth

W, H = 480, 270


def render(path, camera, readout, order="top-down", rate=Fraction(25), n=24):
    """A rolling-shutter clip from tests/truth.py (the published row-time formula, nothing
    imported from skewfix), written with x264 at CRF 10."""
    clip = truth.render_planar_clip(W, H, n, rate, readout, camera, line_order=order, seed=5)
    truth.write_clip(path, clip.frames, rate)
    return path


def clip(tmp_path, panorama, camera, readout, order="top-down", rate=Fraction(25), n=24):
    return analyse(str(render(tmp_path / "c.mp4", camera, readout, order, rate, n)))


def whip(rate):
    return truth.whip_pan(90.0, fps=rate, centre_s=12 / float(rate), duration_s=16 / float(rate))


STEADY, STILL = truth.SteadyPan(900.0, 0.0), truth.SteadyPan(0.0, 0.0)


@pytest.mark.parametrize("order", ["top-down", "bottom-up"])
def test_whip_pan_reveals_readout_and_order(tmp_path, panorama, order):
    est = measure_motion(clip(tmp_path, panorama, whip(25), 0.020, order))
    assert est.readout_s == pytest.approx(0.020, rel=0.05)  # target: within 5 %
    assert est.line_order == order
    assert 0 < est.uncertainty_s < 0.002


def test_global_shutter_reports_zero(tmp_path, panorama):
    # A global shutter reads every row at one instant (fact of the trade): readout 0.
    est = measure_motion(clip(tmp_path, panorama, whip(25), 0.0))
    assert est.readout_s < 0.001
    assert est.line_order == "undetermined"


@pytest.mark.parametrize("camera", [STEADY, STILL], ids=["steady", "still"])
def test_steady_motion_is_refused(tmp_path, panorama, camera):
    # Constant velocity shifts all rows alike whatever the readout (common practice).
    with pytest.raises(MeasurementRefused, match="too steady"):
        measure_motion(clip(tmp_path, panorama, camera, 0.02))


# The verdict on a jackknife uncertainty, at 25 fps (a 40 ms frame interval). The shares are common
# practice: a global shutter reads every row at once (fact of the trade), so a result that cannot
# be told from zero says nothing about the readout, and one that moves by more than a quarter of
# the interval when a stretch of frames is left out is reported as weak rather than hidden.
@pytest.mark.parametrize("best_ms, sigma_ms, verdict", [
    (20.0, 0.5, "sound"),    # a whip pan
    (26.7, 10.5, "weak"),    # over a quarter of the interval, clear of zero
    (-26.7, 10.5, "weak"),   # the same, bottom-up
    (9.5, 4.5, "sound"),     # over a tenth, but zero lies outside two sigma
    (3.0, 4.5, "refuse"),    # over a tenth, and zero within two sigma
    (1.0, 3.9, "sound"),     # near zero with a small sigma: a global shutter, measured
    (20.0, float("inf"), "refuse"),
])
def test_the_verdict_on_an_uncertainty(best_ms, sigma_ms, verdict):
    from skewfix.measure.motion_fit import judge_uncertainty

    assert judge_uncertainty(best_ms / 1e3, sigma_ms / 1e3, 0.040) == verdict


def test_a_weak_result_is_reported_with_its_note(tmp_path, panorama, monkeypatch):
    import skewfix.measure.motion_fit as motion_fit

    monkeypatch.setattr(motion_fit, "judge_uncertainty", lambda best, sigma, interval: "weak")
    est = measure_motion(clip(tmp_path, panorama, whip(25), 0.020))
    assert est.readout_s == pytest.approx(0.020, rel=0.05)
    assert any("the uncertainty is large" in note for note in est.notes)


def test_measure_saves_the_solved_motion(tmp_path, panorama):
    from skewfix.cli import main
    from skewfix.motionfile import load_motion

    path = render(tmp_path / "whip.mp4", whip(25), 0.020)
    motion = tmp_path / "whip.motion.json"
    assert main(["measure", str(path), "--method", "motion", "--save-motion", str(motion), "-q"]) == 0
    model, clock, reference_line, meta = load_motion(motion)
    assert clock.readout == pytest.approx(0.020, rel=0.05)
    assert len(clock.frame_times) == 24 and reference_line == "middle"


def test_lk_measures_the_displacement_at_its_window_gradient_centroid():
    # OpenCV's pyramidal Lucas-Kanade (Lucas & Kanade, 1981) as the reference: a picture whose
    # rows shift by a different amount each (a change of lean between frames, as a rolling
    # shutter makes while the speed changes) is tracked at a point whose window holds vertical
    # edges only in its upper rows; the displacement found is the one at the window's
    # gradient centroid (rows_at_evidence), not at the point
    import cv2
    import numpy as np

    from skewfix.measure.motion_fit import _window_centroid_offsets

    h, w, y0, x0 = 120, 160, 60.0, 80.0
    rng = np.random.default_rng(4)
    cols = np.repeat(rng.uniform(40, 215, w // 4), 4)
    img = np.tile(cols, (h, 1)).astype(np.float32)
    img[int(y0):] = 128.0  # no detail from the point's row down
    img = cv2.GaussianBlur(img, (0, 0), 1.2)
    d0, lean = 2.0, 0.05  # px, and px per row
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    moved = cv2.remap(img, xx - (d0 + lean * (yy - y0)), yy, cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)
    a, b = img.astype(np.uint8), moved.astype(np.uint8)
    pt = np.array([[x0, y0]], np.float32)
    found, st, _ = cv2.calcOpticalFlowPyrLK(a, b, pt, None, winSize=(15, 15), maxLevel=0,
                                            criteria=(cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 50, 1e-4))
    assert st[0, 0] == 1
    measured = float(found[0, 0] - x0)
    offset = float(_window_centroid_offsets(a, pt.astype(np.float64), np.array([1.0, 0.0]), 15)[0])
    assert -6 < offset < -2  # the edges are above the point
    assert measured == pytest.approx(d0 + lean * offset, abs=0.03)
    assert abs(measured - d0) > 0.1  # the point's own row would be wrong


def test_line_order_note_catches_the_wrong_order(tmp_path, panorama):
    from skewfix.measure.motion_fit import line_order_note
    from skewfix.rowclock import RowClock

    analysis = clip(tmp_path, panorama, whip(25), 0.020, "top-down")
    right = RowClock(analysis.frame_times, H, 0.020, "top-down")
    wrong = RowClock(analysis.frame_times, H, 0.020, "bottom-up")
    assert line_order_note(analysis.pairs, right, W) is None
    note = line_order_note(analysis.pairs, wrong, W)
    assert note and "--line-order top-down" in note and "\n" not in note


def test_line_order_note_is_silent_when_the_motion_cannot_tell(tmp_path, panorama):
    # constant velocity leans every frame alike, whatever the order (common practice)
    from skewfix.measure.motion_fit import line_order_note
    from skewfix.rowclock import RowClock

    analysis = clip(tmp_path, panorama, STEADY, 0.020)
    for order in ("top-down", "bottom-up"):
        assert line_order_note(analysis.pairs, RowClock(analysis.frame_times, H, 0.020, order), W) is None


def test_the_plot_marks_the_result_at_the_lowest_point(tmp_path, panorama):
    import numpy as np

    from skewfix.measure.plots import plot_residual_curve

    seen = []
    est = measure_motion(clip(tmp_path, panorama, whip(25), 0.020), progress=lambda *a: seen.append(a))
    # the search reports its progress too, fit by fit, up to its announced total
    search = [a for a in seen if "search" in a[0]]
    assert search and search[-1][1] == search[-1][2] and len(search) == search[-1][2]
    d = est.diagnostics
    cand, res = np.asarray(d["candidates_ms"]), np.asarray(d["residuals"])
    # the result is a parabola's vertex; the sampled candidates on either side of it fit worse
    others = np.abs(cand - d["signed_best_ms"]) > 1e-9
    nearest = np.argsort(np.abs(cand[others] - d["signed_best_ms"]))[:2]
    assert np.all(res[others][nearest] > res[~others].min())
    assert abs(cand[others][np.argmin(res[others])] - d["signed_best_ms"]) <= d["finest_step_ms"] + 1e-9
    out = tmp_path / "motion.png"
    plot_residual_curve(est, out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)


@pytest.mark.parametrize("model", ["auto", "similarity"])
def test_fix_notes_a_wrong_line_order(tmp_path, panorama, model):
    # a top-down clip fixed as bottom-up: the rows are timed backwards (the row clock's
    # definition, skewfix/rowclock.py), so the fix doubles the lean; fix says so in one note
    from skewfix.pipeline import FixOptions, fix_clip

    path = render(tmp_path / "whip.mp4", whip(25), 0.020)
    notes = {}
    for order in ("top-down", "bottom-up"):
        result = fix_clip(str(path), str(tmp_path / f"{order}.mp4"),
                          FixOptions(readout=0.020, line_order=order, preset="ultrafast", model=model))
        notes[order] = [n for n in result.notes if "line order looks wrong" in n]
    assert notes["top-down"] == []
    assert len(notes["bottom-up"]) == 1 and "--line-order top-down" in notes["bottom-up"][0]
