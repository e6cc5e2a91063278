"""Real open data: the January upper-air analysis shipped by Debian's ``libncarg-data`` package
(``/usr/share/ncarg/data/cdf/nc4uvt.nc``: U, V, T on 14 pressure levels 1000-10 hPa, a 64 x 128
Gaussian grid, one time step, time counted as "Month since Jan 1988" = January 1988).

The expectation is from memory: in the zonal-mean climatology the northern winter subtropical jet has
its core near 200 hPa and 30 degrees N with 40-60 m/s (Peixoto & Oort 1992, Physics of Climate,
ch. 7, zonal-mean zonal wind for December-February), while the southern summer hemisphere has one
jet near 45 degrees S and no separate subtropical core. The bands below are deliberately wide.

The file's time units ("Month", no reference date) are not CF, so the test writes a copy with
``months since 1988-01-01``, the one change a user would make too (circtrack refuses undecodable times).
"""

import os

import numpy as np
import pytest
import xarray as xr

from circtrack import config, engine

PATH = "/usr/share/ncarg/data/cdf/nc4uvt.nc"
pytestmark = pytest.mark.skipif(
    not os.path.exists(PATH), reason="Debian package libncarg-data not installed (apt-get install libncarg-data); "
                                     "real-data jet-core checks skipped")

IDS = [f"{j}_jet_core_{q}" for j in ("subtropical", "eddy") for q in ("lat", "pressure", "speed")]


@pytest.fixture(scope="module")
def table(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("ncarg") / "uvt_january.nc")
    with xr.open_dataset(PATH, decode_times=False) as ds:
        ds = ds.load()
    ds["time"].attrs["units"] = "months since 1988-01-01"
    ds.to_netcdf(path)
    out = engine.track([path], config.load(), metric_ids=IDS + ["jet_core_split_share"])
    c = out.columns
    return {(c["hemisphere"][i], c["metric"][i]): (float(c["value"][i]), c["flag"][i])
            for i in range(len(c["metric"])) if c["sector"][i] == "zonal"}


def test_northern_winter_subtropical_jet_core(table):
    lat, flag = table[("NH", "subtropical_jet_core_lat")]
    assert flag == "ok" and 25.0 <= lat <= 40.0
    p = table[("NH", "subtropical_jet_core_pressure")][0]
    assert 150.0 <= p <= 250.0
    speed = table[("NH", "subtropical_jet_core_speed")][0]
    assert 40.0 <= speed <= 60.0


def test_southern_summer_has_one_midlatitude_jet(table):
    # no separate subtropical core (its window's maximum sits on the poleward edge) ...
    assert table[("SH", "subtropical_jet_core_lat")][1] == "extremum_at_window_edge"
    # ... and one upper-tropospheric jet in the midlatitudes
    lat, flag = table[("SH", "eddy_jet_core_lat")]
    assert flag == "ok" and -55.0 <= lat <= -35.0
    assert 150.0 <= table[("SH", "eddy_jet_core_pressure")][0] <= 350.0
    assert 20.0 <= table[("SH", "eddy_jet_core_speed")][0] <= 45.0


def test_the_northern_jets_are_split_in_some_longitudes_only(table):
    share, flag = table[("NH", "jet_core_split_share")]
    assert flag == "ok" and 0.05 < share < 0.95
    assert np.isfinite(share)
