"""Plausible ranges per physical kind, checked after unit conversion, and the one line that names the fix.

A file's units attribute can be wrong (temperature labelled "C" holding kelvin, geopotential in
m2 s-2 labelled "m", humidity in g/kg labelled kg/kg). Converted by the label, such values land
outside what any real atmosphere has. circtrack never repairs units by guessing: a value range
outside :data:`RANGES` stops the run (exit 1) with one line per variable naming the file, the variable, its
stated units, the observed range (said once when nothing was converted) and the exact ``--units ROLE=UNITS`` line that would make the
values plausible (when one of the known spellings does), e.g.::

    circtrack: error: f.nc: variable 'T' (ta) says units 'C' but its values, 190.2 to 310.5 C, are
    463.4 to 583.6 K, outside the plausible 120 to 350 K for air temperature; if the values are in K,
    pass --units ta=K (or ta = "K" under [units] in a config file); circtrack never guesses units

The bounds are deliberately wide physical limits (sources beside each entry); they catch factors
and offsets (x100, x9.8, +273.15), not small biases. Planning reads no data, so the values are
checked where they are read anyway: in the task holding each file's first time chunk
(engine/reduce.py), on the first time step of every role as converted (plain min/max, a few
per cent of that task's work); every implausible variable of the chunk gets its line
(:class:`ImplausibleValues`, printed one ``circtrack: error:`` line each). ``scan`` judges with the
same :func:`problems` on the same values: the first time step of the levels a run without
--metrics reads (scan._default_levels), so both quote the same range and advice. Coordinates are
checked on their values, which detection reads anyway.
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import InputError, ManyLines
from circtrack.inputs import units as U
from circtrack.inputs.rules import VARIABLES

class ImplausibleValues(ManyLines, InputError):
    """Implausible values of one or more variables: one line each (exit status 1)."""


# kind -> (low, high) in the canonical unit of inputs/units.py, and what it is called in messages
RANGES = {
    # coldest polar-summer mesopause ~130 K, hottest surface ~330 K (from memory); 120-350 K
    "temperature": (120.0, 350.0, "air temperature"),
    # fastest winds in reanalyses (stratospheric polar-night jet near 1 hPa) stay below ~200 m/s (from memory)
    "speed": (-250.0, 250.0, "wind"),
    # geopotential height from below sea level (deep lows over depressions) to ~100 km (0.001 hPa)
    "height": (-1500.0, 100000.0, "geopotential height"),
    # specific humidity: saturation at 35 C and 1000 hPa is ~0.037 kg/kg; small negatives from numerics
    "fraction": (-0.001, 0.05, "specific humidity"),
    # precipitation/evaporation: 0.1 kg m-2 s-1 is 360 mm/h, beyond any record (from memory); sign either way
    "water_flux": (-0.1, 0.1, "precipitation or evaporation flux"),
    # outgoing longwave radiation at the top of the atmosphere: ~60 (polar night) to ~380 W m-2 (from memory)
    "energy_flux": (30.0, 500.0, "outgoing longwave radiation"),
    # pressures: surface pressure from the summit of Everest (~330 hPa) to the record high (~1084 hPa)
    "pressure": (250.0, 1100.0, "surface pressure"),
}
# roles whose physical range is narrower than their kind's
ROLE_RANGES = {
    # sea-level pressure: deepest tropical cyclone ~870 hPa to the record high ~1084 hPa (from memory)
    "psl": (800.0, 1100.0, "sea-level pressure"),
}
# coordinates (checked by detection): latitude in degrees, pressure levels in hPa
COORD_RANGES = {"lat": (-90.0, 90.0, "latitude"), "plev": (1e-6, 1100.0, "pressure levels")}


def range_of(role, kind):
    return ROLE_RANGES.get(role) or RANGES[kind]


def fitting_units(lo, hi, kind, bounds):
    """Spellings (the first of each entry of the kind's table) under which raw values ``lo..hi``
    would convert into ``bounds``."""
    out = []
    for keys, (f, o) in U.TABLE[kind].items():
        a, b = sorted((lo * f + o, hi * f + o))
        if a >= bounds[0] and b <= bounds[1]:
            out.append(U.preferred(kind, (f, o)))
    return out


def problem(path, role, name, stated, kind, raw_lo, raw_hi, factor, offset):
    """The one line (``path: variable ...``) when the converted range ``raw_lo..raw_hi`` is
    implausible, else None. The range is said once when nothing was converted (stated units are
    the canonical ones), twice (as stated, as converted) otherwise."""
    if not (np.isfinite(raw_lo) and np.isfinite(raw_hi)):
        return None
    lo_b, hi_b, what = range_of(role, kind)
    lo, hi = sorted((raw_lo * factor + offset, raw_hi * factor + offset))
    if lo >= lo_b and hi <= hi_b:
        return None
    canon = U.CANONICAL[kind]
    fits = [u for u in fitting_units(raw_lo, raw_hi, kind, (lo_b, hi_b)) if U.conversion(u, kind) != (factor, offset)]
    if fits:
        lines = " or ".join(f"--units {role}={_quote(u)}" for u in fits)
        fix = (f"if the values are in {' or '.join(fits)}, pass {lines} (or {role} = \"{fits[0]}\" under [units] "
               f"in a config file)")
    else:
        fix = f"no units circtrack knows make them plausible: check that '{name}' is {what} and convert it first"
    if (factor, offset) == (1.0, 0.0):
        seen = f"its values, {lo:.5g} to {hi:.5g} {canon}, lie"
    else:
        seen = (f"its values, {raw_lo:.5g} to {raw_hi:.5g} {stated or '(no units)'}, are {lo:.5g} to {hi:.5g} "
                f"{canon},")
    return (f"{path}: variable '{name}' ({role}) says units '{stated}' but {seen} outside the plausible "
            f"{lo_b:g} to {hi_b:g} {canon} for {what}; {fix}; circtrack never guesses units")


def check_values(path, role, name, stated, kind, raw_lo, raw_hi, factor, offset):
    """One :class:`InputError` line when the converted range ``raw_lo..raw_hi`` is implausible."""
    line = problem(path, role, name, stated, kind, raw_lo, raw_hi, factor, offset)
    if line:
        raise InputError(line)


def check_coordinate(path, key, name, stated, values):
    """Latitudes (degrees) or pressure levels (hPa) outside their range: one line naming the fix."""
    v = np.asarray(values, dtype=float)
    if v.size == 0 or not np.isfinite(v).any():
        return
    lo_b, hi_b, what = COORD_RANGES[key]
    lo, hi = float(np.nanmin(v)), float(np.nanmax(v))
    if lo >= lo_b - 1e-6 and hi <= hi_b + 1e-6:
        return
    unit = "degrees_north" if key == "lat" else "hPa"
    if key == "plev":
        fits = fitting_units(lo / _plev_factor(stated), hi / _plev_factor(stated), "pressure", (lo_b, hi_b))
        fix = (f"the values look like {' or '.join(fits)}: pass " + " or ".join(f"--units plev={_quote(u)}" for u in fits)
               + f" or set its units attribute (e.g. ncatted -a units,{name},o,c,{fits[0]})"
               if fits else "fix the coordinate")
    else:
        fix = ("if the values are in radians, pass --units lat=radians" if hi - lo <= np.pi + 1e-6
               else "fix the coordinate")
    what = "latitude (|lat| > 90)" if key == "lat" else what
    raise InputError(f"{path}: coordinate '{name}' ({key}) says units '{stated}' but its values are {lo:.5g} to "
                     f"{hi:.5g} {unit}, outside the plausible {lo_b:g} to {hi_b:g} {unit} for {what}; {fix}")


def _plev_factor(stated):
    conv = U.conversion(stated, "pressure")
    return conv[0] if conv else 1.0


def _quote(u):
    return f'"{u}"' if any(ch in u for ch in " *()") else u


def slab_range(arr):
    """``(min, max)`` of the first time step of a chunk already read (NaN, NaN when all missing);
    plain min/max first (fast), NaN-skipping only when a NaN is there."""
    first = np.asarray(arr[:1])
    if first.size == 0:
        return np.nan, np.nan
    lo, hi = float(first.min()), float(first.max())
    if np.isnan(lo) or np.isnan(hi):
        if not np.isfinite(first).any():
            return np.nan, np.nan
        lo, hi = float(np.nanmin(first)), float(np.nanmax(first))
    return lo, hi


def problems(readers, slabs, units):
    """The lines of :func:`problem` for every role of a chunk (canonical units, first time step),
    in the order of the roles (ua, va, ta, ...); the messages state the raw values. ``track`` (in the task reading each
    file's first chunk) and ``scan`` (on the levels a default run reads) both judge with this."""
    out = []
    order = list(VARIABLES)
    for role in sorted(slabs, key=lambda r: order.index(r) if r in order else len(order)):
        arr, rd = slabs[role], readers[role]
        lo, hi = slab_range(arr)
        f, o = (rd.factor or 1.0), rd.offset
        line = problem(rd.path, role, rd.name, units.get(role, ""), VARIABLES[role]["kind"],
                       (lo - o) / f, (hi - o) / f, f, o)
        if line:
            out.append(line)
    return out


def check_slabs(readers, slabs, units):
    """Every role of a chunk inside its range, else one :class:`ImplausibleValues` naming each
    implausible variable on a line of its own."""
    lines = problems(readers, slabs, units)
    if lines:
        raise ImplausibleValues("\n".join(lines))
