"""Windowed extrema and parabolic refinement on a non-uniform grid."""

import numpy as np
import pytest

from circtrack.kernels.extrema import interp_at, parabola_vertex, window_extremum


def parabola(x, a=-2.0, xv=1.37, yv=5.0):
    return a * (x - xv) ** 2 + yv


def test_vertex_of_exact_parabola_nonuniform():
    x0, x1, x2 = 0.2, 1.1, 3.0        # unequal spacing
    xv, yv = parabola_vertex(x0, x1, x2, parabola(x0), parabola(x1), parabola(x2))
    assert xv == pytest.approx(1.37, abs=1e-12)
    assert yv == pytest.approx(5.0, abs=1e-12)


def test_vertex_matches_numpy_polyfit():
    # reference library: numpy.polyfit (least squares of degree 2 through 3 points = interpolation)
    rng = np.random.default_rng(0)
    for _ in range(20):
        x = np.sort(rng.uniform(-5, 5, 3))
        y = rng.normal(size=3)
        a, b, c = np.polyfit(x, y, deg=2)
        ref_x = -b / (2 * a)
        xv, yv = parabola_vertex(*x, *y)
        if x[0] <= ref_x <= x[2]:          # the kernel clips the vertex to the bracket
            assert xv == pytest.approx(ref_x, rel=1e-8, abs=1e-8)
            assert yv == pytest.approx(np.polyval([a, b, c], ref_x), rel=1e-8, abs=1e-8)
        else:
            assert x[0] <= xv <= x[2]


def test_collinear_points_return_middle():
    xv, yv = parabola_vertex(0.0, 1.0, 3.0, 1.0, 2.0, 4.0)
    assert (xv, yv) == (1.0, 2.0)


def test_window_extremum_refines_parabola_on_nonuniform_grid():
    x = np.array([0.0, 0.5, 1.2, 1.6, 2.5, 3.1, 4.0])
    y = parabola(x)
    e = window_extremum(y, x, 0.0, 4.0)
    assert e.position == pytest.approx(1.37, abs=1e-12)
    assert e.value == pytest.approx(5.0, abs=1e-12)
    assert e.index == 2 and not e.at_edge  # x=1.2 is the nearest grid point to 1.37 and e.valid_fraction == 1.0


def test_window_extremum_min():
    x = np.array([0.0, 0.4, 1.0, 1.9, 2.2, 3.0])
    y = -parabola(x, xv=1.7, yv=-3.0)   # minimum 3.0 at 1.7
    e = window_extremum(y, x, 0.0, 3.0, kind="min")
    assert e.position == pytest.approx(1.7, abs=1e-12)
    assert e.value == pytest.approx(3.0, abs=1e-12)


def test_window_restricts_search_and_flags_edge():
    x = np.arange(0.0, 11.0)
    y = x.copy()                         # monotonic: max of window [2, 6] at x = 6 (window edge)
    e = window_extremum(y, x, 2.0, 6.0)
    assert bool(e.at_edge)
    assert e.position == 6.0 and e.value == 6.0 and e.index == 6


def test_all_nan_window():
    x = np.arange(5.0)
    e = window_extremum(np.full((2, 5), np.nan), x, 0.0, 4.0)
    assert np.all(np.isnan(e.position)) and np.all(np.isnan(e.value))
    assert np.all(e.index == -1) and not e.at_edge.any() and np.all(e.valid_fraction == 0)


def test_empty_window():
    x = np.arange(5.0)
    e = window_extremum(np.ones(5), x, 10.0, 20.0)
    assert np.isnan(e.position) and e.index == -1


def test_partial_nan_valid_fraction_and_no_refinement_next_to_nan():
    x = np.arange(6.0)
    y = np.array([0.0, 1.0, 3.0, np.nan, 1.0, 0.0])
    e = window_extremum(y, x, 0.0, 5.0)
    assert e.valid_fraction == pytest.approx(5 / 6)
    assert e.position == 2.0 and e.value == 3.0    # neighbour NaN: grid value, not refined
    # the rule every metric applies (issue 12): an extremum next to a missing point is not trusted
    assert e.next_to_gap and e.reason(0.5) == "extremum_next_to_missing_data"


def test_extremum_reasons_in_order():
    lat = np.array([50.0, 60.0, 70.0, 80.0, 90.0])
    y = np.array([[0.0, 2.0, 1.0, 0.5, 0.0],          # ok (interior, neighbours valid)
                  [0.0, 1.0, 2.0, 3.0, 4.0],          # on the pole row, also the window's edge
                  [0.0, 1.0, 3.0, np.nan, 0.0],       # next to a missing point
                  [3.0, 1.0, 0.0, 0.0, 0.0],          # on the window's first point
                  [np.nan, np.nan, 1.0, np.nan, np.nan]])   # too little data
    e = window_extremum(y, lat, 50.0, 90.0)
    assert list(e.reason(0.5)) == ["ok", "extremum_at_window_edge", "extremum_next_to_missing_data",
                                   "extremum_at_window_edge", "too_little_data"]
    # a pole row inside a window reaching past it (a window edge beyond the data): the pole rule names it
    e = window_extremum(y[1:2], lat, 50.0, 95.0)
    assert e.at_pole[0] and e.reason(0.5)[0] in ("extremum_at_pole_row", "extremum_at_window_edge")
    # the missing neighbour may lie just outside the window: still next to missing data
    y2 = np.array([0.0, 1.0, 3.0, 1.0, np.nan])
    assert window_extremum(y2, lat, 50.0, 80.0).reason(0.5) == "ok"
    y3 = np.array([np.nan, 1.0, 3.0, 0.5, 0.0])
    assert window_extremum(y3, lat, 65.0, 85.0).reason(0.5) == "extremum_at_window_edge"
    assert window_extremum(y3, lat, 55.0, 85.0).reason(0.5) == "ok"
    y4 = np.array([1.0, np.nan, 3.0, 0.5, 0.0])
    assert window_extremum(y4, lat, 50.0, 85.0).reason(0.5) == "extremum_next_to_missing_data"


def test_interp_at():
    x = np.array([0.0, 1.0, 3.0])
    y = np.array([[0.0, 2.0, 6.0]])
    np.testing.assert_allclose(interp_at(y, x, np.array([2.0])), [4.0])
    assert np.isnan(interp_at(y, x, np.array([3.5]))[0])
    assert np.isnan(interp_at(y, x, np.array([np.nan]))[0])


def test_clipped_vertex_value_matches_clipped_position():
    x = np.array([0.0, 1.0, 2.0])
    y = (x - 5.0) ** 2                  # vertex at x = 5, outside the bracket
    xv, yv = parabola_vertex(*x, *y)
    assert xv == 2.0
    assert yv == pytest.approx((xv - 5.0) ** 2)    # 9, the parabola at the returned position


def test_float32_search_and_all_finite_shortcut_give_the_float64_results():
    """float32 input is searched as float32 (its maximum sits at the same index) and a window without
    missing values skips the filling: every field equals the float64 search of the same values."""
    rng = np.random.default_rng(11)
    x = np.concatenate([[-90.0], np.sort(rng.uniform(-89, 89, 40)), [90.0]])
    y = np.round(rng.normal(size=(6, 5, x.size)) * 4, 1).astype(np.float32)   # rounded: ties
    gaps = y.copy()
    gaps[0, 1, 10] = np.nan
    gaps[1, :, 20:] = np.nan
    gaps[2, 3, :] = np.nan
    gaps[3, 0, 5] = np.inf
    gaps[4, 2, 7] = -np.inf
    for arr in (y, gaps):
        for lo, hi in ((-60.0, 60.0), (-90.0, 90.0), (10.0, 89.0)):
            for kind in ("max", "min"):
                got = window_extremum(arr, x, lo, hi, kind=kind)
                want = window_extremum(arr.astype(np.float64), x, lo, hi, kind=kind)
                for f in ("position", "value", "index", "at_edge", "valid_fraction", "next_to_gap", "at_pole"):
                    a, b = getattr(got, f), getattr(want, f)
                    assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=True), (f, lo, hi, kind)


def test_ok_is_the_reason_ok():
    rng = np.random.default_rng(13)
    x = np.linspace(-90.0, 90.0, 37)
    y = rng.normal(size=(50, x.size))
    y[rng.random(y.shape) < 0.2] = np.nan
    y[3] = np.nan
    for lo, hi in ((-60.0, 60.0), (-90.0, 90.0), (0.0, 30.0)):
        ext = window_extremum(y, x, lo, hi)
        for frac in (0.0, 0.5, 0.9):
            assert np.array_equal(ext.ok(frac), ext.reason(frac) == "ok")
