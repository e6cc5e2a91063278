"""Files of one layout are detected once: a netCDF header read instead of an open and a detection per file.

In: a file path and the :class:`LayoutCache` of the run. Out: the :class:`FileInfo` (or the
:class:`MissingRoles` error) of an earlier file of the same layout, re-labelled with this file's
path and time steps; None when the file has to be opened and detected itself (first of its layout,
not a netCDF-4/HDF5 file, data streams, times that this shortcut would decode differently, or any
doubt). Thousands of one-day files then cost one header read each instead of an xarray open.

Two files share a layout when their headers agree on everything but the time steps: the file
format, global attributes (but for their history, tracking id and dates), every variable's name, dimensions, type and attributes, every dimension
size but the time axis's, and the values of every variable without the time dimension (coordinates,
level coefficients). The time steps are decoded from the raw values with the same CF decoder the
full open uses; the first file of a layout checks that this gives exactly the times its full
detection found, otherwise the layout is never shared.
"""

from __future__ import annotations

import copy
import os

import numpy as np

from circtrack.inputs.header import SMALL  # two-dimensional variables up to this many values are compared by value
from circtrack.inputs.header import num2date as _num2date

# global attributes that differ from file to file and that detection never reads (it reads the
# member and model names, title and institution: those stay in the key)
VOLATILE = {"history", "tracking_id", "creation_date", "date_created", "date_modified", "date_metadata_modified"}


def read_headers(job):
    """``(paths, cfg)`` -> the header of each path (or None), as :class:`LayoutCache` reads them;
    run in worker processes when there are many files (run.py), so that they are read in parallel."""
    paths, cfg = job
    return [_header(p, cfg) for p in paths]


class LayoutCache:
    """The detections of the layouts seen so far in one run (parent process only).

    ``headers``: path -> header already read (:func:`read_headers`, e.g. by worker processes);
    the other files' headers are read here."""

    def __init__(self, cfg, headers=None):
        self.cfg = cfg
        self.known = {}          # header key -> (path, outcome, time name, header) or None (never share)
        self.headers = dict(headers or {})
        self.last = None         # (path, header) of the last file asked about (remember() follows shared())
        self.decoded = {}        # time name -> {path: times} of the headers given, decoded at once

    def _head(self, path):
        if self.last is not None and self.last[0] == path:
            return self.last[1]
        head = self.headers.pop(path) if path in self.headers else _header(path, self.cfg)
        self.last = (path, head)
        return head

    def shared(self, path):
        """The outcome of an earlier file with this file's layout, for this file; or None."""
        head = self._head(path)
        if head is None:
            return None
        entry = self.known.get(head["key"])
        if entry is None:
            return None
        first_path, outcome, tname, first_head = entry
        if not _same_static(head, first_head, tname):
            return None
        if tname not in self.decoded:
            self.decoded[tname] = _decode_many(self.headers, tname)
        times = self.decoded[tname].pop(path, None)
        if times is None:
            times = _decode_times(head, tname)
        if times is None or times.size == 0:
            return None
        return _relabel(outcome, first_path, path, times)

    def remember(self, path, outcome):
        """After a full detection of ``path`` (a FileInfo or a MissingRoles error): share it when safe."""
        head = self._head(path)
        if head is None:
            return
        info = outcome if not hasattr(outcome, "info") else outcome.info
        _note_direct(info, head)
        if head["key"] in self.known:
            return
        det = info.detected
        tname = det.coords.get("time")
        ok = (tname is not None and det.streams is None and tname in head["vars"] and det.times is not None
              and _extra_dims_static(det, head, tname))
        if ok:
            times = _decode_times(head, tname)
            ok = (times is not None and times.shape == det.times.shape and times.size > 0
                  and type(times.flat[0]) is type(det.times.flat[0]) and bool(np.all(times == det.times)))
        self.known[head["key"]] = (path, outcome, tname, head) if ok else None


def _note_direct(info, head):
    """Give the readers of plain float variables their header (dimensions, fill values), so that
    workers read their chunks without opening the file with netCDF4 (``RoleReader.read_direct``);
    the files sharing this layout get copies of these readers (same header, same variables)."""
    from circtrack.inputs.readers import FILL_ATTRS, fill_values

    if not str(head["key"][0]).startswith("NETCDF4"):
        return
    for reader in info.readers.values():
        v = head["vars"].get(reader.name)
        if reader.path != info.path or v is None or reader.stream is not None or reader.hybrid is not None \
                or reader.ground is not None or np.dtype(v["dtype"]).kind != "f" \
                or any(a in v["attr_values"] for a in ("scale_factor", "add_offset")):
            continue
        reader.direct = {"dims": tuple(v["dims"]),
                         "fills": fill_values(v["attr_values"][a] for a in FILL_ATTRS if a in v["attr_values"])}


def _extra_dims_static(det, head, tname):
    """Extra dimensions (e.g. members along a dimension) have coordinates without the time axis."""
    return all(d in head["vars"] and tname not in head["vars"][d]["dims"] for d in det.extra_dims)


def _header(path, cfg):
    """The layout key and the raw time/static values of a plain netCDF-4 file, or None."""
    from circtrack.inputs import opening
    if cfg["run"]["netcdf_engine"] != "netcdf4" or not os.path.isfile(path) or opening._source_for(path) is not None:
        return None
    try:
        with open(path, "rb") as f:
            if f.read(4) != b"\x89HDF":          # netCDF-4 (HDF5) only: classic files keep the full checks
                return None
        import netCDF4
        with netCDF4.Dataset(path, "r") as nc:
            if nc.groups:
                return None
            variables = {}
            for name, var in nc.variables.items():
                var.set_auto_maskandscale(False)
                values = {a: var.getncattr(a) for a in var.ncattrs()}
                attrs = tuple((a, _text(x)) for a, x in values.items())
                variables[name] = {"dims": var.dimensions, "dtype": str(var.dtype), "attrs": attrs,
                                   "attr_values": values, "shape": var.shape, "var": var}
            dims = tuple((d, len(v), v.isunlimited()) for d, v in nc.dimensions.items())
            key = (nc.data_model, tuple((a, _text(nc.getncattr(a))) for a in nc.ncattrs() if a not in VOLATILE),
                   tuple((d, u) for d, _, u in dims),
                   tuple((n, v["dims"], v["dtype"], v["attrs"]) for n, v in variables.items()))
            # values: every 1-D variable (coordinates, time) and small 2-D ones (bounds); data fields
            # (3 dimensions or more) are not read
            for name, v in variables.items():
                size = int(np.prod(v["shape"])) if v["shape"] else 1
                v["values"] = np.asarray(v["var"][...]) if (len(v["dims"]) <= 1 or (len(v["dims"]) == 2 and size <= SMALL)) else None
                del v["var"]
            return {"key": key, "dims": dict((d, n) for d, n, _ in dims), "vars": variables}
    except (OSError, RuntimeError, ValueError, KeyError, IndexError, TypeError, UnicodeError):
        return None


def _text(value):
    return repr(value.tolist()) if isinstance(value, np.ndarray) else repr(value)


def _same_static(head, first, tname):
    """Everything but the time steps agrees: sizes of the other dimensions, values without time."""
    tdims = {d for d in first["vars"][tname]["dims"]}
    if any(head["dims"].get(d) != n for d, n in first["dims"].items() if d not in tdims):
        return False
    for name, v in first["vars"].items():
        w = head["vars"].get(name)
        if w is None:
            return False
        if tdims & set(v["dims"]):
            continue
        if v["values"] is None or w["values"] is None:
            return False                    # large static fields: not compared, so not shared
        if v["values"].shape != w["values"].shape or not np.array_equal(v["values"], w["values"],
                                                                         equal_nan=v["values"].dtype.kind == "f"):
            return False
    return True


PLAIN_TIME_ATTRS = {"units", "calendar", "standard_name", "long_name", "axis", "bounds", "_FillValue", "missing_value"}


def _plain_times(head, tname):
    """``(values, units, calendar)`` of a plain time axis (units and calendar, no packing, finite
    numbers, none equal to a fill value), or None."""
    v = head["vars"].get(tname)
    if v is None:
        return None
    attrs = v["attr_values"]
    if v["values"] is None or len(v["dims"]) != 1 or set(attrs) - PLAIN_TIME_ATTRS or "units" not in attrs:
        return None
    values = v["values"]
    if values.dtype.kind not in "if" or not np.all(np.isfinite(values)):
        return None
    fills = [np.asarray(attrs[a]).ravel() for a in ("_FillValue", "missing_value") if a in attrs]
    if any(np.isin(values, f).any() for f in fills):
        return None
    return values, str(attrs["units"]), str(attrs.get("calendar", "standard"))


def _decode_times(head, tname):
    """The time steps decoded with cftime for every calendar, as the full open does, or None.

    Only plain time axes (:func:`_plain_times`); the first file of a layout checks that this gives
    exactly what its full open gave."""
    plain = _plain_times(head, tname)
    return None if plain is None else _num2date(*plain)


def _decode_many(headers, tname):
    """``{path: times}``: :func:`_decode_times` of many headers, one cftime call per units, calendar
    and number type (cftime decodes value by value; a call costs about 0.1 ms however few the
    values). Empty when a call fails: the files are then decoded one by one."""
    groups = {}
    for path, head in headers.items():
        plain = None if head is None else _plain_times(head, tname)
        if plain is not None:
            values, units, calendar = plain
            groups.setdefault((units, calendar, values.dtype.str), []).append((path, values))
    out = {}
    for (units, calendar, _), members in groups.items():
        times = _num2date(np.concatenate([v for _, v in members]), units, calendar)
        if times is None:
            continue
        at = 0
        for path, values in members:
            out[path] = times[at:at + values.size]
            at += values.size
    return out


def _relabel(outcome, first_path, path, times):
    """A copy of ``outcome`` with this file's path and time steps (the coordinate arrays are shared:
    nothing changes them after detection; the dictionaries and readers are copied)."""
    from circtrack.engine.prepare import MissingRoles
    info = outcome.info if isinstance(outcome, MissingRoles) else outcome
    det = copy.copy(info.detected)
    for name, value in vars(det).items():
        if isinstance(value, dict):
            setattr(det, name, copy.deepcopy(value) if name in ("hybrid", "streams") else dict(value))
    det.path = path
    det.times = times
    new = copy.copy(info)
    new.path, new.detected = path, det
    new.readers = {r: _relabel_reader(x, path, times.size) for r, x in info.readers.items()}
    new.plev = dict(info.plev)
    if isinstance(outcome, MissingRoles):
        return MissingRoles(str(outcome).replace(first_path, path), new, list(outcome.missing))
    return new


def _relabel_reader(reader, path, ntime):
    new = copy.copy(reader)
    new.path = path
    new.ntime = ntime
    new.selection = dict(reader.selection)
    if reader.hybrid is not None:
        new.hybrid = dict(reader.hybrid)
        if new.hybrid.get("ps") is not None:
            new.hybrid["ps"] = _relabel_reader(new.hybrid["ps"], path, ntime)
    return new
