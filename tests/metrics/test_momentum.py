"""Angular momentum: Earth-rotation facts and the local Rossby number."""

import numpy as np
import pytest

from circtrack import config, engine, synthetic
from circtrack.constants import EARTH_RADIUS, OMEGA
from circtrack.metrics.momentum import angular_momentum_wind, local_rossby_number


def test_surface_speed_of_the_rotating_earth():
    # common practice: the surface moves at about 1670 km/h at the equator and 1450 km/h at 30 deg
    speed = OMEGA * EARTH_RADIUS * np.cos(np.deg2rad([0.0, 30.0])) * 3.6
    assert speed[0] == pytest.approx(1670, rel=0.005)
    assert speed[1] == pytest.approx(1450, rel=0.005)


def test_angular_momentum_conserving_wind():
    # Held & Hou (1980): u_M = Omega a sin^2 / cos; at 30 deg that is Omega a / (4 cos 30) ~ 134 m/s
    assert angular_momentum_wind(30.0) == pytest.approx(OMEGA * EARTH_RADIUS * 0.25 / np.cos(np.pi / 6), rel=1e-12)
    assert angular_momentum_wind(30.0) == pytest.approx(134.1, abs=0.2)
    lat = np.arange(-40, 40.1, 0.5)
    ro = local_rossby_number(angular_momentum_wind(lat), lat)
    inner = np.abs(lat) >= 5
    np.testing.assert_allclose(ro[inner], 1.0, atol=2e-3)    # zero absolute vorticity -> Ro = 1
    assert np.all(np.isnan(ro[np.abs(lat) <= 1.0]))


def test_rossby_number_zero_for_solid_body_free_flow():
    lat = np.arange(-40, 40.1, 1.0)
    # u cos(lat) constant -> relative vorticity zeta = 0 -> Ro = 0
    u = 10.0 / np.cos(np.deg2rad(lat))
    ro = local_rossby_number(u, lat)
    np.testing.assert_allclose(ro[np.abs(lat) > 2], 0.0, atol=1e-9)


def test_hadley_rossby_number_through_the_engine(tmp_path):
    """A field whose upper-level wind is the angular-momentum-conserving wind gives Ro = 1."""
    lat = np.arange(-90, 90.1, 1.0)
    lon = np.arange(0, 360, 30.0)
    plev = [1000, 850, 700, 500, 300, 250, 200, 150, 100]
    ds = synthetic.dataset(lat, lon, plev, synthetic.monthly_times(2001, 1)[:1], wave_amplitude=0.0)
    # inside 40 deg only (250.6 m/s at 40 deg would be refused as implausible, inputs/plausible.py; the
    # metric sees the latitudes inside the Hadley edge, ~30 deg, only)
    um = np.where(np.abs(lat) < 40, angular_momentum_wind(lat), 0.0)
    upper = np.isin(plev, [300, 250, 200, 150])
    ds["ua"][:, upper, :, :] = um[None, None, :, None]
    path = tmp_path / "am.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding())
    out = engine.track([str(path)], config.load(), metric_ids=["hadley_rossby_number"])
    vals = dict(zip(out.columns["hemisphere"], out.columns["value"]))
    assert vals["NH"] == pytest.approx(1.0, abs=0.01)
    assert vals["SH"] == pytest.approx(1.0, abs=0.01)


def test_hadley_rossby_number_changes_smoothly_as_the_edge_crosses_a_grid_latitude(tmp_path):
    """Grid bands count with the share inside the edge: no jump when the edge passes 28.0 deg."""
    lat = np.arange(-90, 90.1, 1.0)
    lon = np.arange(0, 360, 30.0)
    plev = [1000, 850, 700, 500, 300, 250, 200, 150, 100]
    vals = []
    for nh_edge in (27.98, 28.0, 28.02):
        ds = synthetic.dataset(lat, lon, plev, synthetic.monthly_times(2001, 1)[:1], wave_amplitude=0.0,
                               cell_zeros=(-60.0, -30.0, 5.0, nh_edge, 62.0))
        # a wind whose Rossby number grows poleward, so the band at 28 deg matters
        # (poleward of 36 deg held at 0: the growing wind there, 272 m/s at 39 deg and 1e19 m/s at the pole
        # rows, would be refused as implausible, inputs/plausible.py; the metric sees the latitudes inside
        # the Hadley edge only)
        u = 0.5 * angular_momentum_wind(lat) * (1 + np.abs(lat) / 30.0)
        ds["ua"][:, 4:8, :, :] = np.where(np.abs(lat) < 36, u, 0.0)[None, None, :, None]
        path = tmp_path / f"e{nh_edge}.nc"
        ds.to_netcdf(path, encoding=synthetic.time_encoding())
        out = engine.track([str(path)], config.load(), metric_ids=["hadley_edge_lat", "hadley_rossby_number"])
        c = out.columns
        get = {(m, h): v for m, h, v in zip(c["metric"], c["hemisphere"], c["value"])}
        assert get[("hadley_edge_lat", "NH")] == pytest.approx(nh_edge, abs=0.01)
        vals.append(get[("hadley_rossby_number", "NH")])
    # a 0.02 deg move of the edge changes the mean by far less than dropping a whole 1-deg band would
    assert abs(vals[1] - vals[0]) < 2e-3 and abs(vals[2] - vals[1]) < 2e-3
    assert vals[0] < vals[1] < vals[2]
