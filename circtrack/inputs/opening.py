"""Opening one input: file path and config in, a lazily opened ``xarray.Dataset`` (or a plain
``netCDF4.Dataset`` for the fast read path) out.

The one place to touch for a new kind of input: :data:`SOURCES` picks the engine from the path
(netCDF through the configured engine, ``*.zarr`` through zarr, ``*.grib*`` through cfgrib with
its index files in :func:`grib_index_dir`), and :func:`open_dataset` turns every way of
failing to open into one :class:`~circtrack.errors.InputError` line. Also here: the netCDF chunk
cache, and the check that a netCDF classic file is as long as its header says. Time axes that
xarray cannot decode are handed to :mod:`circtrack.inputs.times`.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
import warnings

import xarray as xr

from circtrack.errors import InputError
from circtrack.inputs import times as T

NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".cdf", ".h5", ".hdf5")
ZARR_SUFFIXES = (".zarr",)
GRIB_SUFFIXES = (".grib", ".grib2", ".grb", ".grb2")

_CACHE_SET = False


def open_raw(path, cfg):
    """A plain ``netCDF4.Dataset`` for :meth:`~circtrack.inputs.readers.RoleReader.read_fast`, or None
    (other engines and sources)."""
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


def open_dataset(path, cfg) -> xr.Dataset:
    """Open lazily with an explicitly named engine; times decoded with cftime for every calendar.

    netCDF through the configured engine, ``*.zarr`` through zarr, ``*.grib*`` through cfgrib (index
    files in :func:`grib_index_dir`). Time axes xarray refuses are decoded where unambiguous by
    :func:`circtrack.inputs.times.reopen_undecoded` (year 0, "months since").
    """
    engine, extra = _engine_for(path, cfg)
    if engine == "netcdf4":
        _set_chunk_cache(cfg["run"]["chunk_cache_bytes"])
    if not os.path.exists(path):
        raise InputError(f"{path}: file not found; check the path")
    if os.path.isfile(path) and os.path.getsize(path) == 0:
        raise InputError(f"{path}: the file is empty; re-copy or re-download it, or pass --on-bad-file skip")
    if os.path.isfile(path):
        _check_classic_complete(path)
    coder = xr.coders.CFDatetimeCoder(use_cftime=True)
    try:
        # no pandas indexes: circtrack only reads coordinate values, and building indexes
        # took two thirds of the time of opening a small file
        with warnings.catch_warnings():
            # stores without consolidated metadata are read fine, only their opening is slower
            warnings.filterwarnings("ignore", message="Failed to open Zarr store with consolidated metadata")
            ds = xr.open_dataset(path, engine=engine, chunks=None, cache=False, decode_times=coder,
                                 decode_timedelta=False, create_default_indexes=False, **extra)
    except ValueError as e:
        # xarray's advice (decode_times=False, install cftime) is for library users, not for this command
        msg = str(e).splitlines()[0].split(" Try opening", 1)[0]
        ds = T.reopen_undecoded(path, engine, extra, cfg, coder, msg)
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
