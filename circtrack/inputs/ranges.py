"""Reading a hyperslab of a netCDF4/HDF5 object in object storage in a few concurrent requests.

In: an fsspec file object of the object (for the reads nobody planned: metadata, coordinates, in
small blocks), its filesystem and path, and per read the h5py dataset and the index being read.
Out: a read-only file object (:class:`RangeFile`) that h5py reads through, and variables
(:class:`PrefetchingVariable`) whose reads are served from memory.

:func:`chunk_ranges` finds the byte ranges of the HDF5 chunks an index touches (h5py's chunk
query, from the chunk index alone: no data read; :func:`chunk_table` also their chunk offsets and
filter masks). :meth:`RangeFile.start` merges neighbouring chunks into runs and starts fetching
each run into a buffer of its own (a per-process pool of reused buffers), in pieces of at most
``request_bytes``, on fsspec's event loop in the background (at most ``IN_FLIGHT`` requests of an
object at once, in the order asked), so a task starts the fetches of all its variables before it
reads the first. A piece is :func:`read_range`: on s3fs a presigned GET on the standard library's
HTTP client received straight into the buffer, else (or when that fails) through s3fs. The read
waits for the runs it needs (:meth:`RangeFile.prefetch`); deflate chunks are decoded by
inputs/chunks.py straight from views of the buffers (:meth:`RangeFile.view`), anything else by
HDF5 reading through this file object (values identical to a local read either way); then the
buffers go back to the pool. Memory: the compressed bytes of one task's reads, never the object.
"""

from __future__ import annotations

import bisect
import io
import itertools
import threading

import numpy as np

from circtrack.inputs.presigned import PROGRESS_STEP, direct_get

MERGE_GAP = 256 * 1024        # chunks closer than this are fetched in one run (the gap is read and dropped)
SETTLE_S = 30.0               # fetches in flight when an object is closed: waited for this long at most
MAX_PENDING = 16              # background fetches kept waiting for their read, at most
IN_FLIGHT = 4                 # requests of one object at once: the first variable's pieces arrive first, and
                              # it is decoded while the next one's arrive
MAX_CHUNKS = 100_000          # more chunks than this in one read: no prefetch (each chunk read as it comes)


class RangeFile(io.RawIOBase):
    """A read-only, seekable file over ``f`` (an fsspec file) that serves reads from prefetched
    extents when one covers them, and from ``f`` otherwise."""

    def __init__(self, f, fs, path, direct_http=True):
        super().__init__()
        self._f, self._fs, self._path = f, fs, path
        self._direct_http = direct_http             # S3 ranges through the standard library's HTTP client
        self._slots = None                          # at most IN_FLIGHT requests at once (on the event loop)
        self._pos = 0
        self._starts, self._data = [], []       # sorted extents: start offset -> bytes (memoryviews)
        self._bufs = []                         # per extent its pool buffer (None: not from the pool)
        self._pending = []                      # background fetches: (runs, pieces, bufs, future, progress)
        self.requests = 0                       # range requests made by prefetch (for tests and profiles)

    # -- the file protocol h5py's file-object driver uses
    def readable(self):
        return True

    def seekable(self):
        return True

    def seek(self, offset, whence=io.SEEK_SET):
        if whence == io.SEEK_SET:
            self._pos = offset
        elif whence == io.SEEK_CUR:
            self._pos += offset
        else:
            self._pos = self._f.size + offset
        return self._pos

    def tell(self):
        return self._pos

    def readinto(self, buf):
        n = len(buf)
        if not self._copy_from_extents(self._pos, buf):
            self._f.seek(self._pos)
            got = self._f.read(n)
            buf[:len(got)] = got
            n = len(got)
        self._pos += n
        return n

    def read(self, n=-1):
        if n is None or n < 0:
            n = max(0, self._f.size - self._pos)
        buf = bytearray(n)
        k = self.readinto(buf)
        return bytes(buf[:k])

    def close(self):
        self.drop()
        try:
            self._f.close()
        finally:
            super().close()

    # -- prefetched extents
    def _covered(self, pos, n):
        """The extents (index range) that hold bytes ``pos .. pos + n`` without a gap, or None."""
        k = bisect.bisect_right(self._starts, pos) - 1
        if k < 0:
            return None
        j, end = k, pos + n
        while self._starts[j] + len(self._data[j]) < end:
            if j + 1 >= len(self._starts) or self._starts[j + 1] != self._starts[j] + len(self._data[j]):
                return None
            j += 1
        return k, j

    def _copy_from_extents(self, pos, buf):
        """Copy bytes ``pos ..`` into ``buf`` from the extents (a read may span adjacent pieces, which
        are kept as fetched: never joined into one copy); False when they do not hold them all."""
        n = len(buf)
        found = self._covered(pos, n) if n else None
        if found is None:
            return False
        out = memoryview(buf).cast("B")
        done = 0
        for i in range(found[0], found[1] + 1):
            start, data = self._starts[i], self._data[i]
            a = pos + done - start
            take = min(len(data) - a, n - done)
            out[done:done + take] = memoryview(data)[a:a + take]
            done += take
        return True

    def _missing(self, runs):
        return [r for r in runs if self._covered(r[0], r[1] - r[0]) is None]

    def view(self, offset, size):
        """A read-only view of bytes ``offset .. offset + size`` in the extents (no copy), or None when
        no single extent holds them all (each fetched run is one extent)."""
        k = bisect.bisect_right(self._starts, offset) - 1
        if k < 0:
            return None
        a = offset - self._starts[k]
        data = self._data[k]
        if a + size > len(data):
            return None
        return data[a:a + size]

    def _fetch(self, runs, request_bytes):
        """``(runs, pieces, buffers, coroutine, progress)``: every run fetched into a buffer of its
        own (from the pool) in concurrent pieces of at most ``request_bytes``; ``progress`` tells
        how far each piece has arrived (:class:`_Progress`)."""
        pieces, bufs, jobs = [], [], []
        for run in runs:
            buf = _take(run[1] - run[0])
            bufs.append(buf)
            view = memoryview(buf)
            for a, b in split_run(run, request_bytes):
                pieces.append((a, b))
                jobs.append((a, view[a - run[0]:b - run[0]]))
        progress = _Progress(pieces)

        async def one(k, a, out):
            import asyncio

            if self._slots is None:
                self._slots = asyncio.Semaphore(IN_FLIGHT)
            async with self._slots:             # first come, first served: the first read's pieces go first
                return await read_range(self._fs, self._path, a, out, self._direct_http,
                                        progress=lambda n: progress.update(k, n))

        async def fetch_all():
            import asyncio

            try:
                return await asyncio.gather(*[one(k, a, out) for k, (a, out) in enumerate(jobs)],
                                            return_exceptions=True)
            finally:
                progress.finish()
        return runs, pieces, bufs, fetch_all(), progress

    def start(self, ranges, request_bytes):
        """Start fetching ``ranges`` (``(offset, size)`` pairs) in the background (merged into runs,
        each run into one buffer in concurrent pieces of at most ``request_bytes``); :meth:`prefetch`
        waits for them. Extents left from earlier reads are dropped first (they are installed only by
        the read that needs them and released after it), so memory holds one task's reads."""
        self._forget_extents()
        if len(self._pending) > MAX_PENDING:          # fetches nobody read (never expected): forget them
            self.drop()
        runs = self._missing(merge_ranges(ranges, MERGE_GAP))
        loop = getattr(self._fs, "loop", None)
        if not runs or loop is None or getattr(self._fs, "_cat_file", None) is None:
            return
        import asyncio

        runs, pieces, bufs, coro, progress = self._fetch(runs, request_bytes)
        self._pending.append((runs, pieces, bufs, asyncio.run_coroutine_threadsafe(coro, loop), progress))

    def streaming(self, ranges):
        """For a read of ``ranges`` that one background fetch holds in full (:meth:`start`): a
        :class:`Arriving` that gives views of its bytes as they arrive, to decode while the rest
        comes; else None. The read still ends with :meth:`prefetch` and :meth:`release`."""
        runs = merge_ranges(ranges, MERGE_GAP)
        for entry in self._pending:
            if all(any(a <= r0 and r1 <= b for a, b in entry[0]) for r0, r1 in runs):
                return Arriving(entry[0], entry[2], entry[4])
        return None

    def prefetch(self, ranges, request_bytes):
        """Make ``ranges`` available in memory: wait for the background fetches that hold them, and
        fetch what none holds now, all pieces at once; kept until :meth:`release`."""
        runs = merge_ranges(ranges, MERGE_GAP)
        for entry in [e for e in self._pending if _overlaps(e[0], runs)]:
            self._pending.remove(entry)
            self._install(entry[0], entry[1], entry[2], entry[3].result())
        runs = self._missing(runs)
        if not runs:
            return
        loop = getattr(self._fs, "loop", None)
        if loop is None or getattr(self._fs, "_cat_file", None) is None:       # a filesystem without async
            pieces = [p for r in runs for p in split_run(r, request_bytes)]
            got = self._fs.cat_ranges([self._path] * len(pieces), [p[0] for p in pieces], [p[1] for p in pieces])
            self._install_bytes(pieces, got)
            return
        import fsspec.asyn

        runs, pieces, bufs, coro, _progress = self._fetch(runs, request_bytes)
        self._install(runs, pieces, bufs, fsspec.asyn.sync(loop, lambda: coro))

    def _install(self, runs, pieces, bufs, got):
        """Keep the fetched runs as extents (``got``: per piece the bytes read or an exception)."""
        for part in got:
            if isinstance(part, BaseException):
                for buf in bufs:
                    _give(buf)
                raise part
        self.requests += len(pieces)
        for (a, b), buf in zip(runs, bufs):
            j = bisect.bisect_left(self._starts, a)
            self._starts.insert(j, a)
            self._data.insert(j, memoryview(buf).toreadonly()[:b - a])
            self._bufs.insert(j, buf)

    def _install_bytes(self, pieces, got):
        for part in got:
            if isinstance(part, BaseException):
                raise part
        self.requests += len(pieces)
        for (a, b), part in zip(pieces, got):
            if len(part) != b - a:
                raise OSError(f"short read from the object store: {len(part)} bytes of {b - a} at offset {a}")
            j = bisect.bisect_left(self._starts, a)
            self._starts.insert(j, a)
            self._data.insert(j, memoryview(part))
            self._bufs.insert(j, None)

    def release(self, ranges):
        """Forget the extents that hold ``ranges`` (a read is done with them); their buffers go back
        to the pool."""
        runs = merge_ranges(ranges, MERGE_GAP)
        keep = []
        for s, d, buf in zip(self._starts, self._data, self._bufs):
            if _overlaps([(s, s + len(d))], runs):
                if buf is not None:
                    _give(buf)
            else:
                keep.append((s, d, buf))
        self._starts, self._data, self._bufs = [k[0] for k in keep], [k[1] for k in keep], [k[2] for k in keep]

    def _forget_extents(self):
        for buf in self._bufs:
            if buf is not None:
                _give(buf)
        self._starts, self._data, self._bufs = [], [], []

    def drop(self):
        """Forget every prefetched extent and background fetch (frees their memory). Fetches still
        in flight are waited for (at most ``SETTLE_S`` in all) and their bytes dropped: cancelled,
        fsspec's requests were left half-read ("Unclosed connection", "Task was destroyed but it is
        pending" at exit). Buffers of fetches that did not finish never go back to the pool."""
        import time

        deadline = time.monotonic() + SETTLE_S
        for _runs, _pieces, bufs, fut, _progress in self._pending:
            try:
                fut.result(timeout=max(0.0, deadline - time.monotonic()))
            except Exception:  # noqa: BLE001 - its bytes are not wanted; its error is not ours to report
                fut.cancel()
                continue
            for buf in bufs:
                _give(buf)
        self._pending = []
        self._forget_extents()


class _Progress:
    """How many bytes of each piece of a fetch have arrived (each piece is received from its start
    on, into its place in the run's buffer), for readers that decode while the rest arrives."""

    def __init__(self, pieces):
        self.pieces = pieces
        self.filled = [0] * len(pieces)
        self.done = False
        self._cond = threading.Condition()

    def update(self, k, n):
        """Piece ``k`` holds its first ``n`` bytes (called from the fetching threads; a piece that
        starts again, e.g. through s3fs after a failing direct GET, reports from 0 again)."""
        with self._cond:
            self.filled[k] = n
            self._cond.notify_all()

    def finish(self):
        with self._cond:
            self.done = True
            self._cond.notify_all()

    def _holds(self, start, end):
        for (a, b), got in zip(self.pieces, self.filled):
            if a < end and start < b and got < min(b, end) - a:
                return False
        return True

    def wait(self, start, end, timeout):
        """True once bytes ``start .. end`` have arrived; False when the fetch ended without them (a
        failure: the caller learns of it from the fetch itself) or after ``timeout`` seconds."""
        with self._cond:
            return self._cond.wait_for(lambda: self._holds(start, end) or self.done, timeout) \
                and self._holds(start, end)


class Arriving:
    """The bytes of a background fetch while they arrive: :meth:`view` waits for a range, and
    :meth:`order` ranks byte offsets by when they are expected (pieces are fetched side by side,
    ``IN_FLIGHT`` at a time, each from its start on)."""

    def __init__(self, runs, bufs, progress):
        self._runs, self._bufs, self._progress = runs, bufs, progress
        self._longest = max((b - a for a, b in progress.pieces), default=0)
        self._starts = [a for a, _ in progress.pieces]

    def view(self, offset, size):
        """A read-only view of bytes ``offset .. offset + size`` once they have arrived, or None
        (the fetch failed: :meth:`RangeFile.prefetch` then raises its error)."""
        for (a, b), buf in zip(self._runs, self._bufs):
            if a <= offset and offset + size <= b:
                if not self._progress.wait(offset, offset + size, SETTLE_S * 10):
                    return None
                return memoryview(buf).toreadonly()[offset - a:offset - a + size]
        return None

    def order(self, offset):
        pieces = self._progress.pieces
        k = max(bisect.bisect_right(self._starts, offset) - 1, 0)
        return (k // IN_FLIGHT) * self._longest + offset - pieces[k][0]


# --------------------------------------------------------------------------- fetching into buffers
POOL_BYTES = 256 * 2 ** 20    # free fetch buffers kept per process for the next reads, at most
_POOL = []                    # free bytearrays (their pages already mapped: no page faults on reuse)
_POOL_LOCK = threading.Lock()


def _take(n):
    """A bytearray of at least ``n`` bytes: the smallest free one of the pool that fits, else a new
    one with some room to spare (1/16, in whole MiB), so that the next task's runs, a little larger
    or smaller as compression goes, fit the same buffers. A new buffer costs its page faults (the
    kernel maps and zeroes every page): measured, allocating every run's buffer anew was up to
    1.9 s of a worker's CPU on 385 MB."""
    with _POOL_LOCK:
        fits = [b for b in _POOL if len(b) >= n]
        if fits:
            buf = min(fits, key=len)
            _POOL.remove(buf)
            return buf
    mib = 2 ** 20
    return bytearray(-(-(n + n // 16) // mib) * mib)


def _give(buf):
    """Return a buffer to the pool (the oldest go when the pool holds more than ``POOL_BYTES``)."""
    with _POOL_LOCK:
        _POOL.append(buf)
        while sum(map(len, _POOL)) > POOL_BYTES:
            _POOL.pop(0)


def _clear_pool():
    with _POOL_LOCK:
        _POOL.clear()


async def read_range(fs, path, start, out, direct_http=True, progress=None):
    """Fetch bytes ``start .. start + len(out)`` of object ``path`` into ``out`` (a writable buffer):
    returns the number of bytes, or raises.

    On s3fs, with ``direct_http``: a GET of a presigned URL of the object (signed by s3fs's own
    client: the same credentials, endpoint and addressing) on the standard library's HTTP client,
    in a thread, the body received straight into ``out`` (``recv_into``: no copy in Python). Any
    failure there (an error answer, a redirect, a proxy to go through, a certificate only s3fs's
    settings accept...) falls back to s3fs for this and later requests to that host, which gives its
    own retries and error messages. Else through s3fs/aiohttp, the body copied block by block as it
    arrives straight into ``out``. Measured against the local S3 server, 770 MB took 1.4-2.4 s of
    client CPU through fsspec's cat_ranges (which joins the blocks into a new bytes object per
    request, copied again by the caller), 0.7-1.2 s through aiohttp into the buffer, 0.4 s on the
    standard library's client. Other filesystems: ``_cat_file``. ``progress(n)``: told now and then
    that the first ``n`` bytes of ``out`` hold the object's bytes (from 0 again when the request
    starts over)."""
    n = len(out)
    if n == 0:
        return 0
    call, split = getattr(fs, "_call_s3", None), getattr(fs, "split_path", None)
    if call is None or split is None:
        data = await fs._cat_file(path, start=start, end=start + n)
        got = _copy_exact(data, out, start)
        if progress is not None:
            progress(got)
        return got
    from s3fs.core import _error_wrapper, version_id_kw

    bucket, key, vers = split(path)
    if direct_http:
        got = await direct_get(fs, bucket, key, vers, start, out, progress)
        if got is not None:
            return got

    async def once():
        resp = await call("get_object", Bucket=bucket, Key=key, Range=f"bytes={start}-{start + n - 1}",
                          **version_id_kw(vers))
        body = resp["Body"]
        try:
            length = resp.get("ContentLength")
            if length is not None and int(length) != n:
                raise OSError(f"short read from the object store: {length} bytes of {n} at offset {start}")
            stream = getattr(getattr(body, "_raw_stream", None), "content", None)
            if stream is None or not hasattr(stream, "readany"):       # another transport: its own read
                return _copy_exact(await body.read(), out, start)
            pos = told = 0
            if progress is not None:
                progress(0)
            while pos < n:
                block = await stream.readany()
                if not block:
                    break
                k = min(len(block), n - pos)
                out[pos:pos + k] = block if k == len(block) else memoryview(block)[:k]
                pos += k
                if progress is not None and (pos - told >= PROGRESS_STEP or pos == n):
                    progress(pos)
                    told = pos
            if pos != n:
                raise OSError(f"short read from the object store: {pos} bytes of {n} at offset {start}")
            return pos
        finally:
            body.close()

    return await _error_wrapper(once, retries=getattr(fs, "retries", 5))


def _copy_exact(data, out, start):
    if len(data) != len(out):
        raise OSError(f"short read from the object store: {len(data)} bytes of {len(out)} at offset {start}")
    out[:] = data
    return len(data)


def _overlaps(runs_a, runs_b):
    return any(a0 < b1 and b0 < a1 for a0, a1 in runs_a for b0, b1 in runs_b)


def merge_ranges(ranges, gap):
    """``(offset, size)`` pairs -> sorted ``(start, end)`` runs; ranges closer than ``gap`` join."""
    runs = []
    for off, size in sorted(ranges):
        end = off + size
        if runs and off - runs[-1][1] <= gap:
            runs[-1][1] = max(runs[-1][1], end)
        else:
            runs.append([off, end])
    return [tuple(r) for r in runs]


def split_run(run, request_bytes):
    """A ``(start, end)`` run -> pieces of at most ``request_bytes`` (equal sizes)."""
    start, end = run
    n = max(1, -(-(end - start) // max(1, int(request_bytes))))
    step = -(-(end - start) // n)
    return [(a, min(a + step, end)) for a in range(start, end, step)]


def _axis_span(i, n):
    """``(first, last + 1)`` of the elements index ``i`` (int, slice or list) selects on an axis of ``n``."""
    if isinstance(i, (int, np.integer)):
        i = int(i) % n if n else 0
        return i, i + 1
    if isinstance(i, slice):
        ids = range(*i.indices(n))
        if not ids:
            return 0, 0
        return min(ids[0], ids[-1]), max(ids[0], ids[-1]) + 1
    ids = [int(k) % n for k in i]
    return (min(ids), max(ids) + 1) if ids else (0, 0)


def chunk_ranges(ds, index):
    """``(offset, size)`` byte ranges in the file of the HDF5 chunks that ``ds[index]`` reads (``ds``
    an h5py dataset; ``index`` a tuple of ints, slices and index lists, one per axis), or None when
    they cannot be told (compact storage, too many chunks). Unallocated chunks (fill values) have none."""
    index = tuple(index) + (slice(None),) * (len(ds.shape) - len(tuple(index)))
    spans = [_axis_span(i, n) for i, n in zip(index, ds.shape)]
    if any(a >= b for a, b in spans):
        return []
    if ds.chunks is None:
        return _contiguous_range(ds, spans)
    table = chunk_table(ds, index)
    return None if table is None else [(off, size) for off, size, _mask in table.values()]


def chunk_table(ds, index):
    """The stored chunks ``ds[index]`` reads (a chunked h5py dataset): ``{chunk offset: (byte offset,
    size, filter mask)}`` (the chunk offset: the index of its first element, a tuple), or None when
    they cannot be told. Chunks never written (fill values) are not in it."""
    index = tuple(index) + (slice(None),) * (len(ds.shape) - len(tuple(index)))
    if ds.chunks is None or not hasattr(ds.id, "get_chunk_info_by_coord"):   # HDF5 before 1.10.5: no chunk query
        return None
    spans = [_axis_span(i, n) for i, n in zip(index, ds.shape)]
    if any(a >= b for a, b in spans):
        return {}
    axes = [sorted({int(k) % n // c for k in i}) if isinstance(i, list) else range(a // c, (b - 1) // c + 1)
            for i, n, (a, b), c in zip(index, ds.shape, spans, ds.chunks)]
    if np.prod([len(r) for r in axes], dtype=float) > MAX_CHUNKS:
        return None
    out = {}
    try:
        for coord in itertools.product(*axes):
            offset = tuple(k * c for k, c in zip(coord, ds.chunks))
            info = ds.id.get_chunk_info_by_coord(offset)
            if info.byte_offset is not None and info.size:
                out[offset] = (int(info.byte_offset), int(info.size), int(info.filter_mask))
    except (OSError, ValueError, RuntimeError, KeyError):      # a chunk index HDF5 cannot query: read as it comes
        return None
    return out


def _contiguous_range(ds, spans):
    """The one byte range of an unchunked dataset that holds every element of ``spans``."""
    offset = ds.id.get_offset()
    if offset is None:                      # compact storage, or nothing written yet
        return None
    shape = ds.shape
    first = last = 0
    for (a, b), n in zip(spans, shape):
        first = first * n + a
        last = last * n + (b - 1)
    item = ds.dtype.itemsize
    return [(int(offset) + first * item, (last - first + 1) * item)]


class PrefetchingVariable:
    """An h5netcdf variable whose reads first fetch the chunks they touch (see the module doc);
    everything else is the variable's own."""

    def __init__(self, var, rfile, request_bytes):
        self._var, self._rfile, self._request_bytes = var, rfile, request_bytes

    def __getattr__(self, name):
        return getattr(self._var, name)

    def __getitem__(self, index):
        key = index if isinstance(index, tuple) else (index,)
        ranges = None
        if not any(k is Ellipsis or k is None for k in key):
            ranges = chunk_ranges(self._var._h5ds, key)
        if not ranges:
            return self._var[index]
        try:
            self._rfile.prefetch(ranges, self._request_bytes)
            return self._var[index]
        finally:
            self._rfile.release(ranges)


class PrefetchingVariables:
    """``nc.variables`` with every variable wrapped in :class:`PrefetchingVariable`."""

    def __init__(self, variables, rfile, request_bytes):
        self._vars, self._rfile, self._request_bytes = variables, rfile, request_bytes

    def __contains__(self, name):
        return name in self._vars

    def __getitem__(self, name):
        return PrefetchingVariable(self._vars[name], self._rfile, self._request_bytes)

    def __iter__(self):
        return iter(self._vars)

    def __len__(self):
        return len(self._vars)

    def keys(self):
        return self._vars.keys()
