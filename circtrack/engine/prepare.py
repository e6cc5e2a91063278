"""Open and detect: one input file -> a detected description with a reader per role.

In: a file path, the chosen roles and levels (:class:`~circtrack.engine.plan.Plan`), the config and
``--var`` overrides. Out: a :class:`FileInfo` (the detection of coordinates and variables and a
picklable :class:`~circtrack.inputs.dataset.RoleReader` per role), or :class:`MissingRoles` when
the file lacks some roles (plan.py joins it with the files holding them). Each file is opened once
and closed again; the rules of opening and detection themselves live in circtrack/inputs/.
Also here: which metrics a run can make without ``--metrics`` (:func:`available_metrics`).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field

from circtrack.engine.times import iso_time
from circtrack.errors import InputError
from circtrack.inputs import dataset as D
from circtrack.inputs import remote
from circtrack.inputs.files import same_period_siblings
from circtrack.inputs.rules import VARIABLES
from circtrack.metrics import families


@dataclass
class FileInfo:
    path: str
    detected: D.Detected
    readers: dict = field(default_factory=dict)    # role -> RoleReader
    plev: dict = field(default_factory=dict)       # role -> hPa levels


def prepare_file(path, plan, cfg, overrides):
    """Open once for coordinates and readers, then close: workers reopen by path."""
    return _on_dataset(path, cfg, lambda ds: _prepare_open(ds, path, plan, cfg, overrides))


def _on_dataset(path, cfg, work):
    """``work(ds)`` on the file's netCDF-4 header (:mod:`circtrack.inputs.header`: no xarray) when it
    can stand for xarray's view of the file, else -- or when ``work`` asks more of it -- on the file
    opened with xarray."""
    from circtrack.inputs import header as H

    head = H.open_header(path, cfg)
    if head is not None:
        try:
            return work(head)
        except H.NeedsFullOpen:
            pass
    ds = D.open_dataset(path, remote.for_metadata(cfg))
    try:
        return work(ds)
    finally:
        ds.close()


def _time_errors():
    """Overflow, and pandas' out-of-bounds dates when pandas is loaded (by xarray: a dataset opened
    without it, inputs/header.py, cannot raise them; not importing it saves 0.3 s of start-up)."""
    errors = sys.modules.get("pandas.errors")
    return (OverflowError,) if errors is None else (OverflowError, errors.OutOfBoundsDatetime)


def _detect(ds, path, overrides, cfg=None):
    """Detection, with time values that cannot be decoded (a fill value such as 9.97e36 in the
    time coordinate overflows the date arithmetic) as one line naming the file."""
    try:
        return D.detect(ds, path, overrides, cfg)
    except _time_errors() as e:
        raise InputError(f"{path}: the time values cannot be decoded ({' '.join(str(e).split())}); a time value "
                         "may be missing or a fill value (e.g. 9.97e36): fix the time coordinate, or pass "
                         "--on-bad-file skip")


def _prepare_open(ds, path, plan, cfg, overrides):
    det = _detect(ds, path, overrides, cfg)
    D.require_axes(det)
    D.check_grid(ds, det)
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


def detect_only(path, cfg, overrides):
    """What a file holds (coordinates, variables), opened and closed again."""
    def work(ds):
        det = _detect(ds, path, overrides, cfg)
        if "lat" in det.coords:
            D.check_grid(ds, det)          # e.g. one pressure level: said before "no variable found"
        return det

    return _on_dataset(path, cfg, work)


def available_metrics(files, cfg, overrides, policy, left_out=None):
    """Without --metrics: every metric whose inputs the first readable file holds.

    ``left_out`` (a list) receives ``(family, metric ids, missing roles)`` for each family left out,
    for the end-of-run summary and the sidecar."""
    for p in files:
        try:
            det = detect_only(p, cfg, overrides)
            D.require_axes(det)
        except InputError:
            if policy == "skip":           # reported when the file is prepared
                continue
            raise
        found = set(det.variables)
        # one variable per file: the files named like this one but for another variable, same time steps
        for q in same_period_siblings(p, files):
            try:
                qd = detect_only(q, cfg, overrides)
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
        ids = [m.id for f in families().values() if set(f.inputs) <= found for m in f.metrics]
        if left_out is not None:
            for name, f in families().items():
                lacking = [r for r in f.inputs if r not in found]
                if lacking:
                    subs = [D.SURFACE_SUBSTITUTES.get(r) for r in lacking]
                    hint = (f"or --metrics {','.join(m.id for m in f.metrics)} to take "
                            f"{' and '.join(subs)} on the lowest pressure level" if all(x in found for x in subs) else "")
                    left_out.append((name, [m.id for m in f.metrics], lacking, hint))
        if not ids:
            roles = sorted({r for f in families().values() for r in f.inputs})
            raise InputError(f"{p}: none of the variables the metrics need ({', '.join(roles)}) was found; "
                             f"run 'circtrack scan {p}' and name them with --var ROLE=NAME")
        return ids
    raise InputError(f"{files[0]}: no readable input among {len(files)} file(s)")

