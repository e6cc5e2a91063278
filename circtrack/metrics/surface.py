"""Surface wind belts and subtropical highs.

References
----------
Kang, S. M. & Polvani, L. M. (2011) J. Climate 24, 563-568 (zero of the surface zonal wind as the
edge between trades and westerlies). Davis & Rosenlof (2012) J. Climate and Waugh et al. (2018)
J. Climate (surface-wind and sea-level-pressure measures of the tropical width).
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import UsageError
from circtrack.metrics.common import HEMISPHERES, add_note, crossing, hemisphere_view, peak, signed
from circtrack.registry import Metric, Result, register_family

WIND_REF = ("Kang & Polvani (2011) J. Climate 24, 563-568 (the surface-wind zero between trades and westerlies); "
            "Waugh et al. (2018) J. Climate 31, 7565-7581")
SPEED_REF = ("this project's diagnostic, not defined in the cited papers (its windows are this project's); the belts "
             "as in " + WIND_REF)
SLP_REF = ("Davis & Rosenlof (2012) J. Climate 25, 1061-1078 (latitude of the subtropical sea-level-pressure maximum); "
           "Waugh et al. (2018) J. Climate 31, 7565-7581")
# the rule every crossing and extremum follows (kernels/crossings.py, kernels/extrema.py), and coverage
_RULES = ("; points with fewer than run.min_coverage of the longitudes valid are missing; a crossing is never taken "
          "across missing latitudes or onto a pole row, an extremum never on the window edge, a pole row or next to a "
          "missing latitude (NaN with a flag naming which); a window needs run.min_window_fraction valid points")

# uas, or without it (and only when these metrics are asked for with --metrics) ua on the lowest
# pressure level; the sidecar's found_by says which (inputs/dataset.py lowest_level_substitute)
_UAS = ("; [uas] is the zonal-mean near-surface wind, or ua on the lowest pressure level (at or below "
        "run.near_surface_min_hpa) when the file has no uas and the metric is asked for: then each row's flag notes "
        "the level (ok;wind_from_1000hPa), columns where ps says the level is below ground are left out, and a "
        "window mostly below ground gives NaN flagged surface_level_below_ground")
WIND_METRICS = [
    Metric("surface_wind_zero_lat", "Edge between the trade winds and the surface westerlies", "degrees_north",
           "hemisphere", "first zero of [uas] poleward of the tropical easterly minimum (searched in "
           "surface.trades_window, 0-35 deg poleward); linear interpolation" + _UAS + _RULES, WIND_REF),
    Metric("polar_easterly_edge_lat", "Edge between the surface westerlies and the polar easterlies", "degrees_north",
           "hemisphere", "first zero of [uas] poleward of the surface westerly maximum (searched in "
           "surface.westerlies_window, 25-70 deg poleward); linear interpolation" + _UAS + _RULES,
           "Kang & Polvani (2011) J. Climate 24, 563-568 (the surface-wind zero, applied here to the poleward side "
           "of the westerlies: an extension of this project)"),
    Metric("trade_wind_speed", "Strongest tropical easterly", "m s-1", "hemisphere",
           "-min([uas]) in surface.trades_window (3-point parabola vertex); positive for easterlies" + _UAS + _RULES,
           SPEED_REF),
    Metric("surface_westerly_speed", "Strongest midlatitude surface westerly", "m s-1", "hemisphere",
           "max([uas]) in surface.westerlies_window (3-point parabola vertex)" + _UAS + _RULES, SPEED_REF),
]
SLP_METRICS = [
    Metric("subtropical_high_lat", "Latitude of the subtropical high-pressure belt", "degrees_north", "hemisphere",
           "maximum of [psl] in surface.high_window (10-50 deg poleward), 3-point parabola" + _RULES, SLP_REF),
    Metric("subtropical_high_slp", "Sea-level pressure of the subtropical high-pressure belt", "hPa", "hemisphere",
           "parabola vertex value of [psl] at the subtropical high" + _RULES,
           "this project's companion of subtropical_high_lat; " + SLP_REF),
]


@register_family("surface_winds", inputs=("uas",), levels=lambda cfg: {"uas": None}, sectors=True,
                 metrics=WIND_METRICS)
def compute_winds(fields, cfg):
    s = cfg["surface"]
    n = fields.n
    out = {m.id: Result.empty(n, 2) for m in WIND_METRICS}
    u = fields.masked("uas", cfg)
    level = fields.info.get("from_level_hpa", {}).get("uas")
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        y = u[:, idx]
        trade = peak(y, x, s["trades_window"], cfg, None, out["trade_wind_speed"], h, kind="min")
        out["trade_wind_speed"].value[:, h] = -out["trade_wind_speed"].value[:, h]
        crossing(out["surface_wind_zero_lat"], h, hemi, y, x, trade, direction="up")
        west = peak(y, x, s["westerlies_window"], cfg, None, out["surface_westerly_speed"], h)
        crossing(out["polar_easterly_edge_lat"], h, hemi, y, x, west, direction="down")
        if level is not None:
            cov = fields.coverage["uas"][:, idx]
            for window, ids in ((s["trades_window"], ("trade_wind_speed", "surface_wind_zero_lat")),
                                (s["westerlies_window"], ("surface_westerly_speed", "polar_easterly_edge_lat"))):
                below = below_ground(cov, x, window, cfg)
                for mid in ids:
                    out[mid].value[below, h] = np.nan
                    out[mid].flag[below, h] = "surface_level_below_ground"
    if level is not None:
        add_note(out.values(), f"wind_from_{level:g}hPa")
    return out


def below_ground(cov, x, window, cfg):
    """``(N,)``: the pressure level standing in for the surface is missing (below ground, or no data)
    at more than half the latitudes of the search window (common practice: a level counts as surface
    only where it lies above the ground; the rule is the project's)."""
    inside = (x >= window[0]) & (x <= window[1])
    if not inside.any():
        return np.zeros(cov.shape[0], bool)
    return np.mean(cov[:, inside] < cfg["run"]["min_coverage"], axis=1) > 0.5


@register_family("subtropical_highs", inputs=("psl",), levels=lambda cfg: {"psl": None}, sectors=True,
                 metrics=SLP_METRICS)
def compute_highs(fields, cfg):
    n = fields.n
    out = {m.id: Result.empty(n, 2) for m in SLP_METRICS}
    p = fields.masked("psl", cfg)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        peak(p[:, idx], x, cfg["surface"]["high_window"], cfg, out["subtropical_high_lat"],
             out["subtropical_high_slp"], h)
        out["subtropical_high_lat"].value[:, h] = signed(hemi, out["subtropical_high_lat"].value[:, h])
    return out


PE_REF = ("Waugh et al. (2018) J. Climate 31, 7565-7581 and Davis & Rosenlof (2012) J. Climate 25, 1061-1078 (the "
          "subtropical P - E zero as a tropical-width measure)")
OLR_REF = "Hu & Fu (2007) Atmos. Chem. Phys. 7, 5229-5236"

PE_METRICS = [
    Metric("p_minus_e_zero_lat", "Poleward edge of the subtropical dry zone (P - E = 0)", "degrees_north",
           "hemisphere", "first zero of [pr - evspsbl] poleward of its subtropical minimum (searched in "
           "surface.p_minus_e_window, 0-45 deg poleward); evaporation is made positive upward when the file "
           "stores it negative (global mean < 0); linear interpolation" + _RULES, PE_REF),
]
OLR_FRACTION_REF = ("an edge relative to the OLR maximum rather than a fixed threshold: Davis & Rosenlof (2012) J. "
                    "Climate 25, 1061-1078 used a fixed drop below the maximum (from memory); the fraction is this "
                    "project's form of it")
OLR_METRICS = [
    Metric("olr_edge_lat", "Tropical edge from outgoing longwave radiation", "degrees_north", "hemisphere",
           "latitude where [rlut] falls below surface.olr_threshold_w_m2 (250 W m-2) poleward of its subtropical "
           "maximum (searched in surface.olr_max_window, 0-40 deg poleward); linear interpolation" + _RULES +
           "; alternative (surface.olr_fraction_of_max > 0, e.g. 0.9; 0 by default): where [rlut] falls to that "
           "fraction of the subtropical maximum [" + OLR_FRACTION_REF + "]",
           OLR_REF + " (the 250 W m-2 threshold; the search from the subtropical maximum is this project's); "
           + OLR_FRACTION_REF),
]


def _olr_levels(cfg):
    frac = cfg["surface"]["olr_fraction_of_max"]
    if not 0.0 <= frac < 1.0:
        raise UsageError(f"surface.olr_fraction_of_max = {frac!r} in the config: expected 0 (the fixed threshold "
                         "surface.olr_threshold_w_m2) or a fraction below 1, e.g. 0.9")
    return {"rlut": None}


@register_family("water_balance", inputs=("pr", "evspsbl"), levels=lambda cfg: {"pr": None, "evspsbl": None},
                 sectors=True, metrics=PE_METRICS)
def compute_p_minus_e(fields, cfg):
    n = fields.n
    res = Result.empty(n, 2)
    pr = fields.masked("pr", cfg)
    ev = fields.masked("evspsbl", cfg)
    w = np.cos(np.deg2rad(fields.lat))
    with np.errstate(invalid="ignore"):
        gmean = np.nansum(ev * w, axis=-1) / np.nansum(np.where(np.isfinite(ev), w, 0), axis=-1)
    ev = np.where((gmean < 0)[:, None], -ev, ev)       # downward-positive files (e.g. accumulated 'e')
    pe = pr - ev
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        y = pe[:, idx]
        ext = peak(y, x, cfg["surface"]["p_minus_e_window"], cfg, None, None, h, kind="min")
        crossing(res, h, hemi, y, x, ext, direction="up")
    return {"p_minus_e_zero_lat": res}


@register_family("outgoing_longwave", inputs=("rlut",), levels=_olr_levels, sectors=True,
                 metrics=OLR_METRICS)
def compute_olr(fields, cfg):
    s = cfg["surface"]
    res = Result.empty(fields.n, 2)
    olr = fields.masked("rlut", cfg)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        y = olr[:, idx]
        ext = peak(y, x, s["olr_max_window"], cfg, None, None, h)
        frac = s["olr_fraction_of_max"]
        level = frac * ext.value if frac > 0 else np.full(y.shape[0], s["olr_threshold_w_m2"])
        crossing(res, h, hemi, y, x, ext, direction="down", level=level)
    return {"olr_edge_lat": res}
