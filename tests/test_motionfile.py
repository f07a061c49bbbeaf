"""The motion file: exact round trip, schema and version checks, and the per-frame CSV."""

from __future__ import annotations

import csv
import json
from fractions import Fraction

import numpy as np
import pytest

from skewfix.decode import VideoInfo
from skewfix.errors import InputError
from skewfix.motion import MotionModel, MotionSegment
from skewfix.motionfile import (FORMAT_NAME, FORMAT_VERSION, csv_columns, load_motion, save_motion,
                                save_motion_csv)
from skewfix.rowclock import RowClock, frame_times_from_rate

W, H = 320, 180
NTSC_FILM = Fraction(24000, 1001)  # SMPTE ST 12-1: the NTSC-family 23.976 rate


def info_for(n: int, rate=NTSC_FILM, first_number=1001) -> VideoInfo:
    return VideoInfo("plate.%04d.tif", W, H, "rgb48le", 16, "tiff", None, rate, 1 / rate, n, None,
                     is_sequence=True, first_number=first_number, is_rgb=True)


def two_shot_model(n: int, clock: RowClock) -> MotionModel:
    """A model with a cut after frame 4 and irregular coefficient values."""
    rng = np.random.default_rng(5)
    spacing = clock.median_interval() / 4
    segs = []
    for first, last in ((0, 4), (5, n - 1)):
        t0 = clock.frame_times[first] - clock.median_interval()
        n_coef = int(np.ceil((clock.frame_times[last] + 2 * clock.median_interval() - t0) / spacing)) + 3
        segs.append(MotionSegment(first, last, t0, spacing, rng.normal(0, [[30], [5], [0.01], [0.002]], (4, n_coef))))
    return MotionModel(W, H, segs, unmeasured_pairs=[2], cuts=[4], inlier_fraction=0.875)


@pytest.fixture
def saved(tmp_path):
    n = 9
    clock = RowClock(frame_times_from_rate(n, NTSC_FILM), H, 0.0123, "bottom-up")
    model = two_shot_model(n, clock)
    path = tmp_path / "shot.motion.json"
    save_motion(path, model, clock, "top", info_for(n))
    return path, model, clock


def test_round_trip_is_exact(saved):
    path, model, clock = saved
    model2, clock2, reference_line, meta = load_motion(path)
    assert reference_line == "top"
    assert clock2.readout == clock.readout and clock2.line_order == "bottom-up" and clock2.height == H
    np.testing.assert_array_equal(clock2.frame_times, clock.frame_times)
    assert (model2.width, model2.height, model2.cuts, model2.unmeasured_pairs) == (W, H, [4], [2])
    for a, b in zip(model.segments, model2.segments):
        assert (a.first_frame, a.last_frame, a.knot_start, a.knot_spacing) == \
               (b.first_frame, b.last_frame, b.knot_start, b.knot_spacing)
        np.testing.assert_array_equal(a.coefficients, b.coefficients)  # JSON floats round-trip exactly
    assert meta["frame_rate"] == NTSC_FILM and meta["first_number"] == 1001 and meta["frame_count"] == 9


def test_schema_has_format_name_version_and_documented_keys(saved):
    doc = json.loads(saved[0].read_text())
    assert doc["format"] == FORMAT_NAME == "skewfix-motion" and doc["version"] == FORMAT_VERSION == 2
    assert doc["model"] == {"kind": "similarity"}
    assert doc["source"]["frame_rate"] == "24000/1001"
    assert set(doc["timing"]) == {"readout_s", "line_order", "reference_line", "frame_times_s"}
    seg = doc["segments"][0]
    assert {"first_frame", "last_frame", "knot_start_s", "knot_spacing_s",
            "pan_x_px", "pan_y_px", "roll_rad", "log_zoom"} <= set(seg)
    assert len({len(seg[k]) for k in ("pan_x_px", "pan_y_px", "roll_rad", "log_zoom")}) == 1


def rewrite(path, change):
    doc = json.loads(path.read_text())
    change(doc)
    path.write_text(json.dumps(doc))


@pytest.mark.parametrize("change,needle", [
    (lambda d: d.update(version=3), "version 3 is newer"),
    (lambda d: d["model"].update(kind="warp-drive"), "'model.kind' must be one of"),
    (lambda d: d["model"].update(focal_length_px=900), "parameters the similarity model does not take"),
    (lambda d: d.update(version="1"), "'version' must be a whole number"),
    (lambda d: d.update(format="something-else"), "'format' is not 'skewfix-motion'"),
    (lambda d: d["timing"].pop("readout_s"), "missing 'timing.readout_s'"),
    (lambda d: d["source"].pop("height"), "missing 'source.height'"),
    (lambda d: d["segments"][0].pop("roll_rad"), "missing 'segments[0].roll_rad'"),
    (lambda d: d["timing"].update(line_order="sideways"), "'timing.line_order' must be one of"),
    (lambda d: d["timing"]["frame_times_s"].pop(), "has 8 entries for 9 frames"),
    (lambda d: d["segments"].pop(), "cover 5 frames, the source has 9"),
    (lambda d: d["segments"][1]["pan_y_px"].pop(), "same number"),
    (lambda d: d["timing"].update(readout_s=-1), "must be at least 0"),
])
def test_bad_files_are_refused_with_one_clear_line(saved, change, needle):
    path = saved[0]
    rewrite(path, change)
    with pytest.raises(InputError) as err:
        load_motion(path)
    message = str(err.value)
    assert needle in message and "\n" not in message and str(path) in message


def test_not_json_and_missing_file(tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text("{ not json")
    with pytest.raises(InputError, match="JSON error at line 1"):
        load_motion(bad)
    with pytest.raises(InputError, match="no such motion file"):
        load_motion(tmp_path / "absent.json")


def steady_pan_model(v: float, clock: RowClock) -> MotionModel:
    """pan_x = v * t exactly: a uniform cubic B-spline reproduces straight lines when the
    coefficients lie on the line at the knots shifted by one spacing (de Boor, 1978)."""
    spacing = clock.median_interval() / 4
    t0 = -clock.median_interval()
    n_coef = int(np.ceil((clock.frame_times[-1] + 3 * clock.median_interval() - t0) / spacing)) + 3
    coef = np.zeros((4, n_coef))
    coef[0] = v * (t0 + (np.arange(n_coef) - 1) * spacing)
    return MotionModel(W, H, [MotionSegment(0, len(clock.frame_times) - 1, t0, spacing, coef)])


@pytest.mark.parametrize("readout", [0.0, 0.005, 0.010, 0.020])
def test_csv_skew_grows_linearly_with_readout(tmp_path, readout):
    # Fact of the trade: a pan at v px/s slants verticals by v * readout / H
    # px per row, so the bottom row (read (H-1)/H of the readout later) sits
    # v * readout * (H-1) / H px left of the top row; a global shutter (readout 0) shows none.
    v, n = 600.0, 6
    clock = RowClock(frame_times_from_rate(n, Fraction(25)), H, readout, "top-down")
    model = steady_pan_model(v, clock)
    t = np.linspace(0, 0.2, 7)
    np.testing.assert_allclose(model.segments[0].evaluate(t)[0], v * t, atol=1e-9)
    path = save_motion_csv(tmp_path / "m.csv", model, clock, "middle", first_number=1001)
    rows = list(csv.DictReader(path.open()))
    assert tuple(rows[0]) == csv_columns(model) == (
        "frame", "time_s", "reference_time_s", "pan_x_px", "pan_y_px", "roll_deg", "zoom", "skew_x_px",
        "skew_y_px") and len(rows) == n
    for k, row in enumerate(rows):
        assert int(row["frame"]) == 1001 + k  # the frame numbers the README states (a plate from 1001)
        assert float(row["time_s"]) == pytest.approx(k / 25)
        t_ref = k / 25 + readout * (H - 1) / 2 / H  # the middle row's instant
        assert float(row["reference_time_s"]) == pytest.approx(t_ref, abs=1e-9)
        assert float(row["pan_x_px"]) == pytest.approx(v * t_ref, abs=1e-6)
        assert float(row["zoom"]) == pytest.approx(1.0) and float(row["roll_deg"]) == pytest.approx(0.0)
        assert float(row["skew_x_px"]) == pytest.approx(-v * readout * (H - 1) / H, abs=1e-3)
        assert float(row["skew_y_px"]) == pytest.approx(0.0, abs=1e-6)


def test_version_1_files_still_load_as_the_similarity(saved):
    """A version-1 file (no 'model', always the four similarity curves) reads as before."""
    path = saved[0]
    model_v2, *_ = load_motion(path)
    rewrite(path, lambda d: (d.update(version=1), d.pop("model")))
    model_v1, clock, _, meta = load_motion(path)
    assert meta["version"] == 1 and model_v1.kind.name == "similarity"
    for a, b in zip(model_v1.segments, model_v2.segments):
        np.testing.assert_array_equal(a.coefficients, b.coefficients)
