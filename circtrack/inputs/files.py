"""Turning PATH arguments into a sorted list of input files or stores."""

from __future__ import annotations

import glob
import os
import sys
from pathlib import Path

from circtrack.errors import InputError
from circtrack.inputs.opening import DATA_SUFFIXES

SUFFIXES = DATA_SUFFIXES                 # netCDF/HDF5 and every source in opening.SOURCES


def _is_data(p: Path) -> bool:
    return p.suffix.lower() in SUFFIXES


def expand(paths, stdin=None) -> list[str]:
    """Files, directories (searched recursively), globs, or ``-`` (one path per line on stdin)."""
    out: list[str] = []
    for arg in paths:
        if arg == "-":
            stream = stdin if stdin is not None else sys.stdin
            lines = [ln.strip() for ln in stream.read().splitlines() if ln.strip()]
            out.extend(expand(lines))
            continue
        p = Path(arg)
        if p.is_dir() and p.suffix.lower() != ".zarr":
            found = sorted(str(q) for q in p.rglob("*") if _is_data(q) and (q.is_file() or q.suffix.lower() == ".zarr")
                           and not any(part.lower().endswith(".zarr") for part in q.relative_to(p).parts[:-1]))
            if not found:
                raise InputError(f"{arg}: directory holds no data files ({', '.join(SUFFIXES[:4])}, ...); "
                                 "point to the files or a directory that holds them")
            out.extend(found)
        elif p.exists():
            out.append(str(p))
        elif any(ch in arg for ch in "*?["):
            found = sorted(glob.glob(arg, recursive=True))
            if not found:
                raise InputError(f"{arg}: the pattern matches no files; check the path or quote the glob")
            out.extend(found)
        else:
            raise InputError(f"{arg}: no such file or directory; check the path")
    seen, uniq = set(), []
    for f in out:
        key = os.path.abspath(f)
        if key not in seen:
            seen.add(key)
            uniq.append(f)
    if not uniq:
        raise InputError("no input files given; pass files, directories, globs or '-' to read paths from stdin")
    return uniq


def _split_variable_token(path):
    """``ua_Amon_X_200001-200912.nc`` -> ("ua", "_Amon_X_200001-200912.nc"); ``uwnd.mon.mean.nc`` -> ("uwnd", ".mon.mean.nc")."""
    name = os.path.basename(path.rstrip("/"))
    cut = min((i for i in (name.find("_"), name.find(".")) if i > 0), default=-1)
    return (name[:cut], name[cut:]) if cut > 0 else (name, "")


def same_period_siblings(path, files):
    """Files in the same directory whose names differ from ``path`` only in the leading variable name
    (the usual naming of one-variable-per-file collections), e.g. ``va_Amon_...`` beside ``ua_Amon_...``."""
    head, rest = _split_variable_token(path)
    if not rest:
        return []
    d = os.path.dirname(os.path.abspath(path))
    out = []
    for f in files:
        h, r = _split_variable_token(f)
        if r == rest and h != head and os.path.dirname(os.path.abspath(f)) == d:
            out.append(f)
    return out
