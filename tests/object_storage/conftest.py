"""Fixtures of the object-storage tests: a local S3-compatible server holding a test bucket.

The server is moto's server mode on 127.0.0.1 (server.py). ``s3`` checks signatures, so wrong
credentials are refused as by a real service; ``open_s3`` serves unsigned requests (a public
bucket, plain HTTP GETs). ``aws`` sets the AWS environment for ``s3`` and checks afterwards that
nothing was written into the bucket.
"""

from __future__ import annotations

import os

import pytest

pytest.importorskip("s3fs")
pytest.importorskip("moto")

from circtrack import config as C  # noqa: E402
from circtrack import synthetic  # noqa: E402

from ..conftest import CALENDAR, LAT, LON, PLEV  # noqa: E402
from .server import LocalS3  # noqa: E402

BUCKET = "circ-test-data"


def month_file(path, k, nt=2):
    """File k holds months k*nt .. k*nt+nt-1 counted from January 2000 (noleap)."""
    times = synthetic.monthly_times(2000, 10, CALENDAR)[k * nt:(k + 1) * nt]
    ds = synthetic.dataset(LAT, LON, PLEV, times, edge_nh=30.0 + k)
    path.parent.mkdir(parents=True, exist_ok=True)
    packed = {"zlib": True, "complevel": 1, "chunksizes": (1, 1, LAT.size, LON.size)}   # one level per chunk
    ds.to_netcdf(str(path), encoding={**synthetic.time_encoding(CALENDAR), "ua": packed, "va": packed})
    return path


@pytest.fixture(scope="session")
def local_data(tmp_path_factory):
    """Three netCDF4 files, a netCDF classic file and a Zarr store on disk (named as in the bucket, so
    the derived ``source`` column is the same)."""
    d = tmp_path_factory.mktemp("objects")
    files = [month_file(d / "reanalysis" / "daily" / f"uv_{k:02d}.nc", k) for k in range(3)]
    classic = d / "classic.nc"
    synthetic.dataset(LAT, LON, PLEV, synthetic.monthly_times(2000, 1, CALENDAR)[:1]).to_netcdf(
        str(classic), format="NETCDF3_64BIT", encoding=synthetic.time_encoding(CALENDAR))
    store = d / "stores" / "uv.zarr"
    synthetic.dataset(LAT, LON, PLEV, synthetic.monthly_times(2000, 1, CALENDAR)).to_zarr(
        str(store), encoding=synthetic.time_encoding(CALENDAR), mode="w", zarr_format=2)
    return {"files": files, "classic": classic, "store": store}


def _fill(server, data):
    server.make_bucket(BUCKET)
    for f in data["files"]:
        server.put(BUCKET, f"reanalysis/daily/{f.name}", f)
    server.put(BUCKET, "reanalysis/daily/README.txt", data["classic"])
    server.put(BUCKET, "other/classic.nc", data["classic"])
    server.put_tree(BUCKET, "stores/uv.zarr", data["store"])
    return server


@pytest.fixture(scope="session")
def s3(local_data):
    """A signing server (wrong credentials refused) holding the test bucket."""
    server = LocalS3(auth=True)
    try:
        yield _fill(server, local_data)
    finally:
        server.stop()


@pytest.fixture(scope="session")
def open_s3(local_data):
    """A server that serves unsigned requests too (public bucket, plain HTTP GETs)."""
    server = LocalS3(auth=False)
    try:
        yield _fill(server, local_data)
    finally:
        server.stop()


@pytest.fixture
def aws(s3, monkeypatch):
    for k in [k for k in os.environ if k.startswith("AWS_")]:
        monkeypatch.delenv(k)
    for k, v in s3.env().items():
        monkeypatch.setenv(k, v)
    before = s3.listing(BUCKET)
    yield s3
    assert s3.listing(BUCKET) == before          # nothing written into the bucket


def cfg(**storage):
    c = C.load(None)
    c["storage"] = {**c.get("storage", {}), **storage}
    return c


@pytest.fixture
def open_aws(open_s3, monkeypatch):
    """The AWS environment for the server that takes presigned URLs (moto's signing server answers
    them with HTTP 500: there the direct path steps aside, which the other tests go through)."""
    from circtrack.inputs import presigned as P

    for k in [k for k in os.environ if k.startswith("AWS_")]:
        monkeypatch.delenv(k)
    for k, v in open_s3.env().items():
        monkeypatch.setenv(k, v)
    P._DIRECT.clear()
    P._SIGNED.clear()
    yield open_s3
    P._DIRECT.clear()
    P._SIGNED.clear()
