"""Inputs in object storage: ``s3://`` buckets (AWS or any S3-compatible service) and ``https://``.

In: a URL as given on the command line and the run's config (``[storage]``). Out: the concrete
inputs it names (:func:`expand_url`: a prefix is searched like a directory, a glob is matched, a
single object or a Zarr store is taken as it is), something xarray can open lazily
(:func:`open_target`), and an identity record per input for ``circtrack update``
(:func:`object_record`: size and ETag take the place of size and mtime).

Reading never downloads a whole object unless ``[storage] cache_dir`` (``--cache-dir``) asks for
local copies: netCDF4/HDF5 objects are read through h5netcdf on an fsspec file object that fetches
byte ranges in blocks of ``[storage] block_bytes`` and keeps at most ``[storage] cached_blocks`` of
them per open object (so memory stays bounded), and Zarr stores are opened natively by zarr on
an fsspec store, one object per chunk. Nothing is ever written into a bucket.

Credentials, region and endpoint come from the usual AWS places (``AWS_ACCESS_KEY_ID``/
``AWS_SECRET_ACCESS_KEY``/``AWS_SESSION_TOKEN``, ``AWS_PROFILE`` and ``~/.aws``,
``AWS_ENDPOINT_URL`` or ``AWS_ENDPOINT_URL_S3`` for S3-compatible services), or from
``[storage] endpoint_url``; ``[storage] anonymous = true`` (``--anonymous``) reads public buckets
without signing requests. Everything here needs the optional extra: ``pip install
'circtrack[cloud]'`` (fsspec, s3fs, aiohttp); without it a URL gives one line saying so.
"""

from __future__ import annotations

import hashlib
import logging
import os
import posixpath
import tempfile
import weakref

from circtrack.errors import InputError

SCHEMES = ("s3://", "https://", "http://")
EXTRA_HINT = "pip install 'circtrack[cloud]'"
ZARR_SUFFIX = ".zarr"
# the first bytes of a netCDF classic file (CDF-1, CDF-2, CDF-5): its reader needs the whole file
_CLASSIC_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05")

DEFAULTS = {"anonymous": False, "endpoint_url": "", "cache_dir": "", "block_bytes": 16 * 2 ** 20,
            "cached_blocks": 4, "request_bytes": 16 * 2 ** 20, "direct_http": True}


def is_url(path) -> bool:
    """True for ``s3://``, ``https://`` and ``http://`` inputs."""
    return isinstance(path, str) and path.lower().startswith(SCHEMES)


def is_store(url) -> bool:
    """A Zarr store (a prefix or URL ending in ``.zarr``)."""
    return url.rstrip("/").lower().endswith(ZARR_SUFFIX)


def _scheme(url):
    return url.split("://", 1)[0].lower()


def _settings(cfg):
    return {**DEFAULTS, **((cfg or {}).get("storage") or {})}


def _require(url, scheme):
    """fsspec and the filesystem of ``scheme``, or one line naming the extra to install."""
    need = {"s3": ("fsspec", "s3fs"), "http": ("fsspec", "aiohttp"), "https": ("fsspec", "aiohttp")}[scheme]
    for name in need:
        try:
            __import__(name)
        except ImportError:
            raise InputError(f"{url}: reading from object storage needs the optional cloud extra ({name} is not "
                             f"installed); install it with {EXTRA_HINT}, or copy the data to a local disk")


def endpoint(cfg):
    """The S3 endpoint in use: ``[storage] endpoint_url``, else ``AWS_ENDPOINT_URL_S3`` or
    ``AWS_ENDPOINT_URL``, else None (AWS itself, as the profile says)."""
    s = _settings(cfg)
    return (str(s["endpoint_url"]).strip() or os.environ.get("AWS_ENDPOINT_URL_S3")
            or os.environ.get("AWS_ENDPOINT_URL") or None)


def storage_options(url, cfg):
    """Keyword arguments for the fsspec filesystem of ``url`` (plain data: they reach the workers)."""
    s = _settings(cfg)
    if _scheme(url) == "s3":
        opts = {"anon": bool(s["anonymous"])}
        if not opts["anon"]:
            # requests are signed with SigV4 either way; this makes presigned URLs (the chunk reads of
            # inputs/ranges.py) SigV4 too, not the legacy SigV2 that newer AWS regions refuse
            opts["config_kwargs"] = {"signature_version": "s3v4"}
        ep = endpoint(cfg)
        if ep:
            opts["endpoint_url"] = ep
        return opts
    return {}


def filesystem(url, cfg):
    """``(fs, path)``: the fsspec filesystem for ``url`` and the path within it."""
    scheme = _scheme(url)
    _require(url, scheme)
    import fsspec

    fs = fsspec.filesystem(scheme, **storage_options(url, cfg))
    loop = getattr(fs, "_loop", None) or getattr(fs, "loop", None)
    if loop is not None:
        _LOOPS.add(loop)
    path = url.split("://", 1)[1] if scheme == "s3" else url
    return fs, path


def _bucket(url):
    return url.split("://", 1)[1].split("/", 1)[0]


def _where(cfg):
    ep = endpoint(cfg)
    return f"at {ep}" if ep else "on AWS"


def translate(err, url, cfg):
    """One :class:`InputError` line for a failure talking to the store (never a traceback)."""
    if isinstance(err, InputError):
        return err
    msg = str(err).splitlines()[0] if str(err) else type(err).__name__
    name = type(err).__name__
    s3 = _scheme(url) == "s3"
    if name == "NoCredentialsError" or "Unable to locate credentials" in msg:
        return InputError(f"{url}: no AWS credentials found; set AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY (or "
                          "AWS_PROFILE), or pass --anonymous for a public bucket")
    if isinstance(err, PermissionError) or "AccessDenied" in msg or "Forbidden" in msg or "403" in msg:
        if not s3:
            return InputError(f"{url}: the server refused access (HTTP 403); check the URL or its access rights")
        how = ("anonymous access was refused: the bucket is not public; drop --anonymous and set credentials"
               if _settings(cfg)["anonymous"] else
               "check AWS_ACCESS_KEY_ID/AWS_SECRET_ACCESS_KEY or AWS_PROFILE, or pass --anonymous for a public bucket")
        return InputError(f"{url}: access denied by the object store {_where(cfg)} ({msg}); {how}")
    if isinstance(err, FileNotFoundError) or "404" in msg or "NoSuchKey" in msg or "NoSuchBucket" in msg:
        if s3 and ("bucket" in msg.lower()):
            return InputError(f"{url}: bucket '{_bucket(url)}' does not exist {_where(cfg)}; check the bucket name "
                              "(and AWS_ENDPOINT_URL for an S3-compatible service)")
        what = f"no such object or prefix in bucket '{_bucket(url)}'" if s3 else "not found on the server (HTTP 404)"
        return InputError(f"{url}: {what}; check the path")
    if "connect" in msg.lower() or name in ("EndpointConnectionError", "ClientConnectorError", "ConnectTimeoutError"):
        where = endpoint(cfg) if s3 else url
        return InputError(f"{url}: cannot reach {where or 'the object store'} ({msg}); check the network and "
                          "AWS_ENDPOINT_URL")
    hint = ("the bucket must be public for --anonymous; drop it and set credentials, or check the URL"
            if s3 and _settings(cfg)["anonymous"] else "check the URL and credentials")
    return InputError(f"{url}: reading from object storage failed ({name}: {msg}); {hint}")


def _call(url, cfg, fn, *args, **kwargs):
    """``fn(*args, **kwargs)`` with every store failure turned into one InputError line."""
    try:
        return fn(*args, **kwargs)
    except InputError:
        raise
    except Exception as e:  # noqa: BLE001 - botocore, aiohttp and fsspec raise many kinds; all become one line
        raise translate(e, url, cfg) from e


# --------------------------------------------------------------------------- locating
def _has_glob(text):
    return any(ch in text for ch in "*?[")


def _data_suffix(name, suffixes):
    return os.path.splitext(name.rstrip("/"))[1].lower() in suffixes


def _inputs_below(keys, root, suffixes):
    """Data objects and Zarr stores among object keys below ``root`` (a store counts once, at its
    root; objects inside a store are not inputs of their own)."""
    found = []
    root = root.rstrip("/")
    for key in keys:
        rel = key[len(root):].lstrip("/") if key.startswith(root) else key
        parts = rel.split("/")
        store = next((i for i, part in enumerate(parts[:-1]) if part.lower().endswith(ZARR_SUFFIX)), None)
        if store is not None:
            found.append(posixpath.join(root, *parts[:store + 1]) if rel else root)
        elif _data_suffix(parts[-1], suffixes) and not parts[-1].lower().endswith(ZARR_SUFFIX):
            found.append(key)
    return sorted(dict.fromkeys(found))


def expand_url(arg, cfg, suffixes):
    """The inputs named by one URL, in sorted order (``suffixes``: those of data files, e.g. ``.nc``).

    ``s3://bucket/prefix/`` (or a prefix without the slash that is no object): every netCDF/HDF5/GRIB
    object and Zarr store below it, like a local directory; ``s3://bucket/path/*.nc``: a glob;
    ``.../store.zarr``: one Zarr store; anything else: one object. ``https://`` URLs name single
    files or Zarr stores (HTTP servers give no listing, so no prefixes or globs).
    """
    scheme = _scheme(arg)
    fs, path = filesystem(arg, cfg)
    if scheme != "s3":
        if _has_glob(path.split("://", 1)[1]):
            raise InputError(f"{arg}: an HTTP server gives no listing to match a pattern against; name each file "
                             "(e.g. one URL per line on stdin with '-') or use an s3:// URL")
        if not is_store(arg):
            _call(arg, cfg, fs.info, path)         # 404 and 403 here, as one line
        return [arg.rstrip("/") if is_store(arg) else arg]
    if not path.split("/", 1)[0]:
        raise InputError(f"{arg}: no bucket named; write s3://BUCKET/PREFIX/")
    if _has_glob(path):
        matches = _call(arg, cfg, fs.glob, path)
        found = []
        for m in matches:
            if m.lower().rstrip("/").endswith(ZARR_SUFFIX) or _data_suffix(m, suffixes):
                found.append(m.rstrip("/"))
        if not found:
            _call(arg, cfg, fs.ls, path.split("/", 1)[0])     # a missing bucket says so
            raise InputError(f"{arg}: the pattern matches no netCDF file or Zarr store in the bucket; check the path")
        return ["s3://" + m for m in sorted(dict.fromkeys(found))]
    if is_store(arg):
        root = path.rstrip("/")
        if not _call(arg, cfg, fs.exists, root):
            _call(arg, cfg, fs.ls, root.split("/", 1)[0])
            raise InputError(f"{arg}: no such Zarr store in bucket '{_bucket(arg)}'; check the path")
        return ["s3://" + root]
    info = None if path.endswith("/") or "/" not in path.rstrip("/") else _call(arg, cfg, _info_or_none, fs, path)
    if info is not None and info.get("type") == "file":
        return [arg]
    root = path.rstrip("/")
    keys = _call(arg, cfg, fs.find, root)
    if not keys:
        _call(arg, cfg, fs.ls, root.split("/", 1)[0])           # a missing bucket says so
        raise InputError(f"{arg}: no such object or prefix in bucket '{_bucket(arg)}'; check the path")
    found = _inputs_below(keys, root, suffixes)
    if not found:
        raise InputError(f"{arg}: the prefix holds no data files ({', '.join(suffixes[:4])}, ...) or Zarr stores; "
                         "point to the objects or a prefix that holds them")
    return ["s3://" + k for k in found]


def _info_or_none(fs, path):
    try:
        return fs.info(path)
    except FileNotFoundError as e:
        if "bucket" in str(e).lower():
            raise
        return None


# --------------------------------------------------------------------------- identity
def object_record(url, cfg):
    """``{"size", "etag"}`` of an input, for ``circtrack update`` (in place of size and mtime).

    A single object: its size and ETag (or another checksum the server sends). A Zarr store: the
    summed size of its objects and a SHA-256 of every object's key, size and ETag, so an appended
    time step (new chunks, changed metadata) changes it.
    """
    fs, path = filesystem(url, cfg)
    if is_store(url):
        listing = _call(url, cfg, fs.find, path.rstrip("/"), detail=True) if _scheme(url) == "s3" else None
        if listing is None:          # HTTP: no listing; the consolidated metadata stands for the store
            meta = None
            for name in ("zarr.json", ".zmetadata"):
                try:
                    meta = fs.info(url.rstrip("/") + "/" + name)
                    break
                except FileNotFoundError:
                    continue
            if meta is None:
                raise InputError(f"{url}: neither zarr.json nor .zmetadata found; update needs consolidated "
                                 "metadata on an HTTP server")
            listing = {name: meta}
        h = hashlib.sha256()
        total = 0
        for key in sorted(listing):
            inf = listing[key]
            total += int(inf.get("size") or 0)
            h.update(f"{key}|{inf.get('size')}|{_etag(inf)}\n".encode())
        return {"size": total, "etag": h.hexdigest()}
    inf = _call(url, cfg, fs.info, path)
    return {"size": int(inf.get("size") or 0), "etag": _etag(inf)}


def _etag(info):
    for k in ("ETag", "etag", "Content-MD5", "Digest", "checksum", "LastModified", "Last-Modified"):
        if info.get(k):
            return str(info[k]).strip('"')
    return None


# --------------------------------------------------------------------------- opening
def open_target(url, cfg):
    """What xarray opens for ``url``: ``(target, engine, open_kwargs, close)``.

    Zarr stores: the URL itself with ``storage_options`` (zarr reads one object per chunk). Other
    objects: the path of a whole-object local copy when ``[storage] cache_dir`` is set (engine
    None: open it like any local file), else an fsspec file object read by h5netcdf in blocks of
    ``block_bytes`` (at most ``cached_blocks`` kept). ``close`` releases the file object.
    """
    if is_store(url):
        scheme = _scheme(url)
        _require(url, scheme)
        _quiet_inherited_sessions()
        return url.rstrip("/"), "zarr", {"storage_options": storage_options(url, cfg)}, (lambda: None)
    s = _settings(cfg)
    if local_copies(cfg):
        return local_copy(url, cfg), None, {}, (lambda: None)
    if url.lower().endswith((".grib", ".grib2", ".grb", ".grb2")):
        raise InputError(f"{url}: GRIB is read from local files only; copy it to a disk or pass --cache-dir DIR")
    fs, path = filesystem(url, cfg)
    f = _open_file(url, cfg, fs, path)
    try:
        head = _call(url, cfg, f.read, 8)
        f.seek(0)
    except BaseException:
        _release(f)
        raise
    if _scheme(url) == "s3" and s["direct_http"]:
        from circtrack.inputs.presigned import remember

        remember(fs, path, f.size)          # for the workers' reads (inputs/presigned.py)
    if head[:4] in _CLASSIC_MAGIC:
        _release(f)
        raise InputError(f"{url}: a netCDF classic file cannot be read in byte ranges; pass --cache-dir DIR to read "
                         "a local copy, or convert it to netCDF4 (e.g. nccopy -k nc4)")
    if not head:
        _release(f)
        raise InputError(f"{url}: the object is empty; re-upload it, or pass --on-bad-file skip")
    return f, "h5netcdf", {}, lambda: _release(f)


def _open_file(url, cfg, fs, path):
    """The fsspec file of an object: reads in blocks of ``block_bytes``, at most ``cached_blocks`` kept."""
    s = _settings(cfg)
    return _call(url, cfg, fs.open, path, "rb", block_size=int(s["block_bytes"]), cache_type="blockcache",
                 cache_options={"maxblocks": max(1, int(s["cached_blocks"]))})


class RawObject:
    """h5netcdf's netCDF4-like API (``variables``, ``ncattrs``, ``dimensions``, raw values) on an
    object, for :meth:`~circtrack.inputs.readers.RoleReader.read_fast`; closed with its file.
    Every read of a variable first fetches the HDF5 chunks it touches in a few concurrent requests
    (:mod:`circtrack.inputs.ranges`)."""

    def __init__(self, nc, close, rfile=None, request_bytes=0):
        self._nc, self._close = nc, close
        self._rfile, self._request_bytes = rfile, request_bytes
        self._layouts = {}            # variable -> chunk layout, for inputs/chunks.py

    @property
    def variables(self):
        if self._rfile is None:
            return self._nc.variables
        from circtrack.inputs.ranges import PrefetchingVariables

        return PrefetchingVariables(self._nc.variables, self._rfile, self._request_bytes)

    def prefetch(self, name, index):
        """Start fetching the chunks that ``variables[name][index]`` reads (in the background; the
        read waits for them)."""
        if self._rfile is None:
            return
        from circtrack.inputs.ranges import chunk_ranges

        ranges = chunk_ranges(self._nc.variables[name]._h5ds, index)
        if ranges:
            self._rfile.start(ranges, self._request_bytes)

    def read_direct(self, name, index):
        """``variables[name][index]`` with its chunks fetched at once (:mod:`circtrack.inputs.ranges`)
        and inflated by :mod:`circtrack.inputs.chunks` straight from the fetched buffers (no copy
        through HDF5's file driver), as for files on disk; or None (the caller then reads through
        :attr:`variables`; the fetched chunks stay for that read). Chunks whose fetch was started
        ahead (:meth:`prefetch`) are inflated as their bytes arrive, in the order they arrive."""
        if self._rfile is None:
            return None
        from circtrack.inputs import chunks
        from circtrack.inputs.ranges import chunk_table

        dset = self._nc.variables[name]._h5ds
        lay = chunks.dataset_layout(dset, self._layouts)
        if lay is None:
            return None
        table = chunk_table(dset, index)
        if not table:
            return None
        ranges = [(off, size) for off, size, _mask in table.values()]
        arriving = self._rfile.streaming(ranges)
        if arriving is None:
            self._rfile.prefetch(ranges, self._request_bytes)
        view = self._rfile.view if arriving is None else arriving.view

        def stored(offset):
            entry = table.get(offset)
            if entry is None:                # a chunk never written: HDF5 gives its fill values
                return None
            data = view(entry[0], entry[1])
            return None if data is None else (entry[2], data)

        def order(offset):                   # the chunks in the order their bytes arrive
            entry = table.get(offset)
            return -1 if entry is None else arriving.order(entry[0])

        arr = chunks.read_stored(lay, index, stored, None if arriving is None else order)
        if arriving is not None:             # all arrived by now: kept as extents (a failed fetch raises here)
            self._rfile.prefetch(ranges, self._request_bytes)
        if arr is not None:
            self._rfile.release(ranges)
        return arr

    @property
    def requests(self):
        """Range requests made so far to fetch chunks (not counting metadata reads)."""
        return self._rfile.requests if self._rfile is not None else 0

    def close(self):
        try:
            self._nc.close()
        finally:
            self._close()


def open_raw(url, cfg):
    """A :class:`RawObject` of a netCDF4/HDF5 object, or None where it does not apply (netCDF
    classic objects, which open_dataset refuses with its own line).

    Metadata and coordinates are read in ranges of at most 1 MiB (:func:`for_metadata`); the data a
    read needs are fetched at its start, its HDF5 chunks merged into runs and fetched in concurrent
    requests of at most ``[storage] request_bytes`` (:mod:`circtrack.inputs.ranges`)."""
    try:
        target, close = _open_direct(url, cfg)
        if target is None:
            target, _engine, _kw, close = open_target(url, for_metadata(cfg))
    except InputError:
        return None
    import h5netcdf.legacyapi

    from circtrack.inputs.ranges import RangeFile

    fs, path = filesystem(url, cfg)
    rfile = RangeFile(target, fs, path, bool(_settings(cfg)["direct_http"]))
    try:
        nc = h5netcdf.legacyapi.Dataset(rfile, "r")
    except BaseException:
        close()
        raise
    return RawObject(nc, lambda: (rfile.drop(), close()), rfile, int(_settings(cfg)["request_bytes"]))


def _open_direct(url, cfg):
    """``(file, close)`` of an object whose presigned URL and size this process knows (the parent
    signed it while planning: inputs/presigned.py), its metadata read by direct GETs without an
    s3fs session; ``(None, None)`` otherwise. InputError where :func:`open_target` refuses."""
    s = _settings(cfg)
    if _scheme(url) != "s3" or not s["direct_http"]:
        return None, None
    from circtrack.inputs.presigned import open_direct

    fs, path = filesystem(url, cfg)
    meta = _settings(for_metadata(cfg))
    block = min(int(meta["block_bytes"]), DIRECT_BLOCK_BYTES)
    f = open_direct(fs, path, block, max(int(meta["cached_blocks"]), METADATA_BLOCK_BYTES * 4 // block),
                    lambda: _open_file(url, for_metadata(cfg), fs, path), _release)
    if f is None:
        return None, None
    try:
        head = _call(url, cfg, f.read, 8)
        f.seek(0)
        if head[:4] in _CLASSIC_MAGIC or not head:
            raise InputError(f"{url}: not read in byte ranges")        # open_target says why
    except BaseException:
        f.close()
        raise
    return f, f.close


def _release(f):
    """Close an object's file and free its cached blocks at once. fsspec's block cache is an LRU
    bound to the cache object (a reference cycle), so after close() its blocks waited for the cyclic
    garbage collector: measured, a worker grew by about one cache (64 MiB) per object it had read."""
    clear = getattr(getattr(getattr(f, "cache", None), "_fetch_block_cached", None), "cache_clear", None)
    if clear is not None:
        clear()
    f.close()


class _InheritedSessions(logging.Filter):
    """Drops asyncio's "Unclosed client session/connector" messages. zarr's store keeps an HTTP
    session per filesystem; a forked worker inherits the parent's and must not close it (its
    connections belong to the parent), so it is dropped unclosed when the worker exits."""

    def filter(self, record):
        return not str(record.msg).startswith(("Unclosed client session", "Unclosed connector"))


def _quiet_inherited_sessions():
    log = logging.getLogger("asyncio")
    if not any(isinstance(f, _InheritedSessions) for f in log.filters):
        log.addFilter(_InheritedSessions())


_LOOPS = weakref.WeakSet()      # event loops of this process's filesystems (fsspec's I/O loop)


def _after_fork_in_child():
    """In a forked worker: let nothing of the parent's S3 sessions touch the parent's connections.

    * A forked child shares the parent's epoll instance (the kernel object, not a copy). When the
      child dropped the connections it inherited, asyncio unregistered their sockets from that
      shared epoll, so the parent never heard its next response: measured, the parent's last
      request of a run (the object's size and ETag for the provenance) waited for the 15 s read
      timeout. The child's copy of the parent's loop gets an epoll of its own.
    * s3fs closes a filesystem's session in a finalizer bound to the parent's loop; run in the child
      (on its own loop) it printed an "attached to a different loop" traceback at exit. Without it,
      aiohttp's own "unclosed session" messages for those sessions are dropped as for Zarr stores.
    """
    import select

    if _LOOPS:
        _quiet_inherited_sessions()

    for loop in list(_LOOPS):
        sel = getattr(getattr(loop, "_selector", None), "_selector", None)
        if sel is not None and hasattr(select, "epoll") and isinstance(sel, select.epoll):
            try:
                sel.close()                      # the child's descriptor only; the parent's stays open
            except OSError:
                pass
            loop._selector._selector = select.epoll()
    registry = getattr(weakref.finalize, "_registry", None) or {}
    for fin, info in list(registry.items()):
        func = getattr(info, "func", None)
        if getattr(func, "__module__", "") == "s3fs.core" and getattr(func, "__name__", "") == "close_session":
            fin.detach()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_after_fork_in_child)


METADATA_BLOCK_BYTES = 2 ** 20
# what a worker reads of an object besides the data is its chunk index (a few kB here and there:
# measured, 20 reads of 1 MiB blocks for 2 objects read by 2 workers, the same 20 with 64 KiB)
DIRECT_BLOCK_BYTES = 256 * 1024


def for_metadata(cfg):
    """``cfg`` for an opening that reads metadata and coordinates only (planning, detection): objects
    are fetched in ranges of at most 1 MiB (measured: a 16 MiB range per object only for its header
    cost the planning of 6 objects of 25 MB 0.8 s of 5.6 s against the local S3 server)."""
    s = _settings(cfg)
    small = min(int(s["block_bytes"]), METADATA_BLOCK_BYTES)
    return {**cfg, "storage": {**s, "block_bytes": small, "cached_blocks": max(int(s["cached_blocks"]), 8)}}


def local_copies(cfg):
    """True when ``[storage] cache_dir`` asks for whole-object local copies."""
    return bool(str(_settings(cfg)["cache_dir"]).strip())


def local_copy(url, cfg):
    """A whole-object copy of ``url`` in ``[storage] cache_dir`` (downloaded once per object
    version: the name carries the ETag, so a changed object is fetched again). Written to a
    temporary file in the same directory and renamed, so a killed run leaves no half file."""
    s = _settings(cfg)
    d = os.path.abspath(os.path.expanduser(str(s["cache_dir"]).strip()))
    try:
        os.makedirs(d, exist_ok=True)
    except OSError as e:
        raise InputError(f"cache directory {d} cannot be created ({e.strerror}); choose another --cache-dir")
    rec = object_record(url, cfg)
    key = hashlib.sha256(f"{url}|{rec['size']}|{rec['etag']}".encode()).hexdigest()[:20]
    dest = os.path.join(d, f"{key}-{posixpath.basename(url.rstrip('/'))}")
    if os.path.isfile(dest) and os.path.getsize(dest) == rec["size"]:
        return dest
    fs, path = filesystem(url, cfg)
    fd, tmp = tempfile.mkstemp(dir=d, prefix=".part-", suffix=".tmp")
    os.close(fd)
    try:
        _call(url, cfg, fs.get_file, path, tmp)
        os.replace(tmp, dest)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return dest

