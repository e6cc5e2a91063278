"""circtrack/inputs/presigned.py: one presigned URL per object, kept with its size by the process
that opened it first (the parent, while planning) for the worker processes forked from it, which
then read the object (metadata and chunks) without an s3fs session of their own; any failure goes
back to s3fs."""

from __future__ import annotations

import os

import netCDF4
import numpy as np
import pytest

from circtrack.inputs import presigned as P
from circtrack.inputs import remote as R

from .conftest import BUCKET, cfg

URL = f"s3://{BUCKET}/reanalysis/daily/uv_01.nc"


def _remembered(url):
    """Open ``url`` as planning does (open_target: s3fs, then the URL kept) and close it again."""
    target, _engine, _kw, close = R.open_target(url, R.for_metadata(cfg()))
    close()
    fs, path = R.filesystem(url, cfg())
    return fs, path


def _no_sessions(monkeypatch):
    """From now on, building or using an s3fs session fails the test (a worker that needs none)."""
    import s3fs

    def refuse(*a, **k):
        raise AssertionError("an s3fs session was asked for")

    monkeypatch.setattr(s3fs.S3FileSystem, "set_session", refuse)
    monkeypatch.setattr(s3fs.S3FileSystem, "_call_s3", refuse)


def test_planning_keeps_one_url_and_the_size_per_object(open_aws, local_data):
    fs, path = _remembered(URL)
    (ident, (parts, expires, size)), = P._SIGNED.items()
    assert ident[2:4] == (BUCKET, "reanalysis/daily/uv_01.nc")
    assert size == local_data["files"][1].stat().st_size and "Signature" in parts.query
    _remembered(URL)
    assert len(P._SIGNED) == 1 and P._SIGNED[ident][0] is parts        # kept, not signed again


def test_direct_file_reads_the_bytes_of_the_object(open_aws, local_data, monkeypatch):
    """Blocks fetched by direct GETs give the object's bytes: reads inside a block, across blocks,
    at the end, past the end; the least recently used blocks are dropped."""
    fs, path = _remembered(URL)
    blob = local_data["files"][1].read_bytes()
    _no_sessions(monkeypatch)
    got = []
    real = P._get_into
    monkeypatch.setattr(P, "_get_into", lambda st, parts, start, out: got.append((start, len(out))) or
                        real(st, parts, start, out))
    f = P.open_direct(fs, path, 1000, 2, fallback=lambda: pytest.fail("no fallback expected"))
    assert f.size == len(blob)
    for start, n in [(0, 8), (10, 100), (990, 30), (2500, 2600), (len(blob) - 7, 7), (len(blob) - 3, 50)]:
        f.seek(start)
        assert f.read(n) == blob[start:start + n] and f.tell() == min(start + n, len(blob))
    f.seek(-5, 2)
    assert f.read() == blob[-5:]
    assert len(f._blocks) <= 2
    assert got[:2] == [(0, 1000), (1000, 1000)]          # the block of byte 0 served 0..8 and 10..110
    f.close()


def test_a_worker_reads_without_an_s3fs_session(open_aws, local_data, monkeypatch):
    """A process that inherited the kept URL and size (here: this one, its s3fs sessions refused)
    reads metadata and chunks by direct GETs; the values equal a local read."""
    _remembered(URL)
    R.filesystem(URL, cfg())[0].clear_instance_cache()      # as in a forked worker: a new filesystem
    _no_sessions(monkeypatch)
    raw = R.open_raw(URL, cfg())
    try:
        assert isinstance(raw._rfile._f, P.DirectFile)
        with netCDF4.Dataset(local_data["files"][1]) as nc:
            index = [slice(0, 2), slice(None), slice(None), slice(None)]
            for name in ("ua", "va"):
                raw.prefetch(name, index)
            for name in ("ua", "va"):
                got = raw.read_direct(name, list(index))
                if got is None:                              # no isal: through HDF5 on the same bytes
                    got = raw.variables[name][tuple(index)]
                ref = nc[name]
                ref.set_auto_maskandscale(False)
                np.testing.assert_array_equal(got, ref[tuple(index)])
    finally:
        raw.close()
    assert not P._DIRECT[os.getpid()]["off"]


def test_a_failing_direct_read_falls_back_to_s3fs(open_aws, local_data, monkeypatch):
    """A direct GET that fails (here: refused) hands the object to s3fs: the reads still give its
    bytes, the URL is dropped and the host goes through s3fs for the process."""
    fs, path = _remembered(URL)
    blob = local_data["files"][1].read_bytes()
    opened = []

    def broken(st, parts, start, out, progress=None):
        out[:3] = b"bad"                      # a partial answer must not survive
        raise P._Fallback("HTTP 403")

    def fallback():
        opened.append(True)
        return fs.open(path, "rb")

    monkeypatch.setattr(P, "_get_into", broken)
    f = P.open_direct(fs, path, 1000, 2, fallback)
    f.seek(500)
    assert f.read(2000) == blob[500:2500] and f.read(10) == blob[2500:2510]
    assert opened == [True] and not P._SIGNED and P._DIRECT[os.getpid()]["off"]
    assert P.open_direct(fs, path, 1000, 2, fallback) is None        # nothing kept: s3fs from the start
    f.close()


def test_a_url_about_to_expire_is_not_used(open_aws, local_data, monkeypatch):
    """A kept URL with less than REUSE_MARGIN_S to run: objects open through s3fs, chunk reads sign
    a new URL (the host stays on the direct path)."""
    fs, path = _remembered(URL)
    ident = next(iter(P._SIGNED))
    P._SIGNED[ident][1] = P.time.time() + P.REUSE_MARGIN_S / 2
    assert P.open_direct(fs, path, 1000, 2, lambda: None) is None
    raw = R.open_raw(URL, cfg())
    try:
        assert not isinstance(raw._rfile._f, P.DirectFile)
        raw.variables["ua"][0, 0, :, :]
    finally:
        raw.close()
    assert P._SIGNED[ident][1] > P.time.time() + P.REUSE_MARGIN_S       # signed again, for the next hour
    assert not P._DIRECT[os.getpid()]["off"]


def test_a_kept_url_of_a_missing_object_gives_the_usual_line(open_aws, local_data):
    """An object deleted after planning: the direct read fails, s3fs says what is wrong (one line)."""
    from circtrack.errors import InputError

    key = "scratch/gone.nc"
    open_aws.put(BUCKET, key, local_data["files"][0])
    url = f"s3://{BUCKET}/{key}"
    try:
        _remembered(url)
    finally:
        open_aws.client.delete_object(Bucket=BUCKET, Key=key)
    R.filesystem(url, cfg())[0].invalidate_cache()
    assert R.open_raw(url, cfg()) is None                  # open_dataset then gives the line
    with pytest.raises(InputError, match="no such object"):
        R.open_target(url, cfg())
