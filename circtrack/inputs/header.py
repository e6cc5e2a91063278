"""A plain netCDF-4 file's header as the dataset detection reads, without xarray.

In: a local file path and the config. Out: a :class:`HeaderDataset` that answers what detection
(:mod:`circtrack.inputs.detect`), :func:`~circtrack.inputs.readers.standardise`,
:func:`~circtrack.inputs.readers.check_grid` and the stream detection ask of an opened
``xarray.Dataset`` -- names, dimensions and their order, sizes, attributes, data types, the
coordinates' values, the decoded time steps -- as xarray's CF decoding would give them; or None when
the file is not plain enough to be sure of that, and the caller opens it with xarray as before.

Why: importing xarray (with pandas) and its first open cost about half a second of every run's
start-up, while the planning process only reads names, attributes and coordinates. Files detected
this way give the same :class:`~circtrack.inputs.detect.Detected` record and readers
(``tests/test_header_detection.py`` compares them with xarray's on every layout the tests write).

Plain means: netCDF-4 (HDF5) without groups; numeric variables only, in native byte order; no packing
or unsigned flags (``scale_factor``, ``add_offset``, ``_Unsigned``), no ``dtype`` attribute; fill
values only on floating-point variables of two dimensions or more (xarray masks them in the same
type: only attributes move); time axes (units containing "since") finite, without fill values, and
decoded by cftime's ``num2date`` exactly as xarray's coder calls it (``only_use_cftime_datetimes``);
no "months since", no year 0, no ``--units time/calendar`` (those take :mod:`circtrack.inputs.times`).
Anything else, or any question the header cannot answer (the values of a data variable, a dimension
without a coordinate variable), raises :class:`NeedsFullOpen` and the caller starts again with xarray.
"""

from __future__ import annotations

import os

import numpy as np

MASK_ATTRS = ("_FillValue", "missing_value")
REFUSED_ATTRS = {"scale_factor", "add_offset", "_Unsigned", "_Encoding", "dtype"}
SMALL = 1 << 16          # two-dimensional variables up to this many values (e.g. time or cell bounds) are read
LARGE = 1 << 22          # one-dimensional variables up to this many values (coordinates, time axes) are read


class NeedsFullOpen(Exception):
    """The header cannot stand for xarray's view of the file here: open it with xarray."""


class HeaderVariable:
    """One variable as xarray decodes it: dims, shape, dtype, attrs (without the attributes CF
    decoding moves to ``encoding``), encoding, and values where the header holds them."""

    def __init__(self, name, dims, shape, dtype, attrs, encoding, values, coords=()):
        self.name, self.dims, self.shape, self.dtype = name, tuple(dims), tuple(shape), dtype
        self.attrs, self.encoding, self._values, self.coords = attrs, encoding, values, tuple(coords)

    @property
    def ndim(self):
        return len(self.dims)

    @property
    def size(self):
        return int(np.prod(self.shape, dtype=np.int64))

    @property
    def sizes(self):
        return dict(zip(self.dims, self.shape))

    @property
    def values(self):
        if self._values is None:
            raise NeedsFullOpen(f"values of '{self.name}'")
        return self._values

    def isel(self, indexers, drop=False):
        """Index 0 of size-1 dimensions, dropped (all that readers._squeeze asks)."""
        if not drop or any(v != 0 or self.sizes.get(d) != 1 for d, v in indexers.items()):
            raise NeedsFullOpen(f"selection on '{self.name}'")
        keep = [k for k, d in enumerate(self.dims) if d not in indexers]
        return HeaderVariable(self.name, [self.dims[k] for k in keep], [self.shape[k] for k in keep], self.dtype,
                              self.attrs, self.encoding, None, self.coords)


class HeaderDataset:
    """The xarray.Dataset API detection uses, from the header of a plain netCDF-4 file (module doc)."""

    def __init__(self, attrs, variables, sizes, coord_names):
        self.attrs = attrs
        self.sizes = sizes
        # xarray's orders: the data variables, then the coordinates, each in the file's order; the
        # dimensions in the order of their first use in that sequence
        self.data_vars = tuple(n for n in variables if n not in coord_names)
        self.coords = tuple(n for n in variables if n in coord_names)
        self.variables = {n: variables[n] for n in self.data_vars + self.coords}
        dims = []
        for v in self.variables.values():
            dims += [d for d in v.dims if d not in dims]
        self.dims = tuple(dims)
        for v in variables.values():
            v.coords = tuple(c for c in self.coords if set(variables[c].dims) <= set(v.dims))

    def __getitem__(self, name):
        if name not in self.variables:
            raise NeedsFullOpen(f"'{name}' has no variable")
        return self.variables[name]

    def __contains__(self, name):
        return name in self.variables

    def close(self):
        pass


def open_header(path, cfg):
    """:class:`HeaderDataset` of a plain netCDF-4 file (module doc), or None."""
    from circtrack.inputs import opening

    if cfg["run"]["netcdf_engine"] != "netcdf4" or {"time", "calendar"} & set(cfg.get("units", {})):
        return None
    if not isinstance(path, str) or not os.path.isfile(path) or opening._source_for(path) is not None:
        return None
    try:
        with open(path, "rb") as f:
            if f.read(8) != opening.HDF5_SIGNATURE:
                return None
        import netCDF4
        with netCDF4.Dataset(path, "r") as nc:
            return _from_netcdf(nc)
    except (OSError, RuntimeError, ValueError, KeyError, IndexError, TypeError, UnicodeError, OverflowError):
        return None


def _from_netcdf(nc):
    if nc.groups or not str(nc.data_model).startswith("NETCDF4"):
        return None
    attrs = {a: nc.getncattr(a) for a in nc.ncattrs()}
    if "coordinates" in attrs:
        return None
    raw = {}
    for name, var in nc.variables.items():
        dtype = var.datatype
        if not isinstance(dtype, np.dtype) or dtype.kind not in "fiu" or not dtype.isnative:
            return None
        if dtype.kind == "f" and dtype.itemsize < 4:
            return None                              # xarray decodes float16 to float32
        a = {k: var.getncattr(k) for k in var.ncattrs() if k != "least_significant_digit"}   # (to encoding)
        fills = _fill_values(a)
        if fills is None or REFUSED_ATTRS & set(a) or (fills and (dtype.kind != "f" or var.ndim < 2)) \
                or (dtype.kind != "f" and any(k in a for k in MASK_ATTRS)):
            return None              # masking that changes the type, or the values detection reads
        if name in var.dimensions and var.dimensions != (name,):
            return None
        var.set_auto_maskandscale(False)
        size = int(np.prod(var.shape, dtype=np.int64))
        small = (var.ndim <= 1 and size <= LARGE) or (var.ndim == 2 and size <= SMALL)
        # values with fill values are left to xarray, which masks them (raw here, they would not be)
        values = np.asarray(var[...]) if small and not fills else None
        raw[name] = [var.dimensions, var.shape, dtype, a, values]
    used = {d for r in raw.values() for d in r[0]}
    if used and all(str(d).startswith("phony_dim_") for d in used):
        return None                                  # plain HDF5: opening.py says so in one line
    sizes = {d: len(v) for d, v in nc.dimensions.items() if d in used}     # xarray's: dimensions in use
    times = _time_attributes(raw)
    if times is None:
        return None
    variables, coord_names = {}, set()
    for name, (dims, shape, dtype, a, values) in raw.items():
        a = {k: v for k, v in a.items() if k not in MASK_ATTRS}
        encoding = {}
        if name in times:
            values = _decode_times(raw, name, times[name])
            if values is None:
                return None
            dtype = np.dtype(object)
            for k in ("units", "calendar"):          # (bounds: those of their time axis, as xarray gives them)
                a.pop(k, None)
                if k in times[name]:
                    encoding[k] = times[name][k]
        if "coordinates" in a:
            names = [c for c in str(a["coordinates"]).split() if c in raw]
            encoding["coordinates"] = a.pop("coordinates")
            coord_names.update(names)
        if len(dims) == 1 and dims[0] == name:
            coord_names.add(name)
        variables[name] = HeaderVariable(name, dims, shape, dtype, a, encoding, values)
    return HeaderDataset(attrs, variables, sizes, coord_names)


def _fill_values(attrs):
    """The fill values xarray masks (those not NaN), or None when one is not a number."""
    out = set()
    for k in MASK_ATTRS:
        if k in attrs:
            v = np.ravel(attrs[k])
            if v.dtype.kind not in "iuf":
                return None
            out |= {x for x in v.tolist() if x == x}
    return out


def _time_attributes(raw):
    """``{name: attrs}`` of the variables xarray decodes as dates (units containing "since", time
    bounds given their axis's units and calendar as xarray does); None for what only xarray or
    :mod:`circtrack.inputs.times` decodes."""
    from circtrack.inputs.times import year_zero_time

    attrs = {name: dict(r[3]) for name, r in raw.items()}
    for name, a in list(attrs.items()):
        units = a.get("units")
        if isinstance(units, str) and "since" in units and "bounds" in a and a["bounds"] in attrs:
            bounds = attrs[a["bounds"]]
            bounds.setdefault("units", a["units"])
            if "calendar" in a:
                bounds.setdefault("calendar", a["calendar"])
    out = {}
    for name, a in attrs.items():
        units = a.get("units")
        if not (isinstance(units, str) and "since" in units):
            continue
        calendar = a.get("calendar", "standard")
        if _fill_values(a) != set() or not isinstance(calendar, str) \
                or units.strip().lower().startswith("months") or year_zero_time(units, calendar):
            return None
        out[name] = a
    return out


def _decode_times(raw, name, attrs):
    """The dates of a time variable as xarray's coder gives them (cftime for every calendar), or None."""
    dims, shape, _, _, values = raw[name]
    if values is None:
        return None
    values = np.asarray(values)
    if values.dtype.kind not in "iuf" or not np.all(np.isfinite(values)):
        return None
    flat = values.ravel()
    dates = num2date(flat, attrs["units"], attrs.get("calendar", "standard")) if flat.size else np.array([], dtype=object)
    return None if dates is None else dates.reshape(values.shape)


def num2date(values, units, calendar):
    """cftime dates of ``values`` (object array) for every calendar, as xarray's coder gives them, or None."""
    import cftime

    try:
        out = cftime.num2date(values, units, calendar=calendar, only_use_cftime_datetimes=True)
    except (ValueError, TypeError, OverflowError):
        return None
    return np.asarray(out, dtype=object)
