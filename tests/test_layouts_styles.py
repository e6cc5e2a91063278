"""Reanalysis, model-intercomparison and older-reanalysis layouts of the same synthetic field.

Each test writes the field of ``tests.conftest.make_dataset`` in one family's layout (names,
coordinate conventions, packing, calendars, extra dimensions; all invented test data) and expects
the rows of the plain CF file.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
import xarray as xr

from circtrack import output as O
from circtrack.errors import InputError
from tests.layout_helpers import (assert_rows_close, baseline, dates, extra_fields, keyed, make_dataset,
                                  run_cfg, with_time_column, write)


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    return baseline(tmp_path_factory.mktemp("base"))


# --------------------------------------------------------------------------- reanalysis style
def _reanalysis(ds, stream=None, number=None):
    """valid_time (seconds since 1970, proleptic_gregorian), pressure_level hPa, latitude 90..-90,
    short names with GRIB-style units, scalar or dimension `number`, optional `expver` stream."""
    t, z, q = extra_fields(ds)
    flip = slice(None, None, -1)
    data = {"u": ds["ua"].values[:, :, flip, :], "v": ds["va"].values[:, :, flip, :],
            "t": t[:, :, flip, :], "z": (z * 9.80665)[:, :, flip, :], "q": q[:, :, flip, :]}
    attrs = {"u": {"units": "m s**-1", "standard_name": "eastward_wind", "long_name": "U component of wind"},
             "v": {"units": "m s**-1", "standard_name": "northward_wind", "long_name": "V component of wind"},
             "t": {"units": "K", "standard_name": "air_temperature"},
             "z": {"units": "m**2 s**-2", "standard_name": "geopotential"},
             "q": {"units": "kg kg**-1", "standard_name": "specific_humidity"}}
    coords = {
        "valid_time": ("valid_time", dates("proleptic_gregorian", n=ds.sizes["time"]), {"standard_name": "time", "long_name": "time"}),
        "pressure_level": ("pressure_level", ds["plev"].values, {"units": "hPa", "long_name": "pressure",
                                                                 "standard_name": "air_pressure", "positive": "down"}),
        "latitude": ("latitude", ds["lat"].values[flip], {"units": "degrees_north", "standard_name": "latitude"}),
        "longitude": ("longitude", ds["lon"].values, {"units": "degrees_east", "standard_name": "longitude"}),
    }
    dims = ["valid_time", "pressure_level", "latitude", "longitude"]
    if isinstance(number, int):
        coords["number"] = ((), number, {"long_name": "ensemble member numerical id"})
    elif number is not None:
        coords["number"] = ("number", np.asarray(number))
        dims.insert(1, "number")
        data = {k: np.stack([a + (1.0 if (k == "u" and m == 2) else 0.0) for m in number], axis=1)
                for k, a in data.items()}
    if stream == "coord":
        coords["expver"] = ("valid_time", np.array(["0001", "0001", "0005"]))
    elif stream == "dim":
        coords["expver"] = ("expver", np.array([1, 5], dtype="int32"))
        dims.insert(1, "expver")
        new = {}
        for k, a in data.items():
            final, prov = a.astype("float32").copy(), a.astype("float32").copy()
            final[2] = np.nan                      # the final stream stops after February
            prov[0] = np.nan                       # the provisional stream starts in February,
            prov[1] = prov[1] + 5.0                # with different values there: must not be used
            new[k] = np.stack([final, prov], axis=1)
        data = new
    out = xr.Dataset({k: (dims, v.astype("float32"), attrs[k]) for k, v in data.items()}, coords=coords)
    out.attrs["Conventions"] = "CF-1.7"
    return out


def _write_reanalysis(ds, path):
    enc = {"valid_time": {"units": "seconds since 1970-01-01", "calendar": "proleptic_gregorian", "dtype": "int64"}}
    ds.to_netcdf(str(path), encoding=enc)
    return str(path)


def _provisional(rows, when="2000-03-15"):
    return [r + ";provisional_data" if r.split(",")[1] == when else r for r in rows]


@pytest.mark.parametrize("stream,number", [("coord", 0), ("dim", [0])], ids=["expver_along_time", "expver_dimension"])
def test_reanalysis_style_final_preferred_and_provisional_flagged(tmp_path, base, stream, number):
    rows, metrics = base
    ds = _reanalysis(make_dataset(3), stream=stream, number=number)
    path = _write_reanalysis(ds, tmp_path / "era.nc")
    out = run_cfg(path, metric_ids=metrics)
    assert O.sorted_lines(out)[0] == "source,time,hemisphere,sector,metric,value,units,flag"   # number squeezed
    assert O.sorted_lines(out)[1:] == _provisional(rows)
    assert out.provenance["time_step_notes"] == {"provisional_data": ["2000-03-15"]}
    assert "expver" in out.provenance["inputs"][0]["layout"]["streams"]
    det = out.provenance["inputs"][0]["variables"]
    assert det["ua"] == "u" and det["va"] == "v"


def test_reanalysis_short_names_are_all_found(tmp_path):
    from circtrack import config
    from circtrack.inputs import dataset as D
    path = _write_reanalysis(_reanalysis(make_dataset(1)), tmp_path / "era.nc")
    ds = D.open_dataset(path, config.load())
    det = D.detect(ds, path)
    ds.close()
    assert det.variables == {"ua": "u", "va": "v", "ta": "t", "zg": "z", "hus": "q"}
    assert det.coords == {"time": "valid_time", "lat": "latitude", "lon": "longitude", "plev": "pressure_level"}


def test_reanalysis_members_become_a_key_column(tmp_path, base):
    rows, metrics = base
    ds = _reanalysis(make_dataset(3), number=[0, 1, 2])
    out = run_cfg(_write_reanalysis(ds, tmp_path / "ens.nc"), metric_ids=metrics)
    lines = O.sorted_lines(out)
    assert lines[0] == "source,time,number,hemisphere,sector,metric,value,units,flag"
    by_member = {}
    for r in lines[1:]:
        f = r.split(",")
        by_member.setdefault(f[2], []).append(",".join(f[:2] + f[3:]))
    assert sorted(by_member) == ["0", "1", "2"]
    assert by_member["0"] == rows and by_member["1"] == rows
    a, b = keyed(by_member["2"]), keyed(rows)
    for k, (v, _, _) in b.items():
        if k[-1] == "eddy_jet_speed":
            assert a[k][0] == pytest.approx(v + 1.0, abs=0.02)    # member 2 has u + 1 m/s


# --------------------------------------------------------------------------- model intercomparison style
def _masked(ds):
    """The same field with points below an invented mountain range missing (NaN)."""
    ds = ds.copy(deep=True)
    for name in ("ua", "va"):
        a = ds[name].values
        a[:, 0, :, 0:8] = np.nan          # 1000 hPa under 8 of 24 longitudes
        a[:, 1, 60:120, 0:3] = np.nan     # 925 hPa under the highest part
        ds[name] = (ds[name].dims, a, ds[name].attrs)
    return ds


def _cmip(ds, calendar, year, members=None):
    t, z, q = extra_fields(ds)
    out = ds.copy()
    out["ta"] = (ds["ua"].dims, t, {"standard_name": "air_temperature", "units": "K"})
    out["zg"] = (ds["ua"].dims, z, {"standard_name": "geopotential_height", "units": "m"})
    out["hus"] = (ds["ua"].dims, q, {"standard_name": "specific_humidity", "units": "1"})
    nt = ds.sizes["time"]
    out = out.assign_coords(plev=ds["plev"].values * 100.0 + 1e-8, time=dates(calendar, year, n=nt))
    out["plev"].attrs.update({"standard_name": "air_pressure", "units": "Pa", "positive": "down", "axis": "Z"})
    out["time"].attrs.update({"standard_name": "time", "axis": "T", "bounds": "time_bnds"})
    tb = np.stack([dates(calendar, year, n=nt, day=1), dates(calendar, year, n=nt, day=28)], axis=1)
    out["time_bnds"] = (("time", "bnds"), tb)
    lat, lon = ds["lat"].values, ds["lon"].values
    out["lat_bnds"] = (("lat", "bnds"), np.stack([np.maximum(lat - 0.5, -90), np.minimum(lat + 0.5, 90)], 1))
    out["lon_bnds"] = (("lon", "bnds"), np.stack([lon - 7.5, lon + 7.5], 1))
    out["lat"].attrs["bounds"] = "lat_bnds"
    out["lon"].attrs["bounds"] = "lon_bnds"
    out.attrs.update({"Conventions": "CF-1.7 CMIP-6.2", "source_id": "INVENTED-1", "experiment_id": "historical",
                      "variant_label": "r1i1p1f1"})
    if members:
        out = xr.concat([out.assign_coords(member_id=m) for m in members], dim="member_id")
        for n in ("time_bnds", "lat_bnds", "lon_bnds"):
            out[n] = out[n].isel(member_id=0, drop=True)
    return out


def _write_cmip(ds, path, calendar):
    enc = {"time": {"units": "days since 0001-01-01", "calendar": calendar, "dtype": "float64"},
           "time_bnds": {"units": "days since 0001-01-01", "calendar": calendar, "dtype": "float64"}}
    for n in ("ua", "va", "ta", "zg", "hus"):
        if n in ds:
            enc[n] = {"_FillValue": np.float32(1e20), "dtype": "float32"}
    ds.to_netcdf(str(path), encoding=enc)
    return str(path)


@pytest.fixture(scope="module")
def masked_base(tmp_path_factory):
    d = tmp_path_factory.mktemp("masked")
    path = write(_masked(make_dataset(3)), d / "masked.nc")
    out = run_cfg(path)
    return O.sorted_lines(out)[1:], sorted(set(out.columns["metric"]))


@pytest.mark.parametrize("calendar,year", [("noleap", 1200), ("360_day", 2500), ("julian", 1650), ("standard", 2300)])
def test_model_intercomparison_style(tmp_path, masked_base, calendar, year):
    rows, metrics = masked_base
    ds = _cmip(_masked(make_dataset(3)), calendar, year)
    path = _write_cmip(ds, tmp_path / f"ua_Amon_INVENTED-1_historical_r1i1p1f1_gn_{year}01-{year}03.nc", calendar)
    raw = xr.open_dataset(path, decode_times=False)
    assert raw["plev"].values[0] == 100000.00000001 and raw["ua"].encoding["_FillValue"] == np.float32(1e20)
    raw.close()
    out = run_cfg(path, metric_ids=metrics)
    mapping = {f"{year:04d}-{m:02d}-15": f"2000-{m:02d}-15" for m in (1, 2, 3)}
    assert with_time_column(O.sorted_lines(out)[1:], mapping) == rows
    assert out.provenance["calendar"] == calendar
    assert out.provenance["time_span"] == [f"{year:04d}-01-15", f"{year:04d}-03-15"]


def test_model_intercomparison_members_as_key_column(tmp_path, masked_base):
    rows, metrics = masked_base
    ds = _cmip(_masked(make_dataset(3)), "noleap", 2000, members=["r1i1p1f1", "r2i1p1f1"])
    out = run_cfg(_write_cmip(ds, tmp_path / "ens.nc", "noleap"), metric_ids=metrics)
    lines = O.sorted_lines(out)
    assert lines[0].startswith("source,time,member_id,hemisphere")
    for member in ("r1i1p1f1", "r2i1p1f1"):
        mine = [r.split(",") for r in lines[1:] if r.split(",")[2] == member]
        assert [",".join(f[:2] + f[3:]) for f in mine] == rows


# --------------------------------------------------------------------------- older reanalysis styles
def _packed(ds):
    """uwnd/vwnd/air on `level` (millibar), latitude descending, int16 with scale/offset, hours since 1800."""
    t, _, _ = extra_fields(ds)
    flip = slice(None, None, -1)
    coords = {"time": ("time", dates("standard"), {"long_name": "Time", "axis": "T"}),
              "level": ("level", ds["plev"].values.astype("float32"), {"units": "millibar", "GRIB_name": "hPa"}),
              "lat": ("lat", ds["lat"].values[flip].astype("float32"), {"units": "degrees_north"}),
              "lon": ("lon", ds["lon"].values.astype("float32"), {"units": "degrees_east"})}
    dims = ("time", "level", "lat", "lon")
    return xr.Dataset({"uwnd": (dims, ds["ua"].values[:, :, flip], {"units": "m/s", "var_desc": "u-wind"}),
                       "vwnd": (dims, ds["va"].values[:, :, flip], {"units": "m/s"}),
                       "air": (dims, t[:, :, flip], {"units": "degK"})}, coords=coords)


def test_older_reanalysis_packed_int16(tmp_path, base):
    rows, metrics = base
    ds = _packed(make_dataset(3))
    enc = {"time": {"units": "hours since 1800-01-01 00:00:0.0", "calendar": "standard", "dtype": "float64"}}
    for n, (scale, offset) in {"uwnd": (0.01, 0.0), "vwnd": (0.001, 0.0), "air": (0.01, 250.0)}.items():
        enc[n] = {"dtype": "int16", "scale_factor": scale, "add_offset": offset, "_FillValue": np.int16(32766)}
    path = tmp_path / "uwnd.mon.mean.nc"
    ds.to_netcdf(str(path), encoding=enc)
    raw = xr.open_dataset(path, mask_and_scale=False, decode_times=False)
    assert raw["uwnd"].dtype == np.int16 and raw["time"].attrs["units"].startswith("hours since 1800")
    raw.close()
    out = run_cfg(path, metric_ids=metrics)
    got = O.sorted_lines(out)[1:]
    # 1. the same as the plain file of the field rounded to the packing steps (unpacked correctly)
    rounded = make_dataset(3)
    for n, (scale, offset) in {"ua": (0.01, 0.0), "va": (0.001, 0.0)}.items():
        rounded[n] = rounded[n].copy(data=(np.round((rounded[n].values - offset) / scale) * scale + offset))
    ref = run_cfg(write(rounded, tmp_path / "rounded.nc"), metric_ids=metrics)
    assert_rows_close(got, O.sorted_lines(ref)[1:], atol_lat=1e-4, rtol=1e-5, atol=1e-9)
    # 2. close to the unrounded field: within the packing precision (0.005 m/s for u, 5e-4 m/s for v)
    assert_rows_close(got, rows, atol_lat=0.01, rtol=5e-3, atol=1e-3)


def test_older_reanalysis_capital_names_on_half_degree_grid(tmp_path, base):
    rows, metrics = base
    lat = np.arange(-90.0, 90.01, 0.5)
    lon = np.arange(-180.0, 180.0, 0.625)                        # 576 longitudes
    from circtrack import synthetic
    ds = synthetic.dataset(lat, lon, make_dataset(1)["plev"].values, dates("standard", n=1))
    out_ds = xr.Dataset({"U": (("time", "lev", "lat", "lon"), ds["ua"].values, {"units": "m s-1", "long_name": "eastward_wind"}),
                         "V": (("time", "lev", "lat", "lon"), ds["va"].values, {"units": "m s-1"})},
                        coords={"time": ("time", dates("standard", n=1)),
                                "lev": ("lev", ds["plev"].values, {"units": "hPa", "positive": "down"}),
                                "lat": ("lat", lat, {"units": "degrees_north"}), "lon": ("lon", lon, {"units": "degrees_east"})})
    path = tmp_path / "INVENTED.inst3_3d_asm_Np.20000115.nc4"
    out_ds.to_netcdf(str(path), encoding={"time": {"units": "minutes since 2000-01-15 00:00:00", "calendar": "standard"}})
    out = run_cfg(path, metric_ids=metrics)
    # the same single time step on the baseline grid (eddy statistics depend on the number of steps)
    one = run_cfg(write(make_dataset(1), tmp_path / "one.nc"), metric_ids=metrics)
    # a finer latitude grid: positions agree to the grid's interpolation error, amounts to 0.5 %
    assert_rows_close(O.sorted_lines(out)[1:], O.sorted_lines(one)[1:], atol_lat=0.2, rtol=5e-3, atol=1e-6,
                      doubtful=False)   # a flat, weak peak (flag weak_peak) moves with the grid
    assert out.provenance["inputs"][0]["variables"] == {"ua": "U", "va": "V"}


# --------------------------------------------------------------------------- one variable per file
def test_one_variable_per_file_split_by_period(tmp_path, masked_base):
    rows, metrics = masked_base
    ds = _cmip(_masked(make_dataset(3)), "noleap", 2000)
    d = tmp_path / "cmip"
    d.mkdir()
    for var in ("ua", "va", "ta"):
        for sl, span in ((slice(0, 2), "200001-200002"), (slice(2, 3), "200003-200003")):
            part = ds[[var, "time_bnds", "lat_bnds", "lon_bnds"]].isel(time=sl)
            _write_cmip(part, d / f"{var}_Amon_INVENTED-1_historical_r1i1p1f1_gn_{span}.nc", "noleap")
    # without --metrics: what the files hold together (ta here too), found through the sibling files
    out = run_cfg(d)
    assert {"hadley_edge_lat", "eddy_jet_lat", "baroclinic_zone_lat"} <= set(out.columns["metric"])
    got = [r for r in O.sorted_lines(out)[1:] if r.split(",")[-4] in metrics]
    assert got == rows
    files = out.provenance["inputs"][0]["layout"]["files"]
    assert files["ua"].endswith("ua_Amon_INVENTED-1_historical_r1i1p1f1_gn_200001-200002.nc")
    assert files["va"].endswith("va_Amon_INVENTED-1_historical_r1i1p1f1_gn_200001-200002.nc")
    joined = out.provenance["inputs"][0]["layout"]["joined_inputs"]     # size and mtime of the other files too
    assert sorted(os.path.basename(j["path"])[:2] for j in joined) == ["ua", "va"] and all(j["size"] > 0 for j in joined)
    # a period whose va file is missing: one clear error naming the file
    (d / "va_Amon_INVENTED-1_historical_r1i1p1f1_gn_200003-200003.nc").unlink()
    with pytest.raises(InputError) as e:
        run_cfg(d, metric_ids=metrics)
    msg = str(e.value)
    assert "\n" not in msg and msg.endswith("ta_Amon_INVENTED-1_historical_r1i1p1f1_gn_200003-200003.nc: northward wind "
        "on pressure levels (va) is neither in this file nor in the 1 other file(s) with the same time steps "
        "(ua_Amon_INVENTED-1_historical_r1i1p1f1_gn_200003-200003.nc); add the file that holds va for these times, "
        "or name it with --var va=NAME if it is there under another name")


def test_one_variable_per_file_joins_only_files_on_the_same_grid(tmp_path):
    ds = make_dataset(2)
    write(ds[["ua"]], tmp_path / "ua_x.nc")
    shifted = ds[["va"]].assign_coords(lat=ds["lat"].values * 0.99)      # same size, other latitudes
    shifted["lat"].attrs.update(ds["lat"].attrs)
    write(shifted, tmp_path / "va_x.nc")
    with pytest.raises(InputError, match=r"not found"):
        run_cfg([tmp_path / "ua_x.nc", tmp_path / "va_x.nc"], metric_ids=["hadley_edge_lat", "eddy_jet_lat"])


def test_older_reanalysis_one_variable_per_file(tmp_path, base):
    rows, metrics = base
    ds = _packed(make_dataset(3))
    enc = {"time": {"units": "hours since 1800-01-01 00:00:0.0", "calendar": "standard", "dtype": "float64"}}
    for var in ("uwnd", "vwnd"):
        e = {**enc, var: {"dtype": "int16", "scale_factor": 0.01 if var == "uwnd" else 0.001, "add_offset": 0.0,
                          "_FillValue": np.int16(32766)}}
        ds[[var]].to_netcdf(str(tmp_path / f"{var}.mon.mean.nc"), encoding=e)
    out = run_cfg([tmp_path / "uwnd.mon.mean.nc", tmp_path / "vwnd.mon.mean.nc"])
    assert sorted(set(out.columns["metric"])) == metrics
    assert_rows_close(O.sorted_lines(out)[1:], rows, atol_lat=0.01, rtol=5e-3, atol=1e-3)


def test_final_data_in_a_later_file_replace_provisional_data(tmp_path, base):
    # a monthly cron download: March first arrives provisional (expver 0005, here with other values),
    # later the final March arrives in a file of its own; final wins without a conflict
    rows, metrics = base
    ds = make_dataset(3)
    early = _reanalysis(ds, stream="coord", number=0)
    early["u"] = early["u"] + xr.DataArray([0.0, 0.0, 5.0], dims="valid_time")
    a = _write_reanalysis(early, tmp_path / "era_2000_01-03.nc")
    late = _reanalysis(ds, number=0).isel(valid_time=[2]).assign_coords(expver=("valid_time", ["0001"]))
    b = _write_reanalysis(late, tmp_path / "era_2000_03_final.nc")
    for order in ([a, b], [b, a]):
        out = run_cfg(order, metric_ids=metrics)
        assert O.sorted_lines(out)[1:] == rows
        assert out.provenance["time_step_notes"] == {}
        (drop,) = out.provenance["repeated_time_steps_dropped"]
        assert drop == {"time": "2000-03-15", "path": a, "kept_from": b, "provisional_replaced_by_final": True}
    alone = run_cfg(a, metric_ids=metrics)
    assert O.sorted_lines(alone)[1:] != _provisional(rows)                # March is provisional: u + 5 there
    assert all(r.endswith(";provisional_data") for r in O.sorted_lines(alone)[1:] if ",2000-03-15," in r)
