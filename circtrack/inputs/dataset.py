"""Opening one input lazily, detecting its coordinates and variables, and standardising roles.

Every role is read through a :class:`RoleReader` as ``(time, *extra, [plev], lat, lon)``, latitude
ascending, pressure in hPa ascending (top first), values in canonical units, one time chunk at a
time inside the worker that reduces it.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from circtrack.errors import InputError
from circtrack.inputs import units as U
from circtrack.inputs.rules import COORDS, VARIABLES

_CACHE_SET = False


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


def open_dataset(path, cfg) -> xr.Dataset:
    """Open lazily with an explicitly named engine; times decoded with cftime for every calendar."""
    engine = cfg["run"]["netcdf_engine"]
    if path.rstrip("/").lower().endswith(".zarr"):
        engine = "zarr"
    elif engine == "netcdf4":
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
        ds = xr.open_dataset(path, engine=engine, chunks=None, cache=False,
                             decode_times=coder, decode_timedelta=False, create_default_indexes=False)
    except ValueError as e:
        # xarray's advice (decode_times=False, install cftime) is for library users, not for this command
        msg = str(e).splitlines()[0].split(" Try opening", 1)[0]
        if "time" in msg.lower() or "zero" in msg.lower():
            ds = _open_year_zero(path, engine, coder)
            if ds is not None:
                return ds
        if "time" in msg.lower() or "calendar" in msg.lower() or "units" in msg.lower():
            raise InputError(f"{path}: the time axis cannot be decoded ({msg}); fix its 'units'/'calendar' "
                             "attributes (e.g. 'days since 1979-01-01') or convert the file with CF time units")
        raise InputError(f"{path}: cannot be opened with the {engine} engine ({msg}); check that it is a "
                         "complete netCDF/Zarr file, or pass --on-bad-file skip")
    except (OSError, RuntimeError, KeyError, IndexError, TypeError) as e:
        msg = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise InputError(f"{path}: cannot be read as netCDF ({msg}); the file may be truncated or not "
                         "netCDF: re-copy it, or pass --on-bad-file skip")
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


def _attr(obj, name):
    v = obj.attrs.get(name, "")
    return str(v) if v is not None else ""


def _find_coord(ds, key, taken=()):
    rule = COORDS[key]
    dims = [d for d in ds.dims if d not in taken]
    # 1. exact names, 2. standard_name, 3. axis attribute, 4. units
    for name in rule["names"]:
        if name in dims:
            return name
    lower = {d.lower(): d for d in dims}
    for name in rule["names"]:
        if name.lower() in lower:
            return lower[name.lower()]
    for d in dims:
        if d in ds.variables and _attr(ds[d], "standard_name") in rule["standard_names"]:
            return d
    for d in dims:
        if d in ds.variables and _attr(ds[d], "axis").upper() == rule["axis"]:
            if key != "plev" or U.is_pressure(_attr(ds[d], "units")):
                return d
    for d in dims:
        if d not in ds.variables:
            continue
        u = _attr(ds[d], "units").lower()
        if key in ("lat", "lon") and u in rule["units"]:
            return d
        if key == "plev" and U.is_pressure(u):
            return d
        if key == "time" and " since " in u:
            return d
    return None


def detect(ds, path, overrides=None) -> Detected:
    """Find coordinates and every role the rules know; nothing is read except coordinates."""
    overrides = overrides or {}
    det = Detected(path=path, attrs={k: str(v) for k, v in ds.attrs.items()
                                     if k in ("source_id", "experiment_id", "variant_label", "title", "institution")})
    taken = []
    for key in ("time", "lat", "lon", "plev"):
        name = _find_coord(ds, key, taken)
        if name:
            det.coords[key] = name
            taken.append(name)
    if "lat" in det.coords:
        det.lat = np.asarray(ds[det.coords["lat"]].values, dtype=float)
    if "lon" in det.coords:
        det.lon = np.asarray(ds[det.coords["lon"]].values, dtype=float)
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
        det.plev_units = _attr(pv, "units")
        conv = U.conversion(det.plev_units, "pressure")
        if conv is None and det.plev_units.strip():
            # units that are not pressure (e.g. 'degC', or '1' for model levels): never guess
            det.problems["plev"] = (f"vertical axis '{det.coords['plev']}' has units '{det.plev_units}', which are "
                                    "not pressure units; set its units attribute to 'Pa' or 'hPa' (e.g. ncatted -a "
                                    f"units,{det.coords['plev']},o,c,hPa) if it holds pressure levels")
        elif conv is None:
            vals = np.asarray(pv.values, float)
            # no units at all: decide by magnitude (recorded in the sidecar as '... (by magnitude)')
            conv = (0.01, 0.0) if np.nanmax(vals) > 2000 else (1.0, 0.0)
            det.plev_units = "Pa (by magnitude)" if conv[0] == 0.01 else "hPa (by magnitude)"
        if conv is not None:
            det.plev_hpa = np.round(np.asarray(pv.values, float) * conv[0], 6)
    core = {det.coords.get(k) for k in ("time", "lat", "lon", "plev")} - {None}
    for role, rule in VARIABLES.items():
        _detect_role(ds, det, role, rule, overrides.get(role))
    extra = set()
    for role, name in det.variables.items():
        for d in ds[name].dims:
            if d not in core and ds.sizes[d] > 1:
                extra.add(d)
    for d in sorted(extra):
        det.extra_dims[d] = np.asarray(ds[d].values) if d in ds.variables else np.arange(ds.sizes[d])
    return det


def require_axes(det):
    """The time, latitude and longitude axes every metric needs, or one clear error naming the fix."""
    path = det.path
    if "time" not in det.coords:
        raise InputError(f"{path}: no time axis found; name it 'time' or give it CF units ('days since ...')")
    for key in ("lat", "lon"):
        if key not in det.coords:
            raise InputError(f"{path}: no {'latitude' if key == 'lat' else 'longitude'} axis found; name it "
                             f"'{key}' or give it units '{'degrees_north' if key == 'lat' else 'degrees_east'}'")


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

    found = []
    for name in ds.data_vars:
        if not shape_ok(name):
            continue
        sn = _attr(ds[name], "standard_name")
        if sn in rule["standard_names"]:
            found.append((0, rule["standard_names"].index(sn), name, f"standard_name '{sn}'"))
        elif name in rule["names"]:
            found.append((1, rule["names"].index(name), name, f"variable name '{name}'"))
        elif name.lower() in [n.lower() for n in rule["names"]]:
            found.append((2, 0, name, f"variable name '{name}' (case-insensitive)"))
    if not found:
        return
    found.sort(key=lambda t: (t[0], t[1], str(t[2])))
    det.variables[role] = found[0][2]
    det.why[role] = found[0][3]
    det.others[role] = [f[2] for f in found[1:]]
    det.units[role] = _attr(ds[found[0][2]], "units")


def standardise(ds, det: Detected, role, levels_hpa, cfg):
    """How to read the role in the canonical layout and units: a :class:`RoleReader`.

    ``levels_hpa``: None for every level, else the wanted levels; the nearest level within the
    tolerance is taken, or the two levels bracketing a wanted level (for log-p interpolation).
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
                             f"'{need}' or give it CF attributes (standard_name/units)")
    if rule["levels"] and "plev" in det.problems:
        raise InputError(f"{path}: variable '{name}' ({role}): {det.problems['plev']}")
    conv = U.conversion(det.units.get(role, ""), rule["kind"])
    if conv is None:
        raise InputError(f"{path}: variable '{name}' ({role}) has units '{det.units.get(role, '')}', which circtrack "
                         f"does not know for {rule['kind'].replace('_', ' ')}; set its units attribute to "
                         f"'{U.CANONICAL[rule['kind']]}' (e.g. ncatted -a units,{name},o,c,'{U.CANONICAL[rule['kind']]}')")
    sel = {}
    # squeeze size-1 dimensions that are not core (e.g. height = 10 m)
    for d in list(da.dims):
        if d not in (c["time"], c["lat"], c["lon"], c.get("plev")) and da.sizes[d] == 1:
            sel[d] = 0
            da = da.isel({d: 0}, drop=True)
    lat = det.lat
    if not np.all(np.isfinite(lat)) or np.any(np.abs(lat) > 90.0 + 1e-6):
        raise InputError(f"{path}: latitude '{c['lat']}' has missing or out-of-range values (|lat| > 90); fix the coordinate")
    if np.unique(lat).size != lat.size:
        raise InputError(f"{path}: latitude '{c['lat']}' has duplicated values; fix the coordinate")
    if not np.all(np.isfinite(det.lon)):
        raise InputError(f"{path}: longitude '{c['lon']}' has missing values; fix the coordinate")
    order = np.argsort(lat)
    if np.array_equal(order, np.arange(lat.size)[::-1]):
        sel[c["lat"]] = (None, None, -1)          # descending: a reversed slice reads fastest
    elif not np.array_equal(order, np.arange(lat.size)):
        sel[c["lat"]] = order
    plev_out = None
    if rule["levels"]:
        p = det.plev_hpa
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
    extra = [d for d in da.dims if d not in (c["time"], c["lat"], c["lon"], c.get("plev"))]
    order_dims = [c["time"], *extra] + ([c["plev"]] if rule["levels"] else []) + [c["lat"], c["lon"]]
    reader = RoleReader(path=path, role=role, name=name, time_dim=c["time"], dims=order_dims,
                        selection={d: (v.tolist() if isinstance(v, np.ndarray) else v) for d, v in sel.items()},
                        factor=float(conv[0]), offset=float(conv[1]), plev=plev_out,
                        ntime=int(ds.sizes[c["time"]]))
    return reader, plev_out


@dataclass
class RoleReader:
    """How to read one role of one file in the canonical layout, as plain picklable data.

    Worker processes receive readers, open the file themselves and call :meth:`read` per time
    chunk, so nothing but a path and a few indices crosses process boundaries and nothing is read
    before the chunk's task runs. ``read`` returns ``(time, *extra, [plev], lat, lon)`` with latitude
    ascending, levels ascending in hPa, values in canonical units (the file's float type when no
    conversion is needed, float64 otherwise).
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

    def read(self, ds, t0, t1):
        var = ds[self.name]
        sel = {d: (slice(*v) if isinstance(v, tuple) else v) for d, v in self.selection.items()}
        sel[self.time_dim] = slice(int(t0), int(t1))
        var = var.isel(sel)
        arr = np.asarray(var.transpose(*self.dims).values)
        if self.factor != 1.0 or self.offset != 0.0:
            arr = arr.astype(np.float64) * self.factor + self.offset
        elif not np.issubdtype(arr.dtype, np.floating):
            arr = arr.astype(np.float64)
        return arr
