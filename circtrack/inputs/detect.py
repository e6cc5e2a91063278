"""Detection: an opened dataset in, a :class:`Detected` record out.

Only coordinates and the coefficients of hybrid levels are read.

Coordinates (time, latitude, longitude, the vertical axis: pressure levels or hybrid
sigma-pressure coefficients) and every variable role the rules know are found by the rules in
:mod:`circtrack.inputs.rules` (data, not code); roles that were not found get a suggestion of the
variables whose units and shape fit. Streams are found by :mod:`circtrack.inputs.streams`, the time
axis is read as decoded by :mod:`circtrack.inputs.times`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from circtrack.errors import InputError
from circtrack.inputs import model_levels as ML
from circtrack.inputs import streams as S
from circtrack.inputs import times as T
from circtrack.inputs import units as U
from circtrack.inputs.rules import COORDS, VARIABLES


@dataclass
class Detected:
    """What was found in one input, for the engine, ``scan`` and the provenance sidecar."""

    path: str
    coords: dict = field(default_factory=dict)        # canonical -> name in the file
    variables: dict = field(default_factory=dict)     # role -> name in the file
    why: dict = field(default_factory=dict)           # role -> how it was found
    others: dict = field(default_factory=dict)        # role -> other candidates not chosen
    units: dict = field(default_factory=dict)         # role -> original units string
    plev_hpa: np.ndarray | None = None
    plev_units: str = ""
    lat: np.ndarray | None = None
    lon: np.ndarray | None = None
    times: np.ndarray | None = None
    calendar: str = "standard"
    extra_dims: dict = field(default_factory=dict)    # name -> coordinate values
    attrs: dict = field(default_factory=dict)
    problems: dict = field(default_factory=dict)      # role -> why it could not be used
    coord_why: dict = field(default_factory=dict)     # canonical coordinate -> how it was found
    vertical: str = "pressure"                         # "pressure" or "hybrid" (sigma-pressure model levels)
    hybrid: dict | None = None                         # coefficients and names of a hybrid level axis
    streams: dict | None = None                        # expver-like data streams (final / provisional)
    lon_keep: np.ndarray | None = None                 # longitude indices kept (repeated longitudes dropped)
    layout: dict = field(default_factory=dict)         # notes on the layout, for scan and the sidecar


def attr_text(obj, name):
    """Attribute ``name`` of a variable as text ("" when absent)."""
    v = obj.attrs.get(name, "")
    return str(v) if v is not None else ""


def _find_coord(ds, key, taken=()):
    """``(name, why)`` of the dimension playing the part ``key`` (time, lat, lon, plev), or ``(None, "")``."""
    rule = COORDS[key]
    dims = [d for d in ds.dims if d not in taken]
    # 1. exact names, 2. standard_name, 3. axis attribute, 4. units
    for name in rule["names"]:
        if name in dims:
            return name, f"named '{name}'"
    lower = {str(d).lower(): d for d in dims}
    for name in rule["names"]:
        if name.lower() in lower:
            return lower[name.lower()], f"named '{lower[name.lower()]}' (case-insensitive)"
    for d in dims:
        if d in ds.variables and attr_text(ds[d], "standard_name") in rule["standard_names"]:
            return d, f"standard_name '{attr_text(ds[d], 'standard_name')}'"
    for d in dims:
        if d in ds.variables and attr_text(ds[d], "axis").upper() == rule["axis"]:
            if key != "plev" or U.is_pressure(attr_text(ds[d], "units")):
                return d, f"axis attribute '{rule['axis']}'"
    for d in dims:
        if d not in ds.variables:
            continue
        u = attr_text(ds[d], "units").lower().replace(" ", "")
        if key in ("lat", "lon") and u in rule["units"]:
            return d, f"units '{attr_text(ds[d], 'units')}'"
        if key == "plev" and U.is_pressure(u):
            return d, f"pressure units '{attr_text(ds[d], 'units')}'"
        if key == "time" and "since" in u:
            return d, f"time units '{attr_text(ds[d], 'units')}'"
        if key == "time" and d in ds.variables and ds[d].dtype == object and ds[d].size \
                and hasattr(ds[d].values.flat[0], "calendar"):
            return d, "decoded dates"
    return None, ""


def detect(ds, path, overrides=None) -> Detected:
    """Find coordinates and every role the rules know; nothing is read except coordinates.

    ``overrides`` maps roles (and the coordinates ``time``, ``lat``, ``lon``, ``plev``) to names.
    """
    overrides = overrides or {}
    det = Detected(path=path, attrs={k: str(v) for k, v in ds.attrs.items()
                                     if k in ("source_id", "experiment_id", "variant_label", "member_id", "realization",
                                              "ensemble_member", "title", "institution")})
    _detect_coords(ds, det, overrides)
    if "lat" in det.coords:
        _read_lat(ds, det)
    if "lon" in det.coords:
        _read_lon(ds, det)
    if "time" in det.coords:
        _read_time(ds, det)
    if "plev" in det.coords:
        _read_vertical(ds, det)
    S.detect_streams(ds, det)
    core = {det.coords.get(k) for k in ("time", "lat", "lon", "plev")} - {None}
    if det.streams and det.streams["kind"] == "dim":
        core.add(det.streams["name"])
    for role, rule in VARIABLES.items():
        _detect_role(ds, det, role, rule, overrides.get(role))
    _suggest(ds, det)
    extra = set()
    for role, name in det.variables.items():
        for d in ds[name].dims:
            if d not in core and ds.sizes[d] > 1:
                extra.add(d)
    for d in sorted(extra):
        det.extra_dims[d] = np.asarray(ds[d].values) if d in ds.variables else np.arange(ds.sizes[d])
    return det


def _detect_coords(ds, det, overrides):
    """``det.coords``/``det.coord_why``: the dimension of each coordinate, named or found by the rules."""
    taken = []
    for key in ("time", "lat", "lon", "plev"):
        forced = overrides.get(key)
        if forced:
            if forced in ds.dims:
                name, why = forced, "set by --var/config"
            else:
                det.problems[key] = (f"dimension '{forced}' given for {key} is not in the file; dimensions there: "
                                     f"{', '.join(map(str, ds.dims))}")
                continue
        else:
            name, why = _find_coord(ds, key, taken)
        if name:
            det.coords[key] = name
            det.coord_why[key] = why
            taken.append(name)


def _read_lat(ds, det):
    """Latitudes in degrees (radians converted); a dimension without values is a problem, not a latitude."""
    det.lat = np.asarray(ds[det.coords["lat"]].values, dtype=float) if det.coords["lat"] in ds.variables else None
    if det.lat is None:
        det.problems["lat"] = f"dimension '{det.coords['lat']}' has no coordinate values"
        del det.coords["lat"]
    elif _in_radians(ds[det.coords["lat"]]):
        det.lat = np.rad2deg(det.lat)
        det.coord_why["lat"] = det.coord_why.get("lat", "") + " (values in radians, converted to degrees)"


def _read_lon(ds, det):
    """Longitudes in degrees; repeated longitudes (modulo 360) are kept once (``det.lon_keep``)."""
    lon = np.asarray(ds[det.coords["lon"]].values, dtype=float)
    if _in_radians(ds[det.coords["lon"]]):
        lon = np.rad2deg(lon)
        det.coord_why["lon"] = det.coord_why.get("lon", "") + " (values in radians, converted to degrees)"
    key = np.round(np.mod(lon, 360.0), 6)
    _, first = np.unique(key, return_index=True)
    if first.size < lon.size and np.all(np.isfinite(lon)):
        det.lon_keep = np.sort(first)
        lon = lon[det.lon_keep]
        det.layout["longitude"] = (f"{lon.size + 0} distinct longitudes of {key.size}: repeated longitudes "
                                   "(e.g. a cyclic column at 0 and 360) are read once")
    det.lon = lon


def _read_time(ds, det):
    """The decoded time steps and calendar; an empty or undecoded time axis is one clear error."""
    path = det.path
    tv = ds[det.coords["time"]]
    det.times = np.asarray(tv.values)
    det.calendar = str(tv.encoding.get("calendar", tv.attrs.get("calendar", "standard")))
    if det.times.size == 0:
        raise InputError(f"{path}: the time axis '{det.coords['time']}' holds no time steps; the file may be "
                         "incomplete: re-copy it, or pass --on-bad-file skip")
    note = T.year_zero_note(ds, det.coords["time"], attr_text(tv, "units") or tv.encoding.get("units", ""))
    if note:
        det.why["time"] = note
    if det.times.size and not hasattr(det.times.flat[0], "calendar"):
        raise InputError(f"{path}: time variable '{det.coords['time']}' has no decodable units "
                         f"('{attr_text(tv, 'units')}'); give it CF units such as 'days since 2000-01-01'")


def _read_vertical(ds, det):
    """Pressure levels in hPa (units checked, or by magnitude when there are none), or hybrid coefficients."""
    pv = ds[det.coords["plev"]]
    if (attr_text(pv, "standard_name") in ML.HYBRID_STANDARD_NAMES
            or "b" in ML.parse_formula_terms(attr_text(pv, "formula_terms"))):
        _detect_hybrid(ds, det, det.coords["plev"])
        return
    det.plev_units = attr_text(pv, "units")
    conv = U.conversion(det.plev_units, "pressure")
    if conv is None and det.plev_units.strip():
        # units that are not pressure (e.g. 'degC', or '1' for model levels): never guess
        det.problems["plev"] = (f"vertical axis '{det.coords['plev']}' has units '{det.plev_units}', which "
                                "are not pressure units; set its units attribute to 'Pa' or 'hPa' (e.g. "
                                f"ncatted -a units,{det.coords['plev']},o,c,hPa) if it holds pressure levels")
    elif conv is None:
        vals = np.asarray(pv.values, float)
        # no units at all: decide by magnitude (recorded in the sidecar as '... (by magnitude)')
        conv = (0.01, 0.0) if np.nanmax(vals) > 2000 else (1.0, 0.0)
        det.plev_units = "Pa (by magnitude)" if conv[0] == 0.01 else "hPa (by magnitude)"
    if conv is not None:
        det.plev_hpa = np.round(np.asarray(pv.values, float) * conv[0], 6)


def _detect_hybrid(ds, det, name):
    """Coefficients of a hybrid sigma-pressure axis from its formula_terms (nothing else is read)."""
    pv = ds[name]
    ft = attr_text(pv, "formula_terms")
    det.vertical = "hybrid"
    terms = ML.parse_formula_terms(ft)
    missing = [t for t in terms.values() if t not in ds.variables]
    if not ft or "b" not in terms or "ps" not in terms or not ("ap" in terms or ("a" in terms and "p0" in terms)):
        det.problems["vertical"] = (f"level '{name}' is a hybrid sigma-pressure coordinate but its formula_terms "
                                    f"('{ft}') do not name ap (or a and p0), b and ps; add them, e.g. ncatted -a "
                                    f"formula_terms,{name},o,c,'ap: ap b: b ps: ps' {det.path}")
        return
    if terms["ps"] in missing:
        det.problems["vertical"] = (f"level '{name}' is a hybrid sigma-pressure coordinate whose surface pressure "
                                    f"'{terms['ps']}' (formula_terms) is not in the file; put ps into the same file "
                                    f"(e.g. cdo merge) so each time step can be converted to pressure")
        return
    if missing:
        det.problems["vertical"] = (f"formula_terms of level '{name}' name {', '.join(missing)}, which the file lacks; "
                                    "add the coefficients or fix the attribute")
        return

    def pa(var):
        conv = U.conversion(attr_text(ds[var], "units") or "Pa", "pressure")
        if conv is None:
            raise InputError(f"{det.path}: '{var}' (formula_terms of '{name}') has units '{attr_text(ds[var], 'units')}'; "
                             "give it pressure units (Pa)")
        return np.asarray(ds[var].values, float) * conv[0] * 100.0

    b = np.asarray(ds[terms["b"]].values, float)
    if "ap" in terms:
        a, p0, form = pa(terms["ap"]), None, "ap + b*ps"
    else:
        a, p0, form = np.asarray(ds[terms["a"]].values, float), float(np.ravel(pa(terms["p0"]))[0]), "a*p0 + b*ps"
    ps = terms["ps"]
    ref = (a * (p0 if p0 is not None else 1.0)) + b * 100000.0
    det.hybrid = {"name": name, "form": form, "a": a.tolist(), "b": b.tolist(), "p0": p0, "ps": ps,
                  "ps_units": attr_text(ds[ps], "units"), "reference_hpa": (ref / 100.0).tolist()}
    det.plev_hpa = ref / 100.0
    det.plev_units = f"hybrid sigma-pressure ({form}; formula_terms '{ft}')"
    det.layout["vertical"] = (f"'{name}': hybrid sigma-pressure levels, p = {form} from formula_terms, "
                              "interpolated to pressure levels linearly in log p per time chunk")


def _in_radians(var):
    u = attr_text(var, "units").strip().lower()
    return u in ("radian", "radians", "rad")


def require_axes(det):
    """The time, latitude and longitude axes every metric needs, or one clear error naming the fix."""
    path = det.path
    if "time" not in det.coords:
        raise InputError(f"{path}: no time axis found; name it 'time' or give it CF units ('days since ...')")
    for key in ("lat", "lon"):
        if key not in det.coords:
            raise InputError(f"{path}: no {'latitude' if key == 'lat' else 'longitude'} axis found; name it "
                             f"'{key}' or give it units '{'degrees_north' if key == 'lat' else 'degrees_east'}'")


RANK_WORDS = {0: "a CF standard_name match", 1: "an exact name match", 2: "a case-insensitive name match"}


def _detect_role(ds, det, role, rule, override):
    lat, lon, plev = det.coords.get("lat"), det.coords.get("lon"), det.coords.get("plev")
    if override:
        if override not in ds.data_vars:
            det.problems[role] = (f"variable '{override}' given for {role} is not in the file; "
                                  f"variables there: {', '.join(map(str, ds.data_vars))}")
            return
        det.variables[role], det.why[role] = override, "set by --var/config"
        det.units[role] = attr_text(ds[override], "units")
        return

    def shape_ok(name):
        dims = ds[name].dims
        if lat not in dims or lon not in dims:
            return False
        has_lev = plev is not None and plev in dims and ds.sizes[plev] > 1
        return has_lev if rule["levels"] else not has_lev

    found, wrong_shape = [], []
    lower_names = [n.lower() for n in rule["names"]]
    for name in ds.data_vars:
        sn = attr_text(ds[name], "standard_name")
        if sn in rule["standard_names"]:
            cand = (0, rule["standard_names"].index(sn), name, f"standard_name '{sn}'")
        elif name in rule["names"]:
            cand = (1, rule["names"].index(name), name, f"variable name '{name}'")
        elif str(name).lower() in lower_names:
            cand = (2, lower_names.index(str(name).lower()), name, f"variable name '{name}' (case-insensitive)")
        else:
            continue
        (found if shape_ok(name) else wrong_shape).append(cand)
    if not found:
        if wrong_shape and role not in det.problems:
            names = ", ".join(f"'{c[2]}' {tuple(map(str, ds[c[2]].dims))}" for c in wrong_shape)
            need = "pressure levels" if rule["levels"] else "no level axis"
            if lat is None or lon is None:
                need = "latitude and longitude axes"
            det.problems[role] = f"{names} matched by name but not by shape ({role} needs {need})"
        return
    found.sort(key=lambda t: (t[0], t[1], str(t[2])))
    best = found[0]
    det.variables[role] = best[2]
    det.why[role] = best[3]
    det.others[role] = [f[2] for f in found[1:]]
    if len(found) > 1:
        reasons = []
        for f in found[1:]:
            if f[0] > best[0]:
                reasons.append(f"'{f[2]}' ({f[3]}): {RANK_WORDS[best[0]]} ranks above {RANK_WORDS[f[0]]}")
            elif f[1] > best[1]:
                reasons.append(f"'{f[2]}' ({f[3]}): comes later in the preference list of {role}")
            else:
                reasons.append(f"'{f[2]}' ({f[3]}): same rank, '{best[2]}' comes first alphabetically")
        det.why[role] += "; chosen over " + "; ".join(reasons)
    det.units[role] = attr_text(ds[best[2]], "units")


def _suggest(ds, det):
    """For roles not found: unassigned variables whose units and shape fit, as the exact line to add."""
    lat, lon, plev = det.coords.get("lat"), det.coords.get("lon"), det.coords.get("plev")
    if lat is None or lon is None:
        return
    assigned = set(det.variables.values()) | {n for names in det.others.values() for n in names}
    for role, rule in VARIABLES.items():
        if role in det.variables:
            continue
        fits = []
        for name in ds.data_vars:
            v = ds[name]
            if name in assigned or lat not in v.dims or lon not in v.dims:
                continue
            has_lev = plev is not None and plev in v.dims and ds.sizes[plev] > 1
            if has_lev != rule["levels"] or U.conversion(attr_text(v, "units"), rule["kind"]) is None:
                continue
            if not attr_text(v, "units"):          # no units: "fits" any dimensionless kind, too weak a hint
                continue
            if rule["kind"] != "speed" and U.conversion(attr_text(v, "units"), "speed") is not None:
                continue                       # "m/s" is a wind before it is a water flux
            fits.append(str(name))
        if fits:
            where = "on pressure levels" if rule["levels"] else "without a level axis"
            lines = " or ".join(f"--var {role}={n}" for n in fits)
            hint = (f"{', '.join(repr(n) for n in fits)} {'fits' if len(fits) == 1 else 'fit'} by units and "
                    f"shape ({where}): {lines}")
            det.problems[role] = (f"{det.problems[role]}; {hint}" if role in det.problems
                                  else f"no name or standard_name matched; {hint}")
