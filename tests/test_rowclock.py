"""The row clock against frame-rate standards and the definition of line order."""

from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, strategies as st

from skewfix.errors import UsageProblem
from skewfix.rowclock import RowClock, frame_times_from_rate, parse_duration


def test_ntsc_family_rates_are_exact():
    # SMPTE ST 12-1 / NTSC-family rates are the rationals 24000/1001 and 30000/1001
    # (from memory); 1001 frames at 24000/1001 fps last exactly 1001*1001/24000 s.
    t24 = frame_times_from_rate(24001, Fraction(24000, 1001))
    assert t24[24000] == 1001.0  # 24000 frames take exactly 1001 s
    t30 = frame_times_from_rate(30001, Fraction(30000, 1001))
    assert t30[30000] == 1001.0
    # the decimal approximation 29.97 would already be 1 ms off after 30000 frames
    assert abs(t30[30000] - 30000 / 29.97) > 5e-4


def test_top_down_and_bottom_up_rows():
    clock = RowClock(np.array([0.0, 0.04]), height=1000, readout=0.02)
    assert clock.row_time(1, 0) == pytest.approx(0.04)
    assert clock.row_time(1, 500) == pytest.approx(0.05)
    up = RowClock(np.array([0.0, 0.04]), height=1000, readout=0.02, line_order="bottom-up")
    assert up.row_time(0, 999) == pytest.approx(0.0)  # the bottom row is read first
    assert up.row_time(0, 0) == pytest.approx(0.02 * 999 / 1000)
    assert clock.line_delay == pytest.approx(20e-6)


def test_variable_frame_rate_uses_timestamps():
    # Phones write variable frame rates: frame times come from timestamps (common practice).
    times = np.array([0.0, 0.033, 0.070, 0.101, 0.140])
    clock = RowClock(times, height=100, readout=0.01)
    assert clock.row_time(2, 50) == pytest.approx(0.070 + 0.005)
    assert clock.row_time(4, 0) == pytest.approx(0.140)


def test_global_shutter_rows_share_one_instant():
    # A global-shutter sensor exposes all rows at once (fact of the trade).
    clock = RowClock(np.array([0.0, 0.04]), height=720, readout=0.0)
    assert np.all(clock.row_time(1, np.arange(720)) == 0.04)


def test_readout_longer_than_frame_is_refused():
    clock = RowClock(np.arange(5) / 25.0, height=100, readout=0.05)
    with pytest.raises(UsageProblem, match="longer than the frame interval"):
        clock.check_readout_fits()


@pytest.mark.parametrize("text,seconds", [("18.5ms", 0.0185), ("0.0185s", 0.0185), ("18500us", 0.0185),
                                          ("18.5", 0.0185), ("0", 0.0), ("1e1ms", 0.01)])
def test_parse_duration_units(text, seconds):
    assert parse_duration(text) == pytest.approx(seconds)


@pytest.mark.parametrize("text", ["-3ms", "fast", "", "12 parsecs", "ms", "1.2.3ms", "nan"])
def test_parse_duration_rejects(text):
    with pytest.raises(UsageProblem):
        parse_duration(text)


@given(st.floats(min_value=0, max_value=1e4, allow_nan=False, allow_infinity=False))
def test_parse_duration_round_trips_ms(value):
    assert parse_duration(f"{value!r}ms") == pytest.approx(value * 1e-3, rel=1e-12, abs=1e-15)
    assert parse_duration(f"{value!r}") == pytest.approx(value * 1e-3, rel=1e-12, abs=1e-15)


@given(st.integers(min_value=2, max_value=4000), st.floats(min_value=0, max_value=0.05),
       st.sampled_from(["top-down", "bottom-up"]))
def test_row_times_are_monotonic_in_read_order(height, readout, order):
    clock = RowClock(np.array([0.0]), height=height, readout=readout, line_order=order)
    rows = np.arange(height)
    t = clock.row_time(0, rows)
    d = np.diff(t)
    if order == "top-down":
        assert np.all(d >= 0)
    else:
        assert np.all(d <= 0)
    assert t.max() - t.min() == pytest.approx(readout * (height - 1) / height, abs=1e-12)


@pytest.mark.parametrize("text, rate", [
    # NTSC-family rates are n * 1000/1001 (SMPTE ST 12-1, from memory); editors write them as decimals
    ("23.976", Fraction(24000, 1001)), ("23.98", Fraction(24000, 1001)), ("29.97", Fraction(30000, 1001)),
    ("59.94", Fraction(60000, 1001)), ("24000/1001", Fraction(24000, 1001)),
    # plain rates stay as written
    ("25", Fraction(25)), ("12.5", Fraction(25, 2)), ("24", Fraction(24)), ("30", Fraction(30)),
])
def test_frame_rates_as_editors_write_them(text, rate):
    from skewfix.rowclock import parse_rate

    assert parse_rate(text) == rate
