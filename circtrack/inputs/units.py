"""Unit normalisation for the few physical kinds circtrack reads.

General unit libraries read meteorological spellings wrongly in this context ("mb" as millibarn,
"M/S" as megasiemens per second, "MB" as megabyte), so each role's kind has its own table and the
unit string is compared after lower-casing and removing spaces, '.', '*' and '^'. Conversion is
``value * factor + offset`` into the canonical unit. Unknown strings are an error that names the
variable and how to fix it.
"""

from __future__ import annotations

CANONICAL = {"speed": "m s-1", "pressure": "hPa", "temperature": "K", "height": "m",
             "fraction": "kg kg-1", "water_flux": "kg m-2 s-1", "energy_flux": "W m-2"}

_TABLE = {
    "speed": {("ms-1", "m/s", "ms**-1", "ms^-1", "meter/second", "meters/second", "metre/second",
               "metres/second", "msec-1", "meterspersecond", "mps"): (1.0, 0.0),
              ("km/h", "kmh-1", "kph"): (1 / 3.6, 0.0),
              ("knots", "knot", "kt", "kts"): (0.514444, 0.0),
              ("cms-1", "cm/s"): (0.01, 0.0)},
    "pressure": {("pa", "pascal", "pascals", "kgm-1s-2"): (0.01, 0.0),
                 ("hpa", "mb", "mbar", "millibar", "millibars", "hectopascal", "hectopascals"): (1.0, 0.0),
                 ("kpa",): (10.0, 0.0)},
    "temperature": {("k", "kelvin", "degk", "deg_k", "degreesk"): (1.0, 0.0),
                    ("degc", "celsius", "deg_c", "degreesc", "degree_celsius", "c"): (1.0, 273.15)},
    "height": {("m", "gpm", "meter", "meters", "metre", "metres", "m2s-2/g"): (1.0, 0.0),
               ("m2s-2", "m**2s**-2", "m^2s^-2", "m2/s2", "j/kg", "jkg-1"): (1 / 9.80665, 0.0),
               ("km",): (1000.0, 0.0),
               ("dam", "decameter", "decameters"): (10.0, 0.0)},
    "fraction": {("kgkg-1", "kg/kg", "1", "", "dimensionless"): (1.0, 0.0),
                 ("gkg-1", "g/kg"): (0.001, 0.0)},
    "water_flux": {("kgm-2s-1", "kg/m2/s", "kg/m^2/s", "mm/s", "mms-1"): (1.0, 0.0),
                   ("mm/day", "mmday-1", "mm/d", "mmd-1"): (1 / 86400.0, 0.0),
                   ("m/s", "ms-1"): (1000.0, 0.0)},
    "energy_flux": {("wm-2", "w/m2", "w/m^2", "wm**-2"): (1.0, 0.0)},
}


TABLE = _TABLE          # read by inputs/plausible.py (which spellings would make a range plausible)


def preferred(kind, factor_offset):
    """The spelling shown in advice for a conversion: the canonical unit, or the table's first spelling."""
    if tuple(factor_offset) == (1.0, 0.0):
        return CANONICAL[kind]
    for keys, v in _TABLE[kind].items():
        if v == tuple(factor_offset):
            return {"degc": "degC", "gkg-1": "g kg-1", "kpa": "kPa", "cms-1": "cm s-1", "pa": "Pa", "mm/day": "mm day-1",
                    "m2s-2": "m2 s-2", "km/h": "km h-1"}.get(keys[0], keys[0])
    return None


def _norm(s: str) -> str:
    return "".join(ch for ch in str(s).strip().lower() if ch not in " .*^_") if s is not None else ""


_LOOKUP = {kind: {_norm(k): v for keys, v in table.items() for k in keys} for kind, table in _TABLE.items()}
# keep explicit underscores in some spellings working after normalisation
for _kind, _table in _TABLE.items():
    for _keys, _v in _table.items():
        for _k in _keys:
            _LOOKUP[_kind].setdefault(_k.replace("_", ""), _v)


def conversion(units, kind):
    """``(factor, offset)`` converting ``units`` of a physical ``kind`` to the canonical unit, or None."""
    return _LOOKUP[kind].get(_norm(units))


def is_pressure(units) -> bool:
    return conversion(units, "pressure") is not None
