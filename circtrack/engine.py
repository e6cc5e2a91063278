"""The streaming pipeline: open lazily, reduce to zonal (and sector) means per time chunk, detect.

Only the variables and levels the chosen metrics need are read. Each dask task reads one time
chunk of one variable and returns its zonal statistics (mean of valid points and the fraction of
valid longitudes, per sector), so everything after the read is small. The reduced arrays are
computed in batches of chunks, the metric families run on each batch in numpy, and tidy rows come
out. Memory is bounded by the batch, never by the record length.
"""

from __future__ import annotations

import os
import sys
import time as _time
from dataclasses import dataclass, field

import dask
import dask.array as da
import numpy as np

from circtrack import registry
from circtrack.errors import InputError, UsageError
from circtrack.inputs import dataset as D
from circtrack.inputs.files import expand
from circtrack.inputs.rules import VARIABLES
from circtrack.metrics.common import Fields


# --------------------------------------------------------------------------- sectors
def parse_sector(text):
    """``NAME=LON0:LON1`` -> (name, lon0, lon1)."""
    try:
        name, rng = text.split("=", 1)
        a, b = rng.split(":", 1)
        lon0, lon1 = float(a), float(b)
    except ValueError:
        raise UsageError(f"--sector '{text}': expected NAME=LON0:LON1 in degrees east, e.g. pacific=150:240")
    name = name.strip()
    if not name or name == "zonal" or not name.replace("_", "").replace("-", "").isalnum():
        raise UsageError(f"--sector '{text}': the name must be letters, digits, '_' or '-' and not 'zonal'")
    if (lon1 - lon0) % 360.0 == 0.0:
        raise UsageError(f"--sector '{text}': the band is empty or the full circle; use two different longitudes")
    return name, lon0, lon1


def sector_mask(lon, lon0, lon1):
    """Longitudes inside the band going east from lon0 to lon1 (any convention, may cross 0 or 180)."""
    width = (lon1 - lon0) % 360.0
    return ((np.asarray(lon, float) - lon0) % 360.0) <= width + 1e-9


# --------------------------------------------------------------------------- reduction
def _zonal_block(block, masks):
    """Zonal statistics of one chunk ``(..., lon)`` -> ``(..., S, 2)``: mean of valid, valid share.

    The NaN check runs once per chunk; chunks without missing values take the plain mean.
    The first mask is the full circle (``None``).
    """
    out = np.empty(block.shape[:-1] + (len(masks), 2), dtype=np.float64)
    finite = np.isfinite(block)
    all_ok = bool(finite.all())
    for s, m in enumerate(masks):
        part = block if m is None else block[..., m]
        if all_ok:
            out[..., s, 0] = part.mean(axis=-1, dtype=np.float64)
            out[..., s, 1] = 1.0
        else:
            f = finite if m is None else finite[..., m]
            cnt = f.sum(axis=-1)
            tot = np.where(f, part, 0.0).sum(axis=-1, dtype=np.float64)
            with np.errstate(invalid="ignore", divide="ignore"):
                out[..., s, 0] = np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan)
            out[..., s, 1] = cnt / part.shape[-1]
    return out


def zonal_stats(arr, lon, sectors):
    """Dask array ``(time, ..., lat, lon)`` -> ``(time, ..., lat, S, 2)``; S = 1 + number of sectors."""
    masks = [None] + [sector_mask(lon, a, b) for _, a, b in sectors]
    nd = arr.ndim
    return da.map_blocks(_zonal_block, arr, masks, dtype=np.float64, drop_axis=nd - 1,
                         new_axis=[nd - 1, nd], chunks=arr.chunks[:-1] + ((len(masks),), (2,)))


# --------------------------------------------------------------------------- planning
@dataclass
class Plan:
    metric_ids: list
    families: list
    roles: dict            # role -> levels (None for all)

    @classmethod
    def make(cls, metric_ids, cfg, sectors):
        cat = registry.catalogue()
        fams = registry.families()
        if metric_ids is None:
            metric_ids = list(cat)
        unknown = [m for m in metric_ids if m not in cat]
        if unknown:
            raise UsageError(f"unknown metric id(s) {', '.join(unknown)}; 'circtrack metrics' lists the ids")
        chosen = [f for f in fams.values() if any(m.id in metric_ids for m in f.metrics)]
        if sectors:
            zonal_only = [m for m in metric_ids if not cat[m].sectors]
            if zonal_only and len(zonal_only) == len(metric_ids):
                raise UsageError(f"{', '.join(zonal_only)} are defined for the full zonal mean only "
                                 "(the streamfunction needs the whole latitude circle); drop --sector or choose "
                                 "sector metrics such as eddy_jet_lat")
        roles = {}
        for f in chosen:
            for role, lev in f.levels(cfg).items():
                if role in roles and (roles[role] is None or lev is None):
                    roles[role] = None
                elif role in roles:
                    roles[role] = sorted(set(roles[role]) | set(lev))
                else:
                    roles[role] = lev
        return cls(metric_ids, chosen, roles)


@dataclass
class FileInfo:
    path: str
    detected: D.Detected
    arrays: dict = field(default_factory=dict)     # role -> dask stats array
    plev: dict = field(default_factory=dict)       # role -> hPa levels


def _stat(path):
    st = os.stat(path) if os.path.isfile(path) else None
    return {"path": os.path.abspath(path), "size": st.st_size if st else None,
            "mtime": int(st.st_mtime) if st else None}


def _prepare_file(path, plan, cfg, sectors, overrides):
    ds = D.open_dataset(path, cfg)
    det = D.detect(ds, path, overrides)
    if "time" not in det.coords:
        raise InputError(f"{path}: no time axis found; name it 'time' or give it CF units ('days since ...')")
    for key in ("lat", "lon"):
        if key not in det.coords:
            raise InputError(f"{path}: no {'latitude' if key == 'lat' else 'longitude'} axis found; name it "
                             f"'{key}' or give it units '{'degrees_north' if key == 'lat' else 'degrees_east'}'")
    info = FileInfo(path, det)
    for role, levels in plan.roles.items():
        if role not in det.variables:
            hint = det.problems.get(role) or "no variable matched"
            raise InputError(f"{path}: {VARIABLES[role]['long']} ({role}) not found ({hint}); "
                             f"add --var {role}=NAME or '{role} = \"NAME\"' under [variables] in the config "
                             f"('circtrack scan {path}' lists the variables)")
        arr, plev = D.standardise(ds, det, role, levels, cfg)
        info.arrays[role] = zonal_stats(arr.data, det.lon, sectors)
        info.plev[role] = plev
    return info


def _calendar(name):
    name = str(name).lower()
    return "standard" if name == "gregorian" else name


def _available_metrics(files, cfg, overrides, policy):
    """Without --metrics: every metric whose inputs the first readable file holds."""
    for p in files:
        try:
            ds = D.open_dataset(p, cfg)
            try:
                det = D.detect(ds, p, overrides)
            finally:
                ds.close()
            D.require_axes(det)
        except InputError:
            if policy == "skip":           # reported when the file is prepared
                continue
            raise
        ids = [m.id for f in registry.families().values() if set(f.inputs) <= set(det.variables) for m in f.metrics]
        if not ids:
            roles = sorted({r for f in registry.families().values() for r in f.inputs})
            raise InputError(f"{p}: none of the variables the metrics need ({', '.join(roles)}) was found; "
                             f"run 'circtrack scan {p}' and name them with --var ROLE=NAME")
        return ids
    raise InputError(f"{files[0]}: no readable input among {len(files)} file(s)")


def _check_consistent(infos):
    first = infos[0]
    lat0 = np.sort(first.detected.lat)
    for inf in infos[1:]:
        lat = np.sort(inf.detected.lat)
        if lat.shape != lat0.shape or not np.allclose(lat, lat0, atol=1e-4):
            raise InputError(f"{inf.path}: its latitude grid ({lat.size} points) differs from {first.path} "
                             f"({lat0.size} points); regrid to one grid or run the files separately")
        for role in first.arrays:
            a, b = first.plev[role], inf.plev[role]
            if (a is None) != (b is None) or (a is not None and (a.shape != b.shape or not np.allclose(a, b))):
                raise InputError(f"{inf.path}: the pressure levels of {role} differ from {first.path}; "
                                 "interpolate to common levels or run the files separately")
        if _calendar(inf.detected.calendar) != _calendar(first.detected.calendar):
            raise InputError(f"{inf.path}: calendar '{inf.detected.calendar}' differs from '{first.detected.calendar}' "
                             f"in {first.path}; files of one run must share a calendar")
        if set(inf.detected.extra_dims) != set(first.detected.extra_dims):
            raise InputError(f"{inf.path}: extra dimensions {sorted(inf.detected.extra_dims)} differ from "
                             f"{sorted(first.detected.extra_dims)} in {first.path}; run them separately")


# --------------------------------------------------------------------------- time formatting
def iso_time(t):
    """ISO 8601 in the data's own calendar: date at midnight, else date and time."""
    y = t.year
    ys = f"{y:04d}" if y >= 0 else f"-{-y:04d}"
    s = f"{ys}-{t.month:02d}-{t.day:02d}"
    if t.hour or t.minute or t.second:
        s += f"T{t.hour:02d}:{t.minute:02d}:{t.second:02d}"
    return s


def derive_source(paths, attrs):
    if attrs.get("source_id"):
        return "_".join(attrs[k] for k in ("source_id", "experiment_id", "variant_label") if attrs.get(k))
    stems = [os.path.basename(p.rstrip("/")).split(".")[0] for p in paths]
    prefix = os.path.commonprefix(stems) if len(stems) > 1 else stems[0]
    prefix = prefix.rstrip("0123456789_-. ") if len(stems) > 1 else prefix
    if len(prefix) >= 3:
        return prefix
    parent = os.path.basename(os.path.dirname(os.path.abspath(paths[0])))
    return parent or "data"


# --------------------------------------------------------------------------- the run
@dataclass
class Outcome:
    columns: dict                 # column name -> numpy array (unsorted)
    key_columns: list
    provenance: dict
    time_order: np.ndarray        # chronological rank per row (for sorting)


class Progress:
    """A bar on a terminal, a few plain lines in logs, nothing with --quiet."""

    def __init__(self, quiet=False, stream=None):
        self.stream = stream or sys.stderr
        self.quiet = quiet
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.t0 = _time.time()

    def line(self, text):
        if not self.quiet:
            print(f"circtrack: {text}", file=self.stream, flush=True)

    def step(self, done, total):
        if self.quiet:
            return
        if self.tty:
            w = 30
            k = int(w * done / max(total, 1))
            print(f"\r[{'#' * k}{'.' * (w - k)}] {done}/{total} time steps", end="", file=self.stream, flush=True)
            if done >= total:
                print(file=self.stream)

    def done(self, rows):
        self.line(f"{rows} rows in {(_time.time() - self.t0):.1f} s")


def track(paths, cfg, *, metric_ids=None, label=None, sectors=(), overrides=None,
          progress=None, on_bad_file=None, stdin=None):
    """Run the chosen metrics over all inputs; returns an :class:`Outcome` of tidy rows."""
    progress = progress or Progress(quiet=True)
    overrides = {**cfg.get("variables", {}), **(overrides or {})}
    sectors = list(sectors) + [(k, float(v[0]), float(v[1])) for k, v in cfg.get("sectors", {}).items()
                               if k not in {s[0] for s in sectors}]
    files = expand(paths, stdin=stdin)
    policy = on_bad_file or cfg["run"]["on_bad_file"]
    if metric_ids is None:
        metric_ids = _available_metrics(files, cfg, overrides, policy)
    plan = Plan.make(metric_ids, cfg, sectors)
    infos, skipped = [], []
    for p in files:
        try:
            infos.append(_prepare_file(p, plan, cfg, sectors, overrides))
        except InputError as e:
            if policy == "skip":
                skipped.append({"path": p, "reason": str(e)})
                print(f"circtrack: skipped {e}", file=sys.stderr, flush=True)
                continue
            raise
    if not infos:
        raise InputError(f"{files[0]}: no usable input among {len(files)} file(s); see the messages above")
    _check_consistent(infos)
    progress.line(f"{len(infos)} file(s), metrics: {', '.join(plan.metric_ids)}")

    # ---- the time axis across files: chronological, duplicated steps dropped (first file wins)
    times = np.concatenate([i.detected.times for i in infos])
    file_of = np.concatenate([np.full(i.detected.times.size, k) for k, i in enumerate(infos)])
    order = np.argsort(times, kind="stable")
    keep, dropped = [], []
    for k in order:
        if keep and times[k] == times[keep[-1]]:
            dropped.append(k)
            continue
        keep.append(k)
    keep = np.array(keep, dtype=int)
    roles = list(plan.roles)
    stats = {r: da.concatenate([i.arrays[r] for i in infos], axis=0) for r in roles}
    if not np.array_equal(keep, np.arange(times.size)):
        stats = {r: a[keep] for r, a in stats.items()}
    times = times[keep]
    lat = np.sort(infos[0].detected.lat)
    plev = {r: infos[0].plev[r] for r in roles}
    extra = infos[0].detected.extra_dims
    extra_names = list(extra)
    n_extra = int(np.prod([len(v) for v in extra.values()])) if extra else 1
    sector_names = ["zonal"] + [s[0] for s in sectors]

    cat = registry.catalogue()
    wanted = set(plan.metric_ids)
    cols = {k: [] for k in ["t", "e", "hemisphere", "sector", "metric", "value", "flag"]}
    nt = times.size
    batch = max(1, int(cfg["run"]["time_chunk"])) * max(4, 2 * (os.cpu_count() or 1))
    for t0 in range(0, nt, batch):
        t1 = min(nt, t0 + batch)
        try:
            computed = dask.compute(*[stats[r][t0:t1] for r in roles])
        except (OSError, RuntimeError, ValueError) as e:
            involved = sorted({infos[file_of[k]].path for k in keep[t0:t1]})
            msg = str(e).splitlines()[0] if str(e) else type(e).__name__
            raise InputError(f"{involved[0]}: reading data failed ({msg}) for time steps {iso_time(times[t0])}.."
                             f"{iso_time(times[t1 - 1])} in {', '.join(involved)}; one of these files is damaged: "
                             "re-copy it or leave it out")
        bt = t1 - t0
        for s, sname in enumerate(sector_names):
            mean, cov = {}, {}
            for r, arr in zip(roles, computed):
                a = arr[..., s, :]
                shp = (bt * n_extra,) + a.shape[1 + len(extra_names):-1]
                mean[r] = a[..., 0].reshape(shp)
                cov[r] = a[..., 1].reshape(shp)
            fields = Fields(lat=lat, plev=plev, mean=mean, coverage=cov, sector=sname)
            tidx = np.repeat(np.arange(t0, t1), n_extra)
            eidx = np.tile(np.arange(n_extra), bt)
            for fam in plan.families:
                if sname != "zonal" and not fam.sectors:
                    continue
                results = fam.compute(fields, cfg)
                for m in fam.metrics:
                    if m.id not in wanted:
                        continue
                    res = results[m.id]
                    for h, hemi in enumerate(registry.hemispheres(m)):
                        cols["t"].append(tidx)
                        cols["e"].append(eidx)
                        cols["hemisphere"].append(np.full(tidx.size, hemi, dtype=object))
                        cols["sector"].append(np.full(tidx.size, sname, dtype=object))
                        cols["metric"].append(np.full(tidx.size, m.id, dtype=object))
                        cols["value"].append(res.value[:, h])
                        cols["flag"].append(res.flag[:, h].astype(object))
        progress.step(t1, nt)

    flat = {k: (np.concatenate(v) if v else np.array([], dtype=object)) for k, v in cols.items()}
    iso = np.array([iso_time(t) for t in times], dtype=object)
    source = label or derive_source([i.path for i in infos], infos[0].detected.attrs)
    out = {"source": np.full(flat["t"].size, source, dtype=object), "time": iso[flat["t"]] if nt else flat["t"]}
    if extra_names:
        grids = np.meshgrid(*[np.arange(len(v)) for v in extra.values()], indexing="ij")
        for name, g, vals in zip(extra_names, grids, extra.values()):
            out[name] = np.array([str(x) for x in np.asarray(vals)[g.ravel()]], dtype=object)[flat["e"]]
    out["hemisphere"] = flat["hemisphere"]
    out["sector"] = flat["sector"]
    out["metric"] = flat["metric"]
    out["value"] = flat["value"].astype(float)
    out["units"] = np.array([cat[m].units for m in flat["metric"]], dtype=object)
    out["flag"] = flat["flag"]
    prov = {
        "inputs": [{**_stat(i.path), "variables": i.detected.variables, "units": i.detected.units,
                    "found_by": i.detected.why, "time_steps": int(i.detected.times.size),
                    "first_time": iso_time(i.detected.times[0]) if i.detected.times.size else None,
                    "last_time": iso_time(i.detected.times[-1]) if i.detected.times.size else None,
                    "pressure_levels_hpa": {r: (None if v is None else [float(x) for x in v]) for r, v in i.plev.items()},
                    "pressure_units_in_file": i.detected.plev_units}
                   for i in infos],
        "skipped_inputs": skipped,
        "duplicate_time_steps_dropped": [{"time": iso_time(np.concatenate([i.detected.times for i in infos])[k]),
                                          "path": infos[file_of[k]].path} for k in dropped],
        "calendar": infos[0].detected.calendar,
        "time_span": [iso[0], iso[-1]] if nt else None,
        "time_steps": int(nt),
        "metrics": plan.metric_ids,
        "sectors": {n: [a, b] for n, a, b in sectors},
        "extra_key_columns": extra_names,
    }
    return Outcome(out, ["source", "time", *extra_names, "hemisphere", "sector", "metric"], prov,
                   flat["t"])
