"""Inputs that cannot be silently misread: plausible ranges, --units, --level, the near-surface rules,
the end-of-run summary and advice that fits the cause (issue 13).

Every file is built here, shaped like the real ones that went wrong: temperature labelled "C" with
kelvin values, a time axis in "Month", winds on one pressure level without a level axis, a lowest
pressure level below the ground. The real file is Debian's libncarg-data nc4uvt.nc.
"""

from __future__ import annotations

import csv
import json
import os

import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import synthetic
from circtrack.cli import main
from circtrack.inputs import plausible as PL

from .conftest import CALENDAR, LAT, LON, PLEV, make_dataset, write

REAL = "/usr/share/ncarg/data/cdf/nc4uvt.nc"


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def err_lines(r):
    return [ln for ln in r.stderr.splitlines() if ln.strip()]


def one_error(r, code=1):
    assert r.exit_code == code, r.output
    lines = err_lines(r)
    assert len(lines) == 1 and lines[0].startswith("circtrack: error: "), r.stderr
    return lines[0]


def rows(path):
    return list(csv.DictReader(open(path)))


def with_ta(ds, units="K"):
    """Temperature from 310 K at 1000 hPa to 190 K at 50 hPa, warmer at the equator."""
    p = ds["plev"].values[:, None]
    lat = ds["lat"].values[None, :]
    t = 190.0 + 110.0 * (p - 50.0) / 950.0 + 10.0 * np.cos(np.deg2rad(lat))
    arr = np.broadcast_to(t[None, :, :, None], ds["ua"].shape).astype("float32")
    ds["ta"] = (ds["ua"].dims, arr, {"standard_name": "air_temperature", "units": units})
    return ds


# ----------------------------------------------------------------------------- plausible ranges
def test_temperature_in_kelvin_labelled_celsius_is_refused_with_the_units_line(tmp_path):
    path = write(with_ta(make_dataset(1), "C"), tmp_path / "ta_c.nc")
    r = run("track", path, "--metrics", "tropical_tropopause_pressure", "-o", tmp_path / "o.csv", "-q")
    line = one_error(r)
    assert line == (f"circtrack: error: {path}: variable 'ta' (ta) says units 'C' but its values, 190 to 310 C, are "
                    "463.15 to 583.15 K, outside the plausible 120 to 350 K for air temperature; if the values are "
                    "in K, pass --units ta=K (or ta = \"K\" under [units] in a config file); circtrack never guesses units")
    assert not os.path.exists(tmp_path / "o.csv")
    ok = run("track", path, "--metrics", "tropical_tropopause_pressure", "--units", "ta=K", "-o", tmp_path / "o.csv", "-q")
    assert ok.exit_code == 0, ok.output
    side = json.load(open(tmp_path / "o.provenance.json"))
    assert side["parameters"]["units"] == {"ta": "K"}
    assert side["inputs"][0]["layout"]["units_overrides"]["ta"] == {"in_file": "C", "used": "K"}


def test_celsius_given_for_kelvin_values_is_refused_too(tmp_path):
    path = write(with_ta(make_dataset(1), "K"), tmp_path / "ta_k.nc")
    line = one_error(run("track", path, "--metrics", "tropical_tropopause_pressure", "--units", "ta=degC",
                         "-o", tmp_path / "o.csv", "-q"))
    assert "says units 'degC'" in line and "pass --units ta=K" in line


@pytest.mark.parametrize("kind,raw,units,fits", [
    ("speed", (-3000.0, 5000.0), "m s-1", ["cm s-1"]),               # cm/s labelled m/s
    ("fraction", (0.0, 20.0), "kg kg-1", ["g kg-1"]),                # g/kg labelled kg/kg
    ("height", (1000.0, 300000.0), "m", ["m2 s-2"]),                 # geopotential labelled m
    ("water_flux", (0.0, 60.0), "kg m-2 s-1", ["mm day-1"]),         # mm/day labelled as a flux
    ("energy_flux", (-300.0, -100.0), "W m-2", []),                 # downward-positive OLR: no unit fixes it
])
def test_each_kind_names_the_units_that_would_fit(kind, raw, units, fits):
    from circtrack.errors import InputError
    from circtrack.inputs import units as U
    f, o = U.conversion(units, kind)
    with pytest.raises(InputError) as e:
        PL.check_values("f.nc", "x", "X", units, kind, raw[0], raw[1], f, o)
    msg = str(e.value)
    for u in fits:
        assert f"--units x={u}" in msg.replace('"', "") and U.conversion(u, kind) is not None
    if not fits:
        assert "no units circtrack knows make them plausible" in msg
    PL.check_values("f.nc", "x", "X", units, kind, PL.RANGES[kind][0], PL.RANGES[kind][1], 1.0, 0.0)   # bounds pass


def test_every_kind_and_coordinate_has_a_documented_range():
    from circtrack.inputs import units as U
    assert set(PL.RANGES) == set(U.CANONICAL)
    assert set(PL.COORD_RANGES) == {"lat", "plev"} and "psl" in PL.ROLE_RANGES
    readme = open(os.path.join(os.path.dirname(__file__), "..", "README.md")).read()
    for lo, hi, what in [*PL.RANGES.values(), *PL.ROLE_RANGES.values(), *PL.COORD_RANGES.values()]:
        assert what in readme


def test_scan_suggests_the_units_line_for_implausible_values(tmp_path):
    path = write(with_ta(make_dataset(1), "C"), tmp_path / "ta_c.nc")
    r = run("scan", path)
    assert r.exit_code == 0, r.output
    assert "IMPLAUSIBLE: variable 'ta' (ta) says units 'C'" in r.output and "--units ta=K" in r.output


def test_unknown_units_given_on_the_command_line_are_a_usage_error(tmp_path, default_nc):
    line = one_error(run("track", default_nc, "--units", "ua=furlongs", "-o", tmp_path / "o.csv"), 2)
    assert line.startswith("circtrack: error: --units ua=furlongs: not a unit circtrack knows for speed; known: ")
    line = one_error(run("track", default_nc, "--units", "wind=m/s", "-o", tmp_path / "o.csv"), 2)
    assert "unknown role" in line
    line = one_error(run("track", default_nc, "--level", "U=high", "-o", tmp_path / "o.csv"), 2)
    assert "expected NAME=HPA" in line


def test_units_from_the_config_file(tmp_path):
    path = write(with_ta(make_dataset(1), "C"), tmp_path / "ta_c.nc")
    cfg = tmp_path / "c.toml"
    cfg.write_text('[units]\nta = "K"\n')
    r = run("track", path, "--metrics", "tropical_tropopause_pressure", "-c", cfg, "-o", tmp_path / "o.csv", "-q")
    assert r.exit_code == 0, r.output


# ----------------------------------------------------------------------------- time units
def month_file(tmp_path, units="Month", long_name="Month since Jan 1988", n=3):
    ds = with_ta(make_dataset(n), "K")
    ds = ds.assign_coords(time=("time", np.arange(n, dtype="int32"), {"units": units, "long_name": long_name}))
    path = tmp_path / "month.nc"
    ds.to_netcdf(str(path))
    return str(path)


def test_time_in_month_is_refused_naming_the_units_line(tmp_path):
    path = month_file(tmp_path)
    line = one_error(run("track", path, "-o", tmp_path / "o.csv"))
    assert line == (f"circtrack: error: {path}: time variable 'time' has no decodable units ('Month'); pass its CF "
                    "units, e.g. --units time=\"days since 2000-01-01\" (or time = \"...\" under [units] in a config "
                    "file), with the reference date the file means; its long_name reads 'Month since Jan 1988', "
                    "which would be --units time=\"months since 1988-01-01\"")


def test_time_units_and_calendar_given_on_the_command_line(tmp_path):
    path = month_file(tmp_path)
    out = tmp_path / "o.csv"
    r = run("track", path, "--units", "time=months since 1988-01-01", "--metrics", "eddy_jet_lat", "-o", out, "-q")
    assert r.exit_code == 0, r.output
    assert sorted({x["time"] for x in rows(out)}) == ["1988-01-01", "1988-02-01", "1988-03-01"]
    side = json.load(open(tmp_path / "o.provenance.json"))
    assert "given by --units" in side["inputs"][0]["found_by"]["time"]
    r = run("track", path, "--units", "time=days since 1988-01-01", "--units", "calendar=360_day",
            "--metrics", "eddy_jet_lat", "-o", out, "-q")
    assert r.exit_code == 0, r.output
    assert sorted({x["time"] for x in rows(out)}) == ["1988-01-01", "1988-01-02", "1988-01-03"]
    assert json.load(open(tmp_path / "o.provenance.json"))["parameters"]["units"]["calendar"] == "360_day"


# ----------------------------------------------------------------------------- near-surface roles
def one_level_wind(tmp_path, how):
    """Winds at 300 hPa only, without a level axis: said by a scalar coordinate, the long_name, or nothing."""
    ds = make_dataset(2).sel(plev=300.0)
    ds = ds.rename({"ua": "U", "va": "V"})
    if how == "scalar":
        ds["plev"].attrs.update(units="hPa", standard_name="air_pressure")
        ds["U"].attrs["coordinates"] = "plev"
    else:
        ds = ds.drop_vars("plev")
    for v in ("U", "V"):
        ds[v].attrs = {"units": "m/s", "long_name": "Zonal wind at 300 hPa" if how == "long_name" else "Zonal wind"}
    path = tmp_path / f"wind300_{how}.nc"
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding(CALENDAR))
    return str(path)


@pytest.mark.parametrize("how", ["scalar", "long_name", "level_option"])
def test_a_wind_aloft_never_stands_for_the_surface_wind(tmp_path, how):
    path = one_level_wind(tmp_path, "bare" if how == "level_option" else how)
    extra = ["--level", "U=300", "--level", "V=300"] if how == "level_option" else []
    scan = run("scan", path, *extra)
    assert scan.exit_code == 0 and "--var uas=U" not in scan.output, scan.output
    line = one_error(run("track", path, "--metrics", "surface_westerly_speed", *extra, "-o", tmp_path / "o.csv"))
    assert "near-surface eastward wind (uas) not found" in line
    line = one_error(run("track", path, "--metrics", "surface_westerly_speed", "--var", "uas=U", *extra,
                         "-o", tmp_path / "o.csv"))
    assert line.endswith("above run.near_surface_min_hpa (900 hPa), so it is not a near-surface eastward wind; give a "
                         "variable near the surface, or leave the metrics that need it out (--metrics)")
    assert "lies at 300 hPa" in line


def test_without_a_stated_level_the_scan_hint_stays(tmp_path):
    # nothing in the file says where U is: the units fit and scan shows the line (the user decides)
    path = one_level_wind(tmp_path, "bare")
    assert "--var uas=U" in run("scan", path).output


def surface_file(tmp_path, levels, ps_hpa=None):
    """ua/va on ``levels``; with ``ps_hpa(lat)`` a surface pressure field."""
    ds = synthetic.dataset(LAT, LON, np.asarray(levels, float), synthetic.monthly_times(2000, 1, CALENDAR)[:2])
    if ps_hpa is not None:
        ps = np.broadcast_to(ps_hpa(LAT)[None, :, None] * 100.0, (2, LAT.size, LON.size)).astype("float32")
        ds["ps"] = (("time", "lat", "lon"), ps, {"standard_name": "surface_air_pressure", "units": "Pa"})
    path = tmp_path / "surface.nc"
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding(CALENDAR))
    return str(path)


WIND = "surface_westerly_speed,trade_wind_speed,surface_wind_zero_lat"


def test_fallback_level_is_noted_per_row(tmp_path):
    path = surface_file(tmp_path, PLEV)
    out = tmp_path / "o.csv"
    r = run("track", path, "--metrics", WIND, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    got = rows(out)
    assert got and all(x["flag"].endswith(";wind_from_1000hPa") for x in got if x["value"] != "NaN")
    side = json.load(open(tmp_path / "o.provenance.json"))
    assert "wind_from_1000hPa" in side["flag_notes"] and "stands in" in side["flag_notes"]["wind_from_1000hPa"]["meaning"]


def test_fallback_level_mostly_below_ground_is_nan_with_a_flag(tmp_path):
    # northern mid-latitudes (25-70 N) under a high plateau: ps 600 hPa, below the 1000 hPa level
    path = surface_file(tmp_path, PLEV, ps_hpa=lambda lat: np.where((lat >= 20) & (lat <= 75), 600.0, 1010.0))
    out = tmp_path / "o.csv"
    r = run("track", path, "--metrics", WIND, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    got = {(x["hemisphere"], x["metric"], x["time"]): x for x in rows(out)}
    nh = got[("NH", "surface_westerly_speed", "2000-01-15")]
    sh = got[("SH", "surface_westerly_speed", "2000-01-15")]
    assert nh["value"] == "NaN" and nh["flag"] == "surface_level_below_ground"
    assert sh["value"] != "NaN" and sh["flag"] == "ok;wind_from_1000hPa"
    assert "surface_westerly_speed: 2 ok, 2 surface_level_below_ground (of 4 rows)" in r.stderr


def test_a_lowest_level_above_the_near_surface_limit_is_not_the_surface(tmp_path):
    path = surface_file(tmp_path, [850.0, 700.0, 500.0, 300.0, 200.0, 100.0])
    line = one_error(run("track", path, "--metrics", WIND, "-o", tmp_path / "o.csv"))
    assert "the lowest level of ua ('ua', 850 hPa) lies above run.near_surface_min_hpa (900 hPa)" in line


# ----------------------------------------------------------------------------- end-of-run summary
def test_summary_names_an_all_nan_metric_and_fail_on_empty_exits_1(tmp_path, default_nc):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[cells]\nlevel_hpa = 1100.0\n")
    out = tmp_path / "o.csv"
    r = run("track", default_nc, "--metrics", "hadley_edge_lat,eddy_jet_lat", "-c", cfg, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    lines = err_lines(r)
    assert "circtrack: hadley_edge_lat: 0 ok, 6 level_missing (of 6 rows)" in lines
    assert "circtrack: warning: hadley_edge_lat has no value in any of its 6 rows; most common flag: level_missing" in lines
    assert not any("eddy_jet_lat" in ln for ln in lines)            # all ok: no line
    os.remove(out)
    r = run("track", default_nc, "--metrics", "hadley_edge_lat,eddy_jet_lat", "-c", cfg, "-o", out, "-q",
            "--fail-on-empty")
    assert r.exit_code == 1 and os.path.exists(out)                 # written first, nothing lost
    assert err_lines(r)[-1] == ("circtrack: error: --fail-on-empty: hadley_edge_lat has no value at all (the output "
                                "was written; see the warnings above)")


def test_summary_names_default_metrics_left_out_for_want_of_a_variable(tmp_path):
    ds = make_dataset(2).drop_vars("va")
    path = write(ds, tmp_path / "ua_only.nc")
    r = run("track", path, "-o", tmp_path / "o.csv", "-q")
    assert r.exit_code == 0, r.output
    left = [ln for ln in err_lines(r) if "left out" in ln]
    assert len(left) == 1 and "hadley_edge_lat" in left[0] and "(need va: add --var va=NAME)" in left[0]
    assert json.load(open(tmp_path / "o.provenance.json"))["metrics_left_out"]


def test_update_prints_the_summary_too(tmp_path, default_nc):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[cells]\nlevel_hpa = 1100.0\n")
    r = run("update", default_nc, "--metrics", "hadley_edge_lat", "-c", cfg, "-o", tmp_path / "u.csv", "-q",
            "--fail-on-empty")
    assert r.exit_code == 1
    assert "circtrack: warning: hadley_edge_lat has no value in any of its 6 rows; most common flag: level_missing" \
        in err_lines(r)


# ----------------------------------------------------------------------------- advice that fits
def test_a_csv_file_is_said_to_be_no_data_file(tmp_path):
    p = tmp_path / "table.nc"
    p.write_text("time,lat,u\n2000-01-01,10,3.5\n")
    line = one_error(run("track", p, "-o", tmp_path / "o.csv"))
    assert line == (f"circtrack: error: {p}: not netCDF, HDF5, Zarr or GRIB at all (it begins like text: "
                    "'time,lat,u'); give circtrack the data files themselves (unpack archives first) or leave this "
                    "file out, or pass --on-bad-file skip")
    z = tmp_path / "packed.nc"
    z.write_bytes(b"\x1f\x8b\x08\x00" + bytes(100))
    assert "(it is a gzip file)" in one_error(run("track", z, "-o", tmp_path / "o.csv"))


def test_two_datasets_mixed_are_named_as_such(tmp_path):
    a = write(make_dataset(2), tmp_path / "a.nc")
    ds = synthetic.dataset(np.arange(-90.0, 91.0, 2.5), LON, PLEV, synthetic.monthly_times(2000, 1, CALENDAR)[:2])
    b = str(tmp_path / "b.nc")
    ds.drop_vars("va").to_netcdf(b, encoding=synthetic.time_encoding(CALENDAR))
    line = one_error(run("track", a, b, "-o", tmp_path / "o.csv"))
    assert line.startswith(f"circtrack: error: {b}: belongs to another dataset than {a} (grid 73x24 vs 181x24")
    assert "--var" not in line and "run each dataset on its own" in line


# ----------------------------------------------------------------------------- the real file
@pytest.mark.skipif(not os.path.exists(REAL), reason="libncarg-data's nc4uvt.nc is not installed")
def test_real_file_with_celsius_label_and_month_time(tmp_path):
    out = tmp_path / "o.csv"
    line = one_error(run("track", REAL, "-o", out))
    assert "--units time=\"months since 1988-01-01\"" in line and "'Month'" in line
    line = one_error(run("track", REAL, "--units", "time=months since 1988-01-01", "-o", out, "-q"))
    assert line.startswith(f"circtrack: error: {REAL}: variable 'T' (ta) says units 'C' but its values, 190.02 to "
                           "310.64 C, are 463.17 to 583.79 K") and "pass --units ta=K" in line
    r = run("track", REAL, "--units", "time=months since 1988-01-01", "--units", "ta=K", "-o", out, "-q")
    assert r.exit_code == 0, r.output
    got = {(x["hemisphere"], x["metric"]): x for x in rows(out)}
    # about 100.5 hPa with kelvin (the value); 116.6 hPa came out of the wrong +273.15
    tp = got[("global", "tropical_tropopause_pressure")]
    assert tp["flag"] == "ok" and abs(float(tp["value"]) - 100.5) < 0.1


def test_scan_names_the_time_units_line(tmp_path):
    path = month_file(tmp_path)
    r = run("scan", path)
    assert r.exit_code == 0 and '--units time="months since 1988-01-01"' in r.output, r.output
    r = run("scan", path, "--units", "time=months since 1988-01-01")
    assert r.exit_code == 0 and "1988-01-01 .. 1988-03-01" in r.output, r.output
    r = run("scan", path, "--units", "time=months since 1988-01-01", "--units", "ta=K")
    (line,) = [x for x in r.output.splitlines() if x.strip().startswith("ta ")]
    assert line.count("units 'K'") == 1 and "given by --units/[units]" in line, line      # said once


def test_latitudes_out_of_range_name_units_and_values(tmp_path):
    ds = make_dataset(1)
    ds = ds.assign_coords(lat=("lat", ds["lat"].values * 2.0, {"units": "degrees_north"}))
    path = write(ds, tmp_path / "lat2.nc")
    line = one_error(run("track", path, "-o", tmp_path / "o.csv"))
    assert line == (f"circtrack: error: {path}: coordinate 'lat' (lat) says units 'degrees_north' but its values are "
                    "-180 to 180 degrees_north, outside the plausible -90 to 90 degrees_north for latitude (|lat| > 90); "
                    "fix the coordinate")


def test_scan_offers_the_lowest_level_only_near_the_surface(tmp_path):
    low = run("scan", surface_file(tmp_path, PLEV)).output
    assert "surface_westerly_speed" in low and "uas from ua on the lowest pressure level" in low
    high = run("scan", surface_file(tmp_path, [850.0, 700.0, 500.0, 300.0, 200.0])).output
    assert "uas from ua on the lowest pressure level" not in high and "cannot run: needs uas" in high


# ----------------------------------------------------------------------------- one check for scan and track
def errors(r):
    return [ln for ln in err_lines(r) if ln.startswith("circtrack: error: ")]


def _winds_in_cm_s(tmp_path):
    """Winds in cm s-1 labelled m s-1 (the trial's case): ua and va both implausible, stronger aloft
    than at the top and bottom levels, so a check of other levels would quote another range."""
    ds = make_dataset(1)
    for v in ("ua", "va"):
        ds[v] = ds[v] * 100.0
        ds[v].attrs["units"] = "m s-1"
    return write(ds, tmp_path / "cm_s.nc")


def test_track_names_every_implausible_variable_once_and_leaves_outputs_alone(tmp_path):
    path = _winds_in_cm_s(tmp_path)
    out = tmp_path / "o.csv"
    out.write_text("previous\n")
    r = run("track", path, "-o", out)
    assert r.exit_code == 1, r.output
    lines = errors(r)
    assert len(lines) == 2 and all(ln.startswith(f"circtrack: error: {path}: variable '") for ln in lines), lines
    assert "variable 'ua' (ua)" in lines[0] and "variable 'va' (va)" in lines[1]
    assert all("--units" in ln and '="cm s-1"' in ln for ln in lines)
    assert out.read_text() == "previous\n" and not (tmp_path / "o.provenance.json").exists()


def test_scan_and_track_quote_the_same_values_and_advice(tmp_path):
    path = _winds_in_cm_s(tmp_path)
    track_lines = [ln.split(": error: ", 1)[1].split(": ", 1)[1] for ln in errors(run("track", path, "-o", tmp_path / "o.csv"))]
    scan = run("scan", path)
    assert scan.exit_code == 0, scan.output
    scan_lines = [ln.split("IMPLAUSIBLE: ", 1)[1] for ln in scan.output.splitlines() if "IMPLAUSIBLE: " in ln]
    assert scan_lines == track_lines and len(scan_lines) == 2


def test_the_range_is_said_once_when_nothing_was_converted(tmp_path):
    path = _winds_in_cm_s(tmp_path)
    line = errors(run("track", path, "-o", tmp_path / "o.csv"))[0]
    lo_hi = line.split("its values, ", 1)[1].split(",", 1)[0]           # e.g. "-1229.2 to 5112.9 m s-1"
    assert line.count(lo_hi) == 1 and f"its values, {lo_hi}, lie outside the plausible -250 to 250 m s-1" in line
    # converted values say both: as stated and as converted
    ta = write(with_ta(make_dataset(1), "C"), tmp_path / "ta_c.nc")
    converted = one_error(run("track", ta, "-o", tmp_path / "o.csv", "-q"))
    assert "says units 'C' but its values, 190 to 310 C, are 463.15 to 583.15 K, outside" in converted


def test_one_variable_per_file_scan_and_track_agree_too(tmp_path):
    import xarray as xr
    both = xr.open_dataset(_winds_in_cm_s(tmp_path))
    d = tmp_path / "split"
    d.mkdir()
    both[["ua"]].to_netcdf(d / "ua_Amon_x.nc")
    both[["va"]].to_netcdf(d / "va_Amon_x.nc")
    both.close()
    track_lines = [ln.split(": error: ", 1)[1].split(": ", 1)[1] for ln in errors(run("track", d, "-o", tmp_path / "o.csv"))]
    scan_lines = [ln.split("IMPLAUSIBLE: ", 1)[1] for ln in run("scan", d).output.splitlines() if "IMPLAUSIBLE: " in ln]
    assert len(track_lines) == 2 and scan_lines == track_lines
