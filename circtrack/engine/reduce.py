"""Reduce (worker side): one task -> zonal statistics and the families' reducer extras.

In: a plain, picklable job dict (path, cfg, readers, t0, t1, masks, lon, lat, reducers), built by
:meth:`circtrack.engine.plan.RunPlan.job`. Out: ``{"stats": {role: (t, *extra, [L], J, S, 2)},
"extras": {name: (t, *extra, ..., S)}, "notes": {"time": (t,) str}}`` -- the mean of valid
longitudes and the share of valid longitudes per sector (the full circle first), plus what each
family's reducers return, plus per time step layout notes (e.g. ``provisional_data``).

This module runs inside worker processes: it opens the file itself (through a small per-thread
cache of open handles), reads the time steps of every role and reduces them. numpy and the input
readers only; no pandas, no click, nothing about worker pools (see pool.py).
"""

from __future__ import annotations

import collections
import functools
import os
import threading
import time as _time

import numpy as np

from circtrack.inputs import chunks as CH
from circtrack.inputs import dataset as D
from circtrack.inputs import slabs as SL
from circtrack.inputs.plausible import check_slabs

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
            mean = _row_means(part)
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


MEAN_BLOCK_BYTES = 2 ** 21   # float64 rows converted at a time for a mean (about the size of L2)


def _row_means(part):
    """``part.mean(axis=-1, dtype=float64)``, the same numbers: rows of a float32 array are converted
    a cache-sized block at a time into one float64 buffer and summed there (numpy's own mean casts
    in small buffers and sums each row the same way; measured 25-30 % less CPU this way)."""
    if part.dtype != np.float32 or not part.flags.c_contiguous or part.ndim < 2 or part.shape[-1] == 0:
        return part.mean(axis=-1, dtype=np.float64)
    n = part.shape[-1]
    rows = part.reshape(-1, n)
    step = max(1, MEAN_BLOCK_BYTES // (8 * n))
    out = np.empty(rows.shape[0], dtype=np.float64)
    buf = np.empty((min(step, rows.shape[0]), n), dtype=np.float64)
    for i in range(0, rows.shape[0], step):
        b = buf[:min(step, rows.shape[0] - i)]
        b[...] = rows[i:i + step]
        np.add.reduce(b, axis=-1, out=out[i:i + b.shape[0]])
    out /= n
    return out.reshape(part.shape[:-1])


_OPEN = {}                # (process id, thread id) -> {path: open dataset}, least recently used first
_OPEN_LOCK = threading.Lock()
_OPEN_MAX = 2             # open files per thread of a worker
# netCDF-C/HDF5 are not thread-safe (xarray locks its data reads, but not every open, close or
# attribute read), and HDF5 serialises inside a process anyway: threads of one process open, read
# and close under this lock and only reduce in parallel
_NC_LOCK = threading.RLock()
NC_LOCK = _NC_LOCK        # for code writing netCDF in this process while a batch is read (zonal-means)


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
    CH.close_all()
    mine = _my_open()
    for key in [(path, False), (path, True)]:
        ds = mine.pop(key, None)
        if ds is not None:
            try:
                ds.close()
            except Exception:  # noqa: BLE001 - a damaged file may fail to close; it is dropped anyway
                pass


def close_thread_cached():
    """Close the handles the current thread opened (a thread that ends never uses them again)."""
    with _OPEN_LOCK:
        group = _OPEN.pop((os.getpid(), threading.get_ident()), None)
    if group:
        with _NC_LOCK:
            while group:
                ds = group.popitem()[1]
                if ds is not None:
                    ds.close()


def close_cached():
    """Close every handle this process holds (all threads; call when no task is running), and unmap
    the free read buffers (inputs/slabs.py): the run is over, or workers are about to be forked."""
    CH.close_all()
    SL.release()
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


@functools.lru_cache(maxsize=None)
def _wants_lat(fn):
    """A reducer may take the ascending latitudes as a keyword ``lat`` (e.g. to locate a maximum);
    asked once per reducer and process (inspect.signature cost 0.5 ms per reducer and task)."""
    import inspect
    return "lat" in inspect.signature(fn).parameters


def reduce_chunk(job):
    """One task: read time steps ``t0:t1`` of every role of one file and reduce them.

    ``job`` is a plain dict (path, cfg, readers, t0, t1, masks, reducers) so it pickles cheaply.
    Returns ``{"stats": {role: (t, *extra, [L], J, S, 2)}, "extras": {name: (t, *extra, ..., S)},
    "notes": {"time": (t,) str}}``.
    """
    clock = _Clock(job.get("profile"))
    slabs, notes = _read(job, clock)
    out = _reduce(job, slabs, clock)
    out["notes"] = {"time": D.merge_notes(notes)}
    if clock.parts is not None:
        out["timing"] = clock.parts
    return out


def _read(job, clock):
    """Every role of the job's time steps as read, and the per time step layout notes."""
    slabs, notes = {}, []
    # variables may come from several files with the same time steps (one variable per file)
    paths = list(dict.fromkeys([job["path"]] + [r.path for r in job["readers"].values()]))
    with _NC_LOCK:     # one netCDF/HDF5 call at a time per process; the reductions below run freely
        opened = {}
        try:
            for role, reader in job["readers"].items():       # objects in object storage: start every fetch now
                if reader.direct is not None:      # a local file read without netCDF4 below: nothing to start
                    continue
                raw = _open_cached(reader.path, job["cfg"], keep=len(paths), raw=True)
                if raw is not None:
                    reader.prefetch_fast(raw, job["t0"], job["t1"])
            for role, reader in job["readers"].items():
                arr = reader.read_direct(job["t0"], job["t1"])      # no netCDF4 open (layouts.py)
                if arr is not None:
                    slabs[role] = arr
                    notes.append(np.full(arr.shape[0], "", dtype=object))
                    clock.lap(f"read {role}")
                    continue
                raw = _open_cached(reader.path, job["cfg"], keep=len(paths), raw=True)
                clock.lap("open files")
                arr = reader.read_fast(raw, job["t0"], job["t1"]) if raw is not None else None
                if arr is not None:
                    slabs[role] = arr
                    notes.append(np.full(arr.shape[0], "", dtype=object))
                    clock.lap(f"read {role}")
                    continue
                if reader.path not in opened:
                    opened[reader.path] = _open_cached(reader.path, job["cfg"], keep=len(paths))
                    clock.lap("open files")
                slabs[role], note = reader.read_noted(opened[reader.path], job["t0"], job["t1"])
                notes.append(note)
                clock.lap(f"read {role}")
        except Exception:
            # a damaged file: drop the handles so a retry reopens them, and let the caller name the file
            for p in paths:
                _forget(p)
            raise
    if job.get("check"):           # values in their physical range (inputs/plausible.py): first time step only
        check_slabs(job["readers"], slabs, job.get("units", {}))
    return slabs, notes


def _reduce(job, slabs, clock):
    """Zonal statistics and the reducers' outputs of ``slabs`` (time first) with the job's settings."""
    stats = {}
    for role, a in slabs.items():
        stats[role] = _zonal_block(a, job["masks"])
        clock.lap(f"zonal means {role}")
    extras = {}
    if job["reducers"]:
        # the slabs as read (the file's float type, e.g. float32, every level): each reducer converts
        # only what it uses to float64 (e.g. one level), never a whole field
        plev = {r: rd.plev for r, rd in job["readers"].items()}
        for name, fn in job["reducers"].items():
            kw = {"lat": job["lat"]} if _wants_lat(fn) else {}     # latitudes for per-longitude features
            extras[name] = np.asarray(fn(slabs, plev, job["lon"], job["masks"], job["cfg"], **kw), dtype=np.float64)
            clock.lap(f"reducer {name}")
    return {"stats": stats, "extras": extras}


class _Clock:
    """Seconds per part of a task (``--profile``): ``{part: (wall, cpu)}``, the CPU time of the
    thread running the task; does nothing when ``on`` is false."""

    def __init__(self, on):
        self.parts = {} if on else None
        self.t = (_time.perf_counter(), _time.thread_time()) if on else (0.0, 0.0)

    def lap(self, name):
        if self.parts is None:
            return
        now = (_time.perf_counter(), _time.thread_time())
        wall, cpu = self.parts.get(name, (0.0, 0.0))
        self.parts[name] = (wall + now[0] - self.t[0], cpu + now[1] - self.t[1])
        self.t = now


_BLAS_LIMITED = set()      # process ids whose BLAS runs on one thread


def one_blas_thread():
    """Let BLAS (numpy's matrix products, e.g. the wave amplitudes) use one thread in the processes
    that run tasks. The products are small and the cores are already busy with one task each: its
    threads spun waiting for each other, which made the wave amplitudes 4 to 15 times slower."""
    if os.getpid() in _BLAS_LIMITED:
        return
    _BLAS_LIMITED.add(os.getpid())
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")


def warm_up(hdf5=False):
    """What a worker forked ahead of its tasks does while the parent still plans (pool.start_early):
    BLAS on one thread, and with netCDF-4/HDF5 inputs the imports of the read paths (h5py for the
    direct chunk reads, inputs/chunks.py: about 0.15 s per process), so that the first task does not."""
    one_blas_thread()
    if hdf5:
        try:
            import h5py  # noqa: F401
            import netCDF4  # noqa: F401
        except ImportError:
            pass


def reduce_chunks(jobs):
    """One task over several small chunks (e.g. one-day files), to keep the per-task cost small."""
    one_blas_thread()
    pause = os.environ.get("CIRCTRACK_TASK_PAUSE_S")   # test hook: slow tasks down to interrupt them
    if pause:
        _time.sleep(float(pause))
    if len(jobs) < 2:
        return [reduce_chunk(j) for j in jobs]
    return _reduce_stacked(jobs)


STACK_MAX_BYTES = 64 * 2 ** 20     # larger chunks gain nothing from stacking and would be copied whole


def _reduce_stacked(jobs):
    """Several small chunks (e.g. one-day files of one layout) read one by one and reduced together,
    stacked along time: each numpy call then works on all of them at once instead of paying its
    overhead per file. Every statistic and reducer works time step by time step, so the numbers are
    those of one chunk at a time (tests compare). Chunks of different layouts go one by one, and so
    do chunks larger than ``STACK_MAX_BYTES`` together (e.g. the end of one month's file and the
    start of the next): each is reduced before the next is read, one chunk in memory at a time."""
    clock = _Clock(jobs[0].get("profile"))
    first = _read(jobs[0], clock)
    if sum(a.nbytes for a in first[0].values()) * len(jobs) > STACK_MAX_BYTES:
        outs, notes = [], []
        for k, job in enumerate(jobs):
            slabs, note = first if k == 0 else _read(job, clock)
            first = None
            outs.append(_reduce(job, slabs, clock))
            notes.append(note)
            del slabs
    else:
        read = [first] + [_read(j, clock) for j in jobs[1:]]
        notes = [n for _, n in read]
        if all(_same_layout(jobs[0], read[0][0], j, r[0]) for j, r in zip(jobs[1:], read[1:])):
            sizes = [next(iter(slabs.values())).shape[0] for slabs, _ in read]
            whole = {role: _stack([slabs[role] for slabs, _ in read]) for role in read[0][0]}
            both = _reduce(jobs[0], whole, clock)
            cut = np.cumsum([0] + sizes)
            outs = [{kind: {k: v[a:b] for k, v in both[kind].items()} for kind in ("stats", "extras")}
                    for a, b in zip(cut[:-1], cut[1:])]
        else:
            outs = [_reduce(j, slabs, clock) for j, (slabs, _) in zip(jobs, read)]
    for out, note in zip(outs, notes):
        out["notes"] = {"time": D.merge_notes(note)}
    if clock.parts is not None:
        outs[0]["timing"] = clock.parts
    return outs


def _stack(parts):
    """``np.concatenate(parts)`` along time, into a reused memory map when large (inputs/slabs.py)."""
    out = SL.empty((sum(p.shape[0] for p in parts),) + parts[0].shape[1:], np.result_type(*parts))
    return np.concatenate(parts, axis=0, out=out)


def _same_layout(a, slabs_a, b, slabs_b):
    """True when two jobs' slabs can be reduced as one: the same roles, shapes but for time, float
    types, levels, grid, sectors, reducers and settings."""
    if slabs_a.keys() != slabs_b.keys() or a["reducers"] != b["reducers"] or a["cfg"] != b["cfg"]:
        return False
    if any(x.shape[1:] != slabs_b[r].shape[1:] or x.dtype != slabs_b[r].dtype for r, x in slabs_a.items()):
        return False
    plev = all(_equal(a["readers"][r].plev, b["readers"][r].plev) for r in slabs_a)
    masks = len(a["masks"]) == len(b["masks"]) and all(_equal(m, n) for m, n in zip(a["masks"], b["masks"]))
    return plev and masks and _equal(a["lat"], b["lat"]) and _equal(a["lon"], b["lon"])


def _equal(x, y):
    if x is None or y is None:
        return x is None and y is None
    return np.array_equal(np.asarray(x), np.asarray(y))


