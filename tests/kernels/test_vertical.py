"""Vertical integral and mass streamfunction: closed forms and reference library."""

import numpy as np
import pytest
from scipy.integrate import cumulative_trapezoid

from circtrack.kernels.vertical import (at_level, balance_column, column_net_mass_flux, cumulative_pressure_integral,
                                        interpolated, mass_streamfunction)

OLD = dict(top="constant_above_top", balance="none")   # the form used before issue 12, still an option

P = np.array([5000.0, 10000.0, 20000.0, 30000.0, 50000.0, 70000.0, 85000.0, 100000.0])  # Pa, non-uniform


def test_linear_v_integral_is_exact():
    # v = a + b p; above the top v is held at v(p0): I(p) = v(p0) p0 + a (p - p0) + b/2 (p^2 - p0^2)
    a, b = 3.0, -2e-5
    v = a + b * P
    p0 = P[0]
    exact = (a + b * p0) * p0 + a * (P - p0) + 0.5 * b * (P ** 2 - p0 ** 2)
    np.testing.assert_allclose(cumulative_pressure_integral(v, P, "constant_above_top"), exact, rtol=1e-12)
    # default (issue 12): psi = 0 at the top data level, no slab above it
    np.testing.assert_allclose(cumulative_pressure_integral(v, P), exact - (a + b * p0) * p0, rtol=1e-12, atol=1e-6)


def test_matches_scipy_cumulative_trapezoid():
    # reference library: scipy.integrate.cumulative_trapezoid (plus the top slab v0 * p0)
    rng = np.random.default_rng(1)
    v = rng.normal(size=(3, P.size))
    ref = cumulative_trapezoid(v, P, axis=-1, initial=0.0)
    np.testing.assert_allclose(cumulative_pressure_integral(v, P), ref, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(cumulative_pressure_integral(v, P, "constant_above_top"), ref + v[:, :1] * P[0],
                               rtol=1e-12, atol=1e-9)


def test_nan_below_ground_contributes_zero():
    v = np.ones(P.size)
    v[-2:] = np.nan                           # 850 and 1000 hPa below the ground
    out = cumulative_pressure_integral(v, P, "constant_above_top")
    # top slab 5000, trapezoids of 1 up to 70000 Pa -> 70000; then (1+0)/2*15000 and 0
    np.testing.assert_allclose(out[:6], P[:6])
    assert out[6] == pytest.approx(70000.0 + 7500.0)
    assert out[7] == pytest.approx(77500.0)
    assert np.all(np.isfinite(out))


def test_mass_streamfunction_factor_hand_computed():
    # v = 1 m/s at all levels, p = [25000, 50000] Pa -> integral 50000 Pa m/s at 500 hPa.
    # factor at 60 deg: 2 pi a cos(60)/g = pi * 6.371e6 / 9.80665 = 2040970.851 m s2 ... ;
    # psi = 50000 * 2040970.851 = 1.020485425503e11 kg/s
    v = np.ones((2, 3))
    p = np.array([25000.0, 50000.0])
    lat = np.array([0.0, 60.0, 90.0])
    psi = mass_streamfunction(v, p, lat, **OLD)
    assert psi.shape == (2, 3)
    assert psi[1, 1] == pytest.approx(1.020485425503e11, rel=1e-10)
    assert psi[1, 0] == pytest.approx(2 * 1.020485425503e11, rel=1e-10)   # cos(0) = 2 cos(60)
    assert abs(psi[1, 2]) < 1e-5 * psi[1, 1]                               # cos(90) = 0
    assert psi[0, 1] == pytest.approx(0.5 * 1.020485425503e11, rel=1e-10)


def test_mass_streamfunction_leading_dims_and_nan():
    v = np.ones((4, 2, 3))
    v[..., 1, 0] = np.nan
    p = np.array([25000.0, 50000.0])
    psi = mass_streamfunction(v, p, np.array([0.0, 30.0, 60.0]), **OLD)
    assert psi.shape == (4, 2, 3)
    assert np.all(np.isfinite(psi))
    # at lat 0 the bottom NaN counts as zero: 25000 + 0.5*25000 = 37500
    factor0 = 2 * np.pi * 6.371e6 / 9.80665
    np.testing.assert_allclose(psi[:, 1, 0], 37500.0 * factor0, rtol=1e-12)


def test_at_level_nearest_and_loglinear():
    p = np.array([200.0, 500.0, 850.0])
    field = np.log(p)[:, None] * np.ones((3, 2))      # field linear in log p -> interpolation exact
    np.testing.assert_allclose(at_level(field, p, 500.4, tolerance=1.0), np.log(500.0))
    np.testing.assert_allclose(at_level(field, p, 300.0, tolerance=1.0), np.log(300.0), rtol=1e-12)
    assert at_level(field, p, 1000.0, tolerance=1.0) is None
    assert at_level(field, p, 100.0, tolerance=1.0) is None


# --------------------------------------------------------------------------- column rules (issue 12)
FACTOR_0 = 2 * np.pi * 6.371e6 / 9.80665          # 2 pi a cos(0) / g


def test_balanced_column_is_left_as_it_is():
    # v = +2 above 500 hPa and -2 below on levels 200, 500, 800 hPa (weights 150, 300, 150 hPa):
    # net = 2*15000 + 0*30000 ... the middle level sits on the reversal (v = 0): net = 30000 - 30000 = 0
    p = np.array([20000.0, 50000.0, 80000.0])
    v = np.array([2.0, 0.0, -2.0])[:, None]
    psi = mass_streamfunction(v, p, np.array([0.0]))
    np.testing.assert_allclose(psi[:, 0] / FACTOR_0, [0.0, 30000.0, 0.0], atol=1e-9)
    np.testing.assert_allclose(psi, mass_streamfunction(v, p, np.array([0.0]), balance="none"), atol=1e-3)
    assert column_net_mass_flux(v, p, np.array([0.0]))[0] == pytest.approx(0.0, abs=1e-3)


def test_unbalanced_column_gets_its_net_flux_removed():
    # uniform v = 1 m/s from 200 to 800 hPa: the whole column drifts north, 60000 Pa m/s of net flux.
    # Removed where there is air, v - c = 0 everywhere: psi = 0 at every level.
    p = np.array([20000.0, 50000.0, 80000.0])
    v = np.ones((3, 1))
    np.testing.assert_allclose(mass_streamfunction(v, p, np.array([0.0])), 0.0, atol=1e-3)
    assert column_net_mass_flux(v, p, np.array([0.0]))[0] == pytest.approx(60000.0 * FACTOR_0)
    # unbalanced overturning: +3 above, -1 below (levels 200, 500, 800 hPa; weights 150, 300, 150 hPa)
    # net = 3*15000 + 1*30000 - 1*15000 = 60000 -> c = 60000/60000 = 1: v - c = (2, 0, -2), the
    # balanced column of the test above
    v = np.array([3.0, 1.0, -1.0])[:, None]
    psi = mass_streamfunction(v, p, np.array([0.0]))
    np.testing.assert_allclose(psi[:, 0] / FACTOR_0, [0.0, 30000.0, 0.0], atol=1e-9)
    raw = mass_streamfunction(v, p, np.array([0.0]), balance="none")
    assert raw[-1, 0] / FACTOR_0 == pytest.approx(60000.0)       # psi at the bottom = the net flux


def test_balance_only_where_there_is_air():
    # the lowest level is below the ground on half the circle (air share 0.5) and v there is the
    # zero-filled mean; the correction c is spread over the air only, and psi closes at the bottom
    p = np.array([20000.0, 50000.0, 80000.0])
    air = np.array([1.0, 1.0, 0.5])
    v = np.array([3.0, 1.0, -0.5])                   # -1 m/s over half the circle, zero-filled
    vb, net = balance_column(v, air, p)
    w = np.array([15000.0, 30000.0, 15000.0])
    assert net == pytest.approx(np.sum(w * v))
    c = net / np.sum(w * air)
    np.testing.assert_allclose(vb, v - c * air)
    assert np.sum(w * vb) == pytest.approx(0.0, abs=1e-9)
    psi = mass_streamfunction(v[:, None], p, np.array([0.0]), air=air[:, None])
    assert psi[-1, 0] == pytest.approx(0.0, abs=1e-3)
    # a level wholly below the ground (air 0) is not corrected
    vb, _ = balance_column(np.array([1.0, 1.0, 0.0]), np.array([1.0, 1.0, 0.0]), p)
    assert vb[-1] == 0.0


def test_top_rules_for_data_stopping_at_100_hpa():
    # v = cos(pi (p - 100 hPa) / 900 hPa), a cell confined between 100 hPa and the ground: from the top
    # data level psi is exact (sin); holding v at its top value up to p = 0 adds v(100) * 100 hPa
    p = np.linspace(10000.0, 100000.0, 181)
    v = np.cos(np.pi * (p - 10000.0) / 90000.0)[:, None]
    exact = 90000.0 / np.pi * np.sin(np.pi * (p - 10000.0) / 90000.0)
    psi = mass_streamfunction(v, p, np.array([0.0]))[:, 0] / FACTOR_0
    np.testing.assert_allclose(psi, exact, atol=2.0)
    old = mass_streamfunction(v, p, np.array([0.0]), **OLD)[:, 0] / FACTOR_0
    np.testing.assert_allclose(old - psi, 10000.0, atol=1e-6)
    assert old.max() / psi.max() == pytest.approx(1 + 10000.0 * np.pi / 90000.0, rel=1e-3)   # +35 %


def test_unknown_rules_raise():
    with pytest.raises(ValueError):
        cumulative_pressure_integral(np.ones(2), np.array([1.0, 2.0]), "above")
    with pytest.raises(ValueError):
        balance_column(np.ones(2), np.ones(2), np.array([1.0, 2.0]), balance="some")


def test_interpolated_says_when_at_level_interpolates():
    p = np.array([200.0, 300.0, 500.0])
    assert interpolated(p, 250.0, tolerance=1.0)
    assert not interpolated(p, 300.4, tolerance=1.0)
    assert not interpolated(p, 100.0, tolerance=1.0)          # outside: level_missing, not interpolated
