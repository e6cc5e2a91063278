"""Readers: a :class:`~circtrack.inputs.detect.Detected` record and a role in, a :class:`RoleReader` out.

Every role is read through a :class:`RoleReader` as ``(time, *extra, [plev], lat, lon)``, latitude
ascending, pressure in hPa ascending (top first), values in canonical units, one time chunk at a
time inside the worker that reduces it. :func:`standardise` decides what to read (levels, latitude
order, repeated longitudes, squeezed dimensions, unit conversion) without reading anything;
:func:`lowest_level_substitute` lets the lowest pressure (or model) level of a 3-D wind stand in for
a missing near-surface wind.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from circtrack.errors import InputError
from circtrack.inputs import chunks as CH
from circtrack.inputs import model_levels as ML
from circtrack.inputs import plausible as PL
from circtrack.inputs import streams as S
from circtrack.inputs import units as U
from circtrack.inputs.detect import Detected, attr_text
from circtrack.inputs.rules import VARIABLES


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
    c = det.coords
    conv = _role_conversion(ds, det, role)
    stream_dim = S.stream_dim(det.streams, ds[name])
    # squeeze size-1 dimensions that are not core (e.g. height = 10 m, number = 0)
    sel, da = _squeeze(ds[name], (c["time"], c["lat"], c["lon"], c.get("plev")))
    sel.update(_lat_lon_selection(det))
    plev_out = None
    hybrid = None
    level_dims = []
    if rule["levels"]:
        level_dims = [c["plev"]]
        if det.vertical == "hybrid":
            sel[c["plev"]], plev_out, hybrid = _hybrid_levels(ds, det, role, levels_hpa, cfg)
        else:
            sel[c["plev"]], plev_out = _pressure_levels(det, role, levels_hpa, cfg)
    extra = [d for d in da.dims if d not in (c["time"], c["lat"], c["lon"], c.get("plev"), stream_dim)]
    order_dims = [c["time"]] + ([stream_dim] if stream_dim else []) + extra + level_dims + [c["lat"], c["lon"]]
    reader = RoleReader(path=path, role=role, name=name, time_dim=c["time"], dims=order_dims,
                        selection=_plain(sel), factor=float(conv[0]), offset=float(conv[1]), plev=plev_out,
                        ntime=int(ds.sizes[c["time"]]), stream=S.stream_spec(det.streams, stream_dim), hybrid=hybrid)
    return reader, plev_out


def _role_conversion(ds, det, role):
    """``(factor, offset)`` to canonical units, after checking the role's variable has the axes it needs."""
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
    return conv


def _squeeze(da, core):
    """``(selection, da)``: index 0 of every size-1 dimension outside ``core``, and ``da`` without them."""
    sel = {}
    for d in list(da.dims):
        if d not in core and da.sizes[d] == 1:
            sel[d] = 0
            da = da.isel({d: 0}, drop=True)
    return sel, da


def check_grid(ds, det):
    """Axes the metrics cannot work on, refused like duplicated latitudes (:func:`_lat_lon_selection`):
    fewer than 3 latitudes, a longitude or a pressure level given twice (a repeated longitude
    that is the same meridian 360 degrees on, the cyclic column, is fine and read once), a variable
    on a single pressure level. InputError naming the file."""
    path = det.path
    if det.lat is not None and "lat" in det.coords and 0 < det.lat.size < 3:
        raise InputError(f"{path}: latitude '{det.coords['lat']}' has only {det.lat.size} value(s); the metrics need "
                         "a grid that resolves latitude (at least 3 latitudes): give files with the full grid")
    name = det.coords.get("lon")
    if name is not None and name in ds.variables:
        lon = np.asarray(ds[name].values, dtype=float).ravel()
        vals, counts = np.unique(lon[np.isfinite(lon)], return_counts=True)
        if (counts > 1).any():
            raise InputError(f"{path}: longitude '{name}' has duplicated values ({vals[counts > 1][0]:g} twice); "
                             "fix the coordinate")
    if det.plev_hpa is not None and det.vertical != "hybrid":
        p = np.asarray(det.plev_hpa, dtype=float).ravel()
        dim = det.coords.get("plev")
        # detected variables first; a wind on one level aloft is no longer taken for a near-surface role,
        # so the other variables on the axis count too
        on_level = [n for n in [*det.variables.values(), *map(str, ds.data_vars)] if n in ds.variables
                    and dim in ds[n].dims]
        if p.size == 1 and on_level:
            raise InputError(f"{path}: variable '{on_level[0]}' has a single pressure level ({p[0]:g} hPa on "
                             f"'{dim}'); circtrack reads variables on pressure levels with at least two levels "
                             "(the metrics need e.g. 850 and 200 hPa, the streamfunction all of them): give files "
                             "with the levels the metrics need")
        vals, counts = np.unique(p[np.isfinite(p)], return_counts=True)
        if (counts > 1).any():
            raise InputError(f"{path}: pressure level '{det.coords.get('plev')}' has duplicated values "
                             f"({vals[counts > 1][0]:g} hPa twice); fix the coordinate")


def _lat_lon_selection(det):
    """Selections that make latitude ascending and drop repeated longitudes (checked first)."""
    path, c = det.path, det.coords
    lat = det.lat
    if np.all(np.isfinite(lat)):
        PL.check_coordinate(path, "lat", c["lat"], det.lat_units, lat)
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


def _pressure_levels(det, role, levels_hpa, cfg):
    """``(level indices, their pressures in hPa)``, top first: every level, or per wanted level the
    nearest within ``run.level_tolerance_hpa``, else the two levels bracketing it."""
    path, name, c = det.path, det.variables[role], det.coords
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
    return idx, p[idx]


def _hybrid_levels(ds, det, role, levels_hpa, cfg):
    """``(model level indices, target levels in hPa, reader's hybrid spec)`` for a role on hybrid levels:
    only the model levels that bracket the targets in some column are read."""
    path, name = det.path, det.variables[role]
    if det.problems.get("vertical") or det.hybrid is None:
        raise InputError(f"{path}: {role} '{name}': {det.problems.get('vertical', 'hybrid levels not understood')}")
    h = det.hybrid
    targets = model_level_targets(det, levels_hpa, cfg)
    if targets.size == 0:
        raise InputError(f"{path}: no pressure level of run.model_level_targets_hpa lies below the model top "
                         f"({np.min(det.plev_hpa):g} hPa); add lower levels to run.model_level_targets_hpa")
    ps_reader = _surface_reader(ds, det, h["ps"])
    idx = ML.levels_needed(h["a"], h["b"], targets * 100.0, h["p0"])
    hybrid = {"a": np.asarray(h["a"])[idx].tolist(), "b": np.asarray(h["b"])[idx].tolist(), "p0": h["p0"],
              "ps": ps_reader, "targets_pa": (targets * 100.0).tolist()}
    return idx, targets, hybrid


def model_level_targets(det, levels_hpa, cfg):
    """Pressure levels (hPa, ascending) a hybrid-level role is interpolated to.

    The levels the metrics ask for, else ``run.model_level_targets_hpa`` down from the model top (a
    level above the top of the columns would be empty everywhere)."""
    if levels_hpa is not None:
        return np.array(sorted({float(x) for x in levels_hpa}))
    top = float(np.min(det.plev_hpa))
    want = np.array(sorted({float(x) for x in cfg["run"]["model_level_targets_hpa"]}))
    return want[want >= top * (1 - 1e-9)]


def _surface_reader(ds, det, name):
    """A reader of the surface pressure that hybrid levels need (hPa, same grid order as the field)."""
    path, c = det.path, det.coords
    if name not in ds.variables or c["lat"] not in ds[name].dims or c["lon"] not in ds[name].dims \
            or c["time"] not in ds[name].dims:
        why = f"formula_terms of '{det.hybrid['name']}'" if det.hybrid else "to tell ground from air"
        raise InputError(f"{path}: surface pressure '{name}' ({why}) needs time, "
                         "latitude and longitude axes; put a ps(time, lat, lon) field into the file")
    conv = U.conversion(attr_text(ds[name], "units") or "Pa", "pressure")
    if conv is None:
        raise InputError(f"{path}: surface pressure '{name}' has units '{attr_text(ds[name], 'units')}'; give it 'Pa'")
    stream_dim = S.stream_dim(det.streams, ds[name])
    sel, da = _squeeze(ds[name], (c["time"], c["lat"], c["lon"]))
    sel.update(_lat_lon_selection(det))
    extra = [d for d in da.dims if d not in (c["time"], c["lat"], c["lon"], stream_dim)]
    dims = [c["time"]] + ([stream_dim] if stream_dim else []) + extra + [c["lat"], c["lon"]]
    return RoleReader(path=path, role="ps", name=name, time_dim=c["time"], dims=dims, selection=_plain(sel),
                      factor=float(conv[0]), offset=float(conv[1]), ntime=int(ds.sizes[c["time"]]),
                      stream=S.stream_spec(det.streams, stream_dim))


def _plain(sel):
    return {d: (v.tolist() if isinstance(v, np.ndarray) else v) for d, v in sel.items()}


# near-surface roles that may be taken from the lowest pressure level of a 3-D field
SURFACE_SUBSTITUTES = {"uas": "ua", "vas": "va"}


def lowest_level_substitute(ds, det, role, cfg):
    """A reader for ``role`` (e.g. uas) made from the highest-pressure level of its 3-D counterpart
    (ua), or None. ``det.variables``/``det.why`` record the substitution for the sidecar.

    Only a level at or below ``run.near_surface_min_hpa`` stands in (common practice: the lowest
    level, usually 1000 or 925 hPa, for the surface). Where the file holds the surface pressure ps,
    columns whose ground lies above that level (ps < level: the level is below ground) are missing
    in the read, so they never count as surface; ``from_level_hpa`` tells the families the level.
    On hybrid sigma-pressure levels that is the lowest model level (the highest reference pressure),
    read as it is: it follows the ground in every column, where a fixed pressure may lie below it."""
    src = SURFACE_SUBSTITUTES.get(role)
    if src is None or src not in det.variables or det.plev_hpa is None or not np.isfinite(det.plev_hpa).any():
        return None
    p = float(np.nanmax(det.plev_hpa))
    limit = float(cfg["run"].get("near_surface_min_hpa", 900.0))
    if p < limit:
        det.problems[role] = (f"the lowest level of {src} ('{det.variables[src]}', {p:g} hPa) lies above "
                              f"run.near_surface_min_hpa ({limit:g} hPa), so it cannot stand for {role}")
        return None
    reader, _ = standardise(ds, det, src, [p], cfg)
    plev_dim = det.coords["plev"]
    k = int(np.flatnonzero(det.plev_hpa == p)[0])
    ground = None
    if det.vertical != "hybrid" and "ps" in det.variables and det.coords["plev"] not in ds[det.variables["ps"]].dims:
        ground = _surface_reader(ds, det, det.variables["ps"])
    reader = dataclasses.replace(reader, role=role, dims=[d for d in reader.dims if d != plev_dim],
                                 selection={**reader.selection, plev_dim: k}, plev=None, hybrid=None,
                                 from_level_hpa=p, ground=ground)
    det.variables[role] = det.variables[src]
    det.units[role] = det.units.get(src, "")
    if det.vertical == "hybrid":
        kind, where = "model", f"'{det.variables[src]}' on {plev_dim} index {k}, at {p:g} hPa for a surface at 1000 hPa"
    else:
        kind, where = "pressure", f"'{det.variables[src]}' at {p:g} hPa"
    masked = (f"; columns where the surface pressure '{det.variables['ps']}' is below {p:g} hPa (the level is "
              "below ground) are left out") if ground is not None else ""
    det.why[role] = (f"no near-surface wind in the file: the lowest {kind} level of {src} ({where}) stands in for "
                     f"{role}{masked}")
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
    from_level_hpa: float | None = None   # a near-surface role read from this pressure level
    ground: "RoleReader | None" = None    # surface pressure: points where the level is below ground -> NaN
    # a plain float variable of a netCDF-4 file, as its header says (engine/layouts.py): the file's
    # dimensions and finite fill values, so that :meth:`read_direct` needs no netCDF4 open
    direct: dict | None = None

    def read(self, ds, t0, t1):
        return self.read_noted(ds, t0, t1)[0]

    def read_fast(self, nc, t0, t1):
        """The same array as :meth:`read`, straight from a ``netCDF4.Dataset`` (or h5netcdf's
        netCDF4-like API on an object in object storage) without xarray's decoding passes; None when the variable needs more than that (packed values, data streams,
        model levels), and the caller takes :meth:`read_noted`.

        Contiguous level runs are read as one hyperslab and reversed as a view; scattered levels
        one by one (each level is a whole HDF5 chunk in usual layouts, so nothing is decoded twice).
        Fill and missing values become NaN in place, as CF decoding would do.
        """
        var = self._fast_variable(nc)
        if var is None:
            return None
        if getattr(type(var), "set_auto_maskandscale", None) is not None:   # netCDF4; h5netcdf reads raw
            var.set_auto_maskandscale(False)
        index, post = _fast_index(var.dimensions, self.time_dim, self.selection, t0, t1)
        arr = _read_direct(nc, self.name, index)
        if arr is None:
            arr = _read_hyperslabs(var, index)
        return self._finish(arr, index, post, var.dimensions, fill_values(var.getncattr(a) for a in FILL_ATTRS
                                                                          if a in var.ncattrs()))

    def read_direct(self, t0, t1):
        """The same array as :meth:`read_fast`, the chunks read by inputs/chunks.py straight from
        the file (h5py's chunk index; deflate or no filter), without opening it with netCDF4 (about 2.5 ms per open and close, as much
        as reading a one-day file): only for readers that carry their variable's header
        (``direct``); None otherwise or when the chunks need HDF5 itself, and the caller takes
        :meth:`read_fast`."""
        d = self.direct
        if d is None or self.stream is not None or self.hybrid is not None or self.ground is not None:
            return None
        index, post = _fast_index(d["dims"], self.time_dim, self.selection, t0, t1)
        arr = _lists_read(CH.read(self.path, self.name, index), index)
        if arr is None:
            return None
        return self._finish(arr, index, post, d["dims"], d["fills"])

    def _finish(self, arr, index, post, dims, fills):
        """The array read at ``index`` -> the canonical layout: reversed axes, fill values to NaN,
        dimensions in order, canonical units."""
        for k, p in enumerate(post):                         # reversed axes as views
            if isinstance(p, np.ndarray):
                arr = np.take(arr, p, axis=k)
            elif p.step == -1:
                arr = arr[(slice(None),) * k + (p,)]
        for fv in fills:
            arr[arr == arr.dtype.type(fv)] = np.nan
        kept = [d for d, i in zip(dims, index) if not isinstance(i, int)]
        if kept != list(self.dims):
            arr = np.transpose(arr, [kept.index(d) for d in self.dims])
        if self.factor != 1.0 or self.offset != 0.0:
            arr = arr.astype(np.float64) * self.factor + self.offset
        return arr

    def _fast_variable(self, nc):
        """The variable :meth:`read_fast` reads, or None when it needs more than raw values."""
        if self.stream is not None or self.hybrid is not None or self.ground is not None \
                or self.name not in nc.variables:
            return None
        var = nc.variables[self.name]
        if var.dtype.kind != "f" or any(a in var.ncattrs() for a in ("scale_factor", "add_offset")):
            return None
        return var

    def prefetch_fast(self, nc, t0, t1):
        """Start fetching what :meth:`read_fast` will read, where ``nc`` can (an object in object
        storage: :meth:`circtrack.inputs.remote.RawObject.prefetch`); does nothing otherwise."""
        start = getattr(type(nc), "prefetch", None)      # the class's: netCDF4 serves file attributes as attributes
        var = self._fast_variable(nc) if start is not None else None
        if var is not None:
            start(nc, self.name, _fast_index(var.dimensions, self.time_dim, self.selection, t0, t1)[0])

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
            arr, provisional = S.combine_streams(arr, st["order"], st["final"])
            notes[provisional] = S.PROVISIONAL
        elif st and st["kind"] == "coord":
            labels = np.asarray(ds[st["name"]].isel({self.time_dim: slice(int(t0), int(t1))}).values).ravel()
            notes[[not S.is_final_stream(x) for x in labels]] = S.PROVISIONAL
        elif st and st["kind"] == "scalar":
            notes[:] = S.PROVISIONAL
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
            notes = S.merge_notes([notes, ps_notes])
        if self.ground is not None:
            ps = np.asarray(self.ground.read_noted(ds, t0, t1)[0], dtype=np.float64)
            if ps.ndim < arr.ndim:
                ps = ps.reshape(ps.shape[:1] + (1,) * (arr.ndim - ps.ndim) + ps.shape[1:])
            arr = np.where(ps < self.from_level_hpa, np.nan, arr)
        return arr, notes


FILL_ATTRS = ("_FillValue", "missing_value")


def fill_values(values):
    """The finite fill values among the raw ``_FillValue`` / ``missing_value`` attribute values, in order."""
    return [fv for v in values for fv in np.atleast_1d(v) if np.isfinite(fv)]


def _fast_index(dims, time_dim, selection, t0, t1):
    """``(index, post)`` for reading a reader's selection from a netCDF4 variable with dimensions
    ``dims``: what to read (ints, slices, or index lists read level by level) and what to apply to
    the array read (reversals as views, a reordering of a long index list)."""
    index, post = [], []
    for d in dims:
        if d == time_dim:
            index.append(slice(int(t0), int(t1)))
            post.append(slice(None))
            continue
        v = selection.get(d)
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
    return index, post


def _read_direct(nc, name, index):
    """``nc[name][index]`` with the chunks decoded by inputs/chunks.py (deflate-compressed or
    unfiltered netCDF4 files on disk, deflate-compressed objects in object storage), else None. ``index`` is updated as :func:`_read_hyperslabs` does."""
    remote_read = getattr(type(nc), "read_direct", None)     # an object in object storage (remote.RawObject)
    if remote_read is not None:
        arr = remote_read(nc, name, index)
    elif not str(getattr(nc, "data_model", "")).startswith("NETCDF4"):
        return None
    else:
        try:
            path = nc.filepath()
        except (AttributeError, ValueError):
            return None
        arr = CH.read(path, name, index)
    return _lists_read(arr, index)


def _lists_read(arr, index):
    """After a read of ``index`` that gave ``arr`` (None: nothing read), its index lists are plain
    axes of ``arr``: ``index`` is updated to say so, as :func:`_read_hyperslabs` does."""
    if arr is not None:
        for k, i in enumerate(index):
            if isinstance(i, list):
                index[k] = slice(0, len(i))          # now a plain axis of arr
    return arr


def _read_hyperslabs(var, index):
    """``var[index]``, an index list read as one hyperslab per element (``index`` is updated to
    describe the array read: the list becomes a plain axis)."""
    scattered = [k for k, i in enumerate(index) if isinstance(i, list)]
    if not scattered:
        return var[tuple(index)]
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
    return arr
