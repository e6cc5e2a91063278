"""Jet cores (zonal and per longitude) through the engine on invented fields with known cores."""

import cftime
import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine

LAT = np.arange(-90.0, 90.1, 1.0)
LON = np.arange(0.0, 360.0, 10.0)
LAM = np.deg2rad(LON)
PLEV = np.array([50.0, 70.0, 100.0, 150.0, 200.0, 250.0, 300.0, 400.0, 500.0, 700.0, 850.0, 925.0, 1000.0])
CORE_IDS = [f"{j}_jet_core_{q}" for j in ("subtropical", "eddy") for q in ("lat", "pressure", "speed")]
GEO_IDS = ["jet_core_split_share"] + [f"{j}_jet_core_{q}_spread" for j in ("subtropical", "eddy")
                                      for q in ("lat", "pressure")]


def jet(lat0, p0, speed, *, width=5.0, depth=0.6, lat=LAT, plev=PLEV):
    """``speed * exp(-((lat - lat0)/width)^2 - (ln(p/p0)/depth)^2)``; ``lat0`` may vary with longitude
    (shape (I,)), giving ``(L, J, I)``."""
    lat0 = np.broadcast_to(np.asarray(lat0, float), LON.shape)
    s = np.log(plev / p0)[:, None, None]
    d = lat[None, :, None] - lat0[None, None, :]
    return speed * np.exp(-(d / width) ** 2 - (s / depth) ** 2)


def field(eddy_nh=50.0, *, sh=True):
    """NH: subtropical core (28N, 200 hPa, 45 m/s) and an eddy-driven core at ``eddy_nh`` (300 hPa,
    30 m/s); SH: one merged jet at 40S, 250 hPa, 35 m/s."""
    u = jet(28.0, 200.0, 45.0) + jet(eddy_nh, 300.0, 30.0, width=6.0, depth=1.2)
    south = jet(-40.0, 250.0, 35.0, width=7.0)
    return np.where(LAT[None, :, None] >= 0, u, south if sh else 0.0)


def write(path, u, *, plev=PLEV, ntime=2):
    t = np.array([cftime.num2date(i, "days since 2001-01-01", "noleap") for i in range(ntime)])
    full = np.broadcast_to(u[None], (ntime,) + u.shape).astype("float32")
    attrs = {"standard_name": "eastward_wind", "units": "m s-1"}
    ds = xr.Dataset({"ua": (("time", "plev", "lat", "lon"), full, attrs)},
                    coords={"time": t, "plev": ("plev", plev, {"units": "hPa", "axis": "Z"}),
                            "lat": ("lat", LAT, {"units": "degrees_north"}),
                            "lon": ("lon", LON, {"units": "degrees_east"})})
    ds.to_netcdf(path, encoding={"time": {"units": "days since 2001-01-01", "calendar": "noleap"}})
    return str(path)


def rows(path, ids, cfg=None, sectors=()):
    out = engine.track([path], cfg or config.load(), metric_ids=ids, sectors=list(sectors))
    c = out.columns
    first = sorted(set(c["time"]))[0]
    return {(c["hemisphere"][i], c["sector"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
            for i in range(len(c["metric"])) if c["time"][i] == first}


def test_zonal_cores_of_split_and_merged_jets(tmp_path):
    r = rows(write(tmp_path / "jets.nc", field()), CORE_IDS)
    z = lambda h, m: r[(h, "zonal", m)]                                     # noqa: E731
    assert z("NH", "subtropical_jet_core_lat") == (pytest.approx(28.0, abs=0.1), "ok")
    assert z("NH", "subtropical_jet_core_pressure") == (pytest.approx(200.0, rel=0.03), "ok")
    assert z("NH", "subtropical_jet_core_speed") == (pytest.approx(45.0, abs=0.8), "ok")
    assert z("NH", "eddy_jet_core_lat") == (pytest.approx(50.0, abs=0.1), "ok")
    assert z("NH", "eddy_jet_core_pressure") == (pytest.approx(300.0, rel=0.03), "ok")
    assert z("NH", "eddy_jet_core_speed") == (pytest.approx(30.0, abs=0.5), "ok")
    # one southern jet at 40S in both windows: reported once, as the subtropical core, with a note
    assert z("SH", "subtropical_jet_core_lat") == (pytest.approx(-40.0, abs=0.1), "ok;merged_jets")
    assert z("SH", "subtropical_jet_core_pressure") == (pytest.approx(250.0, rel=0.03), "ok;merged_jets")
    for q in ("lat", "pressure", "speed"):
        v, flag = z("SH", f"eddy_jet_core_{q}")
        assert np.isnan(v) and flag == "merged_jets"


def test_wave_two_meander(tmp_path):
    # the NH eddy-driven core wanders as 50 + 6 sin(2 lon): over whole periods on a regular grid the
    # population spread is 6 / sqrt(2); the subtropical core stays put; the jets are split everywhere
    path = write(tmp_path / "meander.nc", field(50.0 + 6.0 * np.sin(2 * LAM)))
    r = rows(path, GEO_IDS + CORE_IDS, sectors=[("east", 0.0, 90.0)])
    nh = lambda m, s="zonal": r[("NH", s, m)]                             # noqa: E731
    assert nh("eddy_jet_core_lat_spread") == (pytest.approx(6.0 / np.sqrt(2), abs=0.05), "ok")
    assert nh("eddy_jet_core_pressure_spread")[0] == pytest.approx(0.0, abs=1.0)
    assert nh("subtropical_jet_core_lat_spread")[0] == pytest.approx(0.0, abs=0.05)
    assert nh("jet_core_split_share") == (1.0, "ok")
    inside = LON <= 90.0
    assert nh("eddy_jet_core_lat_spread", "east")[0] == pytest.approx(np.std(6.0 * np.sin(2 * LAM[inside])), abs=0.05)
    # the merged southern jet: no longitude is split, and no eddy-driven core is left to spread
    assert r[("SH", "zonal", "jet_core_split_share")] == (0.0, "ok")
    assert r[("SH", "zonal", "subtropical_jet_core_lat_spread")][0] == pytest.approx(0.0, abs=0.05)
    v, flag = r[("SH", "zonal", "eddy_jet_core_lat_spread")]
    assert np.isnan(v) and flag == "too_little_data"


def test_zonal_and_per_longitude_cores_agree_when_only_the_strength_varies(tmp_path):
    # u = U(lat, p) (1 + 0.4 cos lon): every longitude has its cores where the zonal mean has them,
    # so the per-longitude spreads vanish and the zonal cores are those of U
    u = field() * (1.0 + 0.4 * np.cos(LAM))[None, None, :]
    r = rows(write(tmp_path / "scaled.nc", u), GEO_IDS + CORE_IDS)
    for m in ("subtropical_jet_core_lat_spread", "eddy_jet_core_lat_spread", "subtropical_jet_core_pressure_spread",
              "eddy_jet_core_pressure_spread"):
        assert r[("NH", "zonal", m)] == (pytest.approx(0.0, abs=1e-3), "ok")
    assert r[("NH", "zonal", "subtropical_jet_core_lat")][0] == pytest.approx(28.0, abs=0.1)
    assert r[("NH", "zonal", "eddy_jet_core_lat")][0] == pytest.approx(50.0, abs=0.1)


def test_longitude_bands(tmp_path):
    # the eddy-driven core at 44, 48, 52, 56 N in four 90-degree blocks: every longitude and every band
    # of 30 or 90 degrees sees one of those latitudes (spread sqrt(20)); one 360-degree band sees a
    # single blurred jet (no spread)
    blocks = np.array([44.0, 48.0, 52.0, 56.0])[(LON // 90).astype(int)]
    path = write(tmp_path / "blocks.nc", field(blocks))
    for width, expect in ((0.0, np.sqrt(20.0)), (30.0, np.sqrt(20.0)), (90.0, np.sqrt(20.0)), (360.0, 0.0)):
        cfg = config.load()
        cfg["cores"]["longitude_band_deg"] = width
        v, flag = rows(path, ["eddy_jet_core_lat_spread"], cfg)[("NH", "zonal", "eddy_jet_core_lat_spread")]
        assert (v, flag) == (pytest.approx(expect, abs=0.05), "ok"), width


def test_two_levels_are_too_short_a_column(tmp_path):
    two = np.array([200.0, 850.0])
    u = field()[[4, 10]]
    r = rows(write(tmp_path / "two.nc", u, plev=two), CORE_IDS + ["jet_core_split_share"])
    for m in CORE_IDS:
        v, flag = r[("NH", "zonal", m)]
        assert np.isnan(v) and flag == "column_too_short"
    v, flag = r[("NH", "zonal", "jet_core_split_share")]
    assert np.isnan(v) and flag == "too_little_data"
