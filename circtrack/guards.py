"""Checks that keep a run from destroying its inputs or writing a malformed CSV.

* ``refuse_outputs_among_inputs``: before anything is read, OUT and every file written beside it
  (sidecar, update's state and lock) must not be one of the inputs, compared by real path (symbolic
  links followed) and by device and inode (hard links, bind mounts); two outputs of one command
  must not be the same file either.
* ``refuse_data_file_as_output``: ``-o`` naming a data file (``.nc``, ``.zarr``, ... or an existing
  file that starts like netCDF/HDF5) is refused: that is what ``circtrack track -o d/*.nc`` (the
  output name forgotten, the glob expanded by the shell) looks like.
* ``text_problem`` / ``check_label`` / ``check_text_columns``: one rule for every text field of
  the CSV, wherever it comes from (``--label``, ``--sector``, ``[sectors]`` in a config, file
  names, global attributes such as ``source_id``, member labels): no comma, double quote, line
  break or other control character (so the plain writer never needs quoting and every reader
  splits rows the same way), not empty, and not starting with ``=``, ``+``, ``-`` or ``@`` (a
  spreadsheet would run such a field as a formula). Numbers and the ``time`` column are written
  by circtrack itself and are not text fields in this sense (a negative year starts with ``-``).
"""

from __future__ import annotations

import os

from circtrack.errors import InputError, UsageError
from circtrack.inputs import remote

FORMULA_START = ("=", "+", "-", "@")
DATA_MAGIC = (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n", b"GRIB")
# key columns circtrack writes itself from a fixed vocabulary or as numbers; every other text
# column (source, sector, member, extra dimensions) passes the label rule
_OWN_COLUMNS = ("time", "value")


def text_problem(value):
    """Why ``value`` cannot be a CSV text field, or None when it can."""
    s = str(value)
    if not s.strip():
        return "it is empty"
    for ch, name in ((",", "a comma"), ('"', "a double quote"), ("\n", "a line break"), ("\r", "a line break")):
        if ch in s:
            return f"it holds {name}"
    if any(ord(c) < 32 or ord(c) == 127 for c in s):
        return "it holds a control character"
    if s != s.strip():
        return "it starts or ends with a space"
    if s.startswith(FORMULA_START) and not _is_number(s):
        return f"it starts with '{s[0]}' (a spreadsheet would read it as a formula)"
    return None


def _is_number(s):
    try:
        float(s)
        return True
    except ValueError:
        return False


def clean_label(value):
    """A suggestion: ``value`` with the forbidden characters replaced."""
    s = "".join(" " if (c in ',"' or ord(c) < 32 or ord(c) == 127) else c for c in str(value))
    s = " ".join(s.split()).lstrip("=+-@ ")
    return s or "my_label"


def check_label(value, where, fix, error=UsageError):
    """Raise ``error`` naming ``where`` (e.g. ``--label 'x'``) and ``fix`` when ``value`` cannot be
    a CSV text field; return ``value`` otherwise."""
    why = text_problem(value)
    if why:
        raise error(f"{where}: {why}, which would break the CSV; {fix}")
    return value


def check_cli_labels(label, sector_args, secs):
    """``--label`` and the names of ``--sector`` (already parsed into ``secs``), for track and update."""
    for raw, (name, _, _) in zip(sector_args, secs):
        check_label(name, f"--sector '{raw}'", "rename the sector, e.g. with letters and '_' only")
    if label is not None:
        check_label(label, f"--label '{label}'", f"use e.g. --label '{clean_label(label)}'")


def check_text_columns(cols, names):
    """The last line of defence before writing: every text field of the columns ``names``."""
    for name in names:
        if name in _OWN_COLUMNS or name not in cols:
            continue
        col = cols[name]
        texts = set(map(str, col.tolist())) if getattr(col, "dtype", None) is not None and col.dtype.kind in "UO" \
            else set(str(x) for x in col)
        for v in texts:
            why = text_problem(v)
            if why:
                fix = ("give --label NAME (letters, digits, '_' or '-')" if name == "source"
                       else "rename it in the files or the config")
                raise InputError(f"the {name} value {v!r} (from the inputs' file names or attributes): {why}, "
                                 f"which would break the CSV; {fix}")


# --------------------------------------------------------------------------- outputs vs inputs
def _identity(path):
    real = os.path.realpath(path)
    try:
        st = os.stat(real)
        return real, (st.st_dev, st.st_ino)
    except OSError:
        return real, None


def refuse_outputs_among_inputs(outputs, inputs):
    """``outputs``: ``[(how the user named it, path), ...]``; ``inputs``: paths. UsageError (exit 2)
    when an output is an input or two outputs are the same file."""
    ins = {}
    for p in inputs:
        real, ino = _identity(p)
        ins.setdefault(real, p)
        if ino is not None:
            ins.setdefault(ino, p)
    seen = {}
    for how, p in outputs:
        real, ino = _identity(p)
        hit = ins.get(real) or (ins.get(ino) if ino is not None else None)
        if hit is not None:
            raise UsageError(f"{how}: {p} is the input {hit}; writing it would destroy that input; "
                             "give the output its own name, e.g. -o indices.csv")
        for key in (real, ino):
            if key is not None and key in seen:
                raise UsageError(f"{how}: {p} is the same file as {seen[key][0]}; give each output its own name")
        seen.setdefault(real, (how, p))
        if ino is not None:
            seen.setdefault(ino, (how, p))


def refuse_data_file_as_output(out_path):
    """``-o`` must name a CSV, not a data file (by suffix, or an existing file's first bytes)."""
    from circtrack.inputs.files import SUFFIXES

    if out_path == "-":
        return
    name = out_path.rstrip("/")
    suffix = os.path.splitext(name)[1].lower()
    looks = suffix in SUFFIXES
    if not looks and os.path.isfile(name):
        try:
            with open(name, "rb") as f:
                head = f.read(8)
            looks = head.startswith(DATA_MAGIC)
        except OSError:
            pass
    if looks:
        raise UsageError(f"-o {out_path}: names a data file, not a CSV (was the output name forgotten before a "
                         "glob of inputs?); give the output its own name, e.g. -o indices.csv")


# --------------------------------------------------------------------------- inputs that change during a run
def input_stamps(paths, cfg=None):
    """Size, modification time and inode of every input (for a directory such as a Zarr store: of
    the directory and of the files in it; for an object in object storage: its size and ETag),
    taken before anything is read. ``cfg``: how object storage is reached (``[storage]``)."""
    out = {}
    for p in paths:
        out[p] = _stamp(p, cfg)
    return out


def _stamp(path, cfg=None):
    if remote.is_url(path):
        rec = remote.object_record(path, cfg)
        return (rec["size"], rec["etag"])
    try:
        st = os.stat(path)
    except OSError:
        return None
    own = (st.st_size, st.st_mtime_ns, st.st_ino)
    if not os.path.isdir(path):
        return own
    parts = [own]
    for root, _, names in os.walk(path):
        for n in sorted(names):
            try:
                s2 = os.stat(os.path.join(root, n))
            except OSError:
                continue
            parts.append((n, s2.st_size, s2.st_mtime_ns))
    return tuple(parts)


def refuse_changed_inputs(stamps, cfg=None):
    """After reading, before writing: an input whose size, modification time or inode changed was
    replaced or still being written while it was read; its rows cannot be trusted (InputError)."""
    for p, before in stamps.items():
        if _stamp(p, cfg) != before:
            raise InputError(f"{p}: changed while it was being read (size, modification time or inode differ); "
                             "rerun once the file is complete (nothing was written)")
