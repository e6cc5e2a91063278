"""kernels/cores.py: jet cores in the latitude-pressure plane on fields with known core positions."""

import numpy as np
import pytest

from circtrack.kernels import cores as K

LAT = np.arange(-90.0, 90.1, 2.5)
X = np.arange(0.0, 90.1, 2.5)                    # one hemisphere, poleward degrees
P = np.array([50.0, 70.0, 100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 700.0, 850.0, 925.0, 1000.0])
WINDOWS = {"subtropical": ((10.0, 45.0), (100.0, 400.0)), "eddy": ((30.0, 70.0), (150.0, 850.0))}
SEARCH = dict(min_fraction=0.5, min_speed=10.0)


def jet(x, p, lat0, p0, speed, *, width=8.0, depth=0.6, tilt=0.0):
    """A jet ``speed * exp(-(d/width)^2 - (s/depth)^2)`` with ``s = ln(p/p0)`` and ``d = x - lat0 - tilt*s``:
    its maximum is ``speed`` at ``(lat0, p0)`` whatever the tilt (along the ridge d = 0)."""
    s = np.log(np.asarray(p, float) / p0)[:, None]
    d = np.asarray(x, float)[None, :] - lat0 - tilt * s
    return speed * np.exp(-(d / width) ** 2 - (s / depth) ** 2)


def core(u, x=X, p=P, window=WINDOWS["subtropical"], **kw):
    return K.find_core(u, x, p, *window, **{**SEARCH, **kw})


def test_quadratic_core_between_grid_points_and_levels_is_exact():
    # u = 50 - 0.05 (x - 31.3)^2 - 40 (ln p - ln 222)^2: the separable quadratic the refinement assumes
    s = np.log(P / 222.0)[:, None]
    u = 50.0 - 0.05 * (X[None, :] - 31.3) ** 2 - 40.0 * s ** 2
    c = core(u)
    assert c.reason == K.OK
    assert c.lat == pytest.approx(31.3, abs=1e-9)
    assert c.pressure == pytest.approx(222.0, rel=1e-9)
    assert c.speed == pytest.approx(50.0, abs=1e-9)
    assert (X[c.j], P[c.k]) == (32.5, 200.0)       # the grid maximum the refinement started from


def test_gaussian_core_between_levels():
    # 1-degree latitudes: the parabola through three points of a Gaussian is close to its peak
    x = np.arange(0.0, 90.1, 1.0)
    c = core(jet(x, P, 28.6, 180.0, 45.0), x=x)
    assert c.reason == K.OK
    assert c.lat == pytest.approx(28.6, abs=0.05)
    assert c.pressure == pytest.approx(180.0, rel=0.03)      # levels 150/200/250: log-spacing ~0.25-0.29
    assert c.speed == pytest.approx(45.0, abs=0.6)


def test_tilted_jet_keeps_its_core():
    # the jet axis leans 8 degrees poleward per e-fold of pressure; the maximum stays at (35, 250)
    x = np.arange(0.0, 90.1, 1.0)
    for tilt in (-8.0, 8.0):
        c = core(jet(x, P, 35.0, 250.0, 40.0, tilt=tilt), x=x)
        assert c.reason == K.OK
        assert c.lat == pytest.approx(35.0, abs=0.3)
        assert c.pressure == pytest.approx(250.0, rel=0.04)
        assert c.speed == pytest.approx(40.0, abs=1.0)


def test_split_jets_give_two_cores_and_a_merged_jet_one():
    lat = np.arange(-90.0, 90.1, 1.0)
    nh = jet(lat, P, 28.0, 200.0, 45.0, width=5.0) + jet(lat, P, 52.0, 300.0, 30.0, width=6.0, depth=1.2)
    sh = jet(-lat, P, 40.0, 250.0, 35.0)
    u = np.where(lat[None, :] >= 0, nh, sh)
    c = K.hemisphere_cores(u, lat, P, WINDOWS, **SEARCH)          # (2 hemispheres, 2 jets, 4)
    assert c[0, 0, :3] == pytest.approx([28.0, 200.0, 45.0], rel=0.03)
    assert c[0, 1, :3] == pytest.approx([52.0, 300.0, 30.0], rel=0.03)
    assert list(c[0, :, 3]) == [K.OK, K.OK]
    # the southern jet at 40 deg lies in both windows: one core, reported as the subtropical one
    assert c[1, 0, 0] == pytest.approx(-40.0, abs=0.1)
    assert c[1, 0, 3] == -K.MERGED and c[1, 1, 3] == K.MERGED
    assert np.isnan(c[1, 1, :3]).all()


def test_core_on_a_window_edge_is_not_reported():
    # a jet at 47 deg: inside the subtropical window [10, 45] the wind only grows towards 45
    c = core(jet(X, P, 47.0, 200.0, 40.0))
    assert c.reason == K.AT_EDGE and np.isnan([c.lat, c.pressure, c.speed]).all() and c.j == -1
    # a jet whose maximum is above the window's top level (70 hPa; window 100-400 hPa)
    c = core(jet(X, P, 30.0, 70.0, 40.0, depth=0.4))
    assert c.reason == K.AT_EDGE
    # exactly on the window's edge latitude: still no interior maximum
    assert core(jet(X, P, 45.0, 200.0, 40.0)).reason == K.AT_EDGE


def test_an_interior_core_wins_over_a_stronger_wind_on_the_edge():
    # the strong subtropical jet leaks into the eddy window's equatorward edge; the weaker eddy-driven
    # core inside the window is still found
    x = np.arange(0.0, 90.1, 1.0)
    u = jet(x, P, 27.0, 200.0, 50.0, width=5.0) + jet(x, P, 55.0, 300.0, 25.0, width=6.0, depth=1.2)
    c = core(u, x=x, window=WINDOWS["eddy"])
    assert c.reason == K.OK and c.lat == pytest.approx(55.0, abs=0.3)


def test_too_short_column_and_missing_neighbour():
    u = jet(X, P, 30.0, 200.0, 40.0)
    two = np.array([200.0, 850.0])
    c = core(u[[4, 10]], p=two)
    assert c.reason == K.COLUMN_SHORT and np.isnan(c.lat)
    # a gap right beside the maximum: the true maximum may be in the gap
    gap = u.copy()
    gap[4, X == 32.5] = np.nan
    assert core(gap).reason == K.NEXT_TO_MISSING
    # a column with fewer than three valid levels at the maximum (the rest missing)
    short = u.copy()
    short[[3, 5, 6, 7], 12] = np.nan
    assert core(short).reason == K.COLUMN_SHORT
    # the same wind at the maximum and the level above it: no single core level
    flat = u.copy()
    flat[3, 12] = flat[4, 12]
    assert core(flat).reason == K.COLUMN_SHORT


def test_too_little_data_and_weak_cores():
    u = jet(X, P, 30.0, 200.0, 40.0)
    sparse = np.where(np.arange(X.size)[None, :] % 4 == 0, u, np.nan)
    assert core(sparse).reason == K.TOO_LITTLE
    assert core(u * 0.2).reason == K.WEAK                      # 8 m/s < min_speed 10


def test_leading_axes_are_vectorised():
    u = np.stack([jet(X, P, 25.0 + 5 * i, 200.0, 40.0) for i in range(3)])[:, None]   # (3, 1, L, J)
    c = core(u)
    assert c.lat.shape == (3, 1)
    assert c.lat[:, 0] == pytest.approx([25.0, 30.0, 35.0], abs=0.2)


def test_longitude_bands():
    lon = np.arange(-180.0, 180.0, 10.0)
    band, centres = K.longitude_bands(lon, 0.0)
    assert band.tolist() == list(range(lon.size)) and centres.tolist() == np.mod(lon, 360.0).tolist()
    band, centres = K.longitude_bands(lon, 90.0)
    assert list(centres) == [45.0, 135.0, 225.0, 315.0]
    assert np.bincount(band).tolist() == [9, 9, 9, 9]
    a = np.arange(lon.size, dtype=float)[None, :]
    m = K.band_means(a, band, 4)
    assert m[0, band[0]] == pytest.approx(np.mean(a[0, band == band[0]]))
    inside = K.bands_in((lon >= 0) & (lon < 180), band, 4)
    assert inside.tolist() == [True, True, False, False]
    assert K.bands_in(None, band, 4).all()


def test_summary_of_a_meander():
    # cores (hemisphere, jet, quantity, band) for 4 bands: the eddy core missing in one of them
    c = np.full((2, 2, 4, 4), np.nan)
    c[0, 0, 0] = [30.0, 32.0, 28.0, 30.0]
    c[0, 0, 1] = 200.0
    c[0, 1, 0] = [50.0, 54.0, np.nan, 46.0]
    c[0, 1, 1] = [300.0, 250.0, np.nan, 350.0]
    s = K.summarize(c, np.ones(4, bool))
    assert s[0, 0] == pytest.approx(3 / 4)                    # split in 3 of the 4 bands with a core
    assert s[0, 1] == 1.0
    assert s[0, 2] == pytest.approx(np.std([30, 32, 28, 30]))
    assert s[0, 3] == 0.0 and s[0, 4] == 1.0
    assert s[0, 5] == pytest.approx(np.std([50, 54, 46]))
    assert s[0, 6] == pytest.approx(np.std([300, 250, 350]))
    assert s[0, 7] == 0.75
    assert np.isnan(s[1, 0]) and s[1, 1] == 0.0                # no core at all in the SH


def test_bands_of_one_longitude_on_a_grid_from_minus_180_sit_at_their_own_longitude():
    """Bands as wide as the grid spacing hold one longitude each; on a grid running from -180 the
    bands (numbered from 0 east) come in another order than the grid: each band must get its own
    longitude's core (the band at 3.75 E the core of 0 E, not of 180 W)."""
    lon = np.arange(-180.0, 180.0, 7.5)
    lat = np.arange(-80.0, 80.1, 2.0)
    p = np.array([100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 700.0, 850.0])
    jet_lat = 40.0 + 10.0 * np.cos(np.deg2rad(lon))             # 50 N at 0 E, 30 N at 180
    u = 40.0 * np.exp(-((np.abs(lat)[None, :, None] - jet_lat[None, None, :]) / 6.0) ** 2
                      - (np.log(p[:, None, None] / 250.0) / 0.5) ** 2)
    windows = {"subtropical": ((10.0, 45.0), (100.0, 400.0)), "eddy": ((30.0, 70.0), (150.0, 850.0))}
    kw = dict(min_fraction=0.5, min_speed=10.0)
    each, lam, _ = K.cores_by_longitude(u[None], lat, p, lon, windows, band_width=0.0, **kw)
    banded, centres, band = K.cores_by_longitude(u[None], lat, p, lon, windows, band_width=7.5, **kw)
    assert centres.size == lon.size and np.all(np.diff(centres) > 0)
    for b, c in enumerate(centres):
        i = int(np.flatnonzero(np.isclose(lam + 3.75, c))[0])
        assert np.array_equal(banded[..., b], each[..., i], equal_nan=True), c
    b0 = int(np.argmin(np.abs(centres - 3.75)))
    assert abs(banded[0, 0, 1, 0, b0] - 50.0) < 0.5               # NH eddy-jet core at 0 E: 50 N
    assert np.allclose(K.band_means(u, band, centres.size), u[..., np.argsort(band)])
