"""Vertical integral and mass streamfunction: closed forms and reference library."""

import numpy as np
import pytest
from scipy.integrate import cumulative_trapezoid

from circtrack.kernels.vertical import at_level, cumulative_pressure_integral, mass_streamfunction

P = np.array([5000.0, 10000.0, 20000.0, 30000.0, 50000.0, 70000.0, 85000.0, 100000.0])  # Pa, non-uniform


def test_linear_v_integral_is_exact():
    # v = a + b p; above the top v is held at v(p0): I(p) = v(p0) p0 + a (p - p0) + b/2 (p^2 - p0^2)
    a, b = 3.0, -2e-5
    v = a + b * P
    p0 = P[0]
    exact = (a + b * p0) * p0 + a * (P - p0) + 0.5 * b * (P ** 2 - p0 ** 2)
    np.testing.assert_allclose(cumulative_pressure_integral(v, P), exact, rtol=1e-12)


def test_matches_scipy_cumulative_trapezoid():
    # reference library: scipy.integrate.cumulative_trapezoid (plus the top slab v0 * p0)
    rng = np.random.default_rng(1)
    v = rng.normal(size=(3, P.size))
    ref = cumulative_trapezoid(v, P, axis=-1, initial=0.0) + v[:, :1] * P[0]
    np.testing.assert_allclose(cumulative_pressure_integral(v, P), ref, rtol=1e-12, atol=1e-9)


def test_nan_below_ground_contributes_zero():
    v = np.ones(P.size)
    v[-2:] = np.nan                           # 850 and 1000 hPa below the ground
    out = cumulative_pressure_integral(v, P)
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
    psi = mass_streamfunction(v, p, lat)
    assert psi.shape == (2, 3)
    assert psi[1, 1] == pytest.approx(1.020485425503e11, rel=1e-10)
    assert psi[1, 0] == pytest.approx(2 * 1.020485425503e11, rel=1e-10)   # cos(0) = 2 cos(60)
    assert abs(psi[1, 2]) < 1e-5 * psi[1, 1]                               # cos(90) = 0
    assert psi[0, 1] == pytest.approx(0.5 * 1.020485425503e11, rel=1e-10)


def test_mass_streamfunction_leading_dims_and_nan():
    v = np.ones((4, 2, 3))
    v[..., 1, 0] = np.nan
    p = np.array([25000.0, 50000.0])
    psi = mass_streamfunction(v, p, np.array([0.0, 30.0, 60.0]))
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
