"""circtrack/inputs/remote.py against a local S3-compatible server (fixtures in conftest.py):
locating, opening in byte ranges, identity records, errors, public buckets and HTTP."""

from __future__ import annotations

import os
import sys

import numpy as np
import pytest
import xarray as xr

from circtrack.errors import InputError
from circtrack.inputs import remote as R
from circtrack.inputs.files import SUFFIXES

from .conftest import BUCKET, cfg


# --------------------------------------------------------------------------- locating
def test_prefix_is_searched_like_a_directory(aws):
    got = R.expand_url(f"s3://{BUCKET}/", cfg(), SUFFIXES)
    assert got == [f"s3://{BUCKET}/other/classic.nc", f"s3://{BUCKET}/reanalysis/daily/uv_00.nc",
                   f"s3://{BUCKET}/reanalysis/daily/uv_01.nc", f"s3://{BUCKET}/reanalysis/daily/uv_02.nc",
                   f"s3://{BUCKET}/stores/uv.zarr"]
    # without the trailing slash a prefix that is no object is a directory too; README.txt is no data
    assert R.expand_url(f"s3://{BUCKET}/reanalysis", cfg(), SUFFIXES) == got[1:4]


def test_glob_single_object_and_store(aws):
    assert R.expand_url(f"s3://{BUCKET}/reanalysis/daily/uv_0[12].nc", cfg(), SUFFIXES) == \
        [f"s3://{BUCKET}/reanalysis/daily/uv_01.nc", f"s3://{BUCKET}/reanalysis/daily/uv_02.nc"]
    assert R.expand_url(f"s3://{BUCKET}/*/*/*.nc", cfg(), SUFFIXES) == [f"s3://{BUCKET}/reanalysis/daily/uv_0{k}.nc"
                                                               for k in range(3)]
    one = f"s3://{BUCKET}/reanalysis/daily/uv_01.nc"
    assert R.expand_url(one, cfg(), SUFFIXES) == [one]
    assert R.expand_url(f"s3://{BUCKET}/stores/uv.zarr/", cfg(), SUFFIXES) == [f"s3://{BUCKET}/stores/uv.zarr"]


@pytest.mark.parametrize("url, words", [
    ("s3://no-such-bucket-here/data/", ["bucket 'no-such-bucket-here' does not exist", "127.0.0.1"]),
    ("s3://no-such-bucket-here/data/x.nc", ["bucket 'no-such-bucket-here' does not exist"]),
    (f"s3://{BUCKET}/reanalysis/monthly/", ["no such object or prefix", BUCKET]),
    (f"s3://{BUCKET}/reanalysis/daily/uv_99.nc", ["no such object or prefix"]),
    (f"s3://{BUCKET}/reanalysis/daily/*.grib", ["matches no netCDF file or Zarr store"]),
    (f"s3://{BUCKET}/stores/missing.zarr", ["no such Zarr store"]),
])
def test_missing_bucket_key_and_pattern(aws, url, words):
    with pytest.raises(InputError) as e:
        R.expand_url(url, cfg(), SUFFIXES)
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith(url)
    for w in words:
        assert w in msg


def test_wrong_credentials_one_line(aws, monkeypatch):
    import fsspec

    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "not-the-secret")
    fsspec.filesystem("s3").clear_instance_cache()       # a new filesystem picks up the environment
    try:
        with pytest.raises(InputError) as e:
            R.expand_url(f"s3://{BUCKET}/reanalysis/", cfg(), SUFFIXES)
    finally:
        fsspec.filesystem("s3").clear_instance_cache()
    assert "access denied" in str(e.value) and "AWS_SECRET_ACCESS_KEY" in str(e.value)
    assert "\n" not in str(e.value)


def test_missing_extra_names_the_install_command(monkeypatch):
    monkeypatch.setitem(sys.modules, "s3fs", None)       # import s3fs now raises ImportError
    with pytest.raises(InputError) as e:
        R.expand_url(f"s3://{BUCKET}/reanalysis/", cfg(), SUFFIXES)
    assert "pip install 'circtrack[cloud]'" in str(e.value)


# --------------------------------------------------------------------------- reading
def _open(url, c):
    target, engine, kw, close = R.open_target(url, c)
    ds = xr.open_dataset(target, engine=engine, chunks=None, cache=False, decode_times=False, **kw)
    return ds, close


def test_netcdf_object_reads_the_same_values_in_byte_ranges(aws, local_data):
    url = f"s3://{BUCKET}/reanalysis/daily/uv_01.nc"
    target, engine, kw, close = R.open_target(url, cfg(block_bytes=16384, cached_blocks=4))
    assert engine == "h5netcdf"
    ds = xr.open_dataset(target, engine=engine, chunks=None, cache=False, decode_times=False, **kw)
    try:
        ds["ua"][0, 0].values                               # one time step of one level
        size = local_data["files"][1].stat().st_size
        assert 0 < target.cache.total_requested_bytes < size / 2     # byte ranges, not the whole object
        assert target.cache.maxblocks == 4 and target.blocksize == 16384
        with xr.open_dataset(local_data["files"][1], engine="netcdf4", decode_times=False) as ref:
            for v in ("ua", "va", "time", "lat"):
                np.testing.assert_array_equal(ds[v].values, ref[v].values)
    finally:
        ds.close()
        close()


def test_zarr_store_opens_natively(aws, local_data):
    ds, close = _open(f"s3://{BUCKET}/stores/uv.zarr", cfg())
    with xr.open_zarr(local_data["store"], decode_times=False) as ref:
        np.testing.assert_array_equal(ds["ua"].values, ref["ua"].values)
    ds.close()


def test_classic_netcdf_needs_a_local_copy(aws, local_data, tmp_path):
    url = f"s3://{BUCKET}/other/classic.nc"
    with pytest.raises(InputError, match="--cache-dir"):
        R.open_target(url, cfg())
    cache = tmp_path / "cache"
    c = cfg(cache_dir=str(cache))
    path, engine, _, _ = R.open_target(url, c)
    assert os.path.dirname(path) == str(cache) and engine is None      # opened like a local file
    assert open(path, "rb").read() == local_data["classic"].read_bytes()
    assert R.open_target(url, c)[0] == path                 # the copy is reused
    assert [p for p in os.listdir(cache) if p.endswith(".tmp")] == []


def test_object_record_changes_with_the_object(aws, local_data, tmp_path):
    key = "scratch/grow.nc"
    url = f"s3://{BUCKET}/{key}"
    aws.put(BUCKET, key, local_data["files"][0])
    try:
        a = R.object_record(url, cfg())
        assert a["size"] == local_data["files"][0].stat().st_size and a["etag"]
        assert R.object_record(url, cfg()) == a
        aws.put(BUCKET, key, local_data["files"][1])
        assert R.object_record(url, cfg()) != a
        store = R.object_record(f"s3://{BUCKET}/stores/uv.zarr", cfg())
        assert store["size"] > 0 and len(store["etag"]) == 64
    finally:
        aws.client.delete_object(Bucket=BUCKET, Key=key)


# --------------------------------------------------------------------------- public buckets, HTTP
def test_anonymous_reads_a_public_bucket(open_s3, monkeypatch):
    for k in [k for k in os.environ if k.startswith("AWS_")]:
        monkeypatch.delenv(k)
    c = cfg(anonymous=True, endpoint_url=open_s3.endpoint)
    before = open_s3.listing(BUCKET)
    assert R.expand_url(f"s3://{BUCKET}/reanalysis/", c, SUFFIXES) == [f"s3://{BUCKET}/reanalysis/daily/uv_0{k}.nc"
                                                             for k in range(3)]
    ds, close = _open(f"s3://{BUCKET}/reanalysis/daily/uv_00.nc", c)
    assert ds["ua"].shape[0] == 2
    ds.close()
    close()
    assert open_s3.listing(BUCKET) == before


def test_https_file_and_zarr_store(open_s3, local_data):
    base = f"{open_s3.endpoint}/{BUCKET}"
    url = f"{base}/reanalysis/daily/uv_02.nc"
    assert R.expand_url(url, cfg(), SUFFIXES) == [url]
    ds, close = _open(url, cfg())
    with xr.open_dataset(local_data["files"][2], engine="netcdf4", decode_times=False) as ref:
        np.testing.assert_array_equal(ds["va"].values, ref["va"].values)
    ds.close()
    close()
    rec = R.object_record(url, cfg())
    assert rec["size"] == local_data["files"][2].stat().st_size and rec["etag"]
    ds, close = _open(f"{base}/stores/uv.zarr", cfg())
    assert ds["ua"].shape[0] == 12
    ds.close()
    with pytest.raises(InputError, match="HTTP 404"):
        R.expand_url(f"{base}/reanalysis/daily/uv_77.nc", cfg(), SUFFIXES)
    with pytest.raises(InputError, match="no listing"):
        R.expand_url(f"{base}/reanalysis/daily/*.nc", cfg(), SUFFIXES)


def test_closing_frees_the_cached_blocks_at_once(aws):
    """The block cache is freed when the object is closed, not when the cyclic garbage collector
    runs (a worker reading many objects grew by one cache per object before)."""
    import gc
    import weakref

    target, engine, kw, close = R.open_target(f"s3://{BUCKET}/reanalysis/daily/uv_00.nc", cfg(block_bytes=65536))
    target.read(200000)
    cache = target.cache
    assert cache._fetch_block_cached.cache_info().currsize > 0
    ref = weakref.ref(cache)
    del cache
    gc.disable()
    try:
        close()
        assert target.closed and (ref() is None or ref()._fetch_block_cached.cache_info().currsize == 0)
    finally:
        gc.enable()
