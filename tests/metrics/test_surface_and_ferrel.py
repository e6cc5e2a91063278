"""Known answers for the Ferrel cell, the surface wind belts and the subtropical highs."""

import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine, synthetic


def _rows(outcome):
    c = outcome.columns
    return {(c["metric"][i], c["hemisphere"][i]): (c["value"][i], c["flag"][i])
            for i in range(len(c["metric"])) if c["time"][i] == c["time"][0]}


@pytest.fixture()
def surface_file(tmp_path):
    """[uas] = 7 sin(pi (|lat| - 30) / 30) for |lat| <= 60, -3 sin(pi (|lat| - 60) / 30) poleward:
    zeros exactly at 30 (trades -> westerlies) and 60 (westerlies -> polar easterlies), extremes of
    7 m s-1 at 15 and 45. [psl] = 1013 + 8 exp(-((|lat| - 32)/10)^2) hPa, stored in Pa: peak at 32, 1021 hPa."""
    lat = np.arange(-90, 90.1, 1.0)
    lon = np.arange(-180, 180, 15.0)
    a = np.abs(lat)
    u = np.where(a > 60, -3 * np.sin(np.pi * (a - 60) / 30.0), 7.0 * np.sin(np.pi * (a - 30) / 30.0))
    psl = (1013 + 8 * np.exp(-(((a - 32) / 10) ** 2))) * 100.0
    t = synthetic.monthly_times(2001, 1, "noleap")[:2]
    shape = (t.size, lat.size, lon.size)
    ds = xr.Dataset({"u10": (("time", "latitude", "longitude"), np.broadcast_to(u[None, :, None], shape), {"units": "m/s"}),
                     "msl": (("time", "latitude", "longitude"), np.broadcast_to(psl[None, :, None], shape), {"units": "Pa"})},
                    coords={"time": t, "latitude": lat, "longitude": lon})
    ds = ds.isel(latitude=slice(None, None, -1))     # reanalysis order, north first
    path = tmp_path / "sfc.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding("noleap"))
    return str(path)


def test_surface_belts_known_answers(surface_file):
    out = engine.track([surface_file], config.load())
    r = _rows(out)
    for hemi, s in (("NH", 1), ("SH", -1)):
        assert r[("surface_wind_zero_lat", hemi)][0] == pytest.approx(30 * s, abs=1e-6)
        assert r[("polar_easterly_edge_lat", hemi)][0] == pytest.approx(60 * s, abs=1e-6)
        # parabola through the sine's three top points: vertex value within 0.01 m s-1 of 7
        assert r[("trade_wind_speed", hemi)][0] == pytest.approx(7.0, abs=0.01)
        assert r[("surface_westerly_speed", hemi)][0] == pytest.approx(7.0, abs=0.01)
        assert r[("subtropical_high_lat", hemi)][0] == pytest.approx(32 * s, abs=0.05)
        assert r[("subtropical_high_slp", hemi)][0] == pytest.approx(1021.0, abs=0.01)
        assert r[("surface_wind_zero_lat", hemi)][1] == "ok"


def test_surface_only_file_runs_without_levels(surface_file):
    out = engine.track([surface_file], config.load())
    assert "hadley_edge_lat" not in set(out.columns["metric"])
    assert {"surface_wind_zero_lat", "subtropical_high_lat"} <= set(out.columns["metric"])


def test_ferrel_edges_are_the_prescribed_zeros(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    ds = synthetic.dataset(lat, np.arange(0, 360, 30.0), [1000, 850, 700, 500, 300, 200, 100],
                           synthetic.monthly_times(2001, 1)[:1], cell_zeros=(-58.3, -31.2, 3.1, 27.4, 61.7))
    path = tmp_path / "f.nc"
    ds.to_netcdf(path, encoding=synthetic.time_encoding())
    r = _rows(engine.track([str(path)], config.load(), metric_ids=["ferrel_edge_lat", "ferrel_strength"]))
    assert r[("ferrel_edge_lat", "NH")][0] == pytest.approx(61.7, abs=0.1)
    assert r[("ferrel_edge_lat", "SH")][0] == pytest.approx(-58.3, abs=0.1)
    assert r[("ferrel_strength", "NH")][0] > 0 and r[("ferrel_strength", "NH")][1] == "ok"

