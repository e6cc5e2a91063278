"""Opening one input lazily, detecting its coordinates and variables, and standardising roles.

Every role is read through a :class:`RoleReader` as ``(time, *extra, [plev], lat, lon)``, latitude
ascending, pressure in hPa ascending (top first), values in canonical units, one time chunk at a
time inside the worker that reduces it.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import re
import tempfile
import warnings
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from circtrack.errors import InputError
from circtrack.inputs import model_levels as ML
from circtrack.inputs import units as U
from circtrack.inputs.rules import COORDS, STREAM_NAMES, VARIABLES

GRIB_SUFFIXES = (".grib", ".grib2", ".grb", ".grb2")
PROVISIONAL = "provisional_data"

_CACHE_SET = False


def open_raw(path, cfg):
    """A plain ``netCDF4.Dataset`` for :meth:`RoleReader.read_fast`, or None (other engines)."""
    if cfg["run"]["netcdf_engine"] != "netcdf4" or not os.path.isfile(path) or \
            path.lower().endswith((".grib", ".grb", ".grib2", ".grb2")):
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


@dataclass
class Detected:
    """What was found in one input, for the engine, ``scan`` and the provenance sidecar."""

    path: str
    coords: dict = field(default_factory=dict)        # canonical -> name in the file
    variables: dict = field(default_factory=dict)     # role -> name in the file
    why: dict = field(default_factory=dict)           # role -> how it was found
    others: dict = field(default_factory=dict)        # role -> other candidates not chosen
    units: dict = field(default_factory=dict)         # role -> original units string
    plev_hpa: np.ndarray | None = None
    plev_units: str = ""
    lat: np.ndarray | None = None
    lon: np.ndarray | None = None
    times: np.ndarray | None = None
    calendar: str = "standard"
    extra_dims: dict = field(default_factory=dict)    # name -> coordinate values
    attrs: dict = field(default_factory=dict)
    problems: dict = field(default_factory=dict)      # role -> why it could not be used
    coord_why: dict = field(default_factory=dict)     # canonical coordinate -> how it was found
    vertical: str = "pressure"                         # "pressure" or "hybrid" (sigma-pressure model levels)
    hybrid: dict | None = None                         # coefficients and names of a hybrid level axis
    streams: dict | None = None                        # expver-like data streams (final / provisional)
    lon_keep: np.ndarray | None = None                 # longitude indices kept (repeated longitudes dropped)
    layout: dict = field(default_factory=dict)         # notes on the layout, for scan and the sidecar


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


def _engine_for(path, cfg):
    low = path.rstrip("/").lower()
    if low.endswith(".zarr"):
        return "zarr", {}
    if low.endswith(GRIB_SUFFIXES):
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
    return cfg["run"]["netcdf_engine"], {}


def open_dataset(path, cfg) -> xr.Dataset:
    """Open lazily with an explicitly named engine; times decoded with cftime for every calendar.

    netCDF through the configured engine, ``*.zarr`` through zarr, ``*.grib*`` through cfgrib (index
    files in :func:`grib_index_dir`). Time units "months since" are decoded where unambiguous (see
    :func:`_decode_months`).
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
        if "months since" in msg.lower():
            return _open_months_since(path, engine, extra, cfg, coder)
        if "time" in msg.lower() or "zero" in msg.lower():
            ds = _open_year_zero(path, engine, coder)
            if ds is not None:
                return ds
        if "time" in msg.lower() or "calendar" in msg.lower() or "units" in msg.lower():
            raise InputError(f"{path}: the time axis cannot be decoded ({msg}); fix its 'units'/'calendar' "
                             "attributes (e.g. 'days since 1979-01-01') or convert the file with CF time units")
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
    import warnings

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


YEAR_ZERO_CALENDAR = "proleptic_gregorian"
_YEAR_ZERO = re.compile(r"\bsince\s+0{1,4}-")
_MIXED_CALENDARS = {"", "standard", "gregorian", "julian"}


def year_zero_time(units, calendar):
    """True for a time axis counted from year 0 in a calendar that has no year 0 (CF 'standard',
    'gregorian', 'julian', or no calendar attribute), the usual layout of climatology files
    (e.g. 'hour since 0000-01-01 00:00:00')."""
    return bool(_YEAR_ZERO.search(str(units))) and str(calendar).strip().lower() in _MIXED_CALENDARS


def _open_year_zero(path, engine, coder):
    """Reopen a file whose time axis counts from year 0 and decode it in the proleptic Gregorian
    calendar with astronomical year numbering (year 0 exists, as ISO 8601 has it); None when the
    failure had another cause. The decision is recorded by :func:`detect` (``why['time']``)."""
    try:
        ds = xr.open_dataset(path, engine=engine, chunks=None, cache=False, decode_times=False,
                             decode_timedelta=False, create_default_indexes=False)
    except (ValueError, OSError, RuntimeError, KeyError, IndexError, TypeError):
        return None
    fixed = {}
    for name, var in ds.variables.items():
        if year_zero_time(var.attrs.get("units", ""), var.attrs.get("calendar", "")):
            v = var.copy()
            v.attrs["calendar"] = YEAR_ZERO_CALENDAR
            try:
                fixed[name] = coder.decode(v, name=name)
            except (ValueError, OverflowError):
                ds.close()
                return None
    if not fixed:
        ds.close()
        return None
    ds = ds.assign_coords({k: v for k, v in fixed.items() if k in ds.coords})
    for k, v in fixed.items():
        if k not in ds.coords:
            ds[k] = v
    ds.attrs["_circtrack_year_zero"] = ",".join(fixed)
    return ds


def _add_months(ref, months, calendar):
    import cftime
    k = ref.month - 1 + int(months)
    return cftime.datetime(ref.year + k // 12, k % 12 + 1, ref.day, ref.hour, ref.minute, ref.second,
                           calendar=calendar, has_year_zero=ref.has_year_zero)


def _decode_months(values, units, calendar, path, name, cfg):
    """Dates for "months since REF": exact in 360_day calendars (every month has 30 days) and for
    whole months from a reference day <= 28; other values only with run.fractional_months =
    "fraction-of-month" (the fraction of the month that follows the whole months)."""
    import cftime
    vals = np.asarray(values, dtype=float)
    if calendar == "360_day":
        return np.asarray(cftime.num2date(vals, units, calendar=calendar), dtype=object)
    ref = cftime.num2date(0.0, units.lower().replace("months", "days", 1), calendar=calendar)
    whole = np.all(np.abs(vals - np.round(vals)) < 1e-6)
    policy = str(cfg.get("run", {}).get("fractional_months", "refuse"))
    if whole and ref.day <= 28:
        return np.array([_add_months(ref, round(v), calendar) for v in vals], dtype=object)
    if policy != "fraction-of-month":
        bad = vals[np.abs(vals - np.round(vals)) >= 1e-6]
        why = (f"values that are not whole months (e.g. {bad[0]:g})" if bad.size
               else f"a reference day ({ref.day}) that not every month has")
        raise InputError(f"{path}: time '{name}' has units '{units}' in the {calendar} calendar with {why}, so the "
                         "dates are ambiguous; set fractional_months = \"fraction-of-month\" under [run] in a config "
                         "file (-c) to place each time by the fraction of its month, or convert the time axis to "
                         "'days since ...'")
    out = []
    for v in vals:
        m = int(np.floor(v))
        a = _add_months(ref.replace(day=1), m, calendar) + (ref - ref.replace(day=1))
        b = _add_months(ref.replace(day=1), m + 1, calendar) + (ref - ref.replace(day=1))
        out.append(a + (b - a) * float(v - m))
    return np.array(out, dtype=object)


def _open_months_since(path, engine, extra, cfg, coder):
    """Reopen without time decoding and decode "months since" ourselves (one clear error if ambiguous)."""
    try:
        ds = xr.open_dataset(path, engine=engine, chunks=None, cache=False, decode_times=False,
                             decode_timedelta=False, create_default_indexes=False, **extra)
    except (ValueError, OSError, RuntimeError, KeyError, IndexError, TypeError) as e:
        raise InputError(f"{path}: cannot be opened with the {engine} engine ({str(e).splitlines()[0]}); check "
                         "that it is a complete netCDF/Zarr file, or pass --on-bad-file skip")
    try:
        return _decode_times_ourselves(ds, path, cfg, coder)
    except InputError:
        ds.close()
        raise
    except (ValueError, OverflowError) as e:
        ds.close()
        raise InputError(f"{path}: the time axis cannot be decoded ({str(e).splitlines()[0]}); fix its "
                         "'units'/'calendar' attributes or convert the file with CF time units ('days since ...')")


def _decode_times_ourselves(ds, path, cfg, coder):
    """The dataset opened with decode_times=False: "months since" by :func:`_decode_months`, other
    time variables by xarray's coder."""
    new = {}
    for name, var in ds.variables.items():
        units = str(var.attrs.get("units", ""))
        if " since " not in units.lower():
            continue
        calendar = str(var.attrs.get("calendar", "standard")).lower()
        if units.lower().strip().startswith("months"):
            dates = _decode_months(var.values, units, calendar, path, name, cfg)
            attrs = {k: v for k, v in var.attrs.items() if k not in ("units", "calendar")}
            v = xr.Variable(var.dims, dates, attrs)
            v.encoding.update({"units": units, "calendar": calendar})
            new[name] = v
        else:
            new[name] = coder.decode(var, name=name)
    return ds.assign_coords({k: v for k, v in new.items() if k in ds.coords}).assign(
        {k: v for k, v in new.items() if k not in ds.coords})


def _attr(obj, name):
    v = obj.attrs.get(name, "")
    return str(v) if v is not None else ""


def _find_coord(ds, key, taken=()):
    """``(name, why)`` of the dimension playing the part ``key`` (time, lat, lon, plev), or ``(None, "")``."""
    rule = COORDS[key]
    dims = [d for d in ds.dims if d not in taken]
    # 1. exact names, 2. standard_name, 3. axis attribute, 4. units
    for name in rule["names"]:
        if name in dims:
            return name, f"named '{name}'"
    lower = {str(d).lower(): d for d in dims}
    for name in rule["names"]:
        if name.lower() in lower:
            return lower[name.lower()], f"named '{lower[name.lower()]}' (case-insensitive)"
    for d in dims:
        if d in ds.variables and _attr(ds[d], "standard_name") in rule["standard_names"]:
            return d, f"standard_name '{_attr(ds[d], 'standard_name')}'"
    for d in dims:
        if d in ds.variables and _attr(ds[d], "axis").upper() == rule["axis"]:
            if key != "plev" or U.is_pressure(_attr(ds[d], "units")):
                return d, f"axis attribute '{rule['axis']}'"
    for d in dims:
        if d not in ds.variables:
            continue
        u = _attr(ds[d], "units").lower().replace(" ", "")
        if key in ("lat", "lon") and u in rule["units"]:
            return d, f"units '{_attr(ds[d], 'units')}'"
        if key == "plev" and U.is_pressure(u):
            return d, f"pressure units '{_attr(ds[d], 'units')}'"
        if key == "time" and "since" in u:
            return d, f"time units '{_attr(ds[d], 'units')}'"
        if key == "time" and d in ds.variables and ds[d].dtype == object and ds[d].size \
                and hasattr(ds[d].values.flat[0], "calendar"):
            return d, "decoded dates"
    return None, ""


def _is_final_stream(label):
    """ERA-style experiment versions: 1 ("0001") is the final product, anything else provisional."""
    if isinstance(label, bytes):
        label = label.decode(errors="replace")
    try:
        return int(str(label).strip()) == 1
    except ValueError:
        return False


def _label(x):
    return x.decode(errors="replace").strip() if isinstance(x, bytes) else str(x).strip()


def _detect_streams(ds, det):
    """An ``expver`` dimension (two streams, NaN where a stream has no data) or coordinate along time."""
    names = [n for n in list(ds.dims) + list(ds.coords) if str(n).lower() in STREAM_NAMES]
    if not names:
        return
    name = names[0]
    tdim = det.coords.get("time")
    if name in ds.dims and ds.sizes[name] > 1:
        labels = [_label(x) for x in (ds[name].values if name in ds.variables else range(ds.sizes[name]))]
        final = [_is_final_stream(x) for x in labels]
        order = sorted(range(len(labels)), key=lambda k: (not final[k], labels[k]))
        det.streams = {"name": name, "kind": "dim", "labels": labels, "final": final, "order": order}
        det.layout["streams"] = (f"'{name}' dimension with streams {', '.join(labels)}: per time step the final "
                                 f"stream ({', '.join(l for l, f in zip(labels, final) if f) or 'none'}) is used "
                                 f"where it has data, else the next; time steps taken from another stream are flagged '{PROVISIONAL}'")
    elif name in ds.variables and tdim is not None and ds[name].dims == (tdim,):
        along = [_label(x) for x in np.asarray(ds[name].values).ravel()]
        det.streams = {"name": name, "kind": "coord", "labels_along_time": along}
        labels = sorted(set(along))
        det.layout["streams"] = (f"'{name}' along time with values {', '.join(labels)}: time steps of "
                                 f"provisional streams are flagged '{PROVISIONAL}'")
    elif name in ds.variables and ds[name].size == 1:
        label = _label(np.asarray(ds[name].values).ravel()[0])
        if not _is_final_stream(label):
            det.streams = {"name": name, "kind": "scalar"}
            det.layout["streams"] = f"'{name}' = {label}: a provisional stream; every time step is flagged '{PROVISIONAL}'"


def _detect_hybrid(ds, det, name):
    """Coefficients of a hybrid sigma-pressure axis from its formula_terms (nothing else is read)."""
    pv = ds[name]
    ft = _attr(pv, "formula_terms")
    det.vertical = "hybrid"
    terms = ML.parse_formula_terms(ft)
    missing = [t for t in terms.values() if t not in ds.variables]
    if not ft or "b" not in terms or "ps" not in terms or not ("ap" in terms or ("a" in terms and "p0" in terms)):
        det.problems["vertical"] = (f"level '{name}' is a hybrid sigma-pressure coordinate but its formula_terms "
                                    f"('{ft}') do not name ap (or a and p0), b and ps; add them, e.g. ncatted -a "
                                    f"formula_terms,{name},o,c,'ap: ap b: b ps: ps' {det.path}")
        return
    if terms["ps"] in missing:
        det.problems["vertical"] = (f"level '{name}' is a hybrid sigma-pressure coordinate whose surface pressure "
                                    f"'{terms['ps']}' (formula_terms) is not in the file; put ps into the same file "
                                    f"(e.g. cdo merge) so each time step can be converted to pressure")
        return
    if missing:
        det.problems["vertical"] = (f"formula_terms of level '{name}' name {', '.join(missing)}, which the file lacks; "
                                    "add the coefficients or fix the attribute")
        return

    def pa(var):
        conv = U.conversion(_attr(ds[var], "units") or "Pa", "pressure")
        if conv is None:
            raise InputError(f"{det.path}: '{var}' (formula_terms of '{name}') has units '{_attr(ds[var], 'units')}'; "
                             "give it pressure units (Pa)")
        return np.asarray(ds[var].values, float) * conv[0] * 100.0

    b = np.asarray(ds[terms["b"]].values, float)
    if "ap" in terms:
        a, p0, form = pa(terms["ap"]), None, "ap + b*ps"
    else:
        a, p0, form = np.asarray(ds[terms["a"]].values, float), float(np.ravel(pa(terms["p0"]))[0]), "a*p0 + b*ps"
    ps = terms["ps"]
    ref = (a * (p0 if p0 is not None else 1.0)) + b * 100000.0
    det.hybrid = {"name": name, "form": form, "a": a.tolist(), "b": b.tolist(), "p0": p0, "ps": ps,
                  "ps_units": _attr(ds[ps], "units"), "reference_hpa": (ref / 100.0).tolist()}
    det.plev_hpa = ref / 100.0
    det.plev_units = f"hybrid sigma-pressure ({form}; formula_terms '{ft}')"
    det.layout["vertical"] = (f"'{name}': hybrid sigma-pressure levels, p = {form} from formula_terms, "
                              "interpolated to pressure levels linearly in log p per time chunk")


def detect(ds, path, overrides=None) -> Detected:
    """Find coordinates and every role the rules know; nothing is read except coordinates.

    ``overrides`` maps roles (and the coordinates ``time``, ``lat``, ``lon``, ``plev``) to names.
    """
    overrides = overrides or {}
    det = Detected(path=path, attrs={k: str(v) for k, v in ds.attrs.items()
                                     if k in ("source_id", "experiment_id", "variant_label", "member_id", "realization",
                                              "ensemble_member", "title", "institution")})
    taken = []
    for key in ("time", "lat", "lon", "plev"):
        forced = overrides.get(key)
        if forced:
            if forced in ds.dims:
                name, why = forced, "set by --var/config"
            else:
                det.problems[key] = (f"dimension '{forced}' given for {key} is not in the file; dimensions there: "
                                     f"{', '.join(map(str, ds.dims))}")
                continue
        else:
            name, why = _find_coord(ds, key, taken)
        if name:
            det.coords[key] = name
            det.coord_why[key] = why
            taken.append(name)
    if "lat" in det.coords:
        det.lat = np.asarray(ds[det.coords["lat"]].values, dtype=float) if det.coords["lat"] in ds.variables else None
        if det.lat is None:
            det.problems["lat"] = f"dimension '{det.coords['lat']}' has no coordinate values"
            del det.coords["lat"]
        elif _in_radians(ds[det.coords["lat"]]):
            det.lat = np.rad2deg(det.lat)
            det.coord_why["lat"] = det.coord_why.get("lat", "") + " (values in radians, converted to degrees)"
    if "lon" in det.coords:
        lon = np.asarray(ds[det.coords["lon"]].values, dtype=float)
        if _in_radians(ds[det.coords["lon"]]):
            lon = np.rad2deg(lon)
            det.coord_why["lon"] = det.coord_why.get("lon", "") + " (values in radians, converted to degrees)"
        key = np.round(np.mod(lon, 360.0), 6)
        _, first = np.unique(key, return_index=True)
        if first.size < lon.size and np.all(np.isfinite(lon)):
            det.lon_keep = np.sort(first)
            lon = lon[det.lon_keep]
            det.layout["longitude"] = (f"{lon.size + 0} distinct longitudes of {key.size}: repeated longitudes "
                                       "(e.g. a cyclic column at 0 and 360) are read once")
        det.lon = lon
    if "time" in det.coords:
        tv = ds[det.coords["time"]]
        det.times = np.asarray(tv.values)
        det.calendar = str(tv.encoding.get("calendar", tv.attrs.get("calendar", "standard")))
        if det.times.size == 0:
            raise InputError(f"{path}: the time axis '{det.coords['time']}' holds no time steps; the file may be "
                             "incomplete: re-copy it, or pass --on-bad-file skip")
        if det.coords["time"] in str(ds.attrs.get("_circtrack_year_zero", "")).split(","):
            units = _attr(tv, "units") or tv.encoding.get("units", "")
            det.why["time"] = (f"'{det.coords['time']}' counts from year 0 ('{units}'), which its calendar lacks; "
                               f"decoded as {YEAR_ZERO_CALENDAR} with year 0 (climatology)")
        if det.times.size and not hasattr(det.times.flat[0], "calendar"):
            raise InputError(f"{path}: time variable '{det.coords['time']}' has no decodable units "
                             f"('{_attr(tv, 'units')}'); give it CF units such as 'days since 2000-01-01'")
    if "plev" in det.coords:
        pv = ds[det.coords["plev"]]
        if (_attr(pv, "standard_name") in ML.HYBRID_STANDARD_NAMES
                or "b" in ML.parse_formula_terms(_attr(pv, "formula_terms"))):
            _detect_hybrid(ds, det, det.coords["plev"])
        else:
            det.plev_units = _attr(pv, "units")
            conv = U.conversion(det.plev_units, "pressure")
            if conv is None and det.plev_units.strip():
                # units that are not pressure (e.g. 'degC', or '1' for model levels): never guess
                det.problems["plev"] = (f"vertical axis '{det.coords['plev']}' has units '{det.plev_units}', which "
                                        "are not pressure units; set its units attribute to 'Pa' or 'hPa' (e.g. "
                                        f"ncatted -a units,{det.coords['plev']},o,c,hPa) if it holds pressure levels")
            elif conv is None:
                vals = np.asarray(pv.values, float)
                # no units at all: decide by magnitude (recorded in the sidecar as '... (by magnitude)')
                conv = (0.01, 0.0) if np.nanmax(vals) > 2000 else (1.0, 0.0)
                det.plev_units = "Pa (by magnitude)" if conv[0] == 0.01 else "hPa (by magnitude)"
            if conv is not None:
                det.plev_hpa = np.round(np.asarray(pv.values, float) * conv[0], 6)
    _detect_streams(ds, det)
    core = {det.coords.get(k) for k in ("time", "lat", "lon", "plev")} - {None}
    if det.streams and det.streams["kind"] == "dim":
        core.add(det.streams["name"])
    for role, rule in VARIABLES.items():
        _detect_role(ds, det, role, rule, overrides.get(role))
    _suggest(ds, det)
    extra = set()
    for role, name in det.variables.items():
        for d in ds[name].dims:
            if d not in core and ds.sizes[d] > 1:
                extra.add(d)
    for d in sorted(extra):
        det.extra_dims[d] = np.asarray(ds[d].values) if d in ds.variables else np.arange(ds.sizes[d])
    return det


def _in_radians(var):
    u = _attr(var, "units").strip().lower()
    return u in ("radian", "radians", "rad")


def require_axes(det):
    """The time, latitude and longitude axes every metric needs, or one clear error naming the fix."""
    path = det.path
    if "time" not in det.coords:
        raise InputError(f"{path}: no time axis found; name it 'time' or give it CF units ('days since ...')")
    for key in ("lat", "lon"):
        if key not in det.coords:
            raise InputError(f"{path}: no {'latitude' if key == 'lat' else 'longitude'} axis found; name it "
                             f"'{key}' or give it units '{'degrees_north' if key == 'lat' else 'degrees_east'}'")


RANK_WORDS = {0: "a CF standard_name match", 1: "an exact name match", 2: "a case-insensitive name match"}


def _detect_role(ds, det, role, rule, override):
    lat, lon, plev = det.coords.get("lat"), det.coords.get("lon"), det.coords.get("plev")
    if override:
        if override not in ds.data_vars:
            det.problems[role] = (f"variable '{override}' given for {role} is not in the file; "
                                  f"variables there: {', '.join(map(str, ds.data_vars))}")
            return
        det.variables[role], det.why[role] = override, "set by --var/config"
        det.units[role] = _attr(ds[override], "units")
        return

    def shape_ok(name):
        dims = ds[name].dims
        if lat not in dims or lon not in dims:
            return False
        has_lev = plev is not None and plev in dims and ds.sizes[plev] > 1
        return has_lev if rule["levels"] else not has_lev

    found, wrong_shape = [], []
    lower_names = [n.lower() for n in rule["names"]]
    for name in ds.data_vars:
        sn = _attr(ds[name], "standard_name")
        if sn in rule["standard_names"]:
            cand = (0, rule["standard_names"].index(sn), name, f"standard_name '{sn}'")
        elif name in rule["names"]:
            cand = (1, rule["names"].index(name), name, f"variable name '{name}'")
        elif str(name).lower() in lower_names:
            cand = (2, lower_names.index(str(name).lower()), name, f"variable name '{name}' (case-insensitive)")
        else:
            continue
        (found if shape_ok(name) else wrong_shape).append(cand)
    if not found:
        if wrong_shape and role not in det.problems:
            names = ", ".join(f"'{c[2]}' {tuple(map(str, ds[c[2]].dims))}" for c in wrong_shape)
            need = "pressure levels" if rule["levels"] else "no level axis"
            if lat is None or lon is None:
                need = "latitude and longitude axes"
            det.problems[role] = f"{names} matched by name but not by shape ({role} needs {need})"
        return
    found.sort(key=lambda t: (t[0], t[1], str(t[2])))
    best = found[0]
    det.variables[role] = best[2]
    det.why[role] = best[3]
    det.others[role] = [f[2] for f in found[1:]]
    if len(found) > 1:
        reasons = []
        for f in found[1:]:
            if f[0] > best[0]:
                reasons.append(f"'{f[2]}' ({f[3]}): {RANK_WORDS[best[0]]} ranks above {RANK_WORDS[f[0]]}")
            elif f[1] > best[1]:
                reasons.append(f"'{f[2]}' ({f[3]}): comes later in the preference list of {role}")
            else:
                reasons.append(f"'{f[2]}' ({f[3]}): same rank, '{best[2]}' comes first alphabetically")
        det.why[role] += "; chosen over " + "; ".join(reasons)
    det.units[role] = _attr(ds[best[2]], "units")


def _suggest(ds, det):
    """For roles not found: unassigned variables whose units and shape fit, as the exact line to add."""
    lat, lon, plev = det.coords.get("lat"), det.coords.get("lon"), det.coords.get("plev")
    if lat is None or lon is None:
        return
    assigned = set(det.variables.values()) | {n for names in det.others.values() for n in names}
    for role, rule in VARIABLES.items():
        if role in det.variables:
            continue
        fits = []
        for name in ds.data_vars:
            v = ds[name]
            if name in assigned or lat not in v.dims or lon not in v.dims:
                continue
            has_lev = plev is not None and plev in v.dims and ds.sizes[plev] > 1
            if has_lev != rule["levels"] or U.conversion(_attr(v, "units"), rule["kind"]) is None:
                continue
            if not _attr(v, "units"):          # no units: "fits" any dimensionless kind, too weak a hint
                continue
            if rule["kind"] != "speed" and U.conversion(_attr(v, "units"), "speed") is not None:
                continue                       # "m/s" is a wind before it is a water flux
            fits.append(str(name))
        if fits:
            where = "on pressure levels" if rule["levels"] else "without a level axis"
            lines = " or ".join(f"--var {role}={n}" for n in fits)
            hint = (f"{', '.join(repr(n) for n in fits)} {'fits' if len(fits) == 1 else 'fit'} by units and "
                    f"shape ({where}): {lines}")
            det.problems[role] = (f"{det.problems[role]}; {hint}" if role in det.problems
                                  else f"no name or standard_name matched; {hint}")


def model_level_targets(det, levels_hpa, cfg):
    """Pressure levels (hPa, ascending) a hybrid-level role is interpolated to.

    The levels the metrics ask for, else ``run.model_level_targets_hpa`` down from the model top (a
    level above the top of the columns would be empty everywhere)."""
    if levels_hpa is not None:
        return np.array(sorted({float(x) for x in levels_hpa}))
    top = float(np.min(det.plev_hpa))
    want = np.array(sorted({float(x) for x in cfg["run"]["model_level_targets_hpa"]}))
    return want[want >= top * (1 - 1e-9)]


def _lat_lon_selection(det):
    """Selections that make latitude ascending and drop repeated longitudes (checked first)."""
    path, c = det.path, det.coords
    lat = det.lat
    if not np.all(np.isfinite(lat)) or np.any(np.abs(lat) > 90.0 + 1e-6):
        raise InputError(f"{path}: latitude '{c['lat']}' has missing or out-of-range values (|lat| > 90); fix the coordinate")
    if np.unique(lat).size != lat.size:
        raise InputError(f"{path}: latitude '{c['lat']}' has duplicated values; fix the coordinate")
    if not np.all(np.isfinite(det.lon)):
        raise InputError(f"{path}: longitude '{c['lon']}' has missing values; fix the coordinate")
    sel = {}
    order = np.argsort(lat)
    if np.array_equal(order, np.arange(lat.size)[::-1]):
        sel[c["lat"]] = (None, None, -1)          # descending: a reversed slice reads fastest
    elif not np.array_equal(order, np.arange(lat.size)):
        sel[c["lat"]] = order
    if det.lon_keep is not None:
        sel[c["lon"]] = det.lon_keep
    return sel


def _plain(sel):
    return {d: (v.tolist() if isinstance(v, np.ndarray) else v) for d, v in sel.items()}


def standardise(ds, det: Detected, role, levels_hpa, cfg):
    """How to read the role in the canonical layout and units: a :class:`RoleReader`.

    ``levels_hpa``: None for every level, else the wanted levels; the nearest level within the
    tolerance is taken, or the two levels bracketing a wanted level (for log-p interpolation).
    On hybrid sigma-pressure levels the reader interpolates to exactly the wanted levels (or
    ``run.model_level_targets_hpa``) inside each time chunk.
    Returns ``(RoleReader, plev_hpa or None)``; nothing is read here.
    """
    path = det.path
    name = det.variables[role]
    rule = VARIABLES[role]
    da = ds[name]
    c = det.coords
    for need in ("time", "lat", "lon"):
        if need not in c or c[need] not in da.dims:
            what = {"time": "a time axis", "lat": "a latitude axis", "lon": "a longitude axis"}[need]
            raise InputError(f"{path}: variable '{name}' ({role}) has no {what}; name its dimension "
                             f"'{need}' or give it CF attributes (standard_name/units), or add "
                             f"'{need} = \"DIM\"' under [variables] in a config file")
    if rule["levels"] and "plev" in det.problems:
        raise InputError(f"{path}: variable '{name}' ({role}): {det.problems['plev']}")
    conv = U.conversion(det.units.get(role, ""), rule["kind"])
    if conv is None:
        raise InputError(f"{path}: variable '{name}' ({role}) has units '{det.units.get(role, '')}', which circtrack "
                         f"does not know for {rule['kind'].replace('_', ' ')}; if the values are in "
                         f"{U.CANONICAL[rule['kind']]}, set the attribute (ncatted -a units,{name},o,c,"
                         f"'{U.CANONICAL[rule['kind']]}'), otherwise convert the values first, or name the right "
                         f"variable with --var {role}=NAME")
    streams = det.streams
    stream_dim = streams["name"] if streams and streams["kind"] == "dim" and streams["name"] in da.dims else None
    sel = {}
    # squeeze size-1 dimensions that are not core (e.g. height = 10 m, number = 0)
    for d in list(da.dims):
        if d not in (c["time"], c["lat"], c["lon"], c.get("plev")) and da.sizes[d] == 1:
            sel[d] = 0
            da = da.isel({d: 0}, drop=True)
    sel.update(_lat_lon_selection(det))
    plev_out = None
    hybrid = None
    level_dims = []
    if rule["levels"]:
        level_dims = [c["plev"]]
        if det.vertical == "hybrid":
            if det.problems.get("vertical") or det.hybrid is None:
                raise InputError(f"{path}: {role} '{name}': {det.problems.get('vertical', 'hybrid levels not understood')}")
            h = det.hybrid
            targets = model_level_targets(det, levels_hpa, cfg)
            if targets.size == 0:
                raise InputError(f"{path}: no pressure level of run.model_level_targets_hpa lies below the model top "
                                 f"({np.min(det.plev_hpa):g} hPa); add lower levels to run.model_level_targets_hpa")
            ps_reader = _surface_reader(ds, det, h["ps"])
            idx = ML.levels_needed(h["a"], h["b"], targets * 100.0, h["p0"])
            sel[c["plev"]] = idx
            hybrid = {"a": np.asarray(h["a"])[idx].tolist(), "b": np.asarray(h["b"])[idx].tolist(), "p0": h["p0"],
                      "ps": ps_reader, "targets_pa": (targets * 100.0).tolist()}
            plev_out = targets
        else:
            if det.problems.get("plev") or det.plev_hpa is None:
                raise InputError(f"{path}: {role} '{name}': {det.problems.get('plev', 'no pressure levels found')}")
            p = det.plev_hpa
            if np.nanmax(p) > 1500.0:
                raise InputError(f"{path}: pressure levels of '{c['plev']}' reach {np.nanmax(p):g} hPa, more than any "
                                 f"real atmosphere: the values look like Pa while its units say '{det.plev_units}'; "
                                 f"set its units attribute to 'Pa' (e.g. ncatted -a units,{c['plev']},o,c,Pa)")
            if levels_hpa is None:
                idx = np.argsort(p)
            else:
                idx = set()
                tol = cfg["run"]["level_tolerance_hpa"]
                for want in levels_hpa:
                    k = int(np.argmin(np.abs(p - want)))
                    if abs(p[k] - want) <= tol:
                        idx.add(k)
                    else:
                        below, above = np.flatnonzero(p < want), np.flatnonzero(p > want)
                        if below.size and above.size:
                            idx.add(int(below[np.argmax(p[below])]))
                            idx.add(int(above[np.argmin(p[above])]))
                idx = np.array(sorted(idx, key=lambda k: p[k]), dtype=int)
                if idx.size == 0:
                    idx = np.argsort(p)[:1]
            sel[c["plev"]] = idx
            plev_out = p[idx]
    extra = [d for d in da.dims if d not in (c["time"], c["lat"], c["lon"], c.get("plev"), stream_dim)]
    order_dims = [c["time"]] + ([stream_dim] if stream_dim else []) + extra + level_dims + [c["lat"], c["lon"]]
    reader = RoleReader(path=path, role=role, name=name, time_dim=c["time"], dims=order_dims,
                        selection=_plain(sel), factor=float(conv[0]), offset=float(conv[1]), plev=plev_out,
                        ntime=int(ds.sizes[c["time"]]), stream=_stream_spec(streams, stream_dim), hybrid=hybrid)
    return reader, plev_out


def _stream_spec(streams, stream_dim):
    if not streams:
        return None
    if streams["kind"] == "dim":
        if stream_dim is None:
            return None
        return {"kind": "dim", "order": list(streams["order"]), "final": list(streams["final"])}
    return {"kind": streams["kind"], "name": streams["name"]}


def _surface_reader(ds, det, name):
    """A reader of the surface pressure that hybrid levels need (hPa, same grid order as the field)."""
    path, c = det.path, det.coords
    if name not in ds.variables or c["lat"] not in ds[name].dims or c["lon"] not in ds[name].dims \
            or c["time"] not in ds[name].dims:
        raise InputError(f"{path}: surface pressure '{name}' (formula_terms of '{det.hybrid['name']}') needs time, "
                         "latitude and longitude axes; put a ps(time, lat, lon) field into the file")
    conv = U.conversion(_attr(ds[name], "units") or "Pa", "pressure")
    if conv is None:
        raise InputError(f"{path}: surface pressure '{name}' has units '{_attr(ds[name], 'units')}'; give it 'Pa'")
    da = ds[name]
    streams = det.streams
    stream_dim = streams["name"] if streams and streams["kind"] == "dim" and streams["name"] in da.dims else None
    sel = {}
    for d in list(da.dims):
        if d not in (c["time"], c["lat"], c["lon"]) and da.sizes[d] == 1:
            sel[d] = 0
            da = da.isel({d: 0}, drop=True)
    sel.update(_lat_lon_selection(det))
    extra = [d for d in da.dims if d not in (c["time"], c["lat"], c["lon"], stream_dim)]
    dims = [c["time"]] + ([stream_dim] if stream_dim else []) + extra + [c["lat"], c["lon"]]
    return RoleReader(path=path, role="ps", name=name, time_dim=c["time"], dims=dims, selection=_plain(sel),
                      factor=float(conv[0]), offset=float(conv[1]), ntime=int(ds.sizes[c["time"]]),
                      stream=_stream_spec(streams, stream_dim))


# near-surface roles that may be taken from the lowest pressure level of a 3-D field
SURFACE_SUBSTITUTES = {"uas": "ua", "vas": "va"}


def lowest_level_substitute(ds, det, role, cfg):
    """A reader for ``role`` (e.g. uas) made from the highest-pressure level of its 3-D counterpart
    (ua), or None. ``det.variables``/``det.why`` record the substitution for the sidecar."""
    src = SURFACE_SUBSTITUTES.get(role)
    if src is None or src not in det.variables or det.plev_hpa is None or not np.isfinite(det.plev_hpa).any():
        return None
    p = float(np.nanmax(det.plev_hpa))
    reader, _ = standardise(ds, det, src, [p], cfg)
    plev_dim = det.coords["plev"]
    k = int(np.flatnonzero(det.plev_hpa == p)[0])
    reader = dataclasses.replace(reader, role=role, dims=[d for d in reader.dims if d != plev_dim],
                                 selection={**reader.selection, plev_dim: k}, plev=None)
    det.variables[role] = det.variables[src]
    det.units[role] = det.units.get(src, "")
    det.why[role] = (f"no near-surface wind in the file: the lowest pressure level of {src} "
                     f"('{det.variables[src]}' at {p:g} hPa) stands in for {role}")
    return reader


@dataclass
class RoleReader:
    """How to read one role of one file in the canonical layout, as plain picklable data.

    Worker processes receive readers, open the file themselves and call :meth:`read` per time
    chunk, so nothing but a path and a few indices crosses process boundaries and nothing is read
    before the chunk's task runs. ``read`` returns ``(time, *extra, [plev], lat, lon)`` with latitude
    ascending, levels ascending in hPa, values in canonical units (the file's float type when no
    conversion is needed, float64 otherwise).

    Layout work that needs data happens here, for the chunk only: combining data streams (final
    preferred over provisional per time step, :meth:`read_noted` says which time steps used
    provisional data) and interpolating hybrid model levels to pressure with the chunk's surface
    pressure.
    """

    path: str
    role: str
    name: str
    time_dim: str
    dims: list                      # the variable's dims in output order
    selection: dict                 # dim -> int (squeezed), slice or list of indices
    factor: float = 1.0
    offset: float = 0.0
    plev: np.ndarray | None = None
    ntime: int = 0
    stream: dict | None = None      # {"kind": "dim", "order", "final"} | {"kind": "coord"|"scalar", "name"}
    hybrid: dict | None = None      # {"a", "b", "p0", "ps": RoleReader, "targets_pa"}

    def read(self, ds, t0, t1):
        return self.read_noted(ds, t0, t1)[0]

    def read_fast(self, nc, t0, t1):
        """The same array as :meth:`read`, straight from a ``netCDF4.Dataset`` without xarray's
        decoding passes; None when the variable needs more than that (packed values, data streams,
        model levels), and the caller takes :meth:`read_noted`.

        Contiguous level runs are read as one hyperslab and reversed as a view; scattered levels
        one by one (each level is a whole HDF5 chunk in usual layouts, so nothing is decoded twice).
        Fill and missing values become NaN in place, as CF decoding would do.
        """
        if self.stream is not None or self.hybrid is not None or self.name not in nc.variables:
            return None
        var = nc.variables[self.name]
        if var.dtype.kind != "f" or any(a in var.ncattrs() for a in ("scale_factor", "add_offset")):
            return None
        var.set_auto_maskandscale(False)
        index, post = [], []
        for d in var.dimensions:
            if d == self.time_dim:
                index.append(slice(int(t0), int(t1)))
                post.append(slice(None))
                continue
            v = self.selection.get(d)
            if v is None:
                index.append(slice(None))
                post.append(slice(None))
            elif isinstance(v, int):
                index.append(v)
            elif isinstance(v, tuple):                       # (None, None, -1): reversed
                index.append(slice(None))
                post.append(slice(None, None, -1))
            else:
                ids = [int(k) for k in v]
                lo, hi = min(ids), max(ids)
                if ids == list(range(lo, hi + 1)):
                    index.append(slice(lo, hi + 1))
                    post.append(slice(None))
                elif ids == list(range(hi, lo - 1, -1)):
                    index.append(slice(lo, hi + 1))
                    post.append(slice(None, None, -1))
                elif len(ids) > 64:                          # e.g. shuffled latitudes: read all, reorder
                    index.append(slice(None))
                    post.append(np.asarray(ids))
                else:
                    index.append(ids)                        # read level by level, in this order
                    post.append(slice(None))
        scattered = [k for k, i in enumerate(index) if isinstance(i, list)]
        if scattered:
            # netCDF4 reads an index list element by element along the other axes (measured 60x
            # slower than one hyperslab per level), so read each level as its own hyperslab
            k = scattered[0]
            ids = index[k]
            first = var[tuple(index[:k] + [ids[0]] + index[k + 1:])]
            axis = sum(1 for i in index[:k] if not isinstance(i, int))
            arr = np.empty(first.shape[:axis] + (len(ids),) + first.shape[axis:], dtype=first.dtype)
            for j, lev in enumerate(ids):
                part = first if j == 0 else var[tuple(index[:k] + [lev] + index[k + 1:])]
                arr[(slice(None),) * axis + (j,)] = part
            index[k] = slice(0, len(ids))                    # now a plain axis of arr
        else:
            arr = var[tuple(index)]
        for k, p in enumerate(post):                         # reversed axes as views
            if isinstance(p, np.ndarray):
                arr = np.take(arr, p, axis=k)
            elif p.step == -1:
                arr = arr[(slice(None),) * k + (p,)]
        for attr in ("_FillValue", "missing_value"):
            if attr in var.ncattrs():
                for fv in np.atleast_1d(var.getncattr(attr)):
                    if np.isfinite(fv):
                        arr[arr == arr.dtype.type(fv)] = np.nan
        kept = [d for d, i in zip(var.dimensions, index) if not isinstance(i, int)]
        if kept != list(self.dims):
            arr = np.transpose(arr, [kept.index(d) for d in self.dims])
        if self.factor != 1.0 or self.offset != 0.0:
            arr = arr.astype(np.float64) * self.factor + self.offset
        return arr

    def read_noted(self, ds, t0, t1):
        """``(array, notes)``: the chunk and a note per time step ("" or e.g. ``provisional_data``)."""
        var = ds[self.name]
        sel = {d: (slice(*v) if isinstance(v, tuple) else v) for d, v in self.selection.items()}
        sel[self.time_dim] = slice(int(t0), int(t1))
        lists = [d for d, v in sel.items() if isinstance(v, list) and len(v) <= 64]
        if lists:
            # an index list reaches netCDF4 as one element-by-element read (tens of times slower
            # than a hyperslab per level): read level by level and stack
            d = lists[0]
            parts = [np.asarray(var.isel({**sel, d: k}).transpose(*[x for x in self.dims if x != d]).values)
                     for k in sel[d]]
            arr = np.stack(parts, axis=self.dims.index(d))
        else:
            arr = np.asarray(var.isel(sel).transpose(*self.dims).values)
        notes = np.full(arr.shape[0], "", dtype=object)
        st = self.stream
        if st and st["kind"] == "dim":
            arr, provisional = _combine_streams(arr, st["order"], st["final"])
            notes[provisional] = PROVISIONAL
        elif st and st["kind"] == "coord":
            labels = np.asarray(ds[st["name"]].isel({self.time_dim: slice(int(t0), int(t1))}).values).ravel()
            notes[[not _is_final_stream(x) for x in labels]] = PROVISIONAL
        elif st and st["kind"] == "scalar":
            notes[:] = PROVISIONAL
        if self.factor != 1.0 or self.offset != 0.0:
            arr = arr.astype(np.float64) * self.factor + self.offset
        elif not np.issubdtype(arr.dtype, np.floating):
            arr = arr.astype(np.float64)
        if self.hybrid is not None:
            h = self.hybrid
            ps, ps_notes = h["ps"].read_noted(ds, t0, t1)
            ps_pa = np.asarray(ps, float) * 100.0
            n_extra = arr.ndim - 4 - ps_pa.ndim + 3
            if n_extra > 0:                              # ps without the field's extra dims: broadcast
                ps_pa = ps_pa.reshape(ps_pa.shape[:1] + (1,) * n_extra + ps_pa.shape[1:])
            p = ML.column_pressure(h["a"], h["b"], ps_pa, h["p0"])
            arr = ML.interpolate_log_p(arr, p, h["targets_pa"], axis=-3)
            notes = merge_notes([notes, ps_notes])
        return arr, notes


def _combine_streams(arr, order, final):
    """``(t, E, ...)`` -> ``(t, ...)``: per time step the first stream in ``order`` holding any data."""
    nt, ne = arr.shape[:2]
    if np.issubdtype(arr.dtype, np.floating):
        has = np.isfinite(arr.reshape(nt, ne, -1)).any(axis=2)
    else:
        has = np.ones((nt, ne), dtype=bool)
    pick = np.full(nt, order[0], dtype=int)
    for e in reversed(order):
        pick = np.where(has[:, e], e, pick)
    out = arr[np.arange(nt), pick]
    return out, ~np.asarray(final, dtype=bool)[pick]


def provisional_steps(det):
    """Bool per time step: known from the coordinates to come from a provisional stream (an expver
    coordinate along time, or a scalar one); streams along a dimension are resolved per chunk."""
    n = 0 if det.times is None else det.times.size
    st = det.streams
    if not st or st["kind"] == "dim":
        return np.zeros(n, dtype=bool)
    if st["kind"] == "scalar":
        return np.ones(n, dtype=bool)
    return np.array([not _is_final_stream(x) for x in st["labels_along_time"]], dtype=bool)


def merge_notes(parts):
    """Per-time-step notes of several readers joined: unique codes in order, ';'-separated."""
    parts = [np.asarray(p, dtype=object) for p in parts if p is not None]
    if not parts:
        return None
    out = np.full(parts[0].shape, "", dtype=object)
    for i in range(out.size):
        codes = []
        for p in parts:
            for code in str(p[i]).split(";"):
                if code and code not in codes:
                    codes.append(code)
        out[i] = ";".join(codes)
    return out
