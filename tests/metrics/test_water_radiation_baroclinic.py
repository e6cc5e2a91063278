"""Known answers for P - E, OLR and the baroclinic zone on constructed fields."""

import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine, synthetic


def _first(out):
    c = out.columns
    return {(c["metric"][i], c["hemisphere"][i]): (c["value"][i], c["flag"][i])
            for i in range(len(c["metric"])) if c["time"][i] == c["time"][0]}


def _write(tmp_path, variables, levels=None):
    lat = np.arange(-90, 90.1, 1.0)
    lon = np.arange(0, 360, 30.0)
    times = synthetic.monthly_times(2001, 1, "360_day")[:2]
    data = {}
    for name, (prof, attrs) in variables.items():
        if levels is None:
            arr = np.broadcast_to(prof[None, :, None], (2, lat.size, lon.size))
            data[name] = (("time", "lat", "lon"), arr.astype("f4"), attrs)
        else:
            arr = np.broadcast_to(prof[None, :, :, None], (2, len(levels), lat.size, lon.size))
            data[name] = (("time", "plev", "lat", "lon"), arr.astype("f4"), attrs)
    coords = {"time": times, "lat": ("lat", lat, {"units": "degrees_north"}), "lon": ("lon", lon, {"units": "degrees_east"})}
    if levels is not None:
        coords["plev"] = ("plev", np.asarray(levels, float) * 100, {"units": "Pa"})
    path = tmp_path / "f.nc"
    xr.Dataset(data, coords=coords).to_netcdf(path, encoding=synthetic.time_encoding("360_day"))
    return str(path), lat


def test_p_minus_e_zero_with_either_evaporation_sign(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    a = np.abs(lat)
    # P - E = -3e-5 sin(pi |lat| / 40) up to 40 deg, positive poleward: zero exactly at 40 deg
    pe = np.where(a <= 40, -np.sin(np.pi * a / 40.0), 0.5 * np.sin(np.pi * (a - 40) / 50.0)) * 3e-5
    ev = 4e-5 * np.cos(np.deg2rad(lat))
    for sign in (1.0, -1.0):      # CMIP upward-positive and downward-positive evaporation
        path, _ = _write(tmp_path, {"pr": (pe + ev, {"units": "kg m-2 s-1"}),
                                    "evspsbl": (sign * ev, {"units": "kg m-2 s-1"})})
        r = _first(engine.track([path], config.load()))
        assert r[("p_minus_e_zero_lat", "NH")][0] == pytest.approx(40.0, abs=0.05)
        assert r[("p_minus_e_zero_lat", "SH")][0] == pytest.approx(-40.0, abs=0.05)


def test_olr_edge_at_threshold(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    a = np.abs(lat)
    # OLR = 270 - 40 ((|lat| - 20)/30)^2 ... max 270 at 20, equals 250 where (|lat|-20)/30 = sqrt(0.5)
    olr = 270 - 40 * ((a - 20) / 30.0) ** 2
    path, _ = _write(tmp_path, {"rlut": (olr, {"units": "W m-2", "standard_name": "toa_outgoing_longwave_flux"})})
    r = _first(engine.track([path], config.load()))
    want = 20 + 30 * np.sqrt(0.5)
    assert r[("olr_edge_lat", "NH")][0] == pytest.approx(want, abs=0.05)
    assert r[("olr_edge_lat", "SH")][0] == pytest.approx(-want, abs=0.05)


def test_olr_never_below_threshold_is_flagged(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    olr = 300 - 20 * (np.abs(lat) / 90.0)
    path, _ = _write(tmp_path, {"rlut": (olr, {"units": "W m-2", "standard_name": "toa_outgoing_longwave_flux"})})
    r = _first(engine.track([path], config.load()))
    assert np.isnan(r[("olr_edge_lat", "NH")][0])
    assert r[("olr_edge_lat", "NH")][1] != "ok"


def test_baroclinic_zone_at_steepest_temperature_drop(tmp_path):
    lat = np.arange(-90, 90.1, 1.0)
    # [T]850 = 270 - 15 tanh((|lat| - 47)/8): steepest gradient exactly at 47 deg
    t = 270 - 15 * np.tanh((np.abs(lat) - 47) / 8.0)
    prof = np.stack([t, t + 20, t + 25])
    path, _ = _write(tmp_path, {"ta": (prof, {"units": "K", "standard_name": "air_temperature"})},
                     levels=[500, 850, 1000])
    r = _first(engine.track([path], config.load(), metric_ids=["baroclinic_zone_lat"]))
    assert r[("baroclinic_zone_lat", "NH")][0] == pytest.approx(47.0, abs=0.1)
    assert r[("baroclinic_zone_lat", "SH")][0] == pytest.approx(-47.0, abs=0.1)
