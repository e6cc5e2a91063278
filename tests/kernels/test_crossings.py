"""Zero crossings: analytic answers for straight lines, direction/start/stop rules, NaN handling."""

import numpy as np
import pytest

from circtrack.kernels.crossings import find_crossing, find_level_crossing, first_crossing, level_crossing, reverse


def test_straight_line_zero_is_exact_on_nonuniform_grid():
    x = np.array([0.0, 0.7, 2.1, 3.0, 4.6, 7.0])
    y = 2.5 * (3.3 - x)          # zero at x = 3.3, which lies inside segment [3.0, 4.6]
    assert first_crossing(y, x, 0) == pytest.approx(3.3, abs=1e-12)


def test_batch_of_lines_each_zero_recovered():
    x = np.linspace(0.0, 10.0, 11)
    zeros = np.array([0.25, 4.5, 9.9])
    y = -(x[None, :] - zeros[:, None])   # positive then negative: "down" crossings
    np.testing.assert_allclose(first_crossing(y, x, np.zeros(3, int)), zeros, atol=1e-12)


def test_direction_down_ignores_up_crossing():
    x = np.arange(6.0)
    y = np.array([-1.0, 1.0, 1.0, -1.0, -1.0, -1.0])  # up crossing at 0.5, down crossing at 2.5
    assert first_crossing(y, x, 0, direction="down") == pytest.approx(2.5)
    assert first_crossing(y, x, 0, direction="up") == pytest.approx(0.5)
    assert first_crossing(y, x, 0, direction="any") == pytest.approx(0.5)


def test_bad_direction_raises():
    with pytest.raises(ValueError):
        first_crossing(np.array([1.0, -1.0]), np.array([0.0, 1.0]), 0, direction="sideways")


def test_start_index_skips_earlier_crossings():
    x = np.arange(8.0)
    y = np.array([1.0, -1.0, 1.0, 1.0, -3.0, 1.0, 1.0, -1.0])  # down crossings at 0.5, 3.25, 6.5
    assert first_crossing(y, x, 0) == pytest.approx(0.5)
    assert first_crossing(y, x, 2) == pytest.approx(3.25)
    assert first_crossing(y, x, 4) == pytest.approx(6.5)


def test_negative_start_gives_nan():
    x = np.arange(4.0)
    y = np.array([1.0, -1.0, -1.0, -1.0])
    assert np.isnan(first_crossing(y, x, -1))


def test_stop_rejects_crossing_beyond_limit():
    x = np.arange(6.0)
    y = 3.5 - x                         # zero at 3.5
    assert first_crossing(y, x, 0, stop=4.0) == pytest.approx(3.5)
    assert np.isnan(first_crossing(y, x, 0, stop=3.4))  # segment starts at 3 <= stop, but the zero is beyond


def test_exact_zero_on_grid_point():
    x = np.arange(5.0)
    y = np.array([2.0, 1.0, 0.0, -1.0, -2.0])
    assert first_crossing(y, x, 0) == pytest.approx(2.0)


def test_no_crossing_is_nan():
    x = np.arange(5.0)
    assert np.isnan(first_crossing(np.ones(5), x, 0))
    assert np.isnan(first_crossing(np.ones(1), np.zeros(1), 0))


def test_nan_points_never_cross_and_the_search_stops_at_a_gap():
    # Changed rule (issue 12): a search that meets a missing point before any sign change gives NaN
    # (crossing_in_data_gap) instead of taking the next crossing beyond the gap (4.5 before), since
    # the zero may lie hidden in the gap.
    x = np.arange(6.0)
    y = np.array([1.0, 1.0, np.nan, -1.0, 1.0, -1.0])
    assert np.isnan(first_crossing(y, x, 0))
    c = find_crossing(y, x, 0)
    assert np.isnan(c.position) and c.reason == "crossing_in_data_gap"
    # a gap after the crossing does not matter; a gap beyond `stop` is never reached
    y2 = np.array([1.0, -1.0, np.nan, -1.0, 1.0, -1.0])
    assert find_crossing(y2, x, 0).position == pytest.approx(0.5)
    y3 = np.array([2.0, 1.0, 0.5, np.nan, -1.0, -1.0])
    c3 = find_crossing(y3, x, 0, stop=1.5)
    assert np.isnan(c3.position) and c3.reason == "no_sign_change_in_window"
    # the segment from 2 (inside the window) to the missing 3 could hold a zero before stop = 2.5
    assert find_crossing(y3, x, 0, stop=2.5).reason == "crossing_in_data_gap"
    assert find_crossing(np.full(6, np.nan), x, 0).reason == "crossing_in_data_gap"


def test_crossing_reasons_batch_gap_pole_none_ok():
    # rows: ok; sign change straddling a gap; sign change onto the pole row; no sign change at all
    lat = np.array([60.0, 65.0, 70.0, 75.0, 80.0, 85.0, 90.0])
    y = np.array([[1.0, 0.5, -0.5, -1.0, -1.0, -1.0, -1.0],
                  [0.4, np.nan, np.nan, -0.38, -1.0, -1.0, -1.0],
                  [1.0, 1.0, 1.0, 1.0, 1.0, 0.5, 0.0],
                  [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0]])
    c = find_crossing(y, lat, np.zeros(4, int), direction="down")
    assert c.position[0] == pytest.approx(67.5)
    assert np.all(np.isnan(c.position[1:]))
    assert list(c.reason) == ["ok", "crossing_in_data_gap", "crossing_at_pole_row", "no_sign_change_in_window"]
    # the same on the mirrored (southern) grid: the pole row is -90
    ry, rx, ridx = reverse(y[2:3, ::-1], -lat[::-1], np.array([6]))
    assert find_crossing(ry, rx, ridx).reason[0] == "crossing_at_pole_row"


def test_level_crossing_of_line():
    x = np.linspace(0.0, 10.0, 6)
    y = 10.0 - x                         # y = 4 at x = 6
    assert level_crossing(y, x, 0, 4.0) == pytest.approx(6.0)
    # per-row levels
    yy = np.vstack([y, y])
    np.testing.assert_allclose(level_crossing(yy, x, np.array([0, 0]), np.array([4.0, 7.5])), [6.0, 2.5])


def test_reverse_searches_towards_smaller_x():
    x = np.arange(7.0)
    y = np.array([-1.0, 1.0, 2.0, 3.0, 2.0, 1.0, -1.0])   # peak at 3; zeros at 0.5 and 5.5
    ry, rx, ridx = reverse(y, x, 3)
    assert ridx == 3
    assert -first_crossing(ry, rx, ridx) == pytest.approx(0.5)
    assert first_crossing(y, x, 3) == pytest.approx(5.5)
    assert reverse(y, x, -1)[2] == -1


def test_pole_row_zero_within_rounding_counts_as_zero():
    # the zonal mean of a wind component on a pole row is zero up to rounding (4e-10 m/s on a real
    # monthly file, float32 values averaged in float64): the step onto it is a crossing at the pole row
    lat = np.array([80.0, 85.0, 87.5, 90.0])
    c = find_crossing(np.array([2.4, 1.5, 0.96, 4.1e-10]), lat, 0)
    assert c.reason == "crossing_at_pole_row" and np.isnan(c.position)
    # a clearly positive pole value is no sign change
    assert find_crossing(np.array([2.4, 1.5, 0.96, 0.3]), lat, 0).reason == "no_sign_change_in_window"


def test_touching_zero_is_no_crossing():
    # quantized data decaying to exactly 0.000 and staying there (the demo's surface westerlies towards
    # the pole before it had polar easterlies): the wind touches zero but never changes sign
    x = np.arange(0.0, 40.0, 4.0)
    y = np.array([9.0, 7.0, 4.0, 1.0, 0.1, 0.0, 0.0, 0.0, 0.0, 0.0])
    c = find_crossing(y, x, 0, direction="down", pole=None)
    assert np.isnan(c.position) and c.reason == "no_sign_change_in_window"
    # touching zero and turning back is no crossing either; the later real sign change is
    y2 = np.array([9.0, 4.0, 0.0, 3.0, 5.0, 2.0, -1.0, -2.0, -2.0, -2.0])
    assert find_crossing(y2, x, 0, direction="down").position == pytest.approx(20.0 + 4.0 * 2.0 / 3.0)
    # the same for "up" (trades to westerlies) and "any"
    assert find_crossing(-y, x, 0, direction="up").reason == "no_sign_change_in_window"
    assert find_crossing(y, x, 0, direction="any").reason == "no_sign_change_in_window"


def test_zeros_then_the_other_sign_cross_at_the_first_zero():
    x = np.arange(0.0, 40.0, 4.0)
    y = np.array([9.0, 7.0, 4.0, 0.0, 0.0, 0.0, -1.0, -2.0, -2.0, -2.0])
    c = find_crossing(y, x, 0, direction="down")
    assert c.reason == "ok" and c.position == pytest.approx(12.0)
    assert find_crossing(-y, x, 0, direction="up").position == pytest.approx(12.0)
    # a run of zeros that ends in a missing point: the sign may change in the gap
    y3 = np.array([9.0, 7.0, 4.0, 0.0, 0.0, np.nan, -1.0, -2.0, -2.0, -2.0])
    c3 = find_crossing(y3, x, 0, direction="down")
    assert np.isnan(c3.position) and c3.reason == "crossing_in_data_gap"
    # the level crossings (half maximum, OLR threshold) follow the same rule
    flat = np.array([9.0, 7.0, 4.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0])
    assert find_level_crossing(flat, x, 0, 1.0, pole=None).reason == "no_sign_change_in_window"


def test_zeros_onto_a_pole_row_are_a_possible_crossing_there():
    lat = np.array([75.0, 80.0, 85.0, 90.0])
    c = find_crossing(np.array([2.0, 0.5, 0.0, 0.0]), lat, 0)
    assert np.isnan(c.position) and c.reason == "crossing_at_pole_row"
    # without a pole row the same run of zeros is no sign change
    c2 = find_crossing(np.array([2.0, 0.5, 0.0, 0.0]), lat - 5.0, 0)
    assert c2.reason == "no_sign_change_in_window"
