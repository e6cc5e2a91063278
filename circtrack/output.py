"""Tidy CSV (sorted, stable formatting, atomic) and the JSON provenance sidecar."""

from __future__ import annotations

import json
import os
import platform
import sys
import tempfile
from importlib import metadata

import numpy as np

from circtrack import __version__
from circtrack.errors import UsageError


def format_value(v):
    """Stable text for a float: 6 significant digits, 'NaN' for missing."""
    if not np.isfinite(v):
        return "NaN"
    s = f"{v:.6g}"
    return "0" if s == "-0" else s


def sorted_lines(outcome):
    """CSV lines (header first) sorted by the key columns, time chronologically."""
    cols = outcome.columns
    keys = outcome.key_columns
    n = len(cols["metric"])
    sort_keys = []
    for k in reversed(keys):
        sort_keys.append(outcome.time_order if k == "time" else
                         np.asarray(cols[k], dtype=float) if k == "lon" else np.asarray(cols[k], dtype=str))
    order = np.lexsort(sort_keys) if n else np.array([], dtype=int)
    names = list(cols)
    lines = [",".join(names)]
    text = {k: (np.array([format_value(x) for x in cols[k]], dtype=object) if k == "value" else cols[k]) for k in names}
    for i in order:
        lines.append(",".join(str(text[k][i]) for k in names))
    return lines


def check_output_path(out_path):
    """Before any work: OUT's directory exists and is writable, and OUT is not a directory."""
    if out_path == "-":
        return
    d = os.path.dirname(os.path.abspath(out_path))
    if os.path.isdir(out_path):
        raise UsageError(f"-o {out_path}: is a directory; give a file name such as "
                         f"{os.path.join(out_path, 'indices.csv')}")
    if not os.path.isdir(d):
        raise UsageError(f"-o {out_path}: the directory {d} does not exist; create it first (mkdir -p {d})")
    if not os.access(d, os.W_OK | os.X_OK):
        raise UsageError(f"-o {out_path}: the directory {d} is not writable; choose another output directory")


def temp_prefix(path):
    """Temp files of ``path`` are ``.NAME.<random>.tmp`` beside it."""
    return "." + os.path.basename(path) + "."


def atomic_write_text(path, text, before_replace=None):
    """Write ``text`` to ``path`` through a temp file in the same directory, fsync and rename.

    ``before_replace`` (if given) is called after the temp file is written and synced, just before
    the rename (a test hook to kill the process at exactly that moment).
    """
    path = os.path.abspath(path)
    d = os.path.dirname(path)
    if not os.path.isdir(d):
        raise UsageError(f"{path}: the output directory {d} does not exist; create it first (mkdir -p {d})")
    try:
        fd, tmp = tempfile.mkstemp(prefix=temp_prefix(path), suffix=".tmp", dir=d)
    except OSError as e:
        raise UsageError(f"{path}: cannot write in {d} ({e.strerror}); choose a directory you can write to")
    # mkstemp makes the file private (0600); give it the mode a plain open() would (0666 minus umask)
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    try:
        with os.fdopen(fd, "w", newline="") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        if before_replace is not None:
            before_replace()
        os.replace(tmp, path)
        dfd = os.open(d, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def sidecar_path(csv_path):
    """``OUT.csv`` -> ``OUT.provenance.json`` (any case of the suffix); other names get ``.provenance.json`` appended."""
    stem = csv_path[:-4] if csv_path.lower().endswith(".csv") else csv_path
    return stem + ".provenance.json"


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


def write(outcome, out_path, cfg, argv=None):
    """Write CSV (``-`` for stdout) and, for files, the sidecar. Both appear atomically."""
    text = "\n".join(sorted_lines(outcome)) + "\n"
    if out_path == "-":
        sys.stdout.write(text)
        sys.stdout.flush()
        return None
    prov = provenance(outcome, cfg, argv if argv is not None else sys.argv)
    # the CSV first, then the sidecar describing it (update writes its state after both)
    atomic_write_text(out_path, text)
    atomic_write_text(sidecar_path(out_path), json.dumps(prov, indent=2, sort_keys=False, default=str) + "\n")
    return sidecar_path(out_path)
