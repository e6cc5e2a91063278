"""The streaming pipeline: plan, read and reduce per time chunk in workers, detect, tidy rows.

Only the variables and levels the chosen metrics need are read. The parent process opens each
file once for its coordinates, builds a picklable :class:`~circtrack.inputs.dataset.RoleReader`
per role and closes it again. Each task (one dask.delayed call of :func:`reduce_chunk`) opens its
file inside the worker, reads one time chunk of every role the metrics need, and returns its
zonal statistics (mean of valid points and the fraction of valid longitudes, per sector) plus the
families' own reductions (products, per-longitude features); everything after the read is small.
Tasks run in worker processes by default, because HDF5 decompresses one call at a time per
process (see DEVELOPERS.md). Results are gathered in batches, the metric families run on each
batch in numpy, and tidy rows come out. Memory is bounded by the batch, never by the record length.
"""

from __future__ import annotations

import collections
import copy
import functools
import multiprocessing
import os
import re
import signal
import sys
import threading
import time as _time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field

import dask
import numpy as np

from circtrack import registry
from circtrack.flags import note_summary
from circtrack.errors import InputError, UsageError
from circtrack.inputs import dataset as D
from circtrack.inputs.files import expand, same_period_siblings
from circtrack.inputs.rules import VARIABLES
from circtrack.lowpass import setup as _lowpass_setup
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

    One pass for clean data: the plain mean is taken first, and only rows whose mean is not finite
    (a NaN or inf among their longitudes, e.g. below ground) are redone counting valid points.
    The first mask is the full circle (``None``).
    """
    out = np.empty(block.shape[:-1] + (len(masks), 2), dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        for s, m in enumerate(masks):
            part = block if m is None else block[..., m]
            mean = part.mean(axis=-1, dtype=np.float64)
            out[..., s, 0] = mean
            out[..., s, 1] = 1.0
            bad = ~np.isfinite(mean)
            if bad.any():
                rows = part[bad]                              # (n_bad, lon): only the doubtful rows
                f = np.isfinite(rows)
                cnt = f.sum(axis=-1)
                tot = np.where(f, rows, 0.0).sum(axis=-1, dtype=np.float64)
                out[..., s, 0][bad] = np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan)
                out[..., s, 1][bad] = cnt / part.shape[-1]
    return out


def sector_masks(lon, sectors):
    """The full circle (None) first, then one boolean longitude mask per sector."""
    return [None] + [sector_mask(lon, a, b) for _, a, b in sectors]


_OPEN = {}                # (process id, thread id) -> {path: open dataset}, least recently used first
_OPEN_LOCK = threading.Lock()
_OPEN_MAX = 2             # open files per thread of a worker
# netCDF-C/HDF5 are not thread-safe (xarray locks its data reads, but not every open, close or
# attribute read), and HDF5 serialises inside a process anyway: threads of one process open, read
# and close under this lock and only reduce in parallel
_NC_LOCK = threading.RLock()


def _my_open():
    key = (os.getpid(), threading.get_ident())
    with _OPEN_LOCK:
        return _OPEN.setdefault(key, collections.OrderedDict())


def _open_cached(path, cfg, keep=_OPEN_MAX, raw=False):
    """This thread's open handle of ``path`` (threads never share a netCDF handle); ``keep``: how
    many files the current task needs at once (one per file when variables come in several files).
    ``raw``: a plain netCDF4.Dataset for the fast read path (None where it does not apply)."""
    mine = _my_open()
    key = (path, raw)
    if key in mine:
        ds = mine.pop(key)
    else:
        with _NC_LOCK:
            ds = D.open_raw(path, cfg) if raw else D.open_dataset(path, cfg)
            while len(mine) >= 2 * max(_OPEN_MAX, keep):
                old = mine.popitem(last=False)[1]
                if old is not None:
                    old.close()
    mine[key] = ds
    return ds


def _forget(path):
    mine = _my_open()
    for key in [(path, False), (path, True)]:
        ds = mine.pop(key, None)
        if ds is not None:
            try:
                ds.close()
            except Exception:  # noqa: BLE001 - a damaged file may fail to close; it is dropped anyway
                pass


def close_cached():
    """Close every handle this process holds (all threads; call when no task is running)."""
    with _OPEN_LOCK:
        groups = [g for k, g in _OPEN.items() if k[0] == os.getpid()]
        for k in [k for k in _OPEN if k[0] == os.getpid()]:
            del _OPEN[k]
    with _NC_LOCK:
        for g in groups:
            while g:
                ds = g.popitem()[1]
                if ds is not None:
                    ds.close()


def _wants_lat(fn):
    """A reducer may take the ascending latitudes as a keyword ``lat`` (e.g. to locate a maximum)."""
    import inspect
    return "lat" in inspect.signature(fn).parameters


def reduce_chunk(job):
    """One task: read time steps ``t0:t1`` of every role of one file and reduce them.

    ``job`` is a plain dict (path, cfg, readers, t0, t1, masks, reducers) so it pickles cheaply.
    Returns ``{"stats": {role: (t, *extra, [L], J, S, 2)}, "extras": {name: (t, *extra, ..., S)},
    "notes": {"time": (t,) str}}``.
    """
    slabs, notes = {}, []
    # variables may come from several files with the same time steps (one variable per file)
    paths = list(dict.fromkeys([job["path"]] + [r.path for r in job["readers"].values()]))
    with _NC_LOCK:     # one netCDF/HDF5 call at a time per process; the reductions below run freely
        opened = {}
        try:
            for role, reader in job["readers"].items():
                raw = _open_cached(reader.path, job["cfg"], keep=len(paths), raw=True)
                arr = reader.read_fast(raw, job["t0"], job["t1"]) if raw is not None else None
                if arr is not None:
                    slabs[role] = arr
                    notes.append(np.full(arr.shape[0], "", dtype=object))
                    continue
                if reader.path not in opened:
                    opened[reader.path] = _open_cached(reader.path, job["cfg"], keep=len(paths))
                slabs[role], note = reader.read_noted(opened[reader.path], job["t0"], job["t1"])
                notes.append(note)
        except Exception:
            # a damaged file: drop the handles so a retry reopens them, and let the caller name the file
            for p in paths:
                _forget(p)
            raise
    stats = {role: _zonal_block(a, job["masks"]) for role, a in slabs.items()}
    extras = {}
    if job["reducers"]:
        as64 = {r: a.astype(np.float64, copy=False) for r, a in slabs.items()}
        plev = {r: rd.plev for r, rd in job["readers"].items()}
        for name, fn in job["reducers"].items():
            kw = {"lat": job["lat"]} if _wants_lat(fn) else {}     # latitudes for per-longitude features
            extras[name] = np.asarray(fn(as64, plev, job["lon"], job["masks"], job["cfg"], **kw), dtype=np.float64)
    # per time step layout notes (e.g. provisional_data), joined into the rows' flags
    return {"stats": stats, "extras": extras, "notes": {"time": D.merge_notes(notes)}}


def reduce_chunks(jobs):
    """One task over several small chunks (e.g. one-day files), to keep the per-task cost small."""
    pause = os.environ.get("CIRCTRACK_TASK_PAUSE_S")   # test hook: slow tasks down to interrupt them
    if pause:
        _time.sleep(float(pause))
    return [reduce_chunk(j) for j in jobs]


def group_chunks(need, sizes, target, min_groups):
    """Consecutive chunks grouped to about ``target`` time steps per task, but into at least
    ``min_groups`` tasks when there are that many chunks (so every worker has work)."""
    total = sum(sizes[c] for c in need)
    per = max(1, min(target, -(-total // max(1, min_groups))))
    groups, cur, n = [], [], 0
    for c in need:
        cur.append(c)
        n += sizes[c]
        if n >= per:
            groups.append(cur)
            cur, n = [], 0
    if cur:
        groups.append(cur)
    return groups


# --------------------------------------------------------------------------- planning
@dataclass
class Plan:
    metric_ids: list
    families: list
    roles: dict            # role -> levels (None for all)
    reducers: dict = field(default_factory=dict)   # name -> in-task reduction (registry.Family.reducers)

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
                                 "(the streamfunction, Fourier amplitudes and eddy fluxes need the whole circle of longitudes); drop --sector or choose "
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
        reducers = {}
        for f in chosen:
            for name, fn in f.reducers.items():
                if name in reducers and reducers[name] is not fn:
                    raise ValueError(f"reducer {name} declared by two families")
                reducers[name] = fn
        return cls(metric_ids, chosen, roles, reducers)


@dataclass
class FileInfo:
    path: str
    detected: D.Detected
    readers: dict = field(default_factory=dict)    # role -> RoleReader
    plev: dict = field(default_factory=dict)       # role -> hPa levels


def _stat(path):
    st = os.stat(path) if os.path.isfile(path) else None
    return {"path": os.path.abspath(path), "size": st.st_size if st else None,
            "mtime": int(st.st_mtime) if st else None}


def _prepare_file(path, plan, cfg, sectors, overrides):
    """Open once for coordinates and readers, then close: workers reopen by path."""
    ds = D.open_dataset(path, cfg)
    try:
        return _prepare_open(ds, path, plan, cfg, overrides)
    finally:
        ds.close()


def _prepare_open(ds, path, plan, cfg, overrides):
    det = D.detect(ds, path, overrides)
    D.require_axes(det)
    info = FileInfo(path, det)
    missing = []
    for role, levels in plan.roles.items():
        if role not in det.variables:
            sub = D.lowest_level_substitute(ds, det, role, cfg)
            if sub is not None:
                info.readers[role], info.plev[role] = sub, None
                continue
            missing.append(role)
            continue
        reader, plev = D.standardise(ds, det, role, levels, cfg)
        info.readers[role] = reader
        info.plev[role] = plev
    if missing:
        role = missing[0]
        hint = det.problems.get(role) or "no variable matched"
        raise MissingRoles(f"{path}: {VARIABLES[role]['long']} ({role}) not found ({hint}); "
                           f"add --var {role}=NAME or '{role} = \"NAME\"' under [variables] in the config "
                           f"('circtrack scan {path}' lists the variables)", info, missing)
    return info


class MissingRoles(InputError):
    """A file lacks some roles; files with the same time steps may hold them (one variable per file)."""

    def __init__(self, message, info, missing):
        super().__init__(message)
        self.info, self.missing = info, missing


def _join_split_variables(partial, plan):
    """Join files that hold different roles for the same time steps and grid into one input.

    ``partial``: MissingRoles errors in the order the files were given. Returns ``(infos, errors)``:
    joined inputs, and the errors of files whose roles no file with the same time steps supplies.
    """
    groups = collections.OrderedDict()
    for e in partial:
        det = e.info.detected
        key = (tuple(iso_time(t) for t in det.times), _calendar(det.calendar),
               tuple(np.round(np.sort(det.lat), 4)), tuple(np.round(np.sort(np.mod(det.lon, 360.0)), 4)))
        groups.setdefault(key, []).append(e)
    infos, errors = [], []
    for members in groups.values():
        first = members[0].info
        readers, plevs, origin = {}, {}, {}
        for e in members:
            for role, reader in e.info.readers.items():
                if role not in readers:
                    readers[role], plevs[role], origin[role] = reader, e.info.plev[role], e.info
        lacking = [r for r in plan.roles if r not in readers]
        if lacking:
            if len(members) == 1:
                errors.append(members[0])
            else:
                role = lacking[0]
                others = ", ".join(os.path.basename(e.info.path) for e in members[1:])
                errors.append(MissingRoles(
                    f"{first.path}: {VARIABLES[role]['long']} ({role}) is neither in this file nor in the "
                    f"{len(members) - 1} other file(s) with the same time steps ({others}); add the file that holds "
                    f"{role} for these times, or name it with --var {role}=NAME if it is there under another name",
                    first, lacking))
            continue
        det = copy.copy(first.detected)
        det.variables = {r: o.detected.variables[r] for r, o in origin.items()}
        det.units = {r: o.detected.units[r] for r, o in origin.items()}
        det.why = {**first.detected.why, **{r: o.detected.why[r] for r, o in origin.items()}}
        det.layout = {**det.layout, "files": {r: o.path for r, o in origin.items()},
                      "joined_inputs": [_stat(p) for p in dict.fromkeys(o.path for o in origin.values())
                                        if p != first.path]}
        infos.append(FileInfo(first.path, det, readers, plevs))
    return infos, errors


def _without_skip_hint(err):
    """The message of a skipped file, without the advice to skip it."""
    return re.sub(r",?\s*or pass --on-bad-file skip", "", str(err))


def _calendar(name):
    name = str(name).lower()
    return "standard" if name == "gregorian" else name


def _detect_only(path, cfg, overrides):
    """What a file holds (coordinates, variables), opened and closed again."""
    ds = D.open_dataset(path, cfg)
    try:
        return D.detect(ds, path, overrides)
    finally:
        ds.close()


def _available_metrics(files, cfg, overrides, policy):
    """Without --metrics: every metric whose inputs the first readable file holds."""
    for p in files:
        try:
            det = _detect_only(p, cfg, overrides)
            D.require_axes(det)
        except InputError:
            if policy == "skip":           # reported when the file is prepared
                continue
            raise
        found = set(det.variables)
        # one variable per file: the files named like this one but for another variable, same time steps
        for q in same_period_siblings(p, files):
            try:
                qd = _detect_only(q, cfg, overrides)
            except InputError:
                continue
            if qd.times is not None and det.times is not None and qd.times.size == det.times.size \
                    and all(iso_time(a) == iso_time(b) for a, b in zip(qd.times, det.times)):
                found |= set(qd.variables)
        # a variable named with --var or [variables] that is not there is a mistake, not a reason to
        # quietly leave out every metric that needs it
        for role, name in overrides.items():
            if role in VARIABLES and role not in found:
                raise InputError(f"{p}: variable '{name}' given for {role} (--var {role}={name} or [variables]) is not "
                                 f"in the file; 'circtrack scan {p}' lists its variables")
        ids = [m.id for f in registry.families().values() if set(f.inputs) <= found for m in f.metrics]
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
        for role in first.readers:
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


# --------------------------------------------------------------------------- execution
class _Runner:
    """Runs a list of reduce tasks as dask.delayed calls on the chosen scheduler.

    * a dask.distributed client is active (``--workers``/``--scheduler``): its cluster;
    * ``run.scheduler = "processes"`` (default): a pool of forked worker processes, started once
      per run (HDF5 decompresses one call at a time per process, so threads cannot share it);
    * ``"threads"`` or ``"sync"``: dask's threaded or single-threaded scheduler in this process.
    With a single task, or a single core, everything runs in this process.
    """

    def __init__(self, cfg, n_tasks):
        self.mode = str(cfg["run"].get("scheduler", "processes"))
        if self.mode not in ("processes", "threads", "sync"):
            raise UsageError(f"run.scheduler = '{self.mode}' in the config: use processes, threads or sync")
        self.nproc = int(cfg["run"].get("processes") or 0) or (os.cpu_count() or 1)
        self.client = _active_client()
        self.pool = None
        if self.client is None and (n_tasks < 2 or self.nproc < 2) and self.mode == "processes":
            self.mode = "sync"

    def run(self, fn, jobs):
        if not jobs:
            return []
        tasks = [dask.delayed(fn, pure=False, traverse=False)(j) for j in jobs]
        if self.client is not None:
            return list(dask.compute(*tasks))
        if self.mode == "processes":
            if self.pool is None:
                close_cached()   # the children must not inherit open HDF5 handles
                self.pool = ProcessPoolExecutor(max_workers=self.nproc, initializer=_worker_ignores_interrupts,
                                                mp_context=multiprocessing.get_context("fork"))
            # chunksize=1: dask would otherwise hand up to 6 tasks to one worker as a single batch
            return list(dask.compute(*tasks, scheduler="processes", pool=self.pool, chunksize=1))
        return list(dask.compute(*tasks, scheduler=self.mode))

    def close(self, interrupted=False):
        """Shut the pool down; after Ctrl-C or an error the workers are stopped at once."""
        if self.pool is None:
            return
        if interrupted:
            procs = list((getattr(self.pool, "_processes", None) or {}).values())
            for proc in procs:
                proc.terminate()
            for proc in procs:       # gone before we return: they share our open files (e.g. update's lock)
                proc.join(timeout=10)
            self.pool.shutdown(wait=False, cancel_futures=True)
        else:
            self.pool.shutdown(wait=True, cancel_futures=True)
        self.pool = None


def _worker_ignores_interrupts():
    # Ctrl-C reaches the whole process group: the parent stops the workers itself, so workers
    # ignore SIGINT instead of dying half-way with tracebacks of their own
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _active_client():
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client
        return default_client()
    except (ValueError, ImportError):
        return None


def _choose_time_steps(times, last=False, prefer=None):
    """Chronological positions to keep, the repeated ones dropped, and for each its kept twin.

    ``prefer`` (bool per position, e.g. final rather than provisional data): among repeats of a time
    step the preferred positions win, then the file order decides."""
    order = np.argsort(times, kind="stable")
    keep, dropped, partner = [], [], []
    i = 0
    while i < order.size:
        j = i
        while j + 1 < order.size and times[order[j + 1]] == times[order[i]]:
            j += 1
        group = list(order[i:j + 1])
        best = [g for g in group if prefer is None or prefer[g]] or group
        chosen = best[-1] if last else best[0]
        keep.append(chosen)
        for g in group:
            if g != chosen:
                dropped.append(int(g))
                partner.append(int(chosen))
        i = j + 1
    return np.array(keep, dtype=int), dropped, partner


def _gather(cache, kind, name, positions, *, chunk_of, chunks, starts):
    """Rows of the cached chunk results at global ``positions``, in that order (runs are sliced)."""
    parts = []
    i = 0
    while i < len(positions):
        c = int(chunk_of[positions[i]])
        k, a, _ = chunks[c]
        lo = positions[i] - starts[k] - a
        j = i
        while (j + 1 < len(positions) and chunk_of[positions[j + 1]] == c
               and positions[j + 1] == positions[j] + 1):
            j += 1
        parts.append(cache[c][kind][name][lo:lo + (j - i + 1)])
        i = j + 1
    return np.concatenate(parts, axis=0)


def _time_step_days(times):
    """Median spacing of the time axis in days (NaN for a single step)."""
    if times.size < 2:
        return float("nan")
    d = np.diff(times)
    days = np.array([x.total_seconds() / 86400.0 for x in d[: min(d.size, 400)]])
    return float(np.median(days))


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
        self.next_quarter = 1

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
            return
        # logs (cron, batch jobs): one plain line per quarter of the record, none for short runs
        elapsed = _time.time() - self.t0
        while total and done * 4 >= self.next_quarter * total and self.next_quarter < 4:
            if elapsed >= 2.0:
                self.line(f"{done}/{total} time steps ({25 * self.next_quarter} %) after {elapsed:.0f} s")
            self.next_quarter += 1

    def done(self, rows):
        self.line(f"{rows} rows in {(_time.time() - self.t0):.1f} s")


MEMBER_ATTRIBUTES = ("variant_label", "member_id", "realization", "ensemble_member")


def _member_groups(infos):
    """Files per ensemble member when the inputs belong to several members (one member per file,
    told apart by a global attribute such as ``variant_label``); empty otherwise."""
    groups = collections.OrderedDict()
    for inf in infos:
        attrs = inf.detected.attrs
        label = next((str(attrs[a]).strip() for a in MEMBER_ATTRIBUTES if str(attrs.get(a, "")).strip()), None)
        if label is None:
            return {}
        files = [inf.path] + list((inf.detected.layout or {}).get("files", {}).values())
        groups.setdefault(label, []).extend(files)
    if len(groups) < 2:
        return {}
    return {m: list(dict.fromkeys(fs)) for m, fs in groups.items()}


def track(paths, cfg, *, metric_ids=None, label=None, sectors=(), overrides=None,
          progress=None, on_bad_file=None, stdin=None, only_times=None, time_step_days=None):
    """Run the chosen metrics over all inputs; returns an :class:`Outcome` of tidy rows.

    ``only_times`` (ISO strings) and ``time_step_days`` are for ``circtrack update``: see :class:`Run`.
    Files of several ensemble members (one member per file, told apart by a global attribute such
    as ``variant_label``) are run member by member and get a ``member`` key column; otherwise the
    same time step in two members' files would be a conflicting repeat.
    """
    kw = dict(metric_ids=metric_ids, label=label, sectors=sectors, overrides=overrides, progress=progress,
              on_bad_file=on_bad_file, only_times=only_times, time_step_days=time_step_days)
    run = Run(paths, cfg, stdin=stdin, **kw)          # plans: coordinates and attributes only
    groups = _member_groups(run.infos)
    if not groups:
        return run.execute()
    labels = sorted(groups)
    return _merge_members(labels, [Run(groups[m], cfg, **kw).execute() for m in labels], run.skipped)


def _merge_members(labels, outs, skipped=()):
    """One Outcome from per-member Outcomes, with a ``member`` key column after ``time``."""
    first = outs[0]
    names = list(first.columns)
    at = names.index("time") + 1
    names = names[:at] + ["member"] + names[at:]
    cols = {}
    for name in names:
        parts = []
        for m, o in zip(labels, outs):
            n = len(o.columns["metric"])
            if name == "member":
                parts.append(np.full(n, m, dtype=object))
            elif name in o.columns:
                parts.append(np.asarray(o.columns[name], dtype=object if name != "value" else float))
            else:
                raise InputError(f"member {m}: its rows have other key columns than member {labels[0]}'s "
                                 f"({', '.join(o.key_columns)}); run the members separately")
        cols[name] = np.concatenate(parts)
    k = first.key_columns.index("time") + 1
    keys = first.key_columns[:k] + ["member"] + first.key_columns[k:]
    # ISO 8601 dates of one calendar sort as text (years 0000-9999)
    _, rank = np.unique(np.asarray(cols["time"], dtype=str), return_inverse=True)
    prov = dict(first.provenance)
    prov["inputs"] = [i for o in outs for i in o.provenance["inputs"]]
    prov["skipped_inputs"] = list(skipped)
    prov["members"] = {m: {"found_by": "global attribute " + "/".join(MEMBER_ATTRIBUTES),
                           "time_span": o.provenance["time_span"], "time_steps": o.provenance["time_steps"],
                           "inputs": [i["path"] for i in o.provenance["inputs"]]} for m, o in zip(labels, outs)}
    prov["extra_key_columns"] = ["member"] + list(first.provenance.get("extra_key_columns", []))
    return Outcome(cols, keys, prov, rank)


class Run:
    """One run, in two phases.

    Constructing it *plans*: files are opened once for coordinates and closed, readers are built,
    the time axis across files is settled and the tasks (file, time chunk) are laid out. Nothing is
    read then. :meth:`tasks` gives the dask.delayed calls (for inspection); :meth:`execute` computes
    them batch by batch, runs the metric families and returns the tidy :class:`Outcome`.

    For ``circtrack update``: ``only_times`` (a set of ISO time strings) computes only those time
    steps (repeats among the given files are still resolved and compared for them; other chunks are
    never read), and ``time_step_days`` replaces the time step the eddy-flux flags see by that of
    the whole record (of which the given files may be a part). Neither works with the low-pass filter.

    ``all_levels`` (roles) reads those roles on every pressure level, whatever the metrics need; with
    :meth:`zonal_means` this gives the fields behind a latitude-pressure cross-section.
    """

    def __init__(self, paths, cfg, *, metric_ids=None, label=None, sectors=(), overrides=None,
                 progress=None, on_bad_file=None, stdin=None, only_times=None, time_step_days=None,
                 all_levels=()):
        self.cfg = cfg
        if label is not None and any(ch in label for ch in ',"\n\r'):
            clean = " ".join(label.replace(",", " ").replace('"', " ").split())
            raise UsageError(f"--label '{label}': commas, quotes and line breaks would break the CSV's 'source' "
                             f"column; use e.g. --label '{clean}'")
        self.label = label
        self.progress = progress = progress or Progress(quiet=True)
        overrides = {**cfg.get("variables", {}), **(overrides or {})}
        self.sectors = sectors = list(sectors) + [(k, float(v[0]), float(v[1])) for k, v in cfg.get("sectors", {}).items()
                                                  if k not in {s[0] for s in sectors}]
        files = expand(paths, stdin=stdin)
        policy = on_bad_file or cfg["run"]["on_bad_file"]
        if metric_ids is None:
            metric_ids = _available_metrics(files, cfg, overrides, policy)
        self.plan = plan = Plan.make(metric_ids, cfg, sectors)
        for role in all_levels:            # e.g. the cross-section: [u] on every level, not just 200/850 hPa
            plan.roles[role] = None
        infos, self.skipped, partial = [], [], []
        for p in files:
            try:
                infos.append(_prepare_file(p, plan, cfg, sectors, overrides))
            except MissingRoles as e:
                partial.append(e)          # joined below with files holding its other variables
            except InputError as e:
                if policy == "skip":
                    self.skipped.append({"path": p, "reason": str(e)})
                    print(f"circtrack: skipped {_without_skip_hint(e)}", file=sys.stderr, flush=True)
                    continue
                raise
        joined, unmatched = _join_split_variables(partial, plan)
        infos += joined
        for e in unmatched:
            if policy != "skip":
                raise e
            self.skipped.append({"path": e.info.path, "reason": str(e)})
            print(f"circtrack: skipped {_without_skip_hint(e)}", file=sys.stderr, flush=True)
        if not infos:
            raise InputError(f"{files[0]}: no usable input among {len(files)} file(s); see the messages above")
        _check_consistent(infos)
        self.infos = infos
        progress.line(f"{len(infos)} file(s), metrics: {', '.join(plan.metric_ids)}")

        # the time axis across files: chronological; a repeated time step is read from every file
        # that has it and compared: identical repeats are dropped, conflicting ones refused (or
        # resolved by run.repeated_times = "keep-first" / "keep-last", in the order files were given)
        self.times_all = np.concatenate([i.detected.times for i in infos])
        self.file_of = np.concatenate([np.full(i.detected.times.size, k) for k, i in enumerate(infos)])
        self.repeat_policy = cfg["run"].get("repeated_times", "refuse")
        # a time step in a final and in a provisional stream (e.g. expver 0001 and 0005 files): final wins
        self.provisional = np.concatenate([D.provisional_steps(i.detected) for i in infos])
        self.keep, self.dropped, self.partner = _choose_time_steps(self.times_all,
                                                                   last=(self.repeat_policy == "keep-last"),
                                                                   prefer=~self.provisional)
        self.step_days = _time_step_days(self.times_all[self.keep]) if time_step_days is None else time_step_days
        if only_times is not None:
            wanted = np.array([iso_time(t) in only_times for t in self.times_all], dtype=bool)
            pairs = [(d, p) for d, p in zip(self.dropped, self.partner) if wanted[p]]
            self.keep = self.keep[wanted[self.keep]]
            self.dropped, self.partner = [d for d, _ in pairs], [p for _, p in pairs]
        self.times = self.times_all[self.keep]

        # tasks: one per file and time chunk (chunk along time only; lat/level/lon stay whole)
        tc = max(1, int(cfg["run"]["time_chunk"]))
        self.starts = np.concatenate([[0], np.cumsum([i.detected.times.size for i in infos])]).astype(int)
        self.chunks = [(k, a, min(i.detected.times.size, a + tc)) for k, i in enumerate(infos)
                       for a in range(0, i.detected.times.size, tc)]
        self.chunk_of = np.empty(self.times_all.size, dtype=int)
        for c, (k, a, b) in enumerate(self.chunks):
            self.chunk_of[self.starts[k] + a:self.starts[k] + b] = c
        names = [n for n, _, _ in sectors]
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise UsageError(f"sector name(s) {', '.join(dup)} given twice (--sector or [sectors]); give each band its own name")
        self.masks_of = [sector_masks(i.detected.lon, sectors) for i in infos]
        for inf, masks in zip(infos, self.masks_of):
            for (name, a, b), m in zip(sectors, masks[1:]):
                if not m.any():
                    raise UsageError(f"--sector {name}={a:g}:{b:g} holds no grid longitude of {inf.path} "
                                     f"(longitudes every {np.median(np.abs(np.diff(inf.detected.lon))):g} deg); widen the band")
        nt = self.times.size
        self.lowpass = _lowpass_setup(cfg, self.times, plan, infos[0].path)
        if self.lowpass and (only_times is not None or time_step_days is not None):
            raise ValueError("the low-pass filter needs the whole record: run without only_times/time_step_days")
        per_batch = int(cfg["run"].get("batch_time_steps") or 0) or tc * max(16, 8 * (os.cpu_count() or 1))
        if self.lowpass:
            per_batch = max(per_batch, self.lowpass.half_width)   # the halo fits in one neighbour
        self.batches = [(b0, min(nt, b0 + per_batch)) for b0 in range(0, nt, per_batch)]

    # ---------------------------------------------------------------- tasks
    def job(self, c):
        k, a, b = self.chunks[c]
        inf = self.infos[k]
        return {"path": inf.path, "cfg": self.cfg, "readers": inf.readers, "t0": a, "t1": b,
                "masks": self.masks_of[k], "lon": np.asarray(inf.detected.lon, float),
                "lat": np.sort(np.asarray(inf.detected.lat, float)), "reducers": self.plan.reducers}

    def tasks(self):
        """The dask.delayed reduce calls of every chunk; building them reads nothing."""
        return [dask.delayed(reduce_chunk, pure=False, traverse=False)(self.job(c)) for c in range(len(self.chunks))]

    # ---------------------------------------------------------------- execution
    def _reduce_batch(self, bi, runner, cache, last_use, batch_of_pos):
        """Reduced stats/extras of batch ``bi`` in chronological order (reads what is not cached)."""
        t0, t1 = self.batches[bi]
        positions = self.keep[t0:t1]
        mine = [(d, p) for d, p in zip(self.dropped, self.partner) if batch_of_pos[d] == bi]
        need = sorted({int(self.chunk_of[q]) for q in list(positions) + [d for d, _ in mine]} - set(cache))
        sizes = {c: self.chunks[c][2] - self.chunks[c][1] for c in need}
        groups = group_chunks(need, sizes, int(self.cfg["run"]["time_chunk"]), 2 * runner.nproc)
        try:
            results = [r for rs in runner.run(reduce_chunks, [[self.job(c) for c in g] for g in groups]) for r in rs]
        except (OSError, RuntimeError, ValueError, KeyError, IndexError) as e:
            involved = sorted({self.infos[self.chunks[c][0]].path for c in need})
            msg = str(e).splitlines()[0] if str(e) else type(e).__name__
            raise InputError(f"{involved[0]}: reading data failed ({msg}) for time steps {iso_time(self.times[t0])}.."
                             f"{iso_time(self.times[t1 - 1])} in {', '.join(involved)}; one of these files is damaged: "
                             "re-copy it or leave it out")
        cache.update(zip(need, results))
        for d, p in mine:
            if self.provisional[d] and not self.provisional[p]:
                continue                   # provisional data replaced by final data: expected to differ
            self._compare_repeat(d, p, cache)
        g = functools.partial(_gather, cache, chunk_of=self.chunk_of, chunks=self.chunks, starts=self.starts)
        out = {"stats": {r: g("stats", r, positions) for r in self.plan.roles},
               "extras": {n: g("extras", n, positions) for n in self.plan.reducers},
               "notes": g("notes", "time", positions)}
        for c in [c for c in cache if last_use[c] <= bi]:
            del cache[c]
        return out

    def _compare_repeat(self, d, p, cache):
        """A time step in two files: identical -> drop one; different -> refuse unless a policy says."""
        g = functools.partial(_gather, cache, chunk_of=self.chunk_of, chunks=self.chunks, starts=self.starts)
        same = all(np.array_equal(g("stats", r, [p]), g("stats", r, [d]), equal_nan=True) for r in self.plan.roles)
        if not same and self.repeat_policy == "refuse":
            fa = self.infos[self.file_of[p]].path
            fb = self.infos[self.file_of[d]].path
            raise InputError(f"{fb}: time step {iso_time(self.times_all[d])} is also in {fa} with different values; "
                             "leave one file out, or choose which wins with --repeated-times keep-first|keep-last")

    def _schedule(self):
        """Batch of every position (-1: not computed, only_times) and the last batch using each chunk."""
        batch_of_pos = np.full(self.times_all.size, -1, dtype=int)
        for bi, (b0, b1) in enumerate(self.batches):
            batch_of_pos[self.keep[b0:b1]] = bi
        for d, p in zip(self.dropped, self.partner):
            batch_of_pos[d] = batch_of_pos[p]
        last_use = collections.defaultdict(int)
        for pos in range(self.times_all.size):
            c = self.chunk_of[pos]
            last_use[c] = max(last_use[c], batch_of_pos[pos])
        return batch_of_pos, last_use

    def zonal_means(self):
        """The full-circle zonal statistics the families see, for the run's time steps.

        Returns ``{"lat": (J,) ascending, "plev": {role: hPa levels or None}, "mean": {role: (T, *extra,
        [L], J)}, "coverage": {role: same}, "times": (T,)}``: the mean of valid longitudes and the share
        of valid longitudes, read and reduced exactly as :meth:`execute` does (same readers and tasks).
        Meant for a few time steps (``only_times``); it holds them all in memory.
        """
        batch_of_pos, last_use = self._schedule()
        needed = {int(c) for c in self.chunk_of[self.keep]} | {int(self.chunk_of[d]) for d in self.dropped}
        runner = _Runner(self.cfg, len(needed))
        parts = []
        try:
            cache = {}
            for bi in range(len(self.batches)):
                parts.append(self._reduce_batch(bi, runner, cache, last_use, batch_of_pos)["stats"])
        finally:
            runner.close()
            close_cached()
        roles = list(self.plan.roles)
        stats = {r: np.concatenate([p[r] for p in parts], axis=0) if parts else None for r in roles}
        return {"lat": np.sort(self.infos[0].detected.lat),
                "plev": {r: self.infos[0].plev[r] for r in roles},
                "mean": {r: a[..., 0, 0] for r, a in stats.items() if a is not None},
                "coverage": {r: a[..., 0, 1] for r, a in stats.items() if a is not None},
                "times": self.times}

    def execute(self):
        cfg, plan, infos = self.cfg, self.plan, self.infos
        nt = self.times.size
        batch_of_pos, last_use = self._schedule()

        extra = infos[0].detected.extra_dims
        extra_names = list(extra)
        n_extra = int(np.prod([len(v) for v in extra.values()])) if extra else 1
        sector_names = ["zonal"] + [s[0] for s in self.sectors]
        lat = np.sort(infos[0].detected.lat)
        plev = {r: infos[0].plev[r] for r in plan.roles}
        step_days = self.step_days
        wanted = set(plan.metric_ids)
        cols = {k: [] for k in ["t", "e", "hemisphere", "sector", "metric", "value", "flag"]}
        cache, reduced = {}, {}
        self.step_notes = np.full(nt, "", dtype=object)
        needed = {int(c) for c in self.chunk_of[self.keep]} | {int(self.chunk_of[d]) for d in self.dropped}
        runner = _Runner(cfg, len(needed))          # only_times: no worker pool for a chunk or two
        nb = len(self.batches)
        pending = None             # (batch index, thread, box) being read while the families run
        try:
            ahead = 2 if self.lowpass else 1
            for bi in range(nb):
                # a low-pass filter needs the next batch (its halo) reduced first; the previous one is kept
                for bj in range(bi, min(nb, bi + ahead)):
                    if pending is not None and pending[0] == bj:
                        pending[1].join()
                        if "error" in pending[2]:
                            raise pending[2]["error"]
                        reduced[bj] = pending[2]["result"]
                        pending = None
                    if bj not in reduced:
                        reduced[bj] = self._reduce_batch(bj, runner, cache, last_use, batch_of_pos)
                # read the next batch in the background so the workers never wait for the families
                nxt = bi + ahead
                if nxt < nb and pending is None and nxt not in reduced:
                    box = {}

                    def prefetch(b=nxt, box=box):
                        try:
                            box["result"] = self._reduce_batch(b, runner, cache, last_use, batch_of_pos)
                        except BaseException as e:  # noqa: BLE001 - re-raised in the main thread
                            box["error"] = e

                    th = threading.Thread(target=prefetch, daemon=True)
                    th.start()
                    pending = (nxt, th, box)
                t0, t1 = self.batches[bi]
                bt = t1 - t0
                self.step_notes[t0:t1] = reduced[bi]["notes"]
                lowpassed = self.lowpass.apply(reduced, bi, self.batches) if self.lowpass else {}
                tidx = np.repeat(np.arange(t0, t1), n_extra)
                eidx = np.tile(np.arange(n_extra), bt)

                def per_sample(a):
                    return a.reshape((bt * n_extra,) + a.shape[1 + len(extra_names):])

                for s, sname in enumerate(sector_names):
                    mean, cov, ext, low = {}, {}, {}, {}
                    for r, arr in reduced[bi]["stats"].items():
                        mean[r] = per_sample(arr[..., s, 0])
                        cov[r] = per_sample(arr[..., s, 1])
                    for n_, arr in reduced[bi]["extras"].items():
                        ext[n_] = per_sample(arr[..., s])
                    for r, arr in lowpassed.items():
                        low[r] = per_sample(arr[..., s])
                    fields = Fields(lat=lat, plev=plev, mean=mean, coverage=cov, sector=sname, extras=ext,
                                    info={"time_step_days": step_days, "lowpass": low})
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
                reduced.pop(bi - 1 if self.lowpass else bi, None)
                self.progress.step(t1, nt)
        except BaseException:
            runner.close(interrupted=True)       # stop the workers first, so a waiting prefetch returns
            if pending is not None:
                pending[1].join(timeout=30)
            close_cached()
            raise
        else:
            if pending is not None:
                pending[1].join()
            runner.close()
            close_cached()
        return self._outcome(cols, extra, extra_names)

    def _outcome(self, cols, extra, extra_names):
        infos, nt = self.infos, self.times.size
        cat = registry.catalogue()
        flat = {k: (np.concatenate(v) if v else np.array([], dtype=object)) for k, v in cols.items()}
        iso = np.array([iso_time(t) for t in self.times], dtype=object)
        source = self.label or derive_source([i.path for i in infos], infos[0].detected.attrs)
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
        notes = self.step_notes
        if nt and flat["t"].size and (notes != "").any():
            row_notes = notes[flat["t"]]
            out["flag"] = np.where(row_notes != "", flat["flag"].astype(str).astype(object) + ";" + row_notes,
                                   flat["flag"])
        prov = {
            "inputs": [{**_stat(i.path), "variables": i.detected.variables, "units": i.detected.units,
                        "found_by": i.detected.why, "time_steps": int(i.detected.times.size),
                        "first_time": iso_time(i.detected.times[0]) if i.detected.times.size else None,
                        "last_time": iso_time(i.detected.times[-1]) if i.detected.times.size else None,
                        "pressure_levels_hpa": {r: (None if v is None else [float(x) for x in v])
                                                for r, v in i.plev.items()},
                        "pressure_units_in_file": i.detected.plev_units, "layout": i.detected.layout}
                       for i in infos],
            "skipped_inputs": self.skipped,
            "repeated_time_steps_dropped": [{"time": iso_time(self.times_all[k]), "path": infos[self.file_of[k]].path,
                                             "kept_from": infos[self.file_of[p]].path,
                                             **({"provisional_replaced_by_final": True}
                                                if self.provisional[k] and not self.provisional[p] else {})}
                                            for k, p in zip(self.dropped, self.partner)],
            "repeated_times_policy": self.repeat_policy,
            "calendar": infos[0].detected.calendar,
            "time_span": [iso[0], iso[-1]] if nt else None,
            "time_steps": int(nt),
            "metrics": self.plan.metric_ids,
            "sectors": {n: [a, b] for n, a, b in self.sectors},
            "extra_key_columns": extra_names,
            "time_step_notes": {code: [iso[k] for k in range(nt) if code in str(notes[k]).split(";")]
                                for code in sorted({c for n in notes for c in str(n).split(";") if c})},
            # notes the metrics added to their flags (e.g. unbalanced_column): where they occur
            "flag_notes": note_summary(out["time"], out["hemisphere"], out["metric"], flat["flag"], out["value"]),
        }
        if self.lowpass:
            prov["lowpass"] = self.lowpass.describe()
        return Outcome(out, ["source", "time", *extra_names, "hemisphere", "sector", "metric"], prov, flat["t"])
