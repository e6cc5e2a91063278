"""Zarr, GRIB and odd-but-real layouts of the same synthetic field give the baseline rows."""

from __future__ import annotations

import os
import stat

import numpy as np
import pytest
import xarray as xr

from circtrack import config, synthetic
from circtrack import output as O
from circtrack.errors import InputError
from circtrack.inputs import dataset as D
from tests.conftest import CALENDAR
from tests.layout_helpers import assert_rows_close, baseline, make_dataset, run_cfg, with_time_column, write


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    return baseline(tmp_path_factory.mktemp("base"))


def _rows(out):
    return O.sorted_lines(out)[1:]


# --------------------------------------------------------------------------- Zarr and GRIB
@pytest.mark.parametrize("kw", [{"zarr_format": 2, "consolidated": True}, {"zarr_format": 3, "consolidated": False}],
                         ids=["zarr2_consolidated", "zarr3"])
def test_zarr_store_and_a_directory_holding_it(tmp_path, base, kw):
    pytest.importorskip("zarr")
    rows, metrics = base
    store = tmp_path / "data" / "synth.zarr"
    make_dataset(3).to_zarr(str(store), encoding=synthetic.time_encoding(CALENDAR), mode="w", **kw)
    assert _rows(run_cfg(store, metric_ids=metrics)) == rows
    assert _rows(run_cfg(tmp_path / "data", metric_ids=metrics)) == rows


def _write_grib(path, ds):
    """Messages on isobaric levels, latitude 90..-90 as GRIB stores it, 24-bit packing."""
    import eccodes
    lat, lon = ds["lat"].values[::-1], ds["lon"].values
    with open(path, "wb") as f:
        for it, t in enumerate(ds["time"].values):
            for name, short in (("ua", "u"), ("va", "v")):
                for k, p in enumerate(ds["plev"].values):
                    h = eccodes.codes_grib_new_from_samples("regular_ll_pl_grib2")
                    for key, val in (("dataDate", t.year * 10000 + t.month * 100 + t.day), ("dataTime", 0),
                                     ("Ni", lon.size), ("Nj", lat.size),
                                     ("latitudeOfFirstGridPointInDegrees", float(lat[0])),
                                     ("latitudeOfLastGridPointInDegrees", float(lat[-1])),
                                     ("longitudeOfFirstGridPointInDegrees", float(lon[0])),
                                     ("longitudeOfLastGridPointInDegrees", float(lon[-1])),
                                     ("iDirectionIncrementInDegrees", float(lon[1] - lon[0])),
                                     ("jDirectionIncrementInDegrees", float(lat[0] - lat[1])),
                                     ("typeOfLevel", "isobaricInhPa"), ("level", int(p)), ("shortName", short),
                                     ("bitsPerValue", 24)):
                        eccodes.codes_set(h, key, val)
                    eccodes.codes_set_values(h, ds[name].values[it, k, ::-1].astype(float).ravel())
                    eccodes.codes_write(h, f)
                    eccodes.codes_release(h)
    return str(path)


def test_grib_through_the_optional_extra_keeps_index_files_out_of_the_data_directory(tmp_path, base, monkeypatch):
    pytest.importorskip("cfgrib")
    pytest.importorskip("eccodes")
    rows, metrics = base
    data = tmp_path / "readonly"
    data.mkdir()
    path = _write_grib(data / "pl.grib2", make_dataset(3))
    cache = tmp_path / "cache"
    monkeypatch.setenv("CIRCTRACK_CACHE_DIR", str(cache))
    os.chmod(data, stat.S_IRUSR | stat.S_IXUSR | stat.S_IRGRP | stat.S_IXGRP)
    try:
        out = run_cfg(path, metric_ids=metrics)
    finally:
        os.chmod(data, stat.S_IRWXU)
    assert sorted(os.listdir(data)) == ["pl.grib2"]                      # no index file beside the data
    assert any(n.endswith(".idx") for n in os.listdir(cache / "grib-index"))
    assert out.provenance["inputs"][0]["variables"] == {"ua": "u", "va": "v"}
    # 24-bit packing: equal to about 1e-5 m/s
    assert_rows_close(_rows(out), rows, atol_lat=1e-3, rtol=1e-4, atol=1e-4)


# --------------------------------------------------------------------------- odd but real
def _units_only(ds):
    """Dimensions with arbitrary names; only units attributes tell what they are."""
    ds = ds.rename({"time": "record", "plev": "p", "lat": "row", "lon": "col"})
    for name, units in (("p", "hPa"), ("row", "degrees_north"), ("col", "degrees_east")):
        ds[name].attrs = {"units": units}
    ds["record"].attrs = {}
    return ds


def test_coordinates_recognised_by_units_only(tmp_path, base):
    rows, metrics = base
    ds = _units_only(make_dataset(3))
    path = str(tmp_path / "anon.nc")
    ds.to_netcdf(path, encoding={"record": {"units": "days since 1850-01-01", "calendar": CALENDAR}})
    out = run_cfg(path, metric_ids=metrics)
    assert _rows(out) == rows
    d = D.open_dataset(path, config.load())
    det = D.detect(d, path)
    d.close()
    assert det.coords == {"time": "record", "lat": "row", "lon": "col", "plev": "p"}
    assert det.coord_why["lat"] == "units 'degrees_north'" and det.coord_why["plev"] == "pressure units 'hPa'"


def test_longitudes_running_past_360_and_a_repeated_cyclic_column(tmp_path, base):
    rows, metrics = base
    ds = make_dataset(3)
    shifted = ds.roll(lon=-12, roll_coords=True)                          # 180..345, 0..165
    shifted = shifted.assign_coords(lon=np.arange(180.0, 540.0, 15.0))    # 180..525
    shifted["lon"].attrs.update(ds["lon"].attrs)
    np.testing.assert_array_equal(shifted["ua"].sel(lon=375.0).values, ds["ua"].sel(lon=15.0).values)
    assert _rows(run_cfg(write(shifted, tmp_path / "past360.nc"), metric_ids=metrics)) == rows
    cyclic = xr.concat([ds, ds.isel(lon=[0]).assign_coords(lon=[360.0])], dim="lon")   # 0..360 inclusive
    out = run_cfg(write(cyclic, tmp_path / "cyclic.nc"), metric_ids=metrics)
    assert _rows(out) == rows
    assert "repeated longitudes" in out.provenance["inputs"][0]["layout"]["longitude"]


def _months_file(path, values, calendar, ref="2000-01-01"):
    ds = make_dataset(len(values)).drop_vars("time")
    ds = ds.assign_coords(time=("time", np.asarray(values, float), {"units": f"months since {ref}", "calendar": calendar}))
    ds.to_netcdf(str(path))
    return str(path)


def test_months_since_decoded_where_unambiguous(tmp_path, base):
    rows, metrics = base
    # 360_day: every month has 30 days, so half a month is 15 days
    out = run_cfg(_months_file(tmp_path / "m360.nc", [0.5, 1.5, 2.5], "360_day"), metric_ids=metrics)
    assert out.provenance["time_span"] == ["2000-01-16", "2000-03-16"]
    assert with_time_column(_rows(out), {f"2000-{m:02d}-16": f"2000-{m:02d}-15" for m in (1, 2, 3)}) == rows
    # whole months from the first of a month
    out = run_cfg(_months_file(tmp_path / "mstd.nc", [0, 1, 2], "standard"), metric_ids=metrics)
    assert with_time_column(_rows(out), {f"2000-{m:02d}-01": f"2000-{m:02d}-15" for m in (1, 2, 3)}) == rows


def test_months_since_with_fractions_needs_the_override(tmp_path):
    path = _months_file(tmp_path / "mfrac.nc", [0.5, 1.5, 2.5], "standard")
    with pytest.raises(InputError) as e:
        run_cfg(path, metric_ids=["eddy_jet_lat"])
    msg = str(e.value)
    assert "\n" not in msg and "mfrac.nc" in msg and "months since 2000-01-01" in msg
    assert 'fractional_months = "fraction-of-month" under [run]' in msg
    cfg = config.load()
    cfg["run"]["fractional_months"] = "fraction-of-month"
    out = run_cfg(path, cfg=cfg, metric_ids=["eddy_jet_lat"])
    times = sorted(set(out.columns["time"]))
    assert times == ["2000-01-16T12:00:00", "2000-02-15T12:00:00", "2000-03-16T12:00:00"]   # Feb 2000: 29 days


def test_unit_strings_in_capitals(tmp_path, base):
    rows, metrics = base
    ds = make_dataset(3)
    ds["ua"].attrs["units"] = "M/S"
    ds["va"].attrs["units"] = "M S-1"
    ds["plev"].attrs = {"units": "MB"}
    ds["lat"].attrs = {"units": "DEGREES_NORTH"}
    ds["lon"].attrs = {"units": "DEGREES_EAST"}
    ds = ds.rename({"plev": "pr_lev", "lat": "yy", "lon": "xx"})
    assert _rows(run_cfg(write(ds, tmp_path / "caps.nc"), metric_ids=metrics)) == rows


# --------------------------------------------------------------------------- surface fields without a level axis
SURFACE_METRICS = ["surface_wind_zero_lat", "polar_easterly_edge_lat", "trade_wind_speed", "surface_westerly_speed",
                   "subtropical_high_lat", "subtropical_high_slp"]


def _surface(ds):
    """Near-surface wind (the 1000 hPa wind) and an invented sea-level pressure with highs near 32 deg."""
    uas = ds["ua"].isel(plev=0).values
    lat = ds["lat"].values
    psl = (101000.0 + 1500.0 * (np.exp(-((lat - 32.0) / 10.0) ** 2) + np.exp(-((lat + 30.0) / 10.0) ** 2))
           - 2500.0 * np.exp(-((np.abs(lat) - 62.0) / 8.0) ** 2))
    psl = np.broadcast_to(psl[None, :, None], uas.shape).astype("float32")
    return uas, psl


def test_two_dimensional_surface_fields(tmp_path):
    ds = make_dataset(3)
    uas, psl = _surface(ds)
    c2 = ("time", "lat", "lon")
    plain = xr.Dataset({"uas": (c2, uas, {"standard_name": "eastward_wind", "units": "m s-1"}),
                        "psl": (c2, psl, {"standard_name": "air_pressure_at_mean_sea_level", "units": "Pa"})},
                       coords={k: ds[k] for k in ("time", "lat", "lon")})
    base = _rows(run_cfg(write(plain, tmp_path / "plain.nc"), metric_ids=SURFACE_METRICS))
    assert any(",ok" in r for r in base) and len(base) == 3 * 2 * len(SURFACE_METRICS)
    # model-intercomparison style: a size-1 height axis and capital-letter units
    tall = plain.copy()
    tall["uas"] = plain["uas"].expand_dims(height=[10.0], axis=1)
    tall["uas"].attrs["units"] = "M/S"
    tall["psl"].attrs["units"] = "PA"
    assert _rows(run_cfg(write(tall, tmp_path / "tall.nc"), metric_ids=SURFACE_METRICS)) == base
    # 2-D surface fields next to 3-D fields on pressure levels in one file, with reanalysis names
    mixed = ds.copy()
    mixed["u10"] = (c2, uas, {"units": "m s**-1"})
    mixed["msl"] = (c2, psl, {"units": "Pa"})
    out = run_cfg(write(mixed, tmp_path / "mixed.nc"), metric_ids=SURFACE_METRICS)
    assert _rows(out) == base
    found = out.provenance["inputs"][0]["variables"]
    assert (found["uas"], found["psl"], found["ua"]) == ("u10", "msl", "ua")   # 2-D and 3-D winds kept apart
