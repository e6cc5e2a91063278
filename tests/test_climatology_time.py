"""Climatology files whose time axis counts from year 0 (e.g. 'hour since 0000-01-01 00:00:00')
must be read without hand edits: decoded in the proleptic Gregorian calendar with year 0."""

import netCDF4
import numpy as np
import pytest

from circtrack import config, engine
from circtrack.errors import InputError
from circtrack.inputs import dataset as D


def _write(path, time_units, calendar=None):
    """A 2-month surface file written with netCDF4 directly (xarray refuses to encode year 0)."""
    lat = np.arange(-89.0, 90.0, 2.0)
    lon = np.arange(1.0, 360.0, 2.0)
    a = np.abs(lat)
    u = np.where(a > 60, -3 * np.sin(np.pi * (a - 60) / 30.0), 7.0 * np.sin(np.pi * (a - 30) / 30.0))
    with netCDF4.Dataset(path, "w", format="NETCDF3_CLASSIC") as nc:
        nc.createDimension("TIME", 2)
        nc.createDimension("COADSY", lat.size)
        nc.createDimension("COADSX", lon.size)
        t = nc.createVariable("TIME", "f8", ("TIME",))
        t.units = time_units
        if calendar:
            t.calendar = calendar
        # mid-January and mid-February of year 0: 15.25 and 45.6 days after 0000-01-01
        t[:] = [366.0, 1096.485]
        y = nc.createVariable("COADSY", "f8", ("COADSY",))
        y.units = "degrees_north"
        y[:] = lat
        x = nc.createVariable("COADSX", "f8", ("COADSX",))
        x.units = "degrees_east"
        x[:] = lon
        w = nc.createVariable("UWND", "f4", ("TIME", "COADSY", "COADSX"), fill_value=np.float32(-1e34))
        w.units = "M/S"
        w[:] = np.broadcast_to(u[None, :, None], (2, lat.size, lon.size))
    return str(path)


@pytest.mark.parametrize("calendar", [None, "standard", "gregorian", "julian"])
def test_year_zero_time_axis_is_read(tmp_path, calendar):
    path = _write(tmp_path / "clim.cdf", "hour since 0000-01-01 00:00:00", calendar)
    out = engine.track([path], config.load(), metric_ids=["surface_wind_zero_lat"])
    c = out.columns
    # 366 h after 0000-01-01 00:00 is 16 January 06:00; 1096.485 h is 45 d 16.485 h -> 15 February 16:29:06
    assert sorted(set(c["time"])) == ["0000-01-16T06:00:00", "0000-02-15T16:29:06"]
    assert out.provenance["calendar"] == "proleptic_gregorian"
    assert "year 0" in out.provenance["inputs"][0]["found_by"]["time"]
    # the field's zero is at 30 deg in both hemispheres (closed form above)
    vals = dict(zip(zip(c["time"], c["hemisphere"]), c["value"]))
    assert vals[("0000-01-16T06:00:00", "NH")] == pytest.approx(30.0, abs=1e-6)
    assert vals[("0000-01-16T06:00:00", "SH")] == pytest.approx(-30.0, abs=1e-6)


def test_year_zero_rule_only_for_calendars_without_year_zero():
    assert D.year_zero_time("hour since 0000-01-01 00:00:00", "")
    assert D.year_zero_time("days since 0-1-1", "standard")
    assert not D.year_zero_time("days since 0001-01-01", "")
    assert not D.year_zero_time("days since 1000-01-01", "standard")
    assert not D.year_zero_time("days since 0000-01-01", "noleap")      # has a year 0 already


def test_undecodable_time_is_still_one_clear_error(tmp_path):
    path = _write(tmp_path / "bad.cdf", "hour since the flood")
    with pytest.raises(InputError) as e:
        engine.track([path], config.load(), metric_ids=["surface_wind_zero_lat"])
    assert str(tmp_path / "bad.cdf") in str(e.value) and "time" in str(e.value)


def test_reopening_for_year_zero_keeps_the_engine_arguments(monkeypatch):
    # the second open (without time decoding) must pass the engine arguments of the first, e.g.
    # cfgrib's index path in our cache directory (never beside the data)
    import xarray as xr

    from circtrack.inputs import times as T
    seen = []

    def refuses(path, **kwargs):
        seen.append(kwargs)
        raise ValueError("cannot be reopened here")
    monkeypatch.setattr(xr, "open_dataset", refuses)
    extra = {"backend_kwargs": {"indexpath": "/cache/circtrack/grib-index/x.idx"}}
    with pytest.raises(InputError):
        T.reopen_undecoded("x.grib", "cfgrib", extra, config.load(), None,
                           "unable to decode time units 'hours since 0000-01-01' with calendar 'standard'")
    assert seen and all(kw.get("backend_kwargs") == extra["backend_kwargs"] for kw in seen)
