"""The same field in different file layouts must give byte-identical CSV rows."""

import math

import numpy as np
import pytest

from tests.conftest import csv_rows, make_dataset, run, write
from circtrack import config, engine
from circtrack.errors import InputError

LABEL = "layout"


@pytest.fixture(scope="module")
def base_rows(tmp_path_factory):
    path = write(make_dataset(3), tmp_path_factory.mktemp("base") / "base.nc")
    _, out = run(path, label=LABEL)
    rows = csv_rows(out)
    assert len(rows) > 0
    return rows


def _latitude_descending(ds):
    return ds.isel(lat=slice(None, None, -1))


def _plev_in_pa_with_noise(ds):
    ds = ds.assign_coords(plev=ds["plev"].values * 100.0 + 1e-7)   # 100000.0000001, ...
    ds["plev"].attrs.update({"standard_name": "air_pressure", "units": "Pa", "positive": "down", "axis": "Z"})
    return ds


def _longitude_pm180(ds):
    attrs = dict(ds["lon"].attrs)
    lon = ((ds["lon"].values + 180.0) % 360.0) - 180.0
    ds = ds.assign_coords(lon=lon).sortby("lon")                  # data rolled with its coordinate
    ds["lon"].attrs.update(attrs)
    return ds


def _plev_ascending(ds):
    return ds.isel(plev=slice(None, None, -1))


def _all_at_once(ds):
    return _longitude_pm180(_plev_in_pa_with_noise(_plev_ascending(_latitude_descending(ds))))


@pytest.mark.parametrize("transform", [_latitude_descending, _plev_in_pa_with_noise, _longitude_pm180,
                                       _plev_ascending, _all_at_once],
                         ids=["lat_descending", "plev_pa_noise", "lon_-180_180", "plev_ascending", "all"])
def test_layout_gives_identical_rows(tmp_path, base_rows, transform):
    ds = transform(make_dataset(3))
    path = write(ds, tmp_path / "variant.nc")
    _, out = run(path, label=LABEL)
    assert csv_rows(out) == base_rows


def test_transform_really_changes_the_file(tmp_path):
    # guard against a no-op transform making the layout tests vacuous
    ds = make_dataset(1)
    assert _latitude_descending(ds)["lat"].values[0] == 90.0
    assert _plev_in_pa_with_noise(ds)["plev"].values[0] == 100000.0000001
    lon = _longitude_pm180(ds)["lon"].values
    assert lon[0] == -180.0 and lon[-1] == 165.0
    np.testing.assert_array_equal(_longitude_pm180(ds)["ua"].sel(lon=-90.0).values, ds["ua"].sel(lon=270.0).values)


def test_split_one_file_per_month(tmp_path, base_rows):
    ds = make_dataset(3)
    d = tmp_path / "split"
    d.mkdir()
    paths = [write(ds.isel(time=[k]), d / f"month_{k:02d}.nc") for k in (2, 0, 1)]   # given out of order
    _, out = run(paths, label=LABEL)
    assert csv_rows(out) == base_rows
    _, out_dir = run(str(d), label=LABEL)      # a directory works the same
    assert csv_rows(out_dir) == base_rows


def test_duplicate_time_steps_across_files_are_dropped(tmp_path, base_rows):
    ds = make_dataset(3)
    d = tmp_path / "dup"
    d.mkdir()
    a = write(ds.isel(time=[0, 1]), d / "a.nc")
    b = write(ds.isel(time=[1, 2]), d / "b.nc")            # 2000-02-15 appears twice
    _, out = run([a, b], label=LABEL)
    assert csv_rows(out) == base_rows
    dropped = out.provenance["repeated_time_steps_dropped"]
    assert len(dropped) == 1 and dropped[0]["time"] == "2000-02-15" and dropped[0]["path"] == b
    assert dropped[0]["kept_from"] == a


def test_conflicting_repeated_time_step_is_refused_unless_a_policy_says(tmp_path, base_rows):
    ds = make_dataset(3)
    d = tmp_path / "conflict"
    d.mkdir()
    a = write(ds.isel(time=[0, 1]), d / "a.nc")
    other = ds.isel(time=[1, 2]).copy(deep=True)
    other["ua"] = other["ua"] + 1.0                          # same time stamp, different wind
    b = write(other, d / "b.nc")
    with pytest.raises(InputError, match=r"b\.nc: time step 2000-02-15 is also in .*a\.nc with different values"):
        run([a, b], label=LABEL)
    cfg = config.load()
    cfg["run"]["repeated_times"] = "keep-first"
    first = engine.track([a, b], cfg, label=LABEL)
    cfg["run"]["repeated_times"] = "keep-last"
    last = engine.track([a, b], cfg, label=LABEL)
    assert first.provenance["repeated_time_steps_dropped"][0]["path"] == b
    assert last.provenance["repeated_time_steps_dropped"][0]["path"] == a
    v_first = first.columns["value"][(first.columns["time"] == "2000-02-15") & (first.columns["metric"] == "eddy_jet_speed")]
    v_last = last.columns["value"][(last.columns["time"] == "2000-02-15") & (last.columns["metric"] == "eddy_jet_speed")]
    assert np.allclose(v_last - v_first, 1.0, atol=0.05)     # u + 1 m/s everywhere moves the jet speed by 1


def test_nan_below_ground_in_half_the_longitudes(tmp_path):
    ds = make_dataset(3)
    for name in ("ua", "va"):
        arr = ds[name].values.copy()
        arr[:, 0, :, ::2] = np.nan            # plev[0] = 1000 hPa, every other longitude
        ds[name] = (ds[name].dims, arr, ds[name].attrs)
    assert float(ds["plev"][0]) == 1000.0
    table, _ = run(write(ds, tmp_path / "ground.nc"), label=LABEL)
    for (t, hemi, metric), (value, flag) in table.items():
        if metric == "hadley_edge_lat":
            assert flag == "ok" and not math.isnan(value)
            assert value == pytest.approx(28.0 if hemi == "NH" else -30.0, abs=0.1)
