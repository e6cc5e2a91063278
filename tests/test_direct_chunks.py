"""Chunks inflated by circtrack (inputs/chunks.py) give the same arrays as netCDF4/HDF5 reading them,
and anything the module does not handle falls back to the usual read with the same result."""

from __future__ import annotations

import netCDF4
import numpy as np
import pytest

from circtrack import config as C
from circtrack import engine
from circtrack.inputs import chunks as CH
from circtrack.inputs import readers as R
from tests.conftest import csv_rows

pytestmark = pytest.mark.skipif(not CH.available(), reason="the isal package is not installed")
SHAPE = (10, 5, 7, 9)                        # time, level, lat, lon: edge chunks on every axis


def write(path, *, chunks=(4, 2, 7, 4), dtype="f4", data=None, **kw):
    rng = np.random.default_rng(0)
    values = data if data is not None else (rng.standard_normal(SHAPE) * 20 + 5).astype(dtype)
    with netCDF4.Dataset(path, "w") as nc:
        for d, n in zip(("time", "plev", "lat", "lon"), SHAPE):
            nc.createDimension(d, n)
        v = nc.createVariable("ua", dtype, ("time", "plev", "lat", "lon"), chunksizes=chunks, **kw)
        v[:] = values
    return str(path), values


def netcdf4_read(path, index):
    with netCDF4.Dataset(path) as nc:
        var = nc["ua"]
        var.set_auto_maskandscale(False)
        return R._read_hyperslabs(var, list(index))


INDICES = [
    [slice(0, 10), slice(None), slice(None), slice(None)],
    [slice(3, 9), slice(None), slice(None), slice(None)],          # across chunk boundaries, unaligned
    [slice(9, 10), slice(1, 4), slice(2, 5), slice(3, 9)],         # the edge chunks
    [slice(2, 6), 3, slice(None), slice(None)],                    # one level: the axis goes
    [5, [4, 0, 2], slice(None), slice(1, 8)],                      # levels in a given order
    [slice(0, 4), [1, 3], 6, slice(None)],
]


@pytest.mark.parametrize("kw", [dict(zlib=True, shuffle=True, complevel=1), dict(zlib=True, shuffle=False, complevel=9),
                                dict(zlib=True, shuffle=True, complevel=4, dtype="f8")])
def test_inflated_here_equals_hdf5(tmp_path, kw):
    path, _ = write(tmp_path / "a.nc", **kw)
    for index in INDICES:
        got = CH.read(path, "ua", list(index))
        want = netcdf4_read(path, index)
        assert got is not None and got.dtype == want.dtype and got.shape == want.shape, index
        assert np.array_equal(got, want), index
    CH.close_all()


def test_incompressible_chunks_and_nan(tmp_path):
    """Random bytes do not deflate (HDF5 may store such a chunk as it is and say so in its filter
    mask); NaN and infinities pass through unchanged."""
    rng = np.random.default_rng(1)
    data = rng.integers(0, 2 ** 32, size=SHAPE, dtype=np.uint32).view(np.float32)
    data[0, 0, 0, :3] = [np.nan, np.inf, -np.inf]
    path, _ = write(tmp_path / "r.nc", data=data, zlib=True, shuffle=True)
    got = CH.read(path, "ua", [slice(None)] * 4)
    assert np.array_equal(got.view(np.uint32), data.view(np.uint32))     # bit for bit, NaN payloads too
    CH.close_all()


STORED = [dict(zlib=False), dict(contiguous=True, chunks=None), dict(zlib=False, chunks=(1, 1, 7, 9)),
          dict(zlib=False, chunks=(3, 5, 7, 9), dtype="f8"), dict(zlib=False, chunks=(10, 1, 7, 9))]


@pytest.mark.parametrize("runs", [True, False])
@pytest.mark.parametrize("kw", STORED)
def test_unfiltered_values_read_by_offset_equal_hdf5(tmp_path, monkeypatch, kw, runs):
    """Uncompressed chunks and contiguous storage, read by byte offsets: straight into the output
    where the part is whole rows (``runs``; the threshold lowered so these small fields take that
    path) or through a chunk buffer; every index equals netCDF4's read."""
    monkeypatch.setattr(CH, "MIN_RUN_BYTES", 0 if runs else 10 ** 9)
    sizes = []
    real = CH.os.preadv
    monkeypatch.setattr(CH.os, "preadv", lambda fd, views, pos: sizes.append(sum(v.nbytes for v in views))
                        or real(fd, views, pos))
    path, _ = write(tmp_path / "s.nc", **kw)
    assert CH.layout(path, "ua") is not None and CH.layout(path, "ua").filters == []
    for index in INDICES + [[slice(1, 9), slice(None), slice(None), slice(None)]]:
        got = CH.read(path, "ua", list(index))
        want = netcdf4_read(path, index)
        assert got is not None and got.dtype == want.dtype and got.shape == want.shape, index
        assert np.array_equal(got, want), index
    whole = int(np.prod(CH.layout(path, "ua").chunks)) * np.dtype(kw.get("dtype", "f4")).itemsize
    assert sizes and any(n != whole for n in sizes) == runs   # only parts of chunks: runs into the output
    CH.close_all()


def test_a_truncated_unfiltered_file_falls_back(tmp_path):
    """A file cut short: the read by offsets meets the end of the file and gives None, so the usual
    read (and its error naming the file) takes over."""
    path, _ = write(tmp_path / "t.nc", zlib=False, chunks=(10, 5, 7, 9))
    import h5py
    with h5py.File(path, "r") as f:
        info = f["ua"].id.get_chunk_info(0)
    with open(path, "r+b") as fh:
        fh.truncate(info.byte_offset + info.size // 2)
    try:
        got = CH.read(path, "ua", [slice(None)] * 4)
    except OSError:                                   # h5py itself may refuse the cut file
        got = None
    assert got is None
    CH.close_all()


@pytest.mark.parametrize("kw", [dict(zlib=True, fletcher32=True), dict(zlib=True, endian="big", dtype=">f4"),
                                dict(zlib=False, endian="big", dtype=">f4"), dict(zlib=False, fletcher32=True)])
def test_other_storage_is_left_to_hdf5(tmp_path, kw):
    path, _ = write(tmp_path / "o.nc", **kw)
    assert CH.layout(path, "ua") is None
    assert CH.read(path, "ua", [slice(None)] * 4) is None
    CH.close_all()


def test_a_chunk_never_written_falls_back_to_the_usual_read(tmp_path):
    path = str(tmp_path / "part.nc")
    with netCDF4.Dataset(path, "w") as nc:
        for d, n in zip(("time", "plev", "lat", "lon"), SHAPE):
            nc.createDimension(d, n)
        v = nc.createVariable("ua", "f4", ("time", "plev", "lat", "lon"), chunksizes=(4, 2, 7, 4), zlib=True,
                              fill_value=-999.0)
        v[0:4] = np.ones((4,) + SHAPE[1:], np.float32)          # the later time chunks are never written
    assert CH.read(path, "ua", [slice(0, 4), slice(None), slice(None), slice(None)]) is not None
    assert CH.read(path, "ua", [slice(2, 8), slice(None), slice(None), slice(None)]) is None
    with netCDF4.Dataset(path) as nc:
        nc.set_auto_maskandscale(False)
        index = [slice(2, 8), slice(None), slice(None), slice(None)]
        arr = R._read_direct(nc, "ua", list(index))
        assert arr is None
        assert np.array_equal(R._read_hyperslabs(nc["ua"], index)[2:], np.full((4,) + SHAPE[1:], -999.0, np.float32))
    CH.close_all()


def test_rows_identical_with_and_without_inflating_here(tmp_path, monkeypatch):
    from circtrack import synthetic

    lat = np.arange(-90.0, 90.1, 3.0)
    lon = np.arange(0.0, 360.0, 6.0)
    ds = synthetic.dataset(lat, lon, [1000.0, 850.0, 700.0, 500.0, 300.0, 200.0, 100.0],
                           synthetic.monthly_times(2001, 2, "standard"))
    path = tmp_path / "z.nc"
    enc = {v: {"zlib": True, "shuffle": True, "complevel": 1, "chunksizes": (3, 1, lat.size, lon.size)}
           for v in ("ua", "va")}
    ds.to_netcdf(path, encoding=enc)
    cfg = C.load(None)
    cfg["run"]["scheduler"] = "sync"
    calls = []
    real = CH.read

    def counted(*a):
        out = real(*a)
        calls.append(out is not None)
        return out

    monkeypatch.setattr(CH, "read", counted)
    here = csv_rows(engine.track([str(path)], cfg, label="x"))
    assert calls and all(calls)                     # the chunks were inflated here
    CH.close_all()
    calls.clear()
    monkeypatch.setattr(CH, "_inflate_lib", None)
    assert csv_rows(engine.track([str(path)], cfg, label="x")) == here
    assert calls and not any(calls)                 # HDF5 inflated them this time
    CH.close_all()


@pytest.mark.parametrize("storage", [dict(chunksizes=(3, 1, 61, 60)), dict(contiguous=True)])
def test_rows_identical_with_and_without_reading_by_offset(tmp_path, monkeypatch, storage):
    """Uncompressed files: the rows of a run reading by byte offsets equal those of netCDF4's read."""
    from circtrack import synthetic

    lat = np.arange(-90.0, 90.1, 3.0)
    lon = np.arange(0.0, 360.0, 6.0)
    ds = synthetic.dataset(lat, lon, [1000.0, 850.0, 700.0, 500.0, 300.0, 200.0, 100.0],
                           synthetic.monthly_times(2001, 2, "standard"))
    path = tmp_path / "u.nc"
    ds.to_netcdf(path, encoding={v: dict(storage) for v in ("ua", "va")})
    cfg = C.load(None)
    cfg["run"]["scheduler"] = "sync"
    calls = []
    real = CH.read
    monkeypatch.setattr(CH, "read", lambda *a: calls.append(real(*a) is not None) or real(*a))
    here = csv_rows(engine.track([str(path)], cfg, label="x"))
    assert calls and all(calls)
    CH.close_all()
    monkeypatch.setattr(CH, "read", lambda *a: None)
    assert csv_rows(engine.track([str(path)], cfg, label="x")) == here
