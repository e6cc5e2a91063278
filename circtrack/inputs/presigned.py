"""Range GETs of objects in S3-compatible storage on the standard library's HTTP client.

A piece of an object (inputs/ranges.py :func:`~circtrack.inputs.ranges.read_range`) is fetched by
a GET of a presigned URL, signed by s3fs's own client (the same credentials, endpoint and
addressing), in a per-process thread pool with kept-alive connections, the body received straight
into the caller's buffer. Any failure (an error answer, a redirect, a proxy in the environment, a
certificate only s3fs's settings accept) gives None, and that host is left to s3fs for the rest of
the process: s3fs keeps its retries and error messages.

A presigned URL covers every range of its object (the Range header is not signed into it), so one
is made per object and kept (:data:`_SIGNED`, with the object's size) while it has a while to run.
The parent process signs the objects it opens while planning (:func:`remember`); the worker
processes forked after planning inherit the URLs and sizes, and open objects as a
:class:`DirectFile` (metadata read in blocks by direct GETs) instead of asking s3fs: a worker then
never builds a botocore session or asks for the object's size (measured: about 0.3 s of a worker's
first task, with both workers starting at once). Without a kept URL (another process, a URL that
expires soon, a failure) everything goes through s3fs as before.
"""

from __future__ import annotations

import collections
import os
import threading
import time

DIRECT_THREADS = 8            # concurrent direct GETs per process
DIRECT_TIMEOUT_S = 60.0       # a socket silent this long: the request falls back to s3fs
PRESIGN_S = 3600              # lifetime of a presigned URL
REUSE_MARGIN_S = 600          # a kept URL is used while it has at least this long to run
PROGRESS_STEP = 512 * 1024    # a fetch tells how far it has come every this many bytes or so
_DIRECT = {}                  # process id -> {"pool": executor, "conns": {(scheme, netloc): [free]}, "off": set()}
_SIGNED = {}                  # object -> [presigned URL (split), expiry (time.time()), size or None]
_DIRECT_LOCK = threading.Lock()


class _Fallback(Exception):
    """The direct GET did not give the bytes: the request goes through s3fs instead."""


def _direct_state():
    """This process's thread pool and kept-alive connections (a forked worker makes its own: the
    parent's threads do not exist in it, and its sockets are the parent's)."""
    pid = os.getpid()
    with _DIRECT_LOCK:
        st = _DIRECT.get(pid)
        if st is None:
            from concurrent.futures import ThreadPoolExecutor

            st = _DIRECT[pid] = {"pool": ThreadPoolExecutor(DIRECT_THREADS, thread_name_prefix="circtrack-get"),
                                 "conns": {}, "off": set()}
        return st


async def direct_get(fs, bucket, key, vers, start, out, progress=None):
    """``read_range`` on a presigned URL and the standard library's HTTP client; None when it does
    not apply or fails (the caller then asks s3fs). ``progress``: as for ``read_range``."""
    import asyncio
    from urllib.parse import urlsplit

    st = _direct_state()
    ident = _ident(fs, bucket, key, vers)
    parts = _kept(ident)
    if parts is None:
        try:
            url = await _sign(fs, bucket, key, vers)
        except Exception:  # noqa: BLE001 - signing is s3fs's business: its own request says what is wrong
            return None
        parts = _keep(ident, urlsplit(url))
    if not _usable(st, parts):
        return None
    loop = asyncio.get_running_loop()
    try:
        return await loop.run_in_executor(st["pool"], _get_into, st, parts, start, out, progress)
    except _Fallback:
        _give_up(st, ident, parts)
        return None


async def _sign(fs, bucket, key, vers):
    """A presigned GET of one object (any byte range of it, for PRESIGN_S seconds), signed by s3fs's client."""
    from s3fs.core import version_id_kw

    await fs.set_session()
    return await fs.s3.generate_presigned_url(
        ClientMethod="get_object", Params={"Bucket": bucket, "Key": key, **version_id_kw(vers)}, ExpiresIn=PRESIGN_S)


def _ident(fs, bucket, key, vers):
    """What a kept URL is kept under: the object and how it is reached (the same in a forked worker,
    whose filesystem instance is a new one)."""
    return (getattr(fs, "endpoint_url", None), bool(getattr(fs, "anon", False)), bucket, key, vers)


def _kept(ident):
    """The kept presigned URL of an object (split), or None when there is none with a while to run."""
    entry = _SIGNED.get(ident)
    if entry is None or entry[1] - time.time() < REUSE_MARGIN_S:
        return None
    return entry[0]


def _keep(ident, parts, size=None):
    with _DIRECT_LOCK:
        old = _SIGNED.get(ident)
        _SIGNED[ident] = [parts, time.time() + PRESIGN_S, size if size is not None else (old[2] if old else None)]
    return parts


def _usable(st, parts):
    return (parts.scheme, parts.netloc) not in st["off"] and parts.scheme in ("http", "https") \
        and not _proxied(parts)


def _give_up(st, ident, parts):
    """A direct GET failed: that host goes through s3fs from now on, and the object's URL is dropped."""
    with _DIRECT_LOCK:
        st["off"].add((parts.scheme, parts.netloc))
        _SIGNED.pop(ident, None)


def remember(fs, path, size):
    """Sign a GET of object ``path`` (on ``fs``, an s3fs filesystem whose session is up: the object
    was just opened) and keep the URL with the object's ``size``, for this process and the workers
    forked from it. Does nothing when a URL is kept already or signing fails."""
    bucket, key, vers = fs.split_path(path)
    ident = _ident(fs, bucket, key, vers)
    if _kept(ident) is not None:
        return
    import fsspec.asyn
    from urllib.parse import urlsplit

    try:
        url = fsspec.asyn.sync(fs.loop, _sign, fs, bucket, key, vers)
    except Exception:  # noqa: BLE001 - no URL kept: the workers ask s3fs as before
        return
    _keep(ident, urlsplit(url), int(size))


def open_direct(fs, path, block_bytes, max_blocks, fallback, release=None):
    """A :class:`DirectFile` of object ``path`` when a URL and size are kept for it (see the module
    doc) and the direct path is open for its host, else None. ``fallback()`` opens the object
    through s3fs (for the reads after a failing direct GET), ``release(f)`` closes what it opened."""
    bucket, key, vers = fs.split_path(path)
    ident = _ident(fs, bucket, key, vers)
    parts = _kept(ident)
    entry = _SIGNED.get(ident)
    if parts is None or entry[2] is None or not _usable(_direct_state(), parts):
        return None
    return DirectFile(ident, parts, entry[2], block_bytes, max_blocks, fallback, release)


class DirectFile:
    """A read-only file of an object of known ``size`` over its presigned URL: reads go through
    blocks of ``block_bytes`` fetched by direct GETs (at most ``max_blocks`` kept, least recently
    used dropped first), as fsspec's block cache does through s3fs. A failing GET hands the file
    over to ``fallback()`` (the object opened through s3fs) for this and every later read, and
    the host to s3fs for the process."""

    def __init__(self, ident, parts, size, block_bytes, max_blocks, fallback, release=None):
        self._ident, self._parts = ident, parts
        self._release = release or (lambda f: f.close())
        self.size = int(size)
        self._block, self._max = max(1, int(block_bytes)), max(1, int(max_blocks))
        self._blocks = collections.OrderedDict()
        self._fallback, self._f = fallback, None
        self._pos = 0

    def seek(self, pos, whence=0):
        base = {0: 0, 1: self._pos, 2: self.size}[whence]
        self._pos = base + pos
        return self._pos

    def tell(self):
        return self._pos

    def read(self, n=-1):
        if self._f is None:
            try:
                return self._read_direct(n)
            except _Fallback as e:
                if e.args != ("expires",):
                    _give_up(_direct_state(), self._ident, self._parts)
                self._blocks.clear()
                self._f = self._fallback()
        self._f.seek(self._pos)
        data = self._f.read(n)
        self._pos += len(data)
        return data

    def _read_direct(self, n):
        end = self.size if n is None or n < 0 else min(self.size, self._pos + n)
        if end <= self._pos:
            return b""
        bs = self._block
        first, last = self._pos // bs, (end - 1) // bs
        if first == last:                  # the usual metadata read: inside one block
            block = self._get(first)
            out = bytes(block[self._pos - first * bs:end - first * bs])
        else:
            out = b"".join(bytes(self._get(k)[max(self._pos, k * bs) - k * bs:min(end, (k + 1) * bs) - k * bs])
                           for k in range(first, last + 1))
        self._pos = end
        return out

    def _get(self, k):
        block = self._blocks.get(k)
        if block is not None:
            self._blocks.move_to_end(k)
            return block
        start = k * self._block
        buf = bytearray(min(self._block, self.size - start))
        parts = _kept(self._ident)
        if parts is None:                  # the URL runs out soon (a long run): s3fs signs the reads now
            raise _Fallback("expires")
        _get_into(_direct_state(), parts, start, memoryview(buf))
        self._blocks[k] = block = memoryview(buf)
        while len(self._blocks) > self._max:
            self._blocks.popitem(last=False)
        return block

    def close(self):
        self._blocks.clear()
        if self._f is not None:
            f, self._f = self._f, None
            self._release(f)


def _proxied(parts):
    """True when the environment routes requests to this host through a proxy (s3fs/aiohttp honour
    it; the direct client does not, so it steps aside)."""
    import urllib.request

    proxies = urllib.request.getproxies()
    if not proxies.get(parts.scheme):
        return False
    return not urllib.request.proxy_bypass(parts.hostname or "")


def _get_into(st, parts, start, out, progress=None):
    """One range GET on a kept-alive connection, the body received into ``out``; raises _Fallback.
    A kept-alive connection the server has closed meanwhile (it may, when idle) is replaced by a new
    one once, before giving up."""
    import http.client

    where = (parts.scheme, parts.netloc)
    with _DIRECT_LOCK:
        free = st["conns"].setdefault(where, [])
        conn = free.pop() if free else None
    if conn is not None:
        try:
            return _get_on(st, where, conn, parts, start, out, progress)
        except (http.client.RemoteDisconnected, ConnectionResetError, BrokenPipeError):
            pass                                   # stale: the server closed it while it waited here
        except Exception as e:  # noqa: BLE001 - whatever went wrong, s3fs takes the request over
            raise _Fallback(str(e)) from e
    if parts.scheme == "https":
        import ssl

        conn = http.client.HTTPSConnection(parts.hostname, parts.port, timeout=DIRECT_TIMEOUT_S,
                                           context=ssl.create_default_context())
    else:
        conn = http.client.HTTPConnection(parts.hostname, parts.port, timeout=DIRECT_TIMEOUT_S)
    try:
        return _get_on(st, where, conn, parts, start, out, progress)
    except Exception as e:  # noqa: BLE001 - whatever went wrong, s3fs takes the request over
        raise _Fallback(str(e)) from e


def _get_on(st, where, conn, parts, start, out, progress=None):
    n = len(out)
    try:
        conn.request("GET", f"{parts.path}?{parts.query}", headers={"Range": f"bytes={start}-{start + n - 1}"})
        resp = conn.getresponse()
        length = resp.getheader("Content-Length")
        if resp.status != 206 or length is None or int(length) != n:
            raise _Fallback(f"HTTP {resp.status}")
        view = memoryview(out).cast("B")
        pos = 0
        step = n if progress is None else PROGRESS_STEP      # readinto fills all it is given before it returns
        if progress is not None:
            progress(0)
        while pos < n:
            k = resp.readinto(view[pos:pos + step])
            if not k:
                raise _Fallback("short read")
            pos += k
            if progress is not None:
                progress(pos)
        if not resp.isclosed():
            resp.read()
    except BaseException:
        conn.close()
        raise
    if resp.will_close:
        conn.close()
    else:
        with _DIRECT_LOCK:
            st["conns"].setdefault(where, []).append(conn)
    return n
