"""Self-calibration of the readout from a clip's own motion."""

from fractions import Fraction

import pytest

from skewfix.errors import MeasurementRefused
from skewfix.measure.motion_fit import measure_motion
from skewfix.pipeline import analyse
from skewfix.synth.paths import SteadyPan, Still, WhipPan
from skewfix.synth.shutter import render_clip

W, H = 480, 270


def clip(tmp_path, panorama, camera, readout, order="top-down", rate=Fraction(25), n=24):
    path = tmp_path / "c.mp4"
    render_clip(path, panorama, camera, W, H, rate, n, readout, order, origin=(W * 0.8, panorama.shape[0] / 2))
    return analyse(str(path))


def whip(rate):
    return WhipPan(peak_px_s=90 * float(rate), centre_s=12 / float(rate), duration_s=16 / float(rate))


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


@pytest.mark.parametrize("camera", [SteadyPan(vx_px_s=900.0), Still()])
def test_steady_motion_is_refused(tmp_path, panorama, camera):
    # Constant velocity shifts all rows alike whatever the readout (common practice).
    with pytest.raises(MeasurementRefused, match="too steady"):
        measure_motion(clip(tmp_path, panorama, camera, 0.02))


def test_measure_saves_the_solved_motion(tmp_path, panorama):
    from skewfix.cli import main
    from skewfix.motionfile import load_motion

    path = tmp_path / "whip.mp4"
    render_clip(path, panorama, whip(25), W, H, Fraction(25), 24, 0.020, origin=(W * 0.8, panorama.shape[0] / 2))
    motion = tmp_path / "whip.motion.json"
    assert main(["measure", str(path), "--method", "motion", "--save-motion", str(motion), "-q"]) == 0
    model, clock, reference_line, meta = load_motion(motion)
    assert clock.readout == pytest.approx(0.020, rel=0.05)
    assert len(clock.frame_times) == 24 and reference_line == "middle"
