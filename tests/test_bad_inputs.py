"""Malformed inputs: one clear line, the right exit status, earlier outputs untouched.

Each case builds its bad input in tmp_path (small synthetic files from circtrack.synthetic,
then broken on purpose) and runs it through the command line. A case that fails must give
exactly one line on stderr, ``circtrack: error: ...``, naming the file and a fix, exit 1 (2 for a
usage error), no traceback, and leave an OUT.csv and its sidecar (and for ``update`` its state)
that existed before byte-identical. Where part of the work can still be done honestly, the rows
are written with NaN and a flag that is not ``ok``; ``--on-bad-file skip`` names the skipped file
on stderr and in the sidecar.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field

import h5py
import netCDF4
import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import synthetic
from circtrack.cli import main
from circtrack.output import sidecar_path
from circtrack.update import state_path

from .conftest import CALENDAR, LAT, LON, PLEV

PREVIOUS_CSV = "source,time,hemisphere,sector,metric,value,units,flag\nprev,2000-01-15,NH,zonal,eddy_jet_lat,45,degrees_north,ok\n"
PREVIOUS_SIDECAR = '{"previous": true}\n'


# --------------------------------------------------------------------------- builders
def nc(tmp_path, name, *, k0=0, n=3, lat=LAT, lon=LON, plev=PLEV, calendar=CALENDAR, edit=None, **to_netcdf):
    """A valid synthetic file (months k0.. of 2000) in tmp_path/in, optionally edited before writing."""
    times = synthetic.monthly_times(2000, 1, calendar)[k0:k0 + n]
    ds = synthetic.dataset(lat, lon, plev, times)
    if edit is not None:
        ds = edit(ds)
    path = tmp_path / "in" / name
    path.parent.mkdir(exist_ok=True)
    encoding = {**synthetic.time_encoding(calendar), **to_netcdf.pop("encoding", {})}
    ds.to_netcdf(str(path), encoding=encoding, **to_netcdf)
    return str(path)


def set_attrs(path, var, **attrs):
    """Change attributes in place with netCDF4 (None deletes), as a hand edit with ncatted would."""
    with netCDF4.Dataset(path, "a") as f:
        for k, v in attrs.items():
            if v is None:
                f[var].delncattr(k)
            else:
                f[var].setncattr(k, v)
    return path


def cut_in_half(path):
    data = open(path, "rb").read()
    open(path, "wb").write(data[:len(data) // 2])
    return path


def garbage(tmp_path, name, text="this is not netCDF\n"):
    path = tmp_path / "in" / name
    path.parent.mkdir(exist_ok=True)
    path.write_text(text)
    return str(path)


@dataclass
class Case:
    args: list                  # PATH... and options after the command name
    names: str                  # the file (or path) the message must name
    fix: str                    # words of the fix the message must contain
    code: int = 1
    command: str = "track"
    prior: list = field(default_factory=list)   # update: good files of an earlier successful run
    out: str | None = None      # -o other than the pre-existing OUT.csv


ERRORS = {}


def case(fn):
    ERRORS[fn.__name__] = fn
    return fn


# ---- files that are not (complete) netCDF
@case
def empty_file(tmp_path):
    p = garbage(tmp_path, "empty.nc", "")
    return Case([p], p, "re-copy")


@case
def truncated_netcdf4(tmp_path):
    p = cut_in_half(nc(tmp_path, "cut4.nc"))
    return Case([p], p, "re-copy it")


@case
def truncated_netcdf3(tmp_path):
    # a classic file cut short still opens and reads zeros past its end (found by this corpus)
    p = cut_in_half(nc(tmp_path, "cut3.nc", format="NETCDF3_64BIT"))
    return Case([p], p, "truncated")


@case
def text_file_named_nc(tmp_path):
    p = garbage(tmp_path, "notes.nc")
    return Case([p], p, "not netCDF")


@case
def plain_hdf5_named_nc(tmp_path):
    p = str(tmp_path / "in" / "plain.nc")
    os.makedirs(os.path.dirname(p), exist_ok=True)
    with h5py.File(p, "w") as f:
        f["ua"] = np.zeros((3, PLEV.size, LAT.size, LON.size), "f4")
        f["lat"] = LAT
    return Case([p], p, "plain HDF5")


@case
def damaged_data_chunk(tmp_path):
    # the header is intact; one compressed chunk of ua is overwritten, so reading fails mid-run
    enc = {v: {"zlib": True, "complevel": 1, "chunksizes": (1, PLEV.size, LAT.size, LON.size)} for v in ("ua", "va")}
    p = nc(tmp_path, "damaged.nc", encoding=enc)
    with h5py.File(p, "r") as f:
        info = f["ua"].id.get_chunk_info(1)
    data = bytearray(open(p, "rb").read())
    start = info.byte_offset + info.size // 4
    data[start:start + 64] = b"\xff" * 64
    open(p, "wb").write(bytes(data))
    return Case([p], p, "re-copy it or leave it out")


@case
def empty_zarr_directory(tmp_path):
    p = tmp_path / "in" / "store.zarr"
    p.mkdir(parents=True)
    return Case([str(p)], str(p), "complete netCDF/Zarr")


@case
def unreadable_file(tmp_path):
    if os.geteuid() == 0:
        pytest.skip("running as root: file permissions do not stop root from reading")
    p = nc(tmp_path, "locked.nc")
    os.chmod(p, 0)
    return Case([p], p, "re-copy")


# ---- variables and their units
@case
def missing_variable(tmp_path):
    p = nc(tmp_path, "only_ua.nc", edit=lambda ds: ds.drop_vars("va"))
    return Case([p, "--metrics", "hadley_edge_lat"], p, "--var va=")


@case
def no_known_variable(tmp_path):
    def rename(ds):
        ds = ds.rename({"ua": "wind_x", "va": "wind_y"})
        for v in ("wind_x", "wind_y"):
            del ds[v].attrs["standard_name"]
        return ds
    p = nc(tmp_path, "odd_names.nc", edit=rename)
    return Case([p], p, "--var ROLE=NAME")


@case
def unknown_units(tmp_path):
    p = set_attrs(nc(tmp_path, "furlongs.nc"), "ua", units="furlongs per fortnight")
    return Case([p], p, "'m s-1'")


@case
def no_lat_lon_axes(tmp_path):
    # variables on (time, plev, j, i) with no coordinate variables: no latitude/longitude axis
    p = nc(tmp_path, "no_axes.nc", edit=lambda ds: ds.drop_vars(["lat", "lon"]).rename({"lat": "j", "lon": "i"}))
    return Case([p], p, "name it 'lat'")


# ---- coordinates
@case
def duplicated_latitudes(tmp_path):
    lat = LAT.copy()
    lat[100] = lat[99]
    p = nc(tmp_path, "dup_lat.nc", lat=lat)
    return Case([p], p, "fix the coordinate")


@case
def nan_latitudes(tmp_path):
    lat = LAT.copy()
    lat[100] = np.nan
    p = nc(tmp_path, "nan_lat.nc", lat=lat)
    return Case([p], p, "fix the coordinate")


@case
def out_of_range_latitudes(tmp_path):
    p = nc(tmp_path, "lat_91.nc", lat=LAT * 1.01)            # -90.9 .. 90.9
    return Case([p], p, "|lat| > 90")


@case
def nan_longitudes(tmp_path):
    lon = LON.copy()
    lon[3] = np.nan
    p = nc(tmp_path, "nan_lon.nc", lon=lon)
    return Case([p], p, "fix the coordinate")


@case
def duplicated_longitudes(tmp_path):
    lon = LON.copy()
    lon[3] = lon[2]
    p = nc(tmp_path, "dup_lon.nc", lon=lon)
    return Case([p], p, "duplicated values")


@case
def duplicated_pressure_levels(tmp_path):
    plev = PLEV.copy()
    plev[3] = plev[2]
    p = nc(tmp_path, "dup_plev.nc", plev=plev)
    return Case([p], p, "duplicated values")


@case
def one_pressure_level(tmp_path):
    # was blamed on damage ("one of these files is damaged") after reading failed
    p = nc(tmp_path, "one_level.nc", plev=np.array([500.0]))
    return Case([p], p, "single pressure level")


@case
def one_latitude(tmp_path):
    p = nc(tmp_path, "one_lat.nc", lat=np.array([10.0]))
    return Case([p], p, "at least 3 latitudes")


@case
def time_fill_value(tmp_path):
    p = nc(tmp_path, "time_fill.nc")
    with netCDF4.Dataset(p, "a") as f:
        t = f["time"][:]
        t[1] = 9.969209968386869e36
        f["time"][:] = t
    return Case([p], p, "fix the time coordinate")


@case
def time_step_repeated_inside_one_file(tmp_path):
    def repeat_with_other_values(ds):
        import xarray as xr

        b = ds.isel(time=[1]).copy(deep=True)
        b["ua"] = b["ua"] + 1.0
        return xr.concat([ds.isel(time=[0, 1]), b], dim="time")
    p = nc(tmp_path, "repeat_inside.nc", edit=repeat_with_other_values)
    return Case([p], p, "appears twice in this file")


@case
def unknown_netcdf_engine(tmp_path):
    p = nc(tmp_path, "fine.nc")
    cfg = tmp_path / "engine.toml"
    cfg.write_text('[run]\nnetcdf_engine = "fast"\n')
    return Case([p, "-c", str(cfg)], "run.netcdf_engine = 'fast'", "use one of netcdf4, h5netcdf", code=2)


@case
def level_units_degC(tmp_path):
    # before this corpus the levels were silently taken as hPa by their size
    p = set_attrs(nc(tmp_path, "plev_degc.nc"), "plev", units="degC")
    return Case([p], p, "'Pa' or 'hPa'")


# ---- time axis
@case
def undecodable_time_units(tmp_path):
    p = set_attrs(nc(tmp_path, "fortnights.nc"), "time", units="fortnights since 2000-01-01")
    return Case([p], p, "'days since 1979-01-01'")


@case
def time_without_units(tmp_path):
    p = set_attrs(nc(tmp_path, "bare_time.nc"), "time", units=None, calendar=None)
    return Case([p], p, "'days since 2000-01-01'")


@case
def empty_time_axis(tmp_path):
    # before this corpus a file with no time steps replaced OUT with a header-only CSV
    p = nc(tmp_path, "no_steps.nc", edit=lambda ds: ds.isel(time=slice(0, 0)), encoding={"time": {"dtype": "float64"}})
    return Case([p], p, "holds no time steps")


# ---- files that do not fit together
@case
def mismatched_grids(tmp_path):
    a = nc(tmp_path, "grid1.nc")
    b = nc(tmp_path, "grid2.nc", k0=3, lat=np.arange(-90.0, 91.0, 2.0))
    return Case([a, b], b, "regrid")


@case
def mismatched_levels(tmp_path):
    a = nc(tmp_path, "lev14.nc")
    b = nc(tmp_path, "lev13.nc", k0=3, plev=PLEV[1:])
    return Case([a, b], b, "interpolate to common levels")


@case
def mixed_calendars(tmp_path):
    a = nc(tmp_path, "noleap.nc")
    b = nc(tmp_path, "d360.nc", k0=3, calendar="360_day")
    return Case([a, b], b, "share a calendar")


@case
def corrupt_among_good_stop(tmp_path):
    a, c = nc(tmp_path, "y1.nc"), nc(tmp_path, "y3.nc", k0=6)
    b = garbage(tmp_path, "y2.nc", "<html>502 Bad Gateway</html>\n")
    return Case([a, b, c], b, "--on-bad-file skip")


# ---- paths
@case
def glob_matches_nothing(tmp_path):
    pattern = str(tmp_path / "in" / "ua_*.nc")
    return Case([pattern], pattern, "quote the glob")


@case
def directory_without_nc(tmp_path):
    d = tmp_path / "in" / "notes"
    d.mkdir(parents=True)
    (d / "readme.txt").write_text("no data here\n")
    return Case([str(d)], str(d), "point to the files")


@case
def missing_path(tmp_path):
    p = str(tmp_path / "in" / "nope.nc")
    return Case([p], p, "check the path")


# ---- usage errors (exit 2)
@case
def unknown_metric(tmp_path):
    p = nc(tmp_path, "ok.nc")
    return Case([p, "--metrics", "hadley_edge"], "hadley_edge", "'circtrack metrics'", code=2)


@case
def malformed_var_option(tmp_path):
    p = nc(tmp_path, "ok.nc")
    return Case([p, "--var", "ua"], "--var 'ua'", "ROLE=NAME", code=2)


@case
def config_not_found(tmp_path):
    p = nc(tmp_path, "ok.nc")
    cfg = str(tmp_path / "nope.toml")
    return Case([p, "-c", cfg], cfg, "TOML", code=2)


@case
def output_directory_missing(tmp_path):
    p = nc(tmp_path, "ok.nc")
    out = str(tmp_path / "no_such_dir" / "OUT.csv")
    return Case([p], out, "mkdir -p", code=2, out=out)


@case
def update_to_stdout(tmp_path):
    p = nc(tmp_path, "ok.nc")
    return Case([p], "update needs an output file", "-o OUT.csv", code=2, command="update", out="-")


# ---- update: a bad new file leaves OUT, its sidecar and its state as they were
@case
def update_corrupt_new_file(tmp_path):
    a = nc(tmp_path, "m1.nc")
    b = cut_in_half(nc(tmp_path, "m2.nc", k0=3))
    return Case([a, b], b, "--on-bad-file skip", command="update", prior=[a])


@case
def update_empty_new_file(tmp_path):
    a = nc(tmp_path, "m1.nc")
    b = garbage(tmp_path, "m2.nc", "")
    return Case([a, b], b, "re-copy", command="update", prior=[a])


@case
def update_new_file_other_grid(tmp_path):
    a = nc(tmp_path, "m1.nc")
    b = nc(tmp_path, "m2.nc", k0=3, lat=np.arange(-90.0, 91.0, 2.0))
    return Case([a, b], b, "regrid", command="update", prior=[a])


@case
def update_new_file_other_calendar(tmp_path):
    a = nc(tmp_path, "m1.nc")
    b = nc(tmp_path, "m2.nc", k0=3, calendar="360_day")
    return Case([a, b], b, "share a calendar", command="update", prior=[a])


# --------------------------------------------------------------------------- running
def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def snapshot(directory):
    return {p: open(os.path.join(directory, p), "rb").read() for p in sorted(os.listdir(directory))}


def test_the_corpus_is_large_enough():
    assert len(ERRORS) >= 20


@pytest.mark.parametrize("name", sorted(ERRORS))
def test_bad_input_gives_one_line_and_keeps_outputs(tmp_path, name):
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    out = str(out_dir / "OUT.csv")
    c = ERRORS[name](tmp_path)
    if c.prior:
        r = invoke("update", *c.prior, "-o", out, "-q", "--label", "L")
        assert r.exit_code == 0, r.output
        assert os.path.exists(state_path(out))
    else:
        open(out, "w").write(PREVIOUS_CSV)
        open(sidecar_path(out), "w").write(PREVIOUS_SIDECAR)
    before = snapshot(out_dir)
    extra = ["--label", "L"] if c.command == "update" else []
    r = invoke(c.command, *c.args, "-o", c.out or out, "-q", *extra)

    assert r.exit_code == c.code, r.output
    assert isinstance(r.exception, SystemExit), repr(r.exception)
    lines = r.stderr.splitlines()
    assert len(lines) == 1, r.stderr
    line = lines[0]
    assert line.startswith("circtrack: error: "), line
    assert c.names in line, line
    assert c.fix in line, line
    assert "Traceback" not in r.output
    assert r.stdout == ""
    # OUT, its sidecar (and state) byte-identical; no temp file left behind
    assert snapshot(out_dir) == before


# --------------------------------------------------------------------------- partial work, flagged
def rows(path):
    lines = open(path).read().splitlines()
    return [dict(zip(lines[0].split(","), ln.split(","))) for ln in lines[1:]]


def test_all_nan_wind_gives_nan_rows_with_flags(tmp_path):
    def blank_ua(ds):
        ds["ua"].values[...] = np.nan
        return ds
    p = nc(tmp_path, "ua_nan.nc", edit=blank_ua)
    out = tmp_path / "OUT.csv"
    out.write_text(PREVIOUS_CSV)
    r = invoke("track", p, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    got = rows(out)
    jets = [g for g in got if g["metric"].startswith(("eddy_jet", "subtropical_jet"))]
    assert len(jets) == 3 * 2 * 5                      # 3 months x 2 hemispheres x 5 jet metrics
    assert all(g["value"] == "NaN" and g["flag"] == "too_little_data" for g in jets)
    # the streamfunction needs only va, which is intact: the Hadley edges are still exact
    edges = [g for g in got if g["metric"] == "hadley_edge_lat"]
    assert len(edges) == 6 and all(g["flag"] == "ok" for g in edges)
    assert sorted({float(g["value"]) for g in edges}) == pytest.approx([-30.0, 28.0], abs=0.05)


def test_missing_lower_levels_give_nan_rows_with_level_missing(tmp_path):
    p = nc(tmp_path, "no_850.nc", plev=PLEV[PLEV < 850.0])  # 700 hPa and above only
    out = tmp_path / "OUT.csv"
    r = invoke("track", p, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    got = rows(out)
    low = [g for g in got if g["metric"].startswith(("eddy_jet", "subtropical_jet"))]
    assert len(low) == 30 and all(g["value"] == "NaN" and g["flag"] == "level_missing" for g in low)
    edges = [g for g in got if g["metric"] == "hadley_edge_lat"]
    # without the levels below 700 hPa the column misses the lower branch and carries a net mass flux;
    # it is removed (the edges stay exact) and the flag's note says so (issue 12)
    assert all(g["flag"] == "ok;unbalanced_column" for g in edges)
    assert sorted({float(g["value"]) for g in edges}) == pytest.approx([-30.0, 28.0], abs=0.05)


# --------------------------------------------------------------------------- --on-bad-file skip
def assert_skipped(r, out, bad, n_good_steps):
    assert r.exit_code == 0, r.output
    skipped = [ln for ln in r.stderr.splitlines() if ln.startswith("circtrack: skipped ")]
    assert len(skipped) == 1 and bad in skipped[0], r.stderr
    assert "Traceback" not in r.output
    side = json.loads(open(sidecar_path(str(out))).read())
    assert [s["path"] for s in side["skipped_inputs"]] == [bad]
    assert bad in side["skipped_inputs"][0]["reason"]
    assert side["time_steps"] == n_good_steps
    assert len({g["time"] for g in rows(out)}) == n_good_steps


def test_track_skips_corrupt_file_and_reports_it(tmp_path):
    a, c = nc(tmp_path, "y1.nc"), nc(tmp_path, "y3.nc", k0=6)
    b = garbage(tmp_path, "y2.nc", "<html>502 Bad Gateway</html>\n")
    out = tmp_path / "OUT.csv"
    r = invoke("track", a, b, c, "-o", out, "-q", "--on-bad-file", "skip")
    assert_skipped(r, out, b, 6)


def test_track_skips_a_first_file_whose_time_cannot_be_decoded(tmp_path):
    # before this corpus, only a first file that could not be opened at all was skipped; one that
    # opens but fails detection (a time axis without units) stopped the run despite skip
    a = set_attrs(nc(tmp_path, "a_bad_time.nc"), "time", units=None, calendar=None)
    b = nc(tmp_path, "b_good.nc", k0=3)
    out = tmp_path / "OUT.csv"
    r = invoke("track", a, b, "-o", out, "-q", "--on-bad-file", "skip")
    assert_skipped(r, out, a, 3)


def test_update_skips_bad_new_file_and_equals_track_of_the_good_ones(tmp_path):
    a, c = nc(tmp_path, "m1.nc"), nc(tmp_path, "m3.nc", k0=6)
    out = tmp_path / "OUT.csv"
    assert invoke("update", a, "-o", out, "-q", "--label", "L").exit_code == 0
    b = cut_in_half(nc(tmp_path, "m2.nc", k0=3))
    r = invoke("update", a, b, c, "-o", out, "-q", "--label", "L", "--on-bad-file", "skip")
    assert_skipped(r, out, b, 6)
    ref = tmp_path / "ref.csv"
    assert invoke("track", a, c, "-o", ref, "-q", "--label", "L").exit_code == 0
    assert out.read_bytes() == ref.read_bytes()
    # the skipped file is remembered: nothing new until it changes
    r = invoke("update", a, b, c, "-o", out, "--label", "L", "--on-bad-file", "skip")
    assert r.exit_code == 0 and "nothing new" in r.output


def test_scan_names_level_units_that_are_not_pressure(tmp_path):
    p = set_attrs(nc(tmp_path, "plev_degc.nc"), "plev", units="degC")
    r = invoke("scan", p)
    assert r.exit_code == 0, r.output
    assert "no usable pressure levels: vertical axis 'plev' has units 'degC'" in r.output
