"""circtrack/inputs/ranges.py: the HDF5 chunks of a read fetched at once, in concurrent range
requests, and decoded from memory (values identical to a local read). Local files and the local
S3 server of conftest.py."""

from __future__ import annotations

import os
import time
import zlib

import h5py
import netCDF4
import numpy as np
import pytest

from circtrack.inputs import presigned as P
from circtrack.inputs import ranges as G
from circtrack.inputs import remote as R

from .conftest import BUCKET, cfg


# --------------------------------------------------------------------------- pure helpers
def test_merge_ranges_joins_neighbours_within_the_gap():
    got = G.merge_ranges([(100, 50), (0, 10), (10, 20), (201, 10)], gap=50)
    assert got == [(0, 30), (100, 150), (201, 211)]    # 70 and 51 bytes apart: kept apart
    assert G.merge_ranges([(0, 10), (60, 10)], gap=50) == [(0, 70)]   # 50 bytes apart: one run
    assert G.merge_ranges([], gap=10) == []


def test_split_run_into_equal_pieces_covering_the_run():
    pieces = G.split_run((10, 110), 30)
    assert pieces == [(10, 35), (35, 60), (60, 85), (85, 110)]     # 4 pieces of 25, none over 30
    assert G.split_run((0, 5), 100) == [(0, 5)]


# --------------------------------------------------------------------------- chunk ranges
@pytest.fixture(scope="module")
def chunked(tmp_path_factory):
    """A deflate + shuffle variable in (2, 1, 5, 7) chunks, written by netCDF4, and its values."""
    path = tmp_path_factory.mktemp("ranges") / "c.nc"
    vals = np.arange(6 * 3 * 5 * 7, dtype=np.float32).reshape(6, 3, 5, 7) * 0.5
    with netCDF4.Dataset(path, "w") as nc:
        for d, n in zip(("time", "plev", "lat", "lon"), vals.shape):
            nc.createDimension(d, n)
        v = nc.createVariable("ua", "f4", ("time", "plev", "lat", "lon"), zlib=True, complevel=1, shuffle=True,
                              chunksizes=(2, 1, 5, 7))
        v[:] = vals
        w = nc.createVariable("plain", "f8", ("time", "lat"), contiguous=True)
        w[:] = np.arange(30, dtype=float).reshape(6, 5)
    return path, vals


def _decode(raw, shape, dtype):
    """A deflate + shuffle chunk decoded by hand (zlib from the standard library, the byte shuffle
    undone with numpy): a decoder independent of HDF5's."""
    data = np.frombuffer(zlib.decompress(raw), dtype=np.uint8)
    size = np.dtype(dtype).itemsize
    return data.reshape(size, -1).T.copy().view(dtype).reshape(shape)


def test_chunk_ranges_are_the_chunks_of_the_hyperslab(chunked):
    path, vals = chunked
    blob = path.read_bytes()
    with h5py.File(path, "r") as h:
        ds = h["ua"]
        got = G.chunk_ranges(ds, (slice(1, 4), slice(0, 2), slice(None), slice(None)))
        # time 1..3 lies in chunks 0 and 1 (of 2 steps), levels 0..1 in chunks 0 and 1: 4 chunks
        assert len(got) == 4
        # every range decodes to the values of its chunk
        starts = sorted((ds.id.get_chunk_info_by_coord((t, k, 0, 0)).byte_offset, (t, k))
                        for t in (0, 2) for k in (0, 1))
        for (off, size), (start, (t, k)) in zip(sorted(got), starts):
            assert off == start
            np.testing.assert_array_equal(_decode(blob[off:off + size], (2, 1, 5, 7), "<f4"), vals[t:t + 2, k:k + 1])
        assert len(G.chunk_ranges(ds, (5, [2, 0], 3, slice(None)))) == 2          # an index list: its levels only
        assert G.chunk_ranges(ds, (slice(3, 3),)) == []                           # nothing selected
        (off, size), = G.chunk_ranges(h["plain"], (slice(2, 4), slice(None)))     # contiguous: one span
        np.testing.assert_array_equal(np.frombuffer(blob[off:off + size], "<f8"), np.arange(10, 20, dtype=float))


# --------------------------------------------------------------------------- reading objects
def test_reads_fetch_their_chunks_at_once_and_equal_a_local_read(aws, local_data):
    url = f"s3://{BUCKET}/reanalysis/daily/uv_02.nc"
    raw = R.open_raw(url, cfg(request_bytes=8192))
    try:
        with netCDF4.Dataset(local_data["files"][2]) as nc:
            index = (slice(0, 2), slice(None), slice(None), slice(None))
            raw.prefetch("ua", list(index))
            raw.prefetch("va", list(index))
            assert len(raw._rfile._pending) == 2                # both started before either is read
            before = raw.requests
            for name in ("ua", "va"):
                ref = nc[name]
                ref.set_auto_maskandscale(False)
                np.testing.assert_array_equal(raw.variables[name][index], ref[index])
            ranges = G.chunk_ranges(raw._nc.variables["ua"]._h5ds, index)
            run = sum(b - a for a, b in G.merge_ranges(ranges, G.MERGE_GAP))
            # one variable: its chunks merged into runs, each in pieces of at most 8 KiB
            assert raw.requests - before <= 2 * (-(-run // 8192) + len(ranges))
            assert raw._rfile._data == [] and raw._rfile._pending == []     # nothing kept after the reads
            # a read nobody announced fetches its own chunks; a level chosen by an index list
            ref = nc["va"]
            ref.set_auto_maskandscale(False)
            np.testing.assert_array_equal(raw.variables["va"][1, 3, 2:5], ref[1, 3, 2:5])
    finally:
        raw.close()


def test_track_reads_each_chunk_once(aws, local_data, tmp_path, monkeypatch):
    """The fast path: every byte of the two variables is fetched once, not block by block."""
    calls = []
    real = G.RangeFile._install

    def counting(self, runs, pieces, bufs, got):
        calls.extend(b - a for a, b in pieces)
        return real(self, runs, pieces, bufs, got)

    monkeypatch.setattr(G.RangeFile, "_install", counting)
    url = f"s3://{BUCKET}/reanalysis/daily/uv_00.nc"
    raw = R.open_raw(url, cfg())
    try:
        for name in ("ua", "va"):
            raw.variables[name][:]
        size = local_data["files"][0].stat().st_size
        with h5py.File(local_data["files"][0], "r") as h:
            stored = sum(h[v].id.get_storage_size() for v in ("ua", "va"))
        assert stored <= sum(calls) < size               # the chunks (and small gaps), never the whole object twice
        assert len(calls) <= 4                           # a run per variable, in pieces of 16 MiB
    finally:
        raw.close()


def test_direct_read_inflates_fetched_chunks_as_on_disk(aws, local_data, monkeypatch):
    """Objects take the same chunk decoder as files on disk (inputs/chunks.py), on chunks fetched at
    once and decoded straight from the fetched buffers."""
    from circtrack.inputs import chunks as CH

    if not CH.available():
        pytest.skip("isal not installed")
    used = []
    real = CH.read_stored

    def spy(*a):
        out = real(*a)
        used.append(out is not None)          # decoded from the fetched buffers, not handed back to HDF5
        return out

    monkeypatch.setattr(CH, "read_stored", spy)
    raw = R.open_raw(f"s3://{BUCKET}/reanalysis/daily/uv_01.nc", cfg())
    try:
        with netCDF4.Dataset(local_data["files"][1]) as nc:
            for name, index in [("ua", [slice(0, 2), slice(None), slice(None), slice(None)]),
                                ("va", [1, [3, 0], slice(2, 9), slice(None)])]:
                raw.prefetch(name, index)
                got = raw.read_direct(name, index)
                ref = nc[name]
                ref.set_auto_maskandscale(False)
                want = np.stack([ref[1, 3, 2:9], ref[1, 0, 2:9]]) if name == "va" else ref[tuple(index)]
                np.testing.assert_array_equal(got, want)
                assert raw._rfile._data == [] and raw._rfile._pending == []
        assert used == [True, True]
    finally:
        raw.close()


@pytest.fixture
def keep_alive_server(local_data):
    """A plain HTTP/1.1 server on 127.0.0.1 that keeps connections alive (as object stores do; moto
    closes each connection after its response), serving the test files."""
    import functools
    import http.server
    import threading

    class Handler(http.server.SimpleHTTPRequestHandler):
        protocol_version = "HTTP/1.1"

        def log_message(self, *args):
            pass

    handler = functools.partial(Handler, directory=str(local_data["files"][0].parent))
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()


@pytest.mark.skipif(not hasattr(os, "fork"), reason="needs fork")
def test_a_forked_child_leaves_the_parents_connections_alone(keep_alive_server):
    """A forked worker that drops the connections it inherited must not take them from the parent.
    They share the kernel's epoll instance: the child took the parent's socket out of it, and the
    parent's next request on that kept-alive connection was never heard (s3fs waited for its 15 s
    read timeout at the end of every run whose workers were forked)."""
    import fsspec.asyn

    url = f"{keep_alive_server}/uv_00.nc"
    fs, _path = R.filesystem(url, cfg())
    fsspec.asyn.sync(fs.loop, fs._info, url, timeout=10)      # a kept-alive connection, in the loop's epoll
    session = fsspec.asyn.sync(fs.loop, fs.set_session)
    assert session.connector._conns
    pid = os.fork()
    if pid == 0:
        try:      # the child drops the pool it inherited, as aiohttp does when its connector goes
            session.connector._close()
        finally:
            os._exit(0)
    os.waitpid(pid, 0)
    t0 = time.perf_counter()
    fsspec.asyn.sync(fs.loop, fs._info, url, timeout=5)      # FSTimeoutError when the answer is never heard
    assert time.perf_counter() - t0 < 5


# --------------------------------------------------------------------------- chunks decoded from fetched buffers
def test_read_stored_decodes_chunks_from_buffers_as_the_disk_path(chunked):
    """chunks.read_stored on the stored bytes of each chunk (taken from the file by their byte
    offsets) gives what netCDF4 reads, in whatever order the chunks are taken; a chunk without stored
    bytes (never written) gives None."""
    from circtrack.inputs import chunks as CH

    if not CH.available():
        pytest.skip("isal not installed")
    path, vals = chunked
    blob = memoryview(bytearray(path.read_bytes()))
    with h5py.File(path, "r") as h:
        ds = h["ua"]
        lay = CH.dataset_layout(ds, {})
        for index in [(slice(1, 4), slice(0, 2), slice(None), slice(None)), (5, [2, 0], 3, slice(None)),
                      (slice(None), 1, slice(1, 4), slice(2, 6))]:
            table = G.chunk_table(ds, index)
            assert sorted((o, s) for o, s, _m in table.values()) == sorted(G.chunk_ranges(ds, index))
            got = CH.read_stored(lay, list(index), lambda off: (table[off][2], blob[table[off][0]:][:table[off][1]]))
            want = vals[index[0], index[1], index[2], index[3]] if not isinstance(index[1], list) \
                else np.stack([vals[5, k, 3, :] for k in index[1]])
            np.testing.assert_array_equal(got, want)
            assert got.dtype == vals.dtype
            seen = []                         # decoded in another order (as their bytes arrive): the same array
            again = CH.read_stored(lay, list(index), lambda off: (table[off][2], blob[table[off][0]:][:table[off][1]]),
                                   order=lambda off: seen.append(off) or -table[off][0])
            np.testing.assert_array_equal(again, want)
            assert len(seen) == len(table)
        assert CH.read_stored(lay, [0, 0, slice(None), slice(None)], lambda off: None) is None
        assert CH.dataset_layout(h["plain"], {}) is None            # contiguous, not compressed: not taken


def test_fetch_buffers_are_reused_and_bounded():
    G._clear_pool()
    a = G._take(1000)
    assert len(a) >= 1000
    G._give(a)
    G._give(bytearray(len(a) * 4))
    assert G._take(800) is a                  # the smallest free buffer that fits
    G._give(a)
    b = G._take(len(a) * 4 + 1)               # none fits: a new one, with room for a slightly larger run
    assert b is not a and len(b) >= (len(a) * 4 + 1) * 17 // 16
    big = bytearray(G.POOL_BYTES)
    G._give(big)
    G._give(bytearray(10))
    assert sum(map(len, G._POOL)) <= G.POOL_BYTES and big not in G._POOL      # the oldest went
    G._clear_pool()


# --------------------------------------------------------------------------- how the bytes are fetched
def _fetch(url, start, n, direct):
    import fsspec.asyn

    fs, path = R.filesystem(url, cfg())
    out = bytearray(n)
    got = fsspec.asyn.sync(fs.loop, G.read_range, fs, path, start, memoryview(out), direct)
    return got, bytes(out)


def test_direct_and_s3fs_fetches_give_the_same_bytes(open_aws, local_data, monkeypatch):
    calls = []
    real = P._get_into
    monkeypatch.setattr(P, "_get_into", lambda *a: calls.append(a[2]) or real(*a))
    url = f"s3://{BUCKET}/reanalysis/daily/uv_01.nc"
    blob = local_data["files"][1].read_bytes()
    for start, n in [(0, 100), (5000, 70_000), (len(blob) - 33, 33)]:
        for direct in (True, False):
            got, data = _fetch(url, start, n, direct)
            assert got == n and data == blob[start:start + n]
    assert calls == [0, 5000, len(blob) - 33] and not P._DIRECT[os.getpid()]["off"]     # direct when asked


def test_reads_through_the_direct_path_equal_a_local_read(open_aws, local_data, monkeypatch):
    calls = []
    real = P._get_into
    monkeypatch.setattr(P, "_get_into", lambda *a: calls.append(len(a[3])) or real(*a))
    raw = R.open_raw(f"s3://{BUCKET}/reanalysis/daily/uv_02.nc", cfg(request_bytes=8192))
    try:
        with netCDF4.Dataset(local_data["files"][2]) as nc:
            index = [slice(0, 2), slice(None), slice(None), slice(None)]
            raw.prefetch("ua", index)
            raw.prefetch("va", index)
            for name in ("ua", "va"):
                ref = nc[name]
                ref.set_auto_maskandscale(False)
                got = raw.read_direct(name, index)
                if got is None:                                   # no isal: through HDF5 on the same bytes
                    got = raw.variables[name][tuple(index)]
                np.testing.assert_array_equal(got, ref[tuple(index)])
    finally:
        raw.close()
    assert calls and max(calls) <= 8192 and not P._DIRECT[os.getpid()]["off"]


def test_a_failing_direct_fetch_falls_back_to_s3fs(open_aws, local_data, monkeypatch):
    url = f"s3://{BUCKET}/reanalysis/daily/uv_00.nc"
    blob = local_data["files"][0].read_bytes()
    tried = []

    def broken(st, parts, start, out, progress=None):
        tried.append(start)
        out[:3] = b"bad"                      # a partial answer must not survive
        raise P._Fallback("refused")

    monkeypatch.setattr(P, "_get_into", broken)
    for start in (10, 2000):
        got, data = _fetch(url, start, 500, True)
        assert data == blob[start:start + 500]
    assert tried == [10]                      # after one failure, that host goes through s3fs only
    assert P._DIRECT[os.getpid()]["off"]


def test_errors_of_the_direct_path_read_as_s3fs_errors(open_aws):
    """A missing object: the direct GET steps aside and s3fs raises its own error."""
    with pytest.raises(FileNotFoundError):
        _fetch(f"s3://{BUCKET}/reanalysis/daily/nope.nc", 0, 10, True)


def test_behind_a_proxy_the_direct_path_steps_aside(monkeypatch):
    from urllib.parse import urlsplit

    monkeypatch.setenv("http_proxy", "http://proxy.example:3128")
    monkeypatch.delenv("no_proxy", raising=False)
    monkeypatch.delenv("NO_PROXY", raising=False)
    assert P._proxied(urlsplit("http://s3.example.org/b/k"))
    monkeypatch.setenv("no_proxy", "s3.example.org")
    assert not P._proxied(urlsplit("http://s3.example.org/b/k"))


def test_a_kept_alive_connection_the_server_closed_is_replaced(open_aws, local_data):
    """A connection kept alive but closed by the server while idle: the next GET opens a new one
    instead of giving the direct path up for the process."""
    url = f"s3://{BUCKET}/reanalysis/daily/uv_01.nc"
    blob = local_data["files"][1].read_bytes()
    _fetch(url, 0, 10, True)
    import http.client
    from urllib.parse import urlsplit

    import socket

    endpoint = urlsplit(open_aws.endpoint)
    stale = http.client.HTTPConnection(endpoint.hostname, endpoint.port)
    ours, theirs = socket.socketpair()
    theirs.close()                           # as if the server had hung up while it waited
    stale.sock = ours
    P._DIRECT[os.getpid()]["conns"][("http", endpoint.netloc)] = [stale]
    got, data = _fetch(url, 100, 1000, True)
    assert data == blob[100:1100] and not P._DIRECT[os.getpid()]["off"]


# --------------------------------------------------------------------------- decoding while the bytes arrive
def test_arriving_bytes_are_given_once_they_are_there():
    """Arriving.view waits until every piece a range touches has received it (pieces fill from
    their start on), and gives None when the fetch ended without them."""
    import threading

    pieces = [(100, 150), (150, 200)]
    buf = bytearray(100)
    progress = G._Progress(pieces)
    arriving = G.Arriving([(100, 200)], [buf], progress)
    assert not progress.wait(140, 160, 0.01)                 # nothing there yet
    buf[:] = bytes(range(100))

    def fill():
        time.sleep(0.05)
        progress.update(0, 50)
        time.sleep(0.05)
        progress.update(1, 20)
        progress.finish()

    t = threading.Thread(target=fill)
    t.start()
    t0 = time.perf_counter()
    got = arriving.view(140, 25)                            # bytes 140..165: all of piece 0, 15 of piece 1
    assert time.perf_counter() - t0 >= 0.09 and bytes(got) == bytes(range(40, 65))
    assert got.readonly
    t.join()
    assert arriving.view(160, 30) is None                   # ended with piece 1 at 20 of 50 bytes
    assert arriving.order(100) == arriving.order(150) < arriving.order(110) < arriving.order(149)  # side by side
    wave = G._Progress([(k * 10, k * 10 + 10) for k in range(G.IN_FLIGHT + 1)])
    later = G.Arriving([(0, 10 * (G.IN_FLIGHT + 1))], [bytearray(10 * (G.IN_FLIGHT + 1))], wave)
    assert later.order(10 * G.IN_FLIGHT) > later.order(9)       # a piece that starts when one of the first ends


def test_a_fetch_failing_while_its_chunks_are_decoded_raises_its_error(open_aws, monkeypatch):
    """A piece that cannot be fetched: the read raises the fetch's error, as when it waited for the
    whole fetch first; the other pieces' bytes are not decoded into a result."""
    raw = R.open_raw(f"s3://{BUCKET}/reanalysis/daily/uv_02.nc", cfg(request_bytes=4096))
    real = G.read_range
    calls = []

    async def failing(fs, path, start, out, direct_http=True, progress=None):
        calls.append(start)
        if len(calls) == 3:
            raise OSError("connection reset by the test")
        return await real(fs, path, start, out, direct_http, progress)

    monkeypatch.setattr(G, "read_range", failing)
    try:
        index = [slice(0, 2), slice(None), slice(None), slice(None)]
        raw.prefetch("ua", index)
        with pytest.raises(OSError, match="reset by the test"):
            raw.read_direct("ua", list(index))
        assert raw._rfile._pending == [] and raw._rfile._data == []
    finally:
        raw.close()
