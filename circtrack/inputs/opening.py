"""Opening one input: file path and config in, a lazily opened ``xarray.Dataset`` (or a plain
``netCDF4.Dataset`` for the fast read path) out.

The one place to touch for a new kind of input: :data:`SOURCES` picks the engine from the path
(netCDF through the configured engine, ``*.zarr`` through zarr, ``*.grib*`` through cfgrib with
its index files in :func:`grib_index_dir`), and :func:`open_dataset` turns every way of
failing to open into one :class:`~circtrack.errors.InputError` line. Also here: the netCDF chunk
cache, and the check that a netCDF classic file is as long as its header says. Time axes that
xarray cannot decode are handed to :mod:`circtrack.inputs.times`. URLs (``s3://``, ``https://``)
are opened through :mod:`circtrack.inputs.remote` (byte ranges, Zarr stores, local copies) and
then decoded exactly like files.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import warnings

from circtrack.errors import InputError
from circtrack.inputs import remote
from circtrack.inputs import times as T

NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf", ".h5", ".hdf5")
ZARR_SUFFIXES = (".zarr",)
GRIB_SUFFIXES = (".grib", ".grib2", ".grb", ".grb2")

_CACHE_SET = False


def open_raw(path, cfg):
    """A plain ``netCDF4.Dataset`` for :meth:`~circtrack.inputs.readers.RoleReader.read_fast`, or None
    (other engines and sources). For a netCDF4/HDF5 object in object storage: h5netcdf's
    netCDF4-like API on its byte ranges (:func:`circtrack.inputs.remote.open_raw`), or the netCDF4
    file of its local copy (``[storage] cache_dir``)."""
    if remote.is_url(path):
        if remote.is_store(path) or _source_for(path) is not None:
            return None
        if not remote.local_copies(cfg):
            return remote.open_raw(path, cfg)
        path = remote.local_copy(path, cfg)
    if cfg["run"]["netcdf_engine"] != "netcdf4" or not os.path.isfile(path) or _source_for(path) is not None:
        return None
    import netCDF4
    _set_chunk_cache(cfg["run"]["chunk_cache_bytes"])
    try:
        return netCDF4.Dataset(path, "r")
    except OSError:
        return None


def _set_chunk_cache(nbytes):
    global _CACHE_SET
    if not _CACHE_SET:
        import netCDF4
        netCDF4.set_chunk_cache(int(nbytes), 1009, 0.75)
        _CACHE_SET = True


def grib_index_dir():
    """Where cfgrib's index files go: a cache directory of ours, never beside the (maybe read-only) data."""
    base = os.environ.get("CIRCTRACK_CACHE_DIR") or os.path.join(
        os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache"), "circtrack")
    d = os.path.join(base, "grib-index")
    try:
        os.makedirs(d, exist_ok=True)
        if os.access(d, os.W_OK):
            return d
    except OSError:
        pass
    d = os.path.join(tempfile.gettempdir(), f"circtrack-grib-index-{os.getuid() if hasattr(os, 'getuid') else 0}")
    os.makedirs(d, exist_ok=True)
    return d


def _zarr_source(path, cfg):
    return "zarr", {}


def _grib_source(path, cfg):
    try:
        import cfgrib  # noqa: F401
    except (ImportError, RuntimeError) as e:
        raise InputError(f"{path}: reading GRIB needs the optional grib extra ({type(e).__name__}: "
                         f"{str(e).splitlines()[0] if str(e) else 'cfgrib missing'}); install it with "
                         "pip install 'circtrack[grib]', or convert the file to netCDF")
    # the file's identity and version: a re-downloaded file never meets a stale index
    st = os.stat(path) if os.path.exists(path) else None
    ident = f"{os.path.abspath(path)}|{st.st_size if st else ''}|{st.st_mtime_ns if st else ''}"
    key = hashlib.sha1(ident.encode()).hexdigest()[:16]
    index = os.path.join(grib_index_dir(), f"{os.path.basename(path)}.{key}.{{short_hash}}.idx")
    return "cfgrib", {"backend_kwargs": {"indexpath": index}}


# Input sources other than netCDF, by path suffix: (suffixes, function(path, cfg) -> (xarray engine,
# keyword arguments of xarray.open_dataset)). Everything else is netCDF/HDF5 through
# run.netcdf_engine. A new kind of input is one more entry here (files.py lists its suffixes from it).
SOURCES = (
    (ZARR_SUFFIXES, _zarr_source),
    (GRIB_SUFFIXES, _grib_source),
)
DATA_SUFFIXES = NETCDF_SUFFIXES + tuple(sfx for suffixes, _ in SOURCES for sfx in suffixes)


def _source_for(path):
    """The opener of ``path`` from :data:`SOURCES`, or None for netCDF."""
    low = path.rstrip("/").lower()
    for suffixes, source in SOURCES:
        if low.endswith(suffixes):
            return source
    return None


def _engine_for(path, cfg):
    source = _source_for(path)
    return source(path, cfg) if source is not None else (cfg["run"]["netcdf_engine"], {})


def open_dataset(path, cfg):
    """Open lazily with an explicitly named engine; times decoded with cftime for every calendar.

    netCDF through the configured engine, ``*.zarr`` through zarr, ``*.grib*`` through cfgrib (index
    files in :func:`grib_index_dir`). Time axes xarray refuses are decoded where unambiguous by
    :func:`circtrack.inputs.times.reopen_undecoded` (year 0, "months since").
    """
    if remote.is_url(path):
        return _open_remote(path, cfg)
    engine, extra = _engine_for(path, cfg)
    _check_local(path)
    return _open_lazily(path, path, engine, extra, cfg)


def _check_local(path):
    if not os.path.exists(path):
        raise InputError(f"{path}: file not found; check the path")
    if os.path.isfile(path) and os.path.getsize(path) == 0:
        raise InputError(f"{path}: the file is empty; re-copy or re-download it, or pass --on-bad-file skip")
    if os.path.isfile(path):
        _check_format(path)
        _check_classic_complete(path)


def _open_remote(url, cfg):
    """An object in object storage (:mod:`circtrack.inputs.remote`): read in byte ranges through an
    fsspec file object (closed with the dataset), natively as a Zarr store, or from a local copy
    (``[storage] cache_dir``); error lines name the URL."""
    target, engine, extra, close = remote.open_target(url, cfg)
    if engine is None:                         # a whole-object local copy: opened like a local file
        engine, extra = _engine_for(target, cfg)
        _check_local(target)
    try:
        ds = _open_lazily(url, target, engine, extra, cfg)
    except BaseException:
        close()
        raise
    backend_close = ds._close

    def close_both():
        try:
            if backend_close is not None:
                backend_close()
        finally:
            close()

    ds.set_close(close_both)
    return ds


def _open_lazily(path, target, engine, extra, cfg):
    """``xarray.open_dataset(target)`` with the engine named, failures as one line naming ``path``."""
    import xarray as xr   # here, not at import: see inputs/header.py

    if engine == "netcdf4":
        _set_chunk_cache(cfg["run"]["chunk_cache_bytes"])
    coder = xr.coders.CFDatetimeCoder(use_cftime=True)
    if {"time", "calendar"} & set(cfg.get("units", {})):
        return T.open_with_time_units(path, engine, extra, cfg, coder)
    try:
        # no pandas indexes: circtrack only reads coordinate values, and building indexes
        # took two thirds of the time of opening a small file
        with warnings.catch_warnings():
            # stores without consolidated metadata are read fine, only their opening is slower
            warnings.filterwarnings("ignore", message="Failed to open Zarr store with consolidated metadata")
            ds = xr.open_dataset(target, engine=engine, chunks=None, cache=False, decode_times=coder,
                                 decode_timedelta=False, create_default_indexes=False, **extra)
    except ValueError as e:
        # xarray's advice (decode_times=False, install cftime) is for library users, not for this command
        msg = str(e).splitlines()[0].split(" Try opening", 1)[0]
        if hasattr(target, "seek"):
            target.seek(0)
        ds = T.reopen_undecoded(path, engine, extra, cfg, coder, msg, target=target)
        if ds is not None:
            return ds
        raise InputError(f"{path}: cannot be opened with the {engine} engine ({msg}); check that it is a "
                         "complete netCDF/Zarr file, or pass --on-bad-file skip")
    except (OSError, RuntimeError, KeyError, IndexError, TypeError, EOFError) as e:
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        kind = "GRIB" if engine == "cfgrib" else "netCDF"
        raise InputError(f"{path}: cannot be read as {kind} ({msg}); the file may be truncated or not "
                         f"{kind}: re-copy it, or pass --on-bad-file skip")
    if ds.sizes and all(str(d).startswith("phony_dim_") for d in ds.sizes):
        ds.close()
        raise InputError(f"{path}: is a plain HDF5 file, not netCDF (its arrays have no named dimensions or "
                         "coordinates); write it as netCDF with time/lat/lon (and plev) coordinates, or pass "
                         "--on-bad-file skip")
    return ds


_CLASSIC_MAGIC = (b"CDF\x01", b"CDF\x02")
HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"   # the first 8 bytes of a netCDF-4 (HDF5) file, for every module


def _check_format(path):
    """A file that is neither netCDF (classic or HDF5-based) nor HDF5 nor GRIB: say so, with what it looks like.

    The signatures: netCDF classic 'CDF' + version byte; HDF5 (netCDF-4) its 8-byte signature at
    offset 0, 512, 1024, ...; GRIB 'GRIB' near the start (some archives put a header before it)."""
    try:
        f = open(path, "rb")
    except OSError:
        return                               # unreadable: the opening below names it
    with f:
        head = f.read(4096)
        if head[:3] == b"CDF" or b"GRIB" in head[:1024] or head[:4] == b"\x89HDF":
            return
        off = 512
        size = os.path.getsize(path)
        while off < min(size, 1 << 20):
            f.seek(off)
            if f.read(8) == HDF5_SIGNATURE:
                return
            off *= 2
    text = head[:200]
    try:
        shown = text.decode("utf-8").strip().splitlines()[0][:40] if text.strip() else ""
        looks = f"it begins like text: '{shown}'" if shown and shown.isprintable() else ""
    except (UnicodeDecodeError, IndexError):
        looks = ""
    if not looks:
        kinds = {b"PK\x03\x04": "a ZIP archive", b"\x1f\x8b": "a gzip file", b"BZh": "a bzip2 file",
                 b"\xfd7zXZ": "an xz file", b"%PDF": "a PDF document", b"\x89PNG": "a PNG image"}
        looks = next((f"it is {k}" for m, k in kinds.items() if head.startswith(m)), "its first bytes match none of them")
    raise InputError(f"{path}: not netCDF, HDF5, Zarr or GRIB at all ({looks}); give circtrack the data files "
                     "themselves (unpack archives first) or leave this file out, or pass --on-bad-file skip")


def _check_classic_complete(path):
    """A netCDF classic file cut short still opens and reads zeros past its end; check its length.

    The header states where every variable's data begins and how long it is; scipy's reader maps
    the file (nothing is read) and fails when the file is shorter than that.
    """
    with open(path, "rb") as f:
        magic = f.read(4)
    if magic not in _CLASSIC_MAGIC:
        return
    import gc

    from scipy.io import netcdf_file

    problem = None
    with warnings.catch_warnings():
        # scipy warns when a mapped file is freed while views on it exist; nothing is read here
        warnings.simplefilter("ignore")
        try:
            f = netcdf_file(path, "r", mmap=True)
            f.variables.clear()
            f.close()
            del f
        except (ValueError, TypeError, OSError, EOFError) as e:
            problem = str(e).splitlines()[0] if str(e) else type(e).__name__
            gc.collect()                   # free the half-built reader while the warning is ignored
    if problem is not None:
        raise InputError(f"{path}: netCDF classic file shorter than its header says ({os.path.getsize(path)} "
                         f"bytes; {problem}); the file is truncated: re-copy it, or pass --on-bad-file skip")
