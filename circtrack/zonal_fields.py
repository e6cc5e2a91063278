"""The zonal-mean fields behind the indices, written as CF netCDF (``circtrack zonal-means``).

For every variable the run finds (the roles of the metrics its files can feed), on every pressure
level of the file: the mean over valid longitudes and the share of valid longitudes, per time step
(and member, and sector when sectors are given), plus the mass streamfunction computed from the
northward wind by the very function the cells family uses (``metrics.cells.streamfunction``), so
its convention, balance and top rule are the engine's. Everything is read by the engine's own
readers and tasks, batch by batch, and each batch is appended to the file before the next one is
read: memory is bounded by a batch, not by the record. The file appears atomically (temp file in
the same directory, fsync, rename).

Layout: dimensions ``time`` (unlimited), ``member`` for members in files of their own (as ``track``
tells them apart), extra input dimensions (e.g. ``member``), ``sector`` (only
with sectors; ``zonal`` first), ``plev`` (hPa, top first; ``plev_ROLE`` when roles differ in levels),
``lat`` (ascending). Variables ``ROLE`` (CMIP short name), ``ROLE_coverage`` and ``psi``.
"""

from __future__ import annotations

import os
import sys

import numpy as np

from circtrack.errors import InputError

STANDARD_NAMES = {
    "ua": "eastward_wind", "va": "northward_wind", "ta": "air_temperature", "zg": "geopotential_height",
    "hus": "specific_humidity", "ps": "surface_air_pressure", "uas": "eastward_wind", "vas": "northward_wind",
    "psl": "air_pressure_at_mean_sea_level", "pr": "precipitation_flux",
    "evspsbl": "water_evapotranspiration_flux", "rlut": "toa_outgoing_longwave_flux",
}


def role_attrs(role):
    """(standard_name, units, description) of a role: the units are those the readers convert to."""
    from circtrack.inputs.rules import VARIABLES
    from circtrack.inputs.units import CANONICAL

    rule = VARIABLES.get(role, {})
    return STANDARD_NAMES.get(role, ""), CANONICAL.get(rule.get("kind"), ""), rule.get("long", role)


def _plan(paths, cfg, overrides, sectors, label, on_bad_file, progress):
    """The engine runs reading every role found, on every level, without the in-task reducers:
    ``[(member or None, Run)]``, one per member when each member comes in files of its own."""
    from circtrack import engine

    # sectors are added after planning: here they apply to every field, also those whose metrics
    # are defined for the whole circle only (the streamfunction of a sector is a diagnostic too)
    sectors = engine.merge_sectors(sectors, cfg)
    cfg = {**cfg, "sectors": {}}
    probe = engine.Run(paths, cfg, overrides=overrides, label=label, on_bad_file=on_bad_file)
    kw = dict(metric_ids=probe.plan.metric_ids, roles=tuple(probe.plan.roles), overrides=overrides, label=label,
              on_bad_file=on_bad_file, sectors=sectors, progress=progress)
    groups = engine.member_groups(probe.infos)
    if not groups:
        return [(None, _run(paths, cfg, **kw))]
    runs = [(m, _run(groups[m], cfg, **kw)) for m in sorted(groups)]
    first = [engine.iso_time(t) for t in runs[0][1].times]
    for m, run in runs[1:]:
        if [engine.iso_time(t) for t in run.times] != first:
            raise InputError(f"{run.infos[0].path}: member {m} has other time steps than member {runs[0][0]} "
                             f"({run.times.size} against {len(first)}); give files covering the same period")
    return runs


def _run(paths, cfg, *, metric_ids, roles, overrides, label, on_bad_file, sectors, progress):
    from circtrack import engine
    from circtrack.engine.sectors import masks_per_input

    run = engine.Run(paths, cfg, metric_ids=metric_ids, overrides=overrides, label=label,
                     on_bad_file=on_bad_file, all_levels=roles)
    if progress is not None:
        run.progress = progress
    rp = run.record
    rp.plan.reducers = {}             # only the zonal statistics: no eddy covariances, no Fourier sums
    rp.sectors = sectors
    rp.masks_of = masks_per_input(rp.infos, sectors)
    return run


def streamfunction_of(stats_va, lat, plev_va, cfg):
    """psi ``(bt, *extra, L, J, S)`` from the va statistics, per sector, through the cells family's
    own function (with the run's configuration, so its column rules are those of 'track')."""
    from circtrack.metrics.cells import streamfunction
    from circtrack.metrics.common import Fields

    shape = stats_va.shape                      # (bt, *extra, L, J, S, 2)
    out = np.empty(shape[:-1], float)
    lead = shape[:-4]
    for s in range(shape[-2]):
        mean = stats_va[..., s, 0].reshape((-1,) + shape[-4:-2])
        cov = stats_va[..., s, 1].reshape((-1,) + shape[-4:-2])
        fields = Fields(lat=lat, plev={"va": plev_va}, mean={"va": mean}, coverage={"va": cov})
        psi = streamfunction(fields, cfg)
        out[..., s] = np.asarray(psi).reshape(lead + shape[-4:-2])
    return out


class _Writer:
    """The netCDF file, created on the first batch and appended to along ``time``."""

    def __init__(self, path, run, argv, members=None, inputs=None):
        import netCDF4

        self.run = run
        self.members = members         # one member per file: a 'member' dimension of these labels
        self.inputs = inputs or sorted({r.path for i in run.infos for r in i.readers.values()})
        self.path = os.path.realpath(path)          # a symbolic link is written through, as for every output
        self.tmp = os.path.join(os.path.dirname(self.path), "." + os.path.basename(self.path) + ".tmp")
        self.nc = netCDF4.Dataset(self.tmp, "w", format="NETCDF4")
        self.vars = {}
        self._define(argv)

    def _define(self, argv):
        from circtrack import __version__

        run, nc = self.run, self.nc
        info = run.infos[0]
        det = info.detected
        nc.setncatts({
            "Conventions": "CF-1.8",
            "title": "zonal means of the variables circtrack found, and the mass streamfunction",
            "source": str(run.label or _derived_source(run)),
            "history": " ".join(argv),
            "circtrack_version": __version__,
            "input_files": ", ".join(self.inputs),
            "streamfunction": "psi as in 'circtrack track' (metrics.cells.streamfunction; see 'circtrack "
                              "metrics' for hadley_strength): positive = clockwise with north to the right",
            "zonal_mean": "mean over the longitudes with valid values; ROLE_coverage is their share",
        })
        nc.createDimension("time", None)
        t = nc.createVariable("time", "f8", ("time",))
        first = run.times[0] if run.times.size else None
        self.calendar = str(det.calendar or "standard")
        self.time_units = f"days since {_iso_units(first)}"
        t.setncatts({"standard_name": "time", "units": self.time_units, "calendar": self.calendar, "axis": "T"})
        self.extra = (["member"] if self.members else []) + list(det.extra_dims)
        if self.members and "member" in det.extra_dims:
            raise InputError(f"{info.path}: members both across files ({', '.join(self.members)}) and inside the "
                             "files along 'member'; give the files of one of the two kinds")
        dims = {**({"member": np.array(self.members, dtype=object)} if self.members else {}), **det.extra_dims}
        for name, values in dims.items():
            values = np.asarray(values)
            nc.createDimension(name, values.size)
            kind = "str" if values.dtype.kind in "OUS" else values.dtype
            v = nc.createVariable(name, str if kind == "str" else kind, (name,))
            v[:] = values.astype(str) if kind == "str" else values
        self.sector = ["sector"] if run.sectors else []
        if run.sectors:
            names = ["zonal"] + [s[0] for s in run.sectors]
            nc.createDimension("sector", len(names))
            v = nc.createVariable("sector", str, ("sector",))
            v[:] = np.array(names, dtype=object)
            v.long_name = "longitude band: zonal (the whole circle) or the named sector"
            v.bounds_degrees_east = "; ".join(f"{n}={a:g}:{b:g}" for n, a, b in run.sectors)
        lat = np.sort(np.asarray(det.lat, float))
        nc.createDimension("lat", lat.size)
        v = nc.createVariable("lat", "f8", ("lat",))
        v[:] = lat
        v.setncatts({"standard_name": "latitude", "units": "degrees_north", "axis": "Y"})
        self.lat = lat
        self._define_roles(info)

    def _define_roles(self, info):
        nc = self.nc
        level_sets = {r: tuple(np.asarray(info.plev[r], float)) for r in self.run.plan.roles
                      if info.plev.get(r) is not None and np.size(info.plev[r])}
        one = len(set(level_sets.values())) <= 1
        self.level_dim = {}
        for role, levels in level_sets.items():
            dim = "plev" if one else f"plev_{role}"
            self.level_dim[role] = dim
            if dim not in nc.dimensions:
                nc.createDimension(dim, len(levels))
                v = nc.createVariable(dim, "f8", (dim,))
                v[:] = np.array(levels)
                v.setncatts({"standard_name": "air_pressure", "units": "hPa", "positive": "down", "axis": "Z"})
        self.plev = {r: np.array(v) for r, v in level_sets.items()}
        lead = ("time", *self.extra, *self.sector)
        for role in self.run.plan.roles:
            dims = lead + ((self.level_dim[role],) if role in self.level_dim else ()) + ("lat",)
            std, units, long = role_attrs(role)
            v = nc.createVariable(role, "f8", dims, zlib=True, complevel=1, fill_value=np.nan)
            v.setncatts({k: x for k, x in (("standard_name", std), ("units", units),
                                           ("long_name", f"zonal mean of the {long} over valid longitudes"),
                                           ("cell_methods", "lon: mean (valid points)")) if x})
            c = nc.createVariable(f"{role}_coverage", "f8", dims, zlib=True, complevel=1, fill_value=np.nan)
            c.setncatts({"units": "1", "long_name": f"share of longitudes with a valid {role} value"})
            self.vars[role] = (v, c)
        if "va" in self.level_dim:
            dims = lead + (self.level_dim["va"], "lat")
            p = self.nc.createVariable("psi", "f8", dims, zlib=True, complevel=1, fill_value=np.nan)
            p.setncatts({"units": "kg s-1", "long_name": "mass streamfunction of the zonal-mean meridional "
                         "circulation, as computed by circtrack track",
                         "comment": "psi = 2 pi a cos(lat)/g * integral of [v] dp from the top; the exact "
                         "convention (column balance, top rule) is that of the cells family"})
            self.vars["psi"] = (p, None)

    def append(self, t0, t1, stats, member=None):
        """Write batch ``t0:t1`` (of member index ``member`` when members come one per file)."""
        import cftime

        at = (slice(t0, t1),) if member is None else (slice(t0, t1), member)
        self.nc["time"][t0:t1] = cftime.date2num(list(self.run.times[t0:t1]), self.time_units, self.calendar)
        for role, (v, c) in self.vars.items():
            if role == "psi":
                continue
            a = stats[role]                             # (bt, *extra, [L], J, S, 2)
            v[at] = self._order(a[..., 0])
            c[at] = self._order(a[..., 1])
        if "psi" in self.vars:
            psi = streamfunction_of(stats["va"], self.lat, self.plev["va"], self.run.cfg)
            self.vars["psi"][0][at] = self._order(psi)

    def _order(self, a):
        """(bt, *extra, [L], J, S) -> (bt, *extra, [S], [L], J); the sector axis only with sectors."""
        if self.sector:
            nlead = 1 + len(self.extra) - (1 if self.members else 0)
            return np.moveaxis(a, -1, nlead)
        return a[..., 0]

    def close(self, ok):
        self.nc.close()
        if ok:
            with open(self.tmp, "rb") as f:
                os.fsync(f.fileno())
            os.replace(self.tmp, self.path)
        elif os.path.exists(self.tmp):
            os.unlink(self.tmp)


def _derived_source(run):
    from circtrack.engine import derive_source

    try:
        return derive_source([i.path for i in run.infos], dict(run.infos[0].detected.attrs))
    except Exception:          # the name is a courtesy; never fail a run over it
        return ""


def _iso_units(t):
    from circtrack.engine import iso_time

    if t is None:
        return "1970-01-01 00:00:00"
    text = iso_time(t)
    return text.replace("T", " ") + ("" if "T" in text else " 00:00:00")


def write(paths, out, cfg, *, overrides=None, sectors=(), label=None, on_bad_file=None, progress=None, argv=None):
    """Write the zonal-mean fields of ``paths`` to the netCDF file ``out``; returns the run."""
    runs = _plan(paths, cfg, overrides, sectors, label, on_bad_file, progress)
    run = runs[0][1]
    if not run.times.size:
        raise InputError(f"{paths[0]}: no time steps to write")
    members = [m for m, _ in runs] if runs[0][0] is not None else None
    from circtrack.engine.reduce import NC_LOCK

    inputs = sorted({rd.path for _, r in runs for i in r.infos for rd in i.readers.values()})
    # netCDF-C/HDF5 are not thread-safe: the next batch may be read in a thread of this process
    # (scheduler "threads" or "sync") while this one is written, so writes take the readers' lock
    with NC_LOCK:
        writer = _Writer(out, run, argv if argv is not None else ["circtrack", *sys.argv[1:]], members=members,
                         inputs=inputs)
    ok = False
    try:
        for k, (m, r) in enumerate(runs):
            for t0, t1, stats in r.zonal_batches():
                with NC_LOCK:
                    writer.append(t0, t1, stats, member=None if m is None else k)
        ok = True
    finally:
        with NC_LOCK:
            writer.close(ok)
    return run
