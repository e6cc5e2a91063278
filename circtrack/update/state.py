"""The state beside OUT and its small helpers: state and lock paths, file records and checksums,
the lock, the pause hook for kill tests, stale temp files, CSV blocks per time step, time keys.

In: paths and the text of OUT. Out: plain dicts and strings; nothing here runs the engine.
"""

from __future__ import annotations

import fcntl
import glob
import hashlib
import json
import math
import os
import sys
import time

from circtrack.errors import InputError, UsageError
from circtrack.inputs import remote

STATE_VERSION = 2
CHUNK = 1 << 20


# --------------------------------------------------------------------------- small helpers
def state_path(out_path):
    """``x.csv`` -> ``x.state.json``; other names -> ``NAME-state.json`` (output.beside)."""
    from circtrack.output import beside

    return beside(out_path, "state.json")


def lock_path(out_path):
    """``x.csv`` -> ``x.lock``; other names -> ``NAME-lock`` (output.beside)."""
    from circtrack.output import beside

    return beside(out_path, "lock")


def checksum(path):
    """SHA-256 of the size, the first and the last MiB (cheap; catches rewrites of the same size)."""
    if not os.path.isfile(path):
        return None
    size = os.path.getsize(path)
    h = hashlib.sha256(str(size).encode())
    with open(path, "rb") as f:
        h.update(f.read(CHUNK))
        if size > CHUNK:
            f.seek(max(CHUNK, size - CHUNK))
            h.update(f.read(CHUNK))
    return h.hexdigest()


def file_record(path, old=None, cfg=None):
    """Size, mtime and checksum of ``path``; the checksum of ``old`` (the state's record) is reused
    when size and mtime are both unchanged, and the file is hashed again when either moved. An object
    in object storage: size and ETag (its modification time says when it was uploaded, not whether
    its content changed)."""
    if remote.is_url(path):
        return remote.object_record(path, cfg)
    st = os.stat(path)
    if old is not None and old.get("size") == st.st_size and old.get("mtime_ns") == st.st_mtime_ns \
            and old.get("checksum"):
        return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "checksum": old["checksum"]}
    return {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "checksum": checksum(path)}


def _same_file(old, new):
    """Unchanged: same size and checksum, whatever the mtime (``touch`` or a copy that kept the bytes
    changes nothing; the checksum was taken again when the mtime moved, see :func:`file_record`);
    an object: the same size and ETag."""
    if old is None:
        return False
    keys = ("size", "checksum") if "checksum" in new else tuple(new)
    return all(old.get(k) == new[k] for k in keys)


def _sha_text(text):
    return hashlib.sha256(text.encode()).hexdigest()


def time_key(iso):
    """ISO text (possibly negative year) -> tuple that sorts chronologically."""
    neg = iso.startswith("-")
    s = iso[1:] if neg else iso
    date, _, clock = s.partition("T")
    y, m, d = (int(x) for x in date.split("-"))
    hh, mm, ss = (int(x) for x in clock.split(":")) if clock else (0, 0, 0)
    return (-y if neg else y, m, d, hh, mm, ss)


def params_hash(cfg, metrics, sectors, overrides):
    # how inputs are reached ([storage]: credentials, local copies) never changes the rows; no
    # variants: as before [vary] existed
    cfg = {k: v for k, v in cfg.items() if k != "storage" and not (k == "vary" and not v)}
    blob = json.dumps({"config": cfg, "metrics": metrics, "sectors": [list(s) for s in sectors],
                       "variables": overrides}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


PAUSE_ENV = "CIRCTRACK_PAUSE_AT"
PAUSE_PHASES = ("before-csv-rename", "before-state-write")


def _pause_point(phase):
    """Test hook (see the module docstring): announce the phase and sleep until killed."""
    if os.environ.get(PAUSE_ENV) == phase:
        print(f"circtrack: paused at {phase} (pid {os.getpid()})", file=sys.stderr, flush=True)
        time.sleep(600)


def _remove_stale_temps(paths):
    """Temp files of OUT, its sidecar and state left by a killed run (called with the lock held)."""
    from circtrack.output import temp_prefix

    for p in paths:
        p = os.path.abspath(p)
        for tmp in glob.glob(os.path.join(glob.escape(os.path.dirname(p)), glob.escape(temp_prefix(p)) + "*.tmp")):
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass


def acquire_lock(out_path):
    """Non-blocking exclusive POSIX record lock (``lockf``) on OUT.lock, owned by this process alone.

    Unlike ``flock``, a record lock is not shared with forked children: it is released the moment
    the owning process ends, even if a worker it forked were still alive, so a lock left by a dead
    run never blocks the next one. (The lock is also released when this process closes any
    descriptor of OUT.lock, so nothing else here opens that file.)"""
    lp = lock_path(out_path)
    try:
        fd = os.open(lp, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
    except IsADirectoryError:
        raise UsageError(f"-o {out_path}: the lock file {lp} is a directory; move it away or choose another "
                         "output name")
    except OSError as e:
        raise UsageError(f"-o {out_path}: cannot create the lock file {lp} ({e.strerror}); choose an output "
                         "directory you can write to")
    try:
        fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        os.close(fd)
        raise InputError(f"another update is running on {out_path}; lock file {lp} is held "
                         "(wait for it to finish; the lock is released when that process ends)")
    return fd


def _load_state(path):
    try:
        with open(path) as f:
            st = json.load(f)
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return None
    return st if _state_shape_ok(st) else None


def _state_shape_ok(st):
    """A state of this version with the fields every step reads, of the right kinds (a damaged or
    hand-edited state is rebuilt, with a line on stderr, like one from an older circtrack)."""
    if not isinstance(st, dict) or st.get("version") != STATE_VERSION:
        return False
    kinds = {"params_hash": str, "source": str, "csv_sha256": str, "files": dict, "provenance": dict,
             "metrics": (list, type(None)), "order": list, "repeats": dict, "notes": dict}
    if not all(isinstance(st.get(k), t) for k, t in kinds.items()):
        return False
    for entry in st["files"].values():
        if not isinstance(entry, dict) or not isinstance(entry.get("times"), list) or \
                not all(isinstance(t, str) for t in entry["times"]):
            return False
        if not all(k in entry for k in ("size", "mtime_ns", "checksum")):
            return False
    try:
        for entry in st["files"].values():
            for t in entry["times"]:
                time_key(t)
    except (ValueError, TypeError):
        return False
    return all(isinstance(a, str) for a in st["order"])


def _group_lines(lines, source):
    """CSV body lines -> {time: [lines]} (all rows of one time step are contiguous in the CSV)."""
    prefix = source + ","
    out = {}
    for ln in lines:
        if not ln.startswith(prefix):
            raise InputError(f"row '{ln[:60]}' does not start with the source '{source}'; rerun with --rebuild")
        t = ln[len(prefix):].split(",", 1)[0]
        out.setdefault(t, []).append(ln)
    return out


def _record_step_days(holders, entries, calendar):
    """The time step of the whole record in days, as engine.Run computes it from its time axis
    (median spacing of the first steps; NaN for a single step), from the ISO times in the state."""
    import cftime
    import numpy as np

    from circtrack.engine.times import time_step_days

    ts = sorted((t for t, hs in holders.items() if any(not entries[h].get("skipped") for h in hs)), key=time_key)
    if len(ts) > 401:
        ts = ts[:401]
    try:
        objs = [cftime.datetime(*time_key(t), calendar=calendar) for t in ts]
    except (ValueError, TypeError):
        return None          # a calendar cftime cannot rebuild from the text: the caller recomputes everything
    return time_step_days(np.array(objs, dtype=object))


def _source_paths(ab, entries):
    """The files engine.derive_source sees in a clean track: complete files in the order given, then
    the first file of each group joined from one-variable-per-file files (same time steps)."""
    usable = [a for a in ab if entries[a]["times"] and not entries[a].get("skipped")]
    usable = usable or [a for a in ab if entries[a]["times"]]
    firsts = {}
    for a in usable:
        if entries[a].get("partial"):
            firsts.setdefault(tuple(entries[a]["times"]), a)
    return [a for a in usable if not entries[a].get("partial")] + list(firsts.values())


def _step_class(days, cfg):
    """What the families make of the record's time step (metrics.transport.time_mean_flag): unknown
    (a single step), longer than eddies.max_time_step_days, or not. Rows change only with this."""
    if days is None or not math.isfinite(days):
        return "unknown"
    return "long" if days > cfg["eddies"]["max_time_step_days"] else "short"

