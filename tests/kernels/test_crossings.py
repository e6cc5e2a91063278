"""Zero crossings: analytic answers for straight lines, direction/start/stop rules, NaN handling."""

import numpy as np
import pytest

from circtrack.kernels.crossings import first_crossing, level_crossing, reverse


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


def test_nan_points_never_cross():
    x = np.arange(6.0)
    # the sign change 1 -> NaN -> -1 across index 2 is not a crossing; the next proper one is at 4.5
    y = np.array([1.0, 1.0, np.nan, -1.0, 1.0, -1.0])
    assert first_crossing(y, x, 0) == pytest.approx(4.5)
    assert np.isnan(first_crossing(np.full(6, np.nan), x, 0))


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
