"""``circtrack scan``: what the inputs hold, which metrics can run, and what to add for the rest."""

from __future__ import annotations

import numpy as np

from circtrack import registry
from circtrack.engine import iso_time
from circtrack.errors import InputError
from circtrack.inputs import dataset as D
from circtrack.inputs.files import expand
from circtrack.inputs.rules import VARIABLES


def _grid(det):
    parts = []
    if det.lat is not None:
        d = "ascending" if det.lat.size < 2 or det.lat[1] > det.lat[0] else "descending"
        parts.append(f"{det.lat.size} latitudes {det.lat.min():g}..{det.lat.max():g} ({d})")
    if det.lon is not None:
        parts.append(f"{det.lon.size} longitudes {det.lon.min():g}..{det.lon.max():g}")
    if det.plev_hpa is not None:
        parts.append(f"{det.plev_hpa.size} pressure levels {det.plev_hpa.max():g}..{det.plev_hpa.min():g} hPa "
                     f"(units in file: '{det.plev_units}')")
    elif "plev" in det.problems:
        parts.append(f"no usable pressure levels: {det.problems['plev']}")
    return "; ".join(parts) or "no grid found"


def report(paths, cfg, overrides) -> str:
    files = expand(paths)
    lines = []
    dets, bad = [], []
    for p in files:
        try:
            ds = D.open_dataset(p, cfg)
            dets.append((D.detect(ds, p, overrides), sorted(map(str, ds.data_vars))))
            ds.close()
        except InputError as e:
            bad.append(str(e))
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
    ntime = sum(d.times.size for d, _ in dets if d.times is not None)
    times = [d.times for d, _ in dets if d.times is not None and d.times.size]
    if times:
        allt = np.concatenate(times)
        lines.append(f"  time: {ntime} steps over all inputs, {iso_time(min(allt))} .. {iso_time(max(allt))}, "
                     f"calendar {det.calendar}")
    else:
        lines.append("  time: no time axis found (name it 'time' or give it CF units 'days since ...')")
    if det.extra_dims:
        lines.append("  extra dimensions (become key columns): " + ", ".join(f"{k} ({len(v)})" for k, v in det.extra_dims.items()))
    lines.append("  variables in file: " + ", ".join(names))
    lines.append("variables found:")
    for role, rule in VARIABLES.items():
        if role in det.variables:
            extra = f"; other candidates not used: {', '.join(det.others[role])}" if det.others.get(role) else ""
            lines.append(f"  {role:8s} = '{det.variables[role]}' ({det.why[role]}; units '{det.units.get(role, '')}'){extra}")
    lines.append("metrics:")
    missing_roles = set()
    for fam in registry.families().values():
        lacking = [r for r in fam.inputs if r not in det.variables]
        for m in fam.metrics:
            if lacking:
                lines.append(f"  {m.id:30s} cannot run: needs {', '.join(lacking)}")
            else:
                lines.append(f"  {m.id:30s} can run")
        missing_roles.update(lacking)
    if missing_roles:
        assigned = set(det.variables.values())
        spare = [n for n in names if n not in assigned]
        lines.append("to run the rest, name the missing variables:")
        for r in sorted(missing_roles):
            hint = det.problems.get(r, "")
            lines.append(f"  {r} ({VARIABLES[r]['long']}): add --var {r}=NAME  or in a config file:  "
                         f"[variables] {r} = \"NAME\"" + (f"  ({hint})" if hint else ""))
        if spare:
            lines.append(f"  unassigned variables in the file: {', '.join(spare)}")
    return "\n".join(lines)
