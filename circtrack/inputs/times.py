"""Time axes: every special case of decoding them, in one place.

xarray decodes CF time axes with cftime for every calendar; this module handles what it refuses.
In: the path, engine and config of a file whose opening failed on its time axis. Out: the dataset
with its time variables decoded, or one :class:`~circtrack.errors.InputError` line naming the fix.

- Counted from year 0 in a calendar without year 0 (climatology files): decoded in the proleptic
  Gregorian calendar with year 0 (:func:`_open_year_zero`); :func:`year_zero_note` says so for
  ``scan`` and the sidecar.
- "months since": decoded by us where unambiguous (:func:`_decode_months`), fractional months only
  with ``run.fractional_months = "fraction-of-month"``.
"""

from __future__ import annotations

import re

import numpy as np

from circtrack.errors import InputError

# xarray is imported where a dataset is opened or rebuilt: a run whose inputs are all detected from
# their netCDF-4 headers (inputs/header.py) never imports it (nor pandas) in the planning process

YEAR_ZERO_CALENDAR = "proleptic_gregorian"
_YEAR_ZERO = re.compile(r"\bsince\s+0{1,4}-")
_MIXED_CALENDARS = {"", "standard", "gregorian", "julian"}
_YEAR_ZERO_MARK = "_circtrack_year_zero"         # dataset attribute: time variables decoded with year 0


def reopen_undecoded(path, engine, extra, cfg, coder, msg, target=None):
    """After xarray refused to open ``path`` with error ``msg``: the dataset with its time axes
    decoded by one of the special cases here, or None when the failure was not about time.
    ``target``: what xarray opens when it is not ``path`` itself (e.g. a file object of an object
    in object storage).

    Raises one :class:`~circtrack.errors.InputError` line when it was about time and no special
    case applies (or a "months since" axis is ambiguous)."""
    low = msg.lower()
    if "months since" in low:
        return _open_months_since(path, engine, extra, cfg, coder, target)
    if "time" in low or "zero" in low:
        ds = _open_year_zero(path, engine, extra, coder, target)
        if ds is not None:
            return ds
    if "time" in low or "calendar" in low or "units" in low:
        raise InputError(f"{path}: the time axis cannot be decoded ({msg}); fix its 'units'/'calendar' "
                         "attributes (e.g. 'days since 1979-01-01') or convert the file with CF time units")
    return None


def open_with_time_units(path, engine, extra, cfg, coder):
    """Open with the time axis's units and/or calendar replaced by ``--units time=...`` /
    ``--units calendar=...`` (``[units]`` in a config), then decode as usual ("months since" too).

    The time variable is the one named by ``--var time=NAME``, else the first of the usual names
    present. Its units and calendar as given in the file are kept in ``time_units_in_file``."""
    import xarray as xr

    from circtrack.inputs.rules import COORDS
    given = cfg.get("units", {})
    try:
        ds = xr.open_dataset(path, engine=engine, chunks=None, cache=False, decode_times=False,
                             decode_timedelta=False, create_default_indexes=False, **extra)
    except (ValueError, OSError, RuntimeError, KeyError, IndexError, TypeError) as e:
        raise InputError(f"{path}: cannot be opened with the {engine} engine ({str(e).splitlines()[0]}); check "
                         "that it is a complete netCDF/Zarr file, or pass --on-bad-file skip")
    named = cfg.get("variables", {}).get("time")
    candidates = [named] if named else COORDS["time"]["names"]
    name = next((n for n in candidates if n in ds.variables), None)
    if name is None:
        ds.close()
        raise InputError(f"{path}: --units time/calendar given but no time variable found (looked for "
                         f"{', '.join(candidates)}); name it with --var time=NAME")
    var = ds[name]
    was = {"units": str(var.attrs.get("units", "")), "calendar": str(var.attrs.get("calendar", ""))}
    attrs = dict(var.attrs)
    if "time" in given:
        attrs["units"] = str(given["time"])
    if "calendar" in given:
        attrs["calendar"] = str(given["calendar"])
    ds[name] = xr.Variable(var.dims, var.values, attrs)
    ds.attrs[_GIVEN_MARK] = f"{name}|{was['units']}|{was['calendar']}"
    if " since " not in attrs.get("units", "").lower():
        ds.close()
        raise InputError(f"{path}: --units time='{attrs.get('units', '')}' is not a CF time unit; give e.g. "
                         "--units time=\"days since 1979-01-01\" or --units time=\"months since 1988-01-01\"")
    return _decode_or_close(ds, path, cfg, coder, lambda why: (
        f"{path}: the time axis cannot be decoded with --units time='{attrs.get('units', '')}' "
        f"calendar '{attrs.get('calendar', 'standard')}' ({why}); check the --units time and --units calendar values"))


_GIVEN_MARK = "_circtrack_time_units_given"


def given_time_note(ds, name):
    """For ``scan`` and the sidecar: the time axis's units/calendar replaced by --units, or None."""
    mark = str(ds.attrs.get(_GIVEN_MARK, ""))
    if not mark or mark.split("|")[0] != name:
        return None
    _, units, calendar = mark.split("|", 2)
    var = ds[name]
    now_u = var.encoding.get("units", var.attrs.get("units", ""))
    now_c = var.encoding.get("calendar", var.attrs.get("calendar", "standard"))
    return (f"time units '{now_u}' calendar '{now_c}' given by --units/[units] (the file says units '{units}'"
            f"{f', calendar {calendar!r}' if calendar else ''})")


def year_zero_note(ds, name, units):
    """How time variable ``name`` was decoded when it counts from year 0, for ``scan`` and the
    sidecar (``why['time']``); None for every other time axis."""
    if name not in str(ds.attrs.get(_YEAR_ZERO_MARK, "")).split(","):
        return None
    return (f"'{name}' counts from year 0 ('{units}'), which its calendar lacks; "
            f"decoded as {YEAR_ZERO_CALENDAR} with year 0 (climatology)")


def year_zero_time(units, calendar):
    """True for a time axis counted from year 0 in a calendar that has no year 0 (CF 'standard',
    'gregorian', 'julian', or no calendar attribute), the usual layout of climatology files
    (e.g. 'hour since 0000-01-01 00:00:00')."""
    return bool(_YEAR_ZERO.search(str(units))) and str(calendar).strip().lower() in _MIXED_CALENDARS


def _open_year_zero(path, engine, extra, coder, target=None):
    """Reopen a file whose time axis counts from year 0 and decode it in the proleptic Gregorian
    calendar with astronomical year numbering (year 0 exists, as ISO 8601 has it); None when the
    failure had another cause. The decision is recorded by detection (:func:`year_zero_note`)."""
    import xarray as xr

    try:
        ds = xr.open_dataset(path if target is None else target, engine=engine, chunks=None, cache=False,
                             decode_times=False, decode_timedelta=False, create_default_indexes=False, **extra)
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
    ds.attrs[_YEAR_ZERO_MARK] = ",".join(fixed)
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


def _open_months_since(path, engine, extra, cfg, coder, target=None):
    """Reopen without time decoding and decode "months since" ourselves (one clear error if ambiguous)."""
    import xarray as xr

    try:
        ds = xr.open_dataset(path if target is None else target, engine=engine, chunks=None, cache=False,
                             decode_times=False, decode_timedelta=False, create_default_indexes=False, **extra)
    except (ValueError, OSError, RuntimeError, KeyError, IndexError, TypeError) as e:
        raise InputError(f"{path}: cannot be opened with the {engine} engine ({str(e).splitlines()[0]}); check "
                         "that it is a complete netCDF/Zarr file, or pass --on-bad-file skip")
    return _decode_or_close(ds, path, cfg, coder, lambda why: (
        f"{path}: the time axis cannot be decoded ({why}); fix its 'units'/'calendar' attributes or convert "
        "the file with CF time units ('days since ...')"))


def _decode_or_close(ds, path, cfg, coder, message):
    """:func:`_decode_times_ourselves`, closing ``ds`` on failure; a decoding error becomes one
    InputError line ``message(first line of the error)``."""
    try:
        return _decode_times_ourselves(ds, path, cfg, coder)
    except InputError:
        ds.close()
        raise
    except (ValueError, OverflowError) as e:
        ds.close()
        raise InputError(message(str(e).splitlines()[0]))


def _decode_times_ourselves(ds, path, cfg, coder):
    """The dataset opened with decode_times=False: "months since" by :func:`_decode_months`, other
    time variables by xarray's coder."""
    import xarray as xr

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
