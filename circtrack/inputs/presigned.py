"""Range GETs of objects in S3-compatible storage on the standard library's HTTP client.

A piece of an object (inputs/ranges.py :func:`~circtrack.inputs.ranges.read_range`) is fetched by
a GET of a presigned URL, signed by s3fs's own client (the same credentials, endpoint and
addressing), in a per-process thread pool with kept-alive connections, the body received straight
into the caller's buffer. Any failure (an error answer, a redirect, a proxy in the environment, a
certificate only s3fs's settings accept) gives None, and that host is left to s3fs for the rest of
the process: s3fs keeps its retries and error messages.
"""

from __future__ import annotations

import os
import threading

DIRECT_THREADS = 8            # concurrent direct GETs per process
DIRECT_TIMEOUT_S = 60.0       # a socket silent this long: the request falls back to s3fs
PRESIGN_S = 3600              # lifetime of a presigned URL (each is used at once, for one request)
_DIRECT = {}                  # process id -> {"pool": executor, "conns": {(scheme, netloc): [free]}, "off": set()}
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


async def direct_get(fs, bucket, key, vers, start, out):
    """``read_range`` on a presigned URL and the standard library's HTTP client; None when it does
    not apply or fails (the caller then asks s3fs)."""
    import asyncio
    from urllib.parse import urlsplit

    from s3fs.core import version_id_kw

    st = _direct_state()
    try:
        await fs.set_session()
        url = await fs.s3.generate_presigned_url(
            ClientMethod="get_object", Params={"Bucket": bucket, "Key": key, **version_id_kw(vers)},
            ExpiresIn=PRESIGN_S)
    except Exception:  # noqa: BLE001 - signing is s3fs's business: its own request says what is wrong
        return None
    parts = urlsplit(url)
    where = (parts.scheme, parts.netloc)
    if where in st["off"] or parts.scheme not in ("http", "https") or _proxied(parts):
        return None
    loop = asyncio.get_running_loop()
    try:
        return await loop.run_in_executor(st["pool"], _get_into, st, parts, start, out)
    except _Fallback:
        with _DIRECT_LOCK:
            st["off"].add(where)
        return None


def _proxied(parts):
    """True when the environment routes requests to this host through a proxy (s3fs/aiohttp honour
    it; the direct client does not, so it steps aside)."""
    import urllib.request

    proxies = urllib.request.getproxies()
    if not proxies.get(parts.scheme):
        return False
    return not urllib.request.proxy_bypass(parts.hostname or "")


def _get_into(st, parts, start, out):
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
            return _get_on(st, where, conn, parts, start, out)
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
        return _get_on(st, where, conn, parts, start, out)
    except Exception as e:  # noqa: BLE001 - whatever went wrong, s3fs takes the request over
        raise _Fallback(str(e)) from e


def _get_on(st, where, conn, parts, start, out):
    n = len(out)
    try:
        conn.request("GET", f"{parts.path}?{parts.query}", headers={"Range": f"bytes={start}-{start + n - 1}"})
        resp = conn.getresponse()
        length = resp.getheader("Content-Length")
        if resp.status != 206 or length is None or int(length) != n:
            raise _Fallback(f"HTTP {resp.status}")
        view = memoryview(out).cast("B")
        pos = 0
        while pos < n:
            k = resp.readinto(view[pos:])
            if not k:
                raise _Fallback("short read")
            pos += k
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
