"""The lapse-rate tropopause of the zonal-mean temperature.

References
----------
WMO (1957) Meteorology - A three-dimensional science: second session of the Commission for
Aerology, WMO Bulletin 4, 134-138 (the 2 K/km lapse-rate definition).
Birner, T. (2010) JGR 115, D23109; Seidel, D. J. & Randel, W. J. (2007) JGR 112, D20113
(the subtropical tropopause break as a tropical-width measure).
"""

from __future__ import annotations

import numpy as np

from circtrack.kernels.crossings import find_crossing
from circtrack.kernels.vertical import lapse_rate_tropopause
from circtrack.metrics.common import HEMISPHERES, hemisphere_view, method_choice, peak, signed
from circtrack.registry import Metric, Result, register_family

WMO_REF = "WMO (1957) WMO Bulletin 4, 134-138"
BREAK_REF = ("Birner (2010) JGR 115, D23109; Seidel & Randel (2007) JGR 112, D20113 (the subtropical tropopause break "
             "as a tropical-width measure; the steepest-slope definition on the zonal mean is this project's)")
THRESHOLD_REF = ("Seidel & Randel (2007) JGR 112, D20113 (tropopause heights above 15 km as tropical, from memory); "
                 "the first crossing of the zonal-mean height is this project's reading of it")
BREAK_METHODS = ("steepest_slope", "height_threshold")
_WMO = ("WMO lapse-rate tropopause of [T] at each latitude: the lowest level between tropopause.search_hpa "
        "(75-550 hPa) where the lapse rate falls to tropopause.threshold_k_per_km (2 K/km), provided the mean lapse "
        "rate from it to every level within tropopause.depth_m (2 km) above, and to the level 2 km above, stays at or "
        "below 2 K/km; mean lapse rate = temperature difference over height difference (heights from the "
        "hypsometric equation, each layer weighted by its thickness); layer lapse rates on layer mid-heights, "
        "the crossing interpolated linearly in height, its pressure in log-p; NaN (data_end_within_2km) when the "
        "data's levels end less than 2 km above the candidate; [T] points with fewer than run.min_coverage of the "
        "longitudes valid are missing")

METRICS = [
    Metric("tropical_tropopause_pressure", "Tropical tropopause pressure", "hPa", "global",
           "cos(lat)-weighted mean over |lat| <= tropopause.tropical_band (10 deg) of the " + _WMO + "; at least "
           "run.min_window_fraction of the band's latitudes must have a tropopause (too_little_data)",
           WMO_REF + " (the definition); the tropical mean is this project's"),
    Metric("tropopause_break_lat", "Latitude of the subtropical tropopause break", "degrees_north", "hemisphere",
           "latitude of the steepest poleward decrease of the lapse-rate tropopause height of [T] in "
           "tropopause.break_window (15-50 deg poleward); centred differences, 3-point parabola; an extremum is never "
           "taken on the window edge, a pole row or next to a latitude without a tropopause; alternative "
           "(tropopause.break_method = \"height_threshold\"; default \"steepest_slope\"): the first latitude in the "
           "window, going poleward, where the tropopause height (above the lowest data level) falls below "
           "tropopause.break_height_m (15 km), linear interpolation [" + THRESHOLD_REF + "]; tropopause: " + _WMO,
           BREAK_REF + "; " + THRESHOLD_REF),
]


def break_method(cfg):
    """tropopause.break_method, refused with one line when unknown."""
    return method_choice(cfg, "tropopause", "break_method", BREAK_METHODS)


def _levels(cfg):
    break_method(cfg)
    return {"ta": None}


def height_threshold_break(z, x, window, height):
    """Poleward latitude where the tropopause height ``z (N, J)`` first falls below ``height``, going
    poleward from ``window[0]`` up to ``window[1]``; returns the :class:`Crossing` (NaN with its reason
    when there is none, e.g. already below at the window's start)."""
    start = int(np.searchsorted(x, window[0]))
    start = start if start < x.size else -1
    return find_crossing(np.asarray(z, float) - height, x, start, stop=window[1], direction="down")


@register_family("tropopause", inputs=("ta",), levels=_levels, metrics=METRICS)
def compute(fields, cfg):
    c = cfg["tropopause"]
    n = fields.n
    out = {"tropical_tropopause_pressure": Result.empty(n, 1), "tropopause_break_lat": Result.empty(n, 2)}
    t = np.moveaxis(fields.masked("ta", cfg), -2, -1)            # (N, J, L)
    p_trop, z_trop, why = lapse_rate_tropopause(t, fields.plev["ta"], threshold=c["threshold_k_per_km"],
                                           depth=c["depth_m"], p_bottom=c["search_hpa"][1],
                                           p_top=c["search_hpa"][0])
    lat = fields.lat
    band = np.abs(lat) <= c["tropical_band"]
    w = np.where(band, np.cos(np.deg2rad(lat)), 0.0)
    good = np.isfinite(p_trop) & band
    share = good.sum(axis=-1) / max(band.sum(), 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nansum(np.where(good, p_trop * w, 0.0), axis=-1) / np.sum(np.where(good, w, 0.0), axis=-1)
    r = out["tropical_tropopause_pressure"]
    enough = share >= cfg["run"]["min_window_fraction"]
    short = ((why == "data_end_within_2km") & band).any(axis=-1)     # the data stop too low to decide
    r.value[:, 0] = np.where(enough & ~short, mean, np.nan)
    r.flag[:, 0] = np.where(short, "data_end_within_2km", np.where(enough, "ok", "too_little_data"))
    brk = out["tropopause_break_lat"]
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(lat, hemi)
        z = z_trop[:, idx]
        if break_method(cfg) == "height_threshold":
            cr = height_threshold_break(z, x, c["break_window"], c["break_height_m"])
            brk.value[:, h], brk.flag[:, h] = cr.position, cr.reason
        else:
            slope = np.gradient(z, x, axis=-1) if x.size > 2 else np.full_like(z, np.nan)
            peak(-slope, x, c["break_window"], cfg, brk, None, h)
        brk.value[:, h] = signed(hemi, brk.value[:, h])
        inwin = (x >= c["break_window"][0]) & (x <= c["break_window"][1])
        short = (why[:, idx][:, inwin] == "data_end_within_2km").any(axis=-1)
        brk.value[short, h] = np.nan
        brk.flag[short, h] = "data_end_within_2km"
    return out
