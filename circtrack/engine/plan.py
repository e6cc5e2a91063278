"""Plan: detected inputs -> the plain record of one run (reads no data).

In: the chosen metric ids, the located files and their detections (prepare.py). Out: a
:class:`RunPlan`, plain data that :meth:`RunPlan.describe` prints: the families, roles, levels and
reducers (:class:`Plan`), the inputs (one-variable-per-file groups joined, :func:`join_split_variables`),
the time axis with its repeats resolved (:func:`choose_time_steps`, :func:`time_axis`) and its
provisional streams, the tasks (one per file and time chunk) and the batches of time steps; and,
for ensembles in several files, the files of each member (:func:`member_groups`).

How repeats are resolved lives here: a time step found in two files is kept once; final data wins
over provisional data; then ``run.repeated_times`` (refuse / keep-first / keep-last in the order the
files were given) decides. Whether two repeats agree is checked on their reduced values while the
run executes (gather.py), because planning reads no data.
"""

from __future__ import annotations

import collections
import copy
import os
from dataclasses import dataclass, field

import numpy as np

from circtrack.engine import profile
from circtrack.engine.layouts import LayoutCache
from circtrack.engine.locate import file_stat, skip_or_raise
from circtrack.engine.prepare import FileInfo, MissingRoles, prepare_file
from circtrack.engine.reduce import reduce_chunk
from circtrack.engine.times import calendar_name, iso_time, time_step_days
from circtrack.errors import InputError, UsageError
from circtrack.inputs import dataset as D
from circtrack.inputs.rules import VARIABLES
from circtrack.lowpass import setup as _lowpass_setup
from circtrack.metrics import catalogue, families

MEMBER_ATTRIBUTES = ("variant_label", "member_id", "realization", "ensemble_member")


# --------------------------------------------------------------------------- metrics -> roles
@dataclass
class Plan:
    """The chosen metrics -> their families, the roles with the levels they need, the reducers."""

    metric_ids: list
    families: list
    roles: dict            # role -> levels (None for all)
    reducers: dict = field(default_factory=dict)   # name -> in-task reduction (registry.Family.reducers)

    @classmethod
    def make(cls, metric_ids, cfg, sectors):
        cat = catalogue()
        fams = families()
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
            _add_levels(roles, f.levels(cfg))
        reducers = {}
        for f in chosen:
            for name, fn in f.reducers.items():
                if name in reducers and reducers[name] is not fn:
                    raise ValueError(f"reducer {name} declared by two families")
                reducers[name] = fn
        return cls(metric_ids, chosen, roles, reducers)


def _add_levels(roles, more):
    """Join ``more`` ({role: levels or None}) into ``roles``: the union of levels, None (all) wins."""
    for role, lev in more.items():
        if role in roles and (roles[role] is None or lev is None):
            roles[role] = None
        elif role in roles:
            roles[role] = sorted(set(roles[role]) | set(lev))
        else:
            roles[role] = lev


def union_levels(plan, others):
    """``plan`` reads every level the plans of the variants (``others``) need."""
    for o in others:
        _add_levels(plan.roles, o.roles)
    return plan


# --------------------------------------------------------------------------- inputs
def prepare_inputs(files, plan, cfg, overrides, policy, headers=None):
    """Every file prepared (prepare.py), split variables joined, the bad-file policy applied and the
    inputs checked to fit together. Returns ``(infos, skipped)``. ``headers``: netCDF-4 headers
    already read (path -> header, :func:`~circtrack.engine.layouts.read_headers`, e.g. by worker processes)."""
    infos, skipped, partial = [], [], []
    layouts = LayoutCache(cfg, headers)   # files of one layout: a header read each, one detection
    for p in files:
        try:
            shared = layouts.shared(p)
            if isinstance(shared, MissingRoles):
                raise shared
            if shared is None:
                try:
                    shared = prepare_file(p, plan, cfg, overrides)
                except MissingRoles as e:
                    layouts.remember(p, e)
                    raise
                layouts.remember(p, shared)
            infos.append(shared)
        except MissingRoles as e:
            partial.append(e)          # joined below with files holding its other variables
        except InputError as e:
            skip_or_raise(e, p, policy, skipped)
    joined, unmatched = join_split_variables(partial, plan, cfg)
    infos += joined
    for e in unmatched:
        path = e.info.path
        ref = next((i for i in infos + [x.info for x in partial] if i.path != path), None)
        mixed = mixed_datasets(e.info.detected, ref.detected) if ref is not None else None
        err = e if not mixed else InputError(
            f"{path}: belongs to another dataset than {ref.path} ({mixed}) and lacks {', '.join(e.missing)}; "
            "run each dataset on its own (one circtrack track per dataset)")
        skip_or_raise(err, path, policy, skipped)
    if not infos:
        raise InputError(f"{files[0]}: no usable input among {len(files)} file(s); see the messages above")
    check_consistent(infos)
    return infos, skipped


def join_split_variables(partial, plan, cfg=None):
    """Join files that hold different roles for the same time steps and grid into one input.

    ``partial``: MissingRoles errors in the order the files were given. Returns ``(infos, errors)``:
    joined inputs, and the errors of files whose roles no file with the same time steps supplies.
    """
    groups = collections.OrderedDict()
    for e in partial:
        det = e.info.detected
        key = (tuple(iso_time(t) for t in det.times), calendar_name(det.calendar),
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
                      "joined_inputs": [file_stat(p, cfg) for p in dict.fromkeys(o.path for o in origin.values())
                                        if p != first.path]}
        infos.append(FileInfo(first.path, det, readers, plevs))
    return infos, errors


def mixed_datasets(a, b):
    """What tells two detections apart as different datasets (grid, calendar, source), or None."""
    diffs = []
    if a.lat is not None and b.lat is not None and (a.lat.size != b.lat.size or a.lon.size != b.lon.size):
        diffs.append(f"grid {a.lat.size}x{a.lon.size} vs {b.lat.size}x{b.lon.size} latitudes x longitudes")
    if calendar_name(a.calendar) != calendar_name(b.calendar):
        diffs.append(f"calendar '{a.calendar}' vs '{b.calendar}'")
    for k in ("source_id", "title", "institution"):
        if a.attrs.get(k) and b.attrs.get(k) and a.attrs[k] != b.attrs[k]:
            diffs.append(f"{k} '{a.attrs[k]}' vs '{b.attrs[k]}'")
            break
    return "; ".join(diffs) or None


def check_consistent(infos):
    first = infos[0]
    lat0 = np.sort(first.detected.lat)
    for inf in infos[1:]:
        # files of one layout share the coordinate arrays of its first file (layouts.py): nothing to compare
        lat = lat0 if inf.detected.lat is first.detected.lat else np.sort(inf.detected.lat)
        if lat is not lat0 and (lat.shape != lat0.shape or not np.allclose(lat, lat0, atol=1e-4)):
            raise InputError(f"{inf.path}: its latitude grid ({lat.size} points) differs from {first.path} "
                             f"({lat0.size} points); regrid to one grid or run the files separately")
        for role in first.readers:
            a, b = first.plev[role], inf.plev[role]
            if a is b:
                continue
            if (a is None) != (b is None) or (a is not None and (a.shape != b.shape or not np.allclose(a, b))):
                raise InputError(f"{inf.path}: the pressure levels of {role} differ from {first.path}; "
                                 "interpolate to common levels or run the files separately")
        if calendar_name(inf.detected.calendar) != calendar_name(first.detected.calendar):
            raise InputError(f"{inf.path}: calendar '{inf.detected.calendar}' differs from '{first.detected.calendar}' "
                             f"in {first.path}; files of one run must share a calendar")
        if set(inf.detected.extra_dims) != set(first.detected.extra_dims):
            raise InputError(f"{inf.path}: extra dimensions {sorted(inf.detected.extra_dims)} differ from "
                             f"{sorted(first.detected.extra_dims)} in {first.path}; run them separately")


# --------------------------------------------------------------------------- the time axis
def choose_time_steps(times, last=False, prefer=None):
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


def time_axis(infos, cfg, only_times=None, step_days=None):
    """The time axis across files: chronological; a repeated time step is read from every file that
    has it and compared: identical repeats are dropped, conflicting ones refused (or resolved by
    ``run.repeated_times`` = "keep-first" / "keep-last", in the order files were given); a time step
    in a final and in a provisional stream (e.g. expver 0001 and 0005 files): final wins.

    ``only_times`` (ISO texts): keep only those (and their repeats); ``step_days``: the record's time
    step when the files are only a part of it. Returns the fields of :class:`RunPlan` it settles.
    """
    times_all = np.concatenate([i.detected.times for i in infos])
    file_of = np.concatenate([np.full(i.detected.times.size, k) for k, i in enumerate(infos)])
    repeat_policy = cfg["run"].get("repeated_times", "refuse")
    provisional = np.concatenate([D.provisional_steps(i.detected) for i in infos])
    keep, dropped, partner = choose_time_steps(times_all, last=(repeat_policy == "keep-last"), prefer=~provisional)
    step_days = time_step_days(times_all[keep]) if step_days is None else step_days
    if only_times is not None:
        wanted = np.array([iso_time(t) in only_times for t in times_all], dtype=bool)
        pairs = [(d, p) for d, p in zip(dropped, partner) if wanted[p]]
        keep = keep[wanted[keep]]
        dropped, partner = [d for d, _ in pairs], [p for _, p in pairs]
    return dict(times_all=times_all, file_of=file_of, repeat_policy=repeat_policy, provisional=provisional,
                keep=keep, dropped=dropped, partner=partner, times=times_all[keep], step_days=step_days)


# --------------------------------------------------------------------------- tasks and batches
def task_layout(infos, cfg, n_times):
    """One task per file and time chunk of ``run.time_chunk`` steps (time only; lat/level/lon whole).

    Returns ``starts`` (first position of each file on the joint axis), ``chunks`` ((file, t0, t1)
    per chunk) and ``chunk_of`` (the chunk of every position)."""
    tc = max(1, int(cfg["run"]["time_chunk"]))
    starts = np.concatenate([[0], np.cumsum([i.detected.times.size for i in infos])]).astype(int)
    chunks = [(k, a, min(i.detected.times.size, a + tc)) for k, i in enumerate(infos)
              for a in range(0, i.detected.times.size, tc)]
    chunk_of = np.empty(n_times, dtype=int)
    for c, (k, a, b) in enumerate(chunks):
        chunk_of[starts[k] + a:starts[k] + b] = c
    return dict(starts=starts, chunks=chunks, chunk_of=chunk_of)


def batches_and_lowpass(cfg, times, plan, infos, partial_run):
    """The low-pass filter set-up (lowpass.py) and the batches of time steps gathered at once.

    ``partial_run``: only some time steps or a given time step (``circtrack update``), which the
    filter cannot do (it needs the whole record)."""
    nt = times.size
    lowpass = _lowpass_setup(cfg, times, plan, infos[0].path)
    if lowpass and partial_run:
        raise ValueError("the low-pass filter needs the whole record: run without only_times/time_step_days")
    tc = max(1, int(cfg["run"]["time_chunk"]))
    per_batch = int(cfg["run"].get("batch_time_steps") or 0) or tc * max(16, 8 * (os.cpu_count() or 1))
    if lowpass:
        per_batch = max(per_batch, lowpass.half_width)   # the halo fits in one neighbour
    return dict(lowpass=lowpass, batches=[(b0, min(nt, b0 + per_batch)) for b0 in range(0, nt, per_batch)])


# --------------------------------------------------------------------------- the record
@dataclass
class RunPlan:
    """Everything one run will do, as plain data; building it reads no data."""

    cfg: dict
    plan: Plan                 # metrics, families, roles and levels, reducers
    sectors: list              # [(name, lon0, lon1)]
    infos: list                # FileInfo per input (joined groups as one)
    skipped: list              # [{"path", "reason"}] under --on-bad-file skip
    times_all: np.ndarray      # every time step of every input, in input order
    file_of: np.ndarray        # input index per position of times_all
    repeat_policy: str
    provisional: np.ndarray    # bool per position: from a provisional stream
    keep: np.ndarray           # positions computed, chronological
    dropped: list              # repeated positions not computed ...
    partner: list              # ... and the kept position each repeats
    times: np.ndarray          # times_all[keep]
    step_days: float           # the record's time step (what the eddy-flux flags see)
    starts: np.ndarray
    chunks: list               # (input index, t0, t1) per task
    chunk_of: np.ndarray       # chunk per position of times_all
    masks_of: list             # longitude masks per input (full circle first)
    lowpass: object            # lowpass.Lowpass or None
    batches: list              # (b0, b1) ranges of `times` gathered at once
    variants: list = field(default_factory=list)   # variants.Variant per --vary combination (none: a plain run)

    def job(self, c):
        """The picklable job of chunk ``c`` for :func:`~circtrack.engine.reduce.reduce_chunk`."""
        k, a, b = self.chunks[c]
        inf = self.infos[k]
        return {"path": inf.path, "cfg": self.cfg, "readers": inf.readers, "t0": a, "t1": b,
                "masks": self.masks_of[k], "lon": np.asarray(inf.detected.lon, float),
                "lat": np.sort(np.asarray(inf.detected.lat, float)), "reducers": self.plan.reducers,
                "check": a == 0, "units": inf.detected.units,
                "profile": profile.enabled()}   # plausibility: on each file's first chunk

    def tasks(self):
        """The dask.delayed reduce calls of every chunk; building them reads nothing."""
        import dask

        return [dask.delayed(reduce_chunk, pure=False, traverse=False)(self.job(c)) for c in range(len(self.chunks))]

    def needed_chunks(self):
        """The chunks holding a time step to compute or one of its repeats."""
        return {int(c) for c in self.chunk_of[self.keep]} | {int(self.chunk_of[d]) for d in self.dropped}

    def describe(self):
        """The plan as a few lines of text (for people; nothing parses it)."""
        span = f"{iso_time(self.times[0])}..{iso_time(self.times[-1])}" if self.times.size else "none"
        lines = [f"metrics: {', '.join(self.plan.metric_ids)}",
                 f"families: {', '.join(f.name for f in self.plan.families)}",
                 "roles: " + ", ".join(f"{r} ({'all levels' if v is None else ' '.join(f'{x:g}' for x in v)} hPa)"
                                       for r, v in self.plan.roles.items()),
                 f"inputs: {len(self.infos)} ({len(self.skipped)} skipped)",
                 f"time steps: {self.times.size} ({span}), step {self.step_days:g} days",
                 f"repeated time steps: {len(self.dropped)} dropped (policy {self.repeat_policy}), "
                 f"{int(self.provisional.sum())} provisional",
                 f"sectors: {', '.join(['zonal'] + [s[0] for s in self.sectors])}",
                 f"tasks: {len(self.chunks)}, batches: {len(self.batches)}",
                 f"low-pass: {'on' if self.lowpass else 'off'}"]
        if self.variants:
            lines.append(f"variants: {len(self.variants)} ({'; '.join(v.name for v in self.variants)})")
        return "\n".join(lines)


# --------------------------------------------------------------------------- ensemble members
def member_groups(infos):
    """Files per ensemble member when the inputs belong to several members (one member per file,
    told apart by a global attribute such as ``variant_label``); empty otherwise."""
    from circtrack.guards import check_label

    groups = collections.OrderedDict()
    for inf in infos:
        attrs = inf.detected.attrs
        found = next((a for a in MEMBER_ATTRIBUTES if str(attrs.get(a, "")).strip()), None)
        if found is None:
            return {}
        label = str(attrs[found]).strip()
        check_label(label, f"{inf.path}: the global attribute {found} = {label!r} (used for the member column)",
                    "fix the attribute (ncatted -a ...) or run the members one by one with --label", error=InputError)
        files = [inf.path] + list((inf.detected.layout or {}).get("files", {}).values())
        groups.setdefault(label, []).extend(files)
    if len(groups) < 2:
        return {}
    return {m: list(dict.fromkeys(fs)) for m, fs in groups.items()}

