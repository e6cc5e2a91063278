"""``circtrack scan``: what the inputs hold, which metrics can run, and what to add for the rest."""

from __future__ import annotations

import numpy as np

from circtrack.engine.times import iso_time
from circtrack.errors import InputError
from circtrack.inputs import dataset as D
from circtrack.inputs import remote
from circtrack.inputs import units as U
from circtrack.inputs.files import expand
from circtrack.inputs.rules import VARIABLES
from circtrack.metrics import families


def config_snippet(names, indent):
    """Lines of a valid TOML snippet naming variables (role -> name in the file), indented:
    ``[variables]`` on a line of its own, then one ``role = "name"`` line each."""
    pad = " " * indent
    return [f"{pad}[variables]"] + [f"{pad}{role} = {_toml_string(name)}" for role, name in names.items()]


def _toml_string(text):
    """A TOML basic string (quotes, backslashes and control characters escaped)."""
    out = []
    for ch in str(text):
        if ch in '"\\':
            out.append("\\" + ch)
        elif ord(ch) < 32 or ord(ch) == 127:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _grid(det):
    parts = []
    if det.lat is not None:
        d = "ascending" if det.lat.size < 2 or det.lat[1] > det.lat[0] else "descending"
        parts.append(f"{det.lat.size} latitudes {det.lat[0]:g}..{det.lat[-1]:g} ({d})")
    if det.lon is not None:
        parts.append(f"{det.lon.size} longitudes {det.lon.min():g}..{det.lon.max():g}")
    if det.plev_hpa is not None and det.vertical == "hybrid":
        parts.append(f"{det.plev_hpa.size} hybrid sigma-pressure model levels ({det.plev_hpa.max():g}..{det.plev_hpa.min():g} "
                     "hPa where the surface pressure is 1000 hPa)")
    elif det.plev_hpa is not None:
        parts.append(f"{det.plev_hpa.size} pressure levels {det.plev_hpa.max():g}..{det.plev_hpa.min():g} hPa "
                     f"(units in file: '{det.plev_units}')")
    elif "plev" in det.problems:
        parts.append(f"no usable pressure levels: {det.problems['plev']}")
    return "; ".join(parts) or "no grid found"


def _default_levels(found, cfg):
    """role -> the levels a run without --metrics reads (None: every level), when the inputs hold
    the roles ``found``: the plan of every metric whose inputs are all there (as track's)."""
    from circtrack.engine.plan import Plan

    ids = [m.id for f in families().values() if set(f.inputs) <= set(found) for m in f.metrics]
    return Plan.make(ids, cfg, None).roles if ids else {}


def _implausible(ds, det, cfg, levels):
    """Roles whose values are implausible after unit conversion: role -> the advice line. The same
    check as track's (inputs/plausible.py ``problems``), on the same values: the first time step
    of the levels a run without --metrics reads (``levels``, from :func:`_default_levels`)."""
    from circtrack.inputs import plausible as PL
    readers, slabs = {}, {}
    for role in det.variables:
        try:
            reader, _ = D.standardise(ds, det, role, levels.get(role), cfg)
            slabs[role] = reader.read_noted(ds, 0, 1)[0]
            readers[role] = reader
        except (InputError, KeyError, ValueError, IndexError):
            continue                    # what cannot be read is reported elsewhere (units, levels)
    return {role: line.split(": ", 1)[1]
            for role in readers for line in PL.problems({role: readers[role]}, {role: slabs[role]}, det.units)}


def _detect_all(files, cfg, overrides):
    """Every input opened for metadata and detected: (detections with their variable names, error
    lines of unreadable inputs, dimensions per input, implausible roles per input). Values are
    sampled on the levels the roles found so far need; an input whose roles need other levels once
    every input is known (one variable per file: va's file comes after ua's) is sampled again."""
    dets, bad = [], []
    det_dims, implausible, sampled, plans = {}, {}, {}, {}
    found = set()
    for p in files:
        try:
            ds = D.open_dataset(p, remote.for_metadata(cfg))     # metadata only: small ranges for objects
            try:
                det = D.detect(ds, p, overrides, cfg)
                dets.append((det, sorted(map(str, ds.data_vars))))
                det_dims[p] = [str(d) for d in ds.dims]
                found |= set(det.variables)
                key = frozenset(found)
                levels = plans[key] if key in plans else plans.setdefault(key, _default_levels(found, cfg))
                implausible[p] = _implausible(ds, det, cfg, levels)
                sampled[p] = {r: levels.get(r) for r in det.variables}
            finally:
                ds.close()
        except InputError as e:
            bad.append(str(e))
    levels = _default_levels(found, cfg)
    for det, _ in dets:
        if sampled.get(det.path) == {r: levels.get(r) for r in det.variables}:
            continue
        try:
            ds = D.open_dataset(det.path, remote.for_metadata(cfg))
            try:
                implausible[det.path] = _implausible(ds, det, cfg, levels)
            finally:
                ds.close()
        except InputError:
            implausible[det.path] = {}
    return dets, bad, det_dims, implausible


def report(paths, cfg, overrides) -> str:
    files = expand(paths, cfg=cfg)
    lines = []
    dets, bad, det_dims, implausible = _detect_all(files, cfg, overrides)
    lines.append(f"{len(files)} input(s), {len(dets)} readable")
    for b in bad:
        lines.append(f"  unreadable: {b}")
    if not dets:
        return "\n".join(lines)
    found_roles = {}
    for det, _ in dets:
        for r, name in det.variables.items():
            found_roles.setdefault(r, set()).add(name)
    det, names = dets[0]
    lines.append(f"first input: {det.path}")
    lines.append(f"  grid: {_grid(det)}")
    lines.append("  coordinates: " + "; ".join(
        f"{k} = '{det.coords[k]}' ({det.coord_why.get(k, '')})" for k in ("time", "lat", "lon", "plev") if k in det.coords))
    for key, what, unit in (("time", "time", "days since 2000-01-01"), ("lat", "latitude", "degrees_north"),
                            ("lon", "longitude", "degrees_east")):
        if key not in det.coords:
            spare = [d for d in det_dims.get(det.path, []) if d not in det.coords.values()]
            problem = det.problems.get(key, "not found by name, standard_name, axis or units")
            lines.append(f"  {what} axis: {problem}; add --var {key}=DIM  (or give it units '{unit}')"
                         + (f"; dimensions without a part: {', '.join(spare)}" if spare else "")
                         + "; or in a config file:")
            lines += config_snippet({key: "DIM"}, 6)
    for what, note in det.layout.items():
        lines.append(f"  {what}: {note}")
    if det.problems.get("vertical"):
        lines.append(f"  vertical axis: {det.problems['vertical']}")
    ntime = sum(d.times.size for d, _ in dets if d.times is not None)
    times = [d.times for d, _ in dets if d.times is not None and d.times.size]
    if times:
        allt = np.concatenate(times)
        ntime = len({iso_time(t) for t in allt})
        lines.append(f"  time: {ntime} distinct steps over all inputs, {iso_time(min(allt))} .. {iso_time(max(allt))}, "
                     f"calendar {det.calendar}")
    else:
        lines.append("  time: no time axis found (name it 'time' or give it CF units 'days since ...')")
    if det.extra_dims:
        lines.append("  extra dimensions (become key columns): " + ", ".join(f"{k} ({len(v)})" for k, v in det.extra_dims.items()))
    lines.append("  variables in file: " + ", ".join(names))
    lines.append("variables found:")
    for role, rule in VARIABLES.items():
        if role in det.variables:
            why = det.why[role]
            said = "given by --units/[units]" in why         # the units are already in the reason
            lines.append(f"  {role:8s} = '{det.variables[role]}' ({why}"
                         + ("" if said else f"; units '{det.units.get(role, '')}'") + ")")
            if U.conversion(det.units.get(role, ""), rule["kind"]) is None:
                canon = U.CANONICAL[rule["kind"]]
                lines.append(f"  {'':8s}   units '{det.units.get(role, '')}' are not understood for {rule['kind'].replace('_', ' ')}: "
                             f"set them, e.g. ncatted -a units,{det.variables[role]},o,c,'{canon}' {det.path}, or "
                             f"if the values are in {canon} add --units {role}='{canon}'")
            elif role in implausible.get(det.path, {}):
                lines.append(f"  {'':8s}   IMPLAUSIBLE: {implausible[det.path][role]}")
            if det.others.get(role):
                lines.append(f"  {'':8s}   to use another, add --var {role}={det.others[role][0]}  or in a config file:")
                lines += config_snippet({role: det.others[role][0]}, 15)
    # one variable per file: roles from other inputs with the same time steps join this one
    def same_times(a, b):
        return (a.times is not None and b.times is not None and a.times.size == b.times.size
                and all(iso_time(x) == iso_time(y) for x, y in zip(a.times, b.times)))

    joined = dict(det.variables)
    for other, _ in dets[1:]:
        if same_times(det, other):
            for role, name in other.variables.items():
                if role not in joined:
                    joined[role] = name
                    lines.append(f"  {role:8s} = '{name}' in {other.path} (same time steps; {other.why[role]}; "
                                 f"units '{other.units.get(role, '')}')")
                    if role in implausible.get(other.path, {}):
                        lines.append(f"  {'':8s}   IMPLAUSIBLE: {implausible[other.path][role]}")
    lines += _metric_lines(det, joined, names)
    return "\n".join(lines)


def _metric_lines(det, joined, names):
    """Which metrics can run with the roles found (``joined``: role -> variable, over joined
    inputs), and what to name for the rest."""
    lines = []
    lines.append("metrics:")
    missing_roles = set()
    for fam in families().values():
        lacking = [r for r in fam.inputs if r not in joined]
        for m in fam.metrics:
            subs = {r: D.SURFACE_SUBSTITUTES.get(r) for r in lacking}
            low_enough = det.plev_hpa is not None and np.nanmax(det.plev_hpa) >= det.near_surface_hpa
            if lacking and all(src in joined for src in subs.values()) and low_enough:
                lines.append(f"  {m.id:30s} can run when asked for (--metrics {m.id}): "
                             + ", ".join(f"{r} from {src} on the lowest pressure level" for r, src in subs.items()))
            elif lacking:
                lines.append(f"  {m.id:30s} cannot run: needs {', '.join(lacking)}")
            else:
                lines.append(f"  {m.id:30s} can run")
        missing_roles.update(lacking)
    if missing_roles:
        assigned = set(det.variables.values())
        spare = [n for n in names if n not in assigned]
        lines.append("to run the rest, name the missing variables:")
        names_for = {}
        for r in sorted(missing_roles):
            hint = det.problems.get(r, "")
            fits = [t.split("=", 1)[1] for t in hint.split(": ", 1)[-1].split(" or ") if t.startswith(f"--var {r}=")] \
                if "fit" in hint else []
            names_for[r] = fits[0] if len(fits) == 1 else "NAME"
            lines.append(f"  {r} ({VARIABLES[r]['long']}): add --var {r}={names_for[r]}" + (f"  ({hint})" if hint else ""))
        if spare:
            lines.append(f"  unassigned variables in the file: {', '.join(spare)}")
        lines.append("  or in a config file (-c FILE):")
        lines += config_snippet(names_for, 6)
    return lines
