"""Tidy CSV (sorted, stable formatting, all-or-nothing writes) and the JSON provenance sidecar.

Where outputs go (``resolve_target``):

* ``-``: standard output, no sidecar;
* an existing file that is not a regular file (``/dev/null``, a FIFO, a terminal): written to
  directly as a stream, no temporary file, no rename, no sidecar (replacing a device with a
  regular file would break the machine);
* a symbolic link: written through to the file it points to; the files written beside OUT
  (sidecar, update's state and lock) sit beside that target and are named after it;
* otherwise a regular file, replaced all-or-nothing: every file of the run is written to a
  temporary file in the same directory and synced first, and only then are they renamed into
  place (``commit``), so a failure before the renames changes nothing.

Files beside OUT are named by ``beside``: ``OUT.csv`` -> ``OUT.provenance.json``; any other
name keeps its full name and gets ``-provenance.json`` (``-o x`` -> ``x-provenance.json``), so the
sidecars of ``-o x`` and ``-o x.csv`` can never be the same file.
"""

from __future__ import annotations

import errno
import json
import math
import os
import platform
import stat
import sys
import tempfile
from dataclasses import dataclass
from importlib import metadata

import numpy as np

from circtrack import __version__
from circtrack.errors import CircError, UsageError


def format_value(v):
    """Stable text for a float: 6 significant digits, 'NaN' for missing."""
    if not np.isfinite(v):
        return "NaN"
    s = f"{v:.6g}"
    return "0" if s == "-0" else s


def sorted_lines(outcome):
    """CSV lines (header first) sorted by the key columns, time chronologically.

    Every text field is checked first (``guards.check_csv_text``): the CSV is never malformed.
    """
    from circtrack.guards import check_text_columns

    cols = outcome.columns
    keys = outcome.key_columns
    check_text_columns(cols, [k for k in cols if k != "value"])
    n = len(cols["metric"])
    sort_keys = []
    for k in reversed(keys):
        sort_keys.append(outcome.time_order if k == "time" else
                         np.asarray(cols[k], dtype=float) if k == "lon" else np.asarray(cols[k], dtype=str))
    order = np.lexsort(sort_keys) if n else np.array([], dtype=int)
    names = list(cols)
    lines = [",".join(names)]
    # column by column, then joined row by row (tens of thousands of rows for one-day files)
    texts = [_values_text(col, order) if k == "value" else [str(x) for x in _in_order(col, order)]
             for k, col in cols.items()]
    lines.extend(",".join(row) for row in zip(*texts))
    return lines


def _values_text(col, order):
    """:func:`format_value` of the values in ``order`` (plain floats: the same text, faster checks)."""
    if isinstance(col, np.ndarray) and col.dtype == np.float64:
        out = []
        for v in col[order].tolist():
            s = f"{v:.6g}" if math.isfinite(v) else "NaN"
            out.append("0" if s == "-0" else s)
        return out
    return [format_value(x) for x in _in_order(col, order)]


def _in_order(col, order):
    """The column's elements in ``order``: python str for text arrays (``str`` of a numpy str is the
    same text), the elements themselves otherwise."""
    if isinstance(col, np.ndarray) and col.dtype.kind in "UO":
        return col[order].tolist()
    return [col[i] for i in order.tolist()]


# --------------------------------------------------------------------------- where outputs go
def beside(out_path, what):
    """The file ``what`` (``provenance.json``, ``state.json``, ``lock``) written beside OUT:
    ``x.csv`` -> ``x.WHAT``, any other name -> ``NAME-WHAT`` (never the same for two OUTs)."""
    if out_path.endswith(".csv"):
        return out_path[:-4] + "." + what
    return out_path + "-" + what


def sidecar_path(csv_path):
    """``OUT.csv`` -> ``OUT.provenance.json``; other names get ``-provenance.json`` appended."""
    return beside(csv_path, "provenance.json")


@dataclass(frozen=True)
class Target:
    """Where an output goes: ``kind`` is ``stdout``, ``stream`` (an existing non-regular file,
    written to directly) or ``file`` (``path`` is the real path, symbolic links followed)."""

    given: str
    kind: str
    path: str


def resolve_target(out_path):
    if out_path == "-":
        return Target(out_path, "stdout", out_path)
    real = os.path.realpath(out_path)
    try:
        st = os.stat(real)
    except FileNotFoundError:
        return Target(out_path, "file", real)
    except OSError as e:
        raise UsageError(f"-o {out_path}: cannot be examined ({e.strerror}); choose another output file")
    if stat.S_ISDIR(st.st_mode):
        return Target(out_path, "dir", real)
    if not stat.S_ISREG(st.st_mode):
        return Target(out_path, "stream", real)
    return Target(out_path, "file", real)


def check_output_path(out_path, beside_names=("provenance.json",), stream_ok=True):
    """Before any work: OUT's directory exists and is writable, OUT and the files written beside it
    are not directories; a non-regular OUT is written as a stream (or refused when not ``stream_ok``).
    Returns the :class:`Target`."""
    t = resolve_target(out_path)
    if t.kind == "stdout":
        return t
    if t.kind == "dir":
        raise UsageError(f"-o {out_path}: is a directory; give a file name such as "
                         f"{os.path.join(out_path, 'indices.csv')}")
    if t.kind == "stream":
        if not stream_ok:
            raise UsageError(f"-o {out_path}: is not a regular file (a device or pipe); this command keeps files "
                             "beside OUT, so give a regular file name such as indices.csv")
        return t
    d = os.path.dirname(t.path)
    if not os.path.isdir(d):
        raise UsageError(f"-o {out_path}: the directory {d} does not exist; create it first (mkdir -p {d})")
    if not os.access(d, os.W_OK | os.X_OK):
        raise UsageError(f"-o {out_path}: the directory {d} is not writable; choose another output directory")
    for what in beside_names:
        p = beside(t.path, what)
        if os.path.isdir(p):
            raise UsageError(f"-o {out_path}: {p} (written beside it) is a directory; move that directory away "
                             "or choose another output name")
    return t


# --------------------------------------------------------------------------- writing
def temp_prefix(path):
    """Temp files of ``path`` are ``.NAME.<random>.tmp`` beside it."""
    return "." + os.path.basename(path) + "."


def _write_failed(path, e):
    why = e.strerror or str(e)
    if e.errno in (errno.ENOSPC, errno.EDQUOT):
        return CircError(f"{path}: cannot be written ({why}); free some space or choose another output "
                         "directory; the previous output is untouched")
    return CircError(f"{path}: cannot be written ({why}); check the disk and the output directory; "
                     "the previous output is untouched")


def _write_temp(path, data):
    """``data`` (text or bytes) into a new synced temp file beside ``path``; returns its name."""
    d = os.path.dirname(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=temp_prefix(path), suffix=".tmp", dir=d)
    except OSError as e:
        raise UsageError(f"{path}: cannot write in {d} ({e.strerror}); choose a directory you can write to")
    try:
        # mkstemp makes the file private (0600); give it the mode a plain open() would (0666 minus umask)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        raw = data.encode() if isinstance(data, str) else data
        with os.fdopen(fd, "wb") as f:
            f.write(raw)
            f.flush()
            os.fsync(f.fileno())
    except BaseException:
        _unlink(tmp)
        raise
    return tmp


def _unlink(p):
    try:
        os.unlink(p)
    except FileNotFoundError:
        pass


def _fsync_dir(d):
    dfd = os.open(d, os.O_RDONLY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


def commit(files, before_replace=None, between=None):
    """Write every ``(path, data)`` to a synced temp file beside it, then rename them all in order.

    A failure while writing the temp files (disk full, quota, I/O error) removes them and changes
    nothing. ``before_replace`` runs after all temp files are synced, just before the first rename;
    ``between`` (a dict index -> callable) runs before the rename of ``files[index]`` (test hooks to
    kill the process at exactly that moment).
    """
    files = [(os.path.realpath(p), data) for p, data in files]        # symbolic links are written through
    for p, _ in files:
        d = os.path.dirname(p)
        if not os.path.isdir(d):
            raise UsageError(f"{p}: the output directory {d} does not exist; create it first (mkdir -p {d})")
        if os.path.lexists(p) and not os.path.isfile(p):     # never replace a device, FIFO or directory
            raise UsageError(f"{p}: is not a regular file (a device, pipe or directory); choose another output name")
    temps = []
    try:
        try:
            for p, data in files:
                temps.append(_write_temp(p, data))
        except OSError as e:
            raise _write_failed(files[len(temps)][0], e)
        if before_replace is not None:
            before_replace()
        for i, ((p, _), tmp) in enumerate(zip(files, temps)):
            if between and i in between:
                between[i]()
            os.replace(tmp, p)
        for d in dict.fromkeys(os.path.dirname(p) for p, _ in files):
            _fsync_dir(d)
    except BaseException:
        for tmp in temps:
            _unlink(tmp)
        raise


def atomic_write_text(path, text, before_replace=None):
    """Write ``text`` to ``path`` through a synced temp file in the same directory and a rename."""
    commit([(path, text)], before_replace=before_replace)


def write_stdout(text, where="-o -"):
    """``text`` to standard output; a full disk or closed pipe is one error line, not a traceback."""
    try:
        sys.stdout.write(text)
        sys.stdout.flush()
    except OSError as e:
        _silence_stdout()
        if e.errno == errno.EPIPE:
            raise CircError(f"{where}: standard output was closed before all rows were written "
                            "(e.g. by 'head'); write to a file with -o FILE.csv to keep them all")
        raise CircError(f"{where}: cannot write to standard output ({e.strerror or e}); "
                        "free some space or write to a file with -o FILE.csv")


def _silence_stdout():
    """After a failed write to stdout, point it at /dev/null so Python's exit flush stays quiet."""
    try:
        fd = os.open(os.devnull, os.O_WRONLY)
        os.dup2(fd, sys.stdout.fileno())
        os.close(fd)
    except (OSError, ValueError, AttributeError):
        pass


def write_stream(path, data):
    """``data`` written straight to a non-regular file (device, FIFO): no temp file, no rename."""
    raw = data.encode() if isinstance(data, str) else data
    try:
        with open(path, "wb") as f:
            f.write(raw)
    except OSError as e:
        raise _write_failed(path, e)


def emit(target, data, extra=()):
    """Write one output (and, for regular files, ``extra`` ``(path, data)`` beside it) to ``target``."""
    if target.kind == "stdout":
        write_stdout(data if isinstance(data, str) else data.decode())
    elif target.kind == "stream":
        write_stream(target.path, data)
    else:
        commit([(target.path, data), *extra])


# --------------------------------------------------------------------------- provenance
def library_versions():
    out = {"python": platform.python_version()}
    for name in ("numpy", "pandas", "xarray", "dask", "distributed", "netCDF4", "h5netcdf", "cftime", "scipy", "click"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    return out


def provenance(outcome, cfg, argv):
    return {
        "tool": "circtrack",
        "version": __version__,
        "command": argv,
        "columns": list(outcome.columns),
        "parameters": cfg,
        **outcome.provenance,
        "libraries": library_versions(),
    }


def write(outcome, out_path, cfg, argv=None, tables=()):
    """Write the CSV (``-`` for stdout; a device or FIFO as a stream) and, for regular files, the
    sidecar; both are written and synced to temp files first, then renamed. ``tables``: side tables
    ``[(Outcome, path)]`` (e.g. ``track --cores-by-longitude``), regular files with their own sidecars,
    committed together with OUT. Returns the sidecar path."""
    argv = argv if argv is not None else sys.argv
    text = "\n".join(sorted_lines(outcome)) + "\n"
    extra = []
    for t_outcome, t_path in tables:
        extra += [(t_path, "\n".join(sorted_lines(t_outcome)) + "\n"),
                  (sidecar_path(t_path), json.dumps(provenance(t_outcome, cfg, argv), indent=2, default=str) + "\n")]
    target = resolve_target(out_path)
    if target.kind != "file":
        if extra:
            commit(extra)
        emit(target, text)
        return None
    prov = provenance(outcome, cfg, argv)
    side = sidecar_path(target.path)
    commit([(target.path, text), (side, json.dumps(prov, indent=2, sort_keys=False, default=str) + "\n")] + extra)
    return side
