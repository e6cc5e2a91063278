"""Known answers for the longitude reductions (covariances, Fourier amplitudes, column sums,
per-longitude maxima) and checks against reference libraries named beside each check."""

import statistics

import numpy as np
import pytest
import scipy.fft
from scipy.interpolate import CubicSpline
from scipy.optimize import minimize_scalar

from circtrack.kernels import zonal as Z
from circtrack.kernels.vertical import cumulative_pressure_integral

LON = np.arange(0.0, 360.0, 7.5)          # 48 points
LAM = np.deg2rad(LON)


@pytest.mark.parametrize("k,phase", [(1, 0.0), (2, 0.6), (5, np.pi / 2), (3, np.pi)])
def test_covariance_of_two_waves(k, phase):
    # u = U0 + A cos(k lam), v = V0 + B cos(k lam + phase): [u'v'] = A B / 2 cos(phase) (mean of cos*cos)
    A, B = 7.0, 3.0
    u = 12.0 + A * np.cos(k * LAM)
    v = -1.0 + B * np.cos(k * LAM + phase)
    cov, frac = Z.zonal_covariance(u, v)
    assert cov == pytest.approx(A * B / 2 * np.cos(phase), abs=1e-12)
    assert frac == 1.0


def test_covariance_against_python_statistics_with_gaps_and_a_band():
    # reference: Python standard library statistics.covariance (sample, n-1) scaled to the population
    rng = np.random.default_rng(3)
    u, v = rng.normal(size=(2, 48))
    u[[3, 17]] = np.nan
    band = (LON >= 30.0) & (LON <= 200.0)
    cov, frac = Z.zonal_covariance(u, v, band)
    ok = band & np.isfinite(u)
    n = ok.sum()
    ref = statistics.covariance(list(u[ok]), list(v[ok])) * (n - 1) / n
    assert cov == pytest.approx(ref, rel=1e-12)
    assert frac == pytest.approx(n / band.sum())


def test_covariance_all_missing_is_nan():
    cov, frac = Z.zonal_covariance(np.full(8, np.nan), np.ones(8))
    assert np.isnan(cov) and frac == 0.0


@pytest.mark.parametrize("lon", [LON, LON - 180.0, LON + 20.0], ids=["0_360", "-180_180", "20_380"])
def test_fourier_amplitudes_known_waves(lon):
    lam = np.deg2rad(lon)
    v = 4.0 + 1.5 * np.sin(lam) + 3.0 * np.cos(2 * lam - 0.7)
    amp = Z.fourier_amplitudes(v, lon, [1, 2, 3])
    np.testing.assert_allclose(amp, [1.5, 3.0, 0.0], atol=1e-12)


def test_fourier_amplitudes_against_scipy_fft():
    # reference: scipy.fft.rfft; the amplitude of wavenumber k on N points is 2 |X_k| / N
    rng = np.random.default_rng(7)
    y = rng.normal(size=(5, LON.size))
    ref = 2 * np.abs(scipy.fft.rfft(y, axis=-1)[:, 1:4]) / LON.size
    np.testing.assert_allclose(Z.fourier_amplitudes(y, LON, [1, 2, 3]), ref, rtol=1e-10, atol=1e-12)


def test_fourier_amplitudes_missing_longitude_gives_nan():
    y = np.cos(LAM)[None, :].repeat(2, axis=0)
    y[1, 4] = np.nan
    amp = Z.fourier_amplitudes(y, LON, [1])
    assert amp[0, 0] == pytest.approx(1.0) and np.isnan(amp[1, 0])


def test_layer_weights_hand_calculation():
    p = np.arange(100.0, 1001.0, 100.0)
    # default top rule (issue 12): the column starts at the top data level: [100, 150], then 100 hPa
    # each, the lowest level's half layer [950, 1000]
    np.testing.assert_allclose(Z.layer_weights(p), [50] + [100] * 8 + [50])
    # the old form: the top level also stands for [0, 100]
    np.testing.assert_allclose(Z.layer_weights(p, "constant_above_top"), [150] + [100] * 8 + [50])
    f = np.random.default_rng(1).normal(size=p.size)
    # same quadrature as the streamfunction integral, under either rule
    for top in ("zero_at_top_level", "constant_above_top"):
        assert np.sum(Z.layer_weights(p, top) * f) == pytest.approx(cumulative_pressure_integral(f, p, top)[-1],
                                                                   rel=1e-12)


def test_column_sums_leave_out_below_ground():
    p = np.array([200.0, 500.0, 1000.0])                   # weights 150, 400, 250 (350, 400, 250 with the old top)
    v = np.array([1.0, 2.0, np.nan])[:, None, None]
    e = np.array([10.0, 20.0, 30.0])[:, None, None]
    sve, sv, se, sw = (x[0, 0] for x in Z.column_sums(v, e, p))
    assert sve == pytest.approx(150 * 10 + 400 * 2 * 20)
    assert sv == pytest.approx(150 + 800)
    assert se == pytest.approx(150 * 10 + 400 * 20)
    assert sw == pytest.approx(550)
    sve, sv, se, sw = (x[0, 0] for x in Z.column_sums(v, e, p, "constant_above_top"))
    assert (sve, sv, se, sw) == (pytest.approx(350 * 10 + 400 * 2 * 20), pytest.approx(1150), pytest.approx(350 * 10 + 400 * 20),
                                 pytest.approx(750))


def test_humidity_missing_aloft_counts_as_zero_above_the_ground():
    # q missing at 100 and 200 hPa (shipped only up to 300 hPa), and at 1000 hPa where the ground is
    # (t missing there too): aloft q = 0, below the ground it stays missing
    t = np.array([210.0, 220.0, 240.0, 260.0, np.nan])[:, None, None]
    q = np.array([np.nan, np.nan, 1e-4, 5e-3, np.nan])[:, None, None]
    filled_q, filled = Z.humidity_filled_aloft(q, t)
    np.testing.assert_array_equal(filled[:, 0, 0], [True, True, False, False, False])
    assert filled_q[0, 0, 0] == 0.0 and filled_q[1, 0, 0] == 0.0 and filled_q[3, 0, 0] == 5e-3
    assert np.isnan(filled_q[4, 0, 0])


def _meandering_jet(lat, lon, centre):
    """u = 15 exp(-((lat - c(lon))/10)^2), shape (J, I)."""
    return 15.0 * np.exp(-(((lat[:, None] - centre[None, :]) / 10.0) ** 2))


def test_per_longitude_jet_latitude_and_spread():
    lat = np.arange(-90.0, 90.1, 1.0)
    lon = np.arange(0.0, 360.0, 10.0)
    lam = np.deg2rad(lon)
    c = 45.0 + 5.0 * np.sin(2 * lam)
    u = _meandering_jet(lat, lon, c)
    pos = Z.per_longitude_peak(u, lat, "NH", (15.0, 70.0), min_fraction=0.5)
    np.testing.assert_allclose(pos, c, atol=0.02)
    std, mean, frac = Z.spread(pos)
    # mean of sin^2 over a full period on a regular grid is 1/2: spread = 5 / sqrt(2)
    assert std == pytest.approx(5.0 / np.sqrt(2.0), abs=0.02)
    assert mean == pytest.approx(45.0, abs=0.02) and frac == 1.0
    # reference: Python standard library statistics.pstdev (population standard deviation)
    assert std == pytest.approx(statistics.pstdev(list(pos)), rel=1e-12)


def test_per_longitude_peak_against_scipy_spline_maximum():
    # reference: the maximum of scipy's cubic spline through the same profile (scipy.optimize)
    lat = np.arange(0.0, 90.1, 2.5)
    lon = np.array([0.0, 90.0, 180.0])
    c = np.array([41.3, 47.9, 52.2])
    u = _meandering_jet(lat, lon, c)
    pos = Z.per_longitude_peak(u, lat, "NH", (15.0, 70.0), min_fraction=0.5)
    for i in range(lon.size):
        spl = CubicSpline(lat, u[:, i])
        ref = minimize_scalar(lambda x: -spl(x), bounds=(30.0, 65.0), method="bounded").x
        assert pos[i] == pytest.approx(ref, abs=0.1)


def test_per_longitude_peak_on_window_edge_is_left_out():
    lat = np.arange(-90.0, 90.1, 1.0)
    lon = np.array([0.0, 10.0])
    u = _meandering_jet(lat, lon, np.array([45.0, 80.0]))   # the second one peaks outside 15-70
    pos = Z.per_longitude_peak(u, lat, "NH", (15.0, 70.0), min_fraction=0.5)
    assert pos[0] == pytest.approx(45.0, abs=0.01) and np.isnan(pos[1])
    sh = Z.per_longitude_peak(u[::-1] * 1.0, lat, "SH", (15.0, 70.0), min_fraction=0.5)   # mirrored field
    assert sh[0] == pytest.approx(45.0, abs=0.01)


def test_covers_circle():
    assert Z.covers_circle(LON) and Z.covers_circle(LON - 180.0) and Z.covers_circle(LON + 20.0)
    assert not Z.covers_circle(np.arange(-60.0, 40.1, 1.0))            # a regional grid
    irregular = np.sort(np.concatenate([np.arange(0, 360, 10.0), [5.0, 15.0]]))
    assert Z.covers_circle(irregular)
