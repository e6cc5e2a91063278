"""circtrack zonal-means: the zonal-mean fields and the engine's streamfunction as CF netCDF
(issue 16), against the synthetic field's closed-form zonal means and against the CSV of 'track'."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from click.testing import CliRunner

from circtrack import synthetic
from circtrack.cli import main
from tests.conftest import LAT, LON, PLEV, make_dataset, write

TIMES = ["2000-01-15", "2000-02-15", "2000-03-15"]
ZEROS = np.array([[-60.0, -30.0, 5.0, 28.0, 62.0], [-58.0, -27.5, 4.0, 31.5, 63.0], [-61.0, -33.0, 6.0, 25.0, 60.0]])


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def opened(path):
    return xr.open_dataset(path, decode_times=xr.coders.CFDatetimeCoder(use_cftime=True))


@pytest.fixture(scope="module")
def moving(tmp_path_factory):
    d = tmp_path_factory.mktemp("zm")
    return write(make_dataset(3, cell_zeros=ZEROS), d / "moving.nc")


def test_fields_are_the_zonal_means_and_coverage(moving, tmp_path):
    out = tmp_path / "zm.nc"
    r = invoke("zonal-means", moving, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    ds = opened(out)
    assert ds.attrs["Conventions"].startswith("CF-")
    assert [t.strftime("%Y-%m-%d") for t in ds.time.values] == TIMES
    np.testing.assert_array_equal(ds.plev, np.sort(PLEV))
    np.testing.assert_array_equal(ds.lat, LAT)
    assert ds.ua.dims == ("time", "plev", "lat") and ds.ua.attrs["units"] == "m s-1"
    ua, va, _ = synthetic.fields(LAT, LON, PLEV, ntime=3, cell_zeros=ZEROS)
    order = np.argsort(PLEV)
    np.testing.assert_allclose(ds.ua, ua.astype(np.float32).astype(float).mean(-1)[:, order], atol=1e-4)
    np.testing.assert_allclose(ds.va, va.astype(np.float32).astype(float).mean(-1)[:, order], atol=1e-6)
    assert (ds.ua_coverage == 1).all() and ds.psi.attrs["units"] == "kg s-1"


def test_psi500_zero_is_the_csv_hadley_edge(moving, tmp_path):
    """The streamfunction in the file is the engine's: its 500 hPa zero poleward of the cell's extremum,
    interpolated linearly between grid latitudes, is the hadley_edge_lat that 'track' writes."""
    out, csv = tmp_path / "zm.nc", tmp_path / "idx.csv"
    assert invoke("zonal-means", moving, "-o", out, "-q").exit_code == 0
    assert invoke("track", moving, "-o", csv, "-q", "--metrics", "hadley_edge_lat").exit_code == 0
    rows = pd.read_csv(csv)
    psi = opened(out).psi.sel(plev=500.0)
    lat = psi.lat.to_numpy()
    for k, t in enumerate(TIMES):
        p = psi.isel(time=k).to_numpy()
        for hemi, sign in (("NH", 1), ("SH", -1)):
            idx = np.flatnonzero(sign * lat >= 0)
            idx = idx if sign > 0 else idx[::-1]               # equator to pole
            window = idx[np.abs(lat[idx]) <= 50]
            j0 = window[np.argmax(sign * p[window])]           # the cell's extremum (NH max, SH min)
            along = idx[np.searchsorted(np.abs(lat[idx]), abs(lat[j0])):]
            s = np.sign(p[j0])
            n = int(np.flatnonzero(np.sign(p[along]) != s)[0])
            a, b = along[n - 1], along[n]
            edge = lat[a] + (lat[b] - lat[a]) * p[a] / (p[a] - p[b])
            csv_edge = rows[(rows.time == t) & (rows.hemisphere == hemi)].value.iloc[0]
            assert edge == pytest.approx(csv_edge, abs=1e-4), (t, hemi)
            assert edge == pytest.approx(ZEROS[k, 3 if hemi == "NH" else 1], abs=0.05)


def test_streams_batch_by_batch_with_identical_values(moving, tmp_path):
    """One time step per task and per batch: the file is appended batch by batch (memory bounded by a
    batch) and holds the same numbers as one batch."""
    from circtrack import config as C
    from circtrack import zonal_fields

    a, b = tmp_path / "a.nc", tmp_path / "b.nc"
    assert invoke("zonal-means", moving, "-o", a, "-q").exit_code == 0
    cfg = C.load(None)
    cfg["run"].update(time_chunk=1, batch_time_steps=1, scheduler="sync")
    run = zonal_fields.write([moving], str(b), cfg)
    assert len(run.batches) == 3
    da, db = opened(a), opened(b)
    for v in ("ua", "va", "ua_coverage", "psi"):
        np.testing.assert_array_equal(da[v], db[v])


def test_members_and_sectors_are_dimensions(tmp_path):
    ds = make_dataset(2)
    other = make_dataset(2, cell_zeros=(-60.0, -25.0, 5.0, 33.0, 62.0))
    both = xr.concat([other, ds], dim="member").assign_coords(member=("member", ["r2", "r1"]))
    path = write(both.transpose("time", "member", "plev", "lat", "lon"), tmp_path / "members.nc")
    out = tmp_path / "zm.nc"
    r = invoke("zonal-means", path, "-o", out, "-q", "--sector", "west=0:30")
    assert r.exit_code == 0, r.output
    z = opened(out)
    assert z.psi.dims == ("time", "member", "sector", "plev", "lat")
    assert list(z.sector.values) == ["zonal", "west"] and list(z.member.values) == ["r2", "r1"]
    plain = tmp_path / "plain.nc"
    assert invoke("zonal-means", path, "-o", plain, "-q").exit_code == 0
    np.testing.assert_array_equal(opened(plain).psi, z.psi.sel(sector="zonal"))
    # a twelfth of the circle of a zonal wave-3 pattern: the zonal mean plus a nonzero wave part
    assert np.abs(z.ua.sel(sector="west") - z.ua.sel(sector="zonal")).max() > 0.1


def test_failures_leave_the_previous_file(moving, tmp_path):
    out = tmp_path / "zm.nc"
    assert invoke("zonal-means", moving, "-o", out, "-q").exit_code == 0
    before = out.read_bytes()
    junk = tmp_path / "junk.nc"
    junk.write_bytes(b"not netCDF" * 50)
    r = invoke("zonal-means", moving, junk, "-o", out, "-q")
    assert r.exit_code == 1 and "junk.nc" in r.output and len(r.output.strip().splitlines()) == 1
    assert out.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir() if p.name.endswith(".tmp")] == []
    r = invoke("zonal-means", moving, "-o", tmp_path / "zm.csv")
    assert r.exit_code == 2 and ".nc" in r.output


def test_members_in_files_of_their_own(tmp_path):
    """One member per file (told apart by variant_label, as 'track' does): a 'member' dimension, each
    member's fields those of its own files."""
    paths = {}
    for member, zeros in (("r1i1p1f1", (-60.0, -30.0, 5.0, 28.0, 62.0)), ("r2i1p1f1", (-60.0, -25.0, 5.0, 33.0, 62.0))):
        ds = make_dataset(2, cell_zeros=zeros)
        ds.attrs["variant_label"] = member
        paths[member] = write(ds, tmp_path / f"va_{member}.nc")
    out = tmp_path / "zm.nc"
    r = invoke("zonal-means", *paths.values(), "-o", out, "-q")
    assert r.exit_code == 0, r.output
    z = opened(out)
    assert z.psi.dims == ("time", "member", "plev", "lat") and list(z.member.values) == list(paths)
    for member, path in paths.items():
        one = tmp_path / f"{member}.nc"
        assert invoke("zonal-means", path, "-o", one, "-q").exit_code == 0
        np.testing.assert_array_equal(opened(one).psi, z.psi.sel(member=member))
        np.testing.assert_array_equal(opened(one).ua, z.ua.sel(member=member))
    assert "va_r2i1p1f1.nc" in z.attrs["input_files"]


def test_surface_fields_and_one_variable_per_file(tmp_path):
    """A field without levels (sea-level pressure, here in Pa) is written (time, lat) in the units the
    readers convert to (hPa); files of one variable each are joined as for 'track'."""
    ds = make_dataset(2)
    psl = 101325.0 + 1000.0 * np.cos(np.deg2rad(LAT))
    ds["psl"] = xr.DataArray(np.broadcast_to(psl[None, :, None], (2, LAT.size, LON.size)).astype("float32"),
                             dims=("time", "lat", "lon"),
                             attrs={"standard_name": "air_pressure_at_mean_sea_level", "units": "Pa"})
    (tmp_path / "d").mkdir()
    write(ds[["ua", "psl"]], tmp_path / "d" / "ua_Amon_X_2000.nc")
    write(ds[["va"]], tmp_path / "d" / "va_Amon_X_2000.nc")
    out = tmp_path / "zm.nc"
    r = invoke("zonal-means", tmp_path / "d", "-o", out, "-q")
    assert r.exit_code == 0, r.output
    z = opened(out)
    assert z.psl.dims == ("time", "lat") and z.psl.attrs["units"] == "hPa"
    np.testing.assert_allclose(z.psl.isel(time=1), psl.astype(np.float32) / 100.0, rtol=1e-6)
    assert {"ua", "va", "psi", "psl_coverage"} <= set(z.data_vars)


def test_an_input_is_never_the_output(moving, tmp_path):
    import shutil

    copy = tmp_path / "copy.nc"
    shutil.copy(moving, copy)
    before = copy.read_bytes()
    r = invoke("zonal-means", copy, "-o", copy)
    assert r.exit_code == 2 and len(r.output.strip().splitlines()) == 1
    assert copy.read_bytes() == before
