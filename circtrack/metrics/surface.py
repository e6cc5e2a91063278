"""Surface wind belts and subtropical highs.

References
----------
Kang, S. M. & Polvani, L. M. (2011) J. Climate 24, 563-568 (zero of the surface zonal wind as the
edge between trades and westerlies). Davis & Rosenlof (2012) J. Climate and Waugh et al. (2018)
J. Climate (surface-wind and sea-level-pressure measures of the tropical width).
"""

from __future__ import annotations

import numpy as np

from circtrack.kernels.crossings import first_crossing
from circtrack.metrics.common import HEMISPHERES, hemisphere_view, peak, signed
from circtrack.registry import Metric, Result, register_family

WIND_REF = "Kang & Polvani (2011) J. Climate 24, 563-568; Waugh et al. (2018) J. Climate 31, 7565-7581"
SLP_REF = "Davis & Rosenlof (2012) J. Climate 25, 1061-1078; Waugh et al. (2018) J. Climate 31, 7565-7581"

# uas, or without it (and only when these metrics are asked for with --metrics) ua on the lowest
# pressure level; the sidecar's found_by says which (inputs/dataset.py lowest_level_substitute)
_UAS = ("; [uas] is the zonal-mean near-surface wind, or ua on the lowest pressure level when the file has no uas "
        "and the metric is asked for (the sidecar says which)")
WIND_METRICS = [
    Metric("surface_wind_zero_lat", "Edge between the trade winds and the surface westerlies", "degrees_north",
           "hemisphere", "first zero of [uas] poleward of the tropical easterly minimum (searched in "
           "surface.trades_window, 0-35 deg poleward); linear interpolation" + _UAS, WIND_REF),
    Metric("polar_easterly_edge_lat", "Edge between the surface westerlies and the polar easterlies", "degrees_north",
           "hemisphere", "first zero of [uas] poleward of the surface westerly maximum", WIND_REF),
    Metric("trade_wind_speed", "Strongest tropical easterly", "m s-1", "hemisphere",
           "-min([uas]) in surface.trades_window (3-point parabola vertex); positive for easterlies", WIND_REF),
    Metric("surface_westerly_speed", "Strongest midlatitude surface westerly", "m s-1", "hemisphere",
           "max([uas]) in surface.westerlies_window (3-point parabola vertex)", WIND_REF),
]
SLP_METRICS = [
    Metric("subtropical_high_lat", "Latitude of the subtropical high-pressure belt", "degrees_north", "hemisphere",
           "maximum of [psl] in surface.high_window (10-50 deg poleward), 3-point parabola", SLP_REF),
    Metric("subtropical_high_slp", "Sea-level pressure of the subtropical high-pressure belt", "hPa", "hemisphere",
           "parabola vertex value of [psl] at the subtropical high", SLP_REF),
]


@register_family("surface_winds", inputs=("uas",), levels=lambda cfg: {"uas": None}, sectors=True,
                 metrics=WIND_METRICS)
def compute_winds(fields, cfg):
    s = cfg["surface"]
    n = fields.n
    out = {m.id: Result.empty(n, 2) for m in WIND_METRICS}
    u = fields.masked("uas", cfg)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        y = u[:, idx]
        trade = peak(y, x, s["trades_window"], cfg, None, out["trade_wind_speed"], h, kind="min")
        out["trade_wind_speed"].value[:, h] = -out["trade_wind_speed"].value[:, h]
        zero = first_crossing(y, x, trade.index, direction="up")
        _set(out["surface_wind_zero_lat"], h, hemi, zero, out["trade_wind_speed"].flag[:, h])
        west = peak(y, x, s["westerlies_window"], cfg, None, out["surface_westerly_speed"], h)
        polar = first_crossing(y, x, west.index, direction="down")
        _set(out["polar_easterly_edge_lat"], h, hemi, polar, out["surface_westerly_speed"].flag[:, h])
    return out


def _set(res, h, hemi, pos, parent_flag):
    res.value[:, h] = signed(hemi, pos)
    res.flag[:, h] = np.where(np.isnan(pos), "no_zero_crossing", "ok")
    bad = parent_flag != "ok"
    res.flag[bad, h] = parent_flag[bad]
    res.value[bad, h] = np.nan


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


PE_REF = "Waugh et al. (2018) J. Climate 31, 7565-7581; Davis & Rosenlof (2012) J. Climate 25, 1061-1078"
OLR_REF = "Hu & Fu (2007) Atmos. Chem. Phys. 7, 5229-5236"

PE_METRICS = [
    Metric("p_minus_e_zero_lat", "Poleward edge of the subtropical dry zone (P - E = 0)", "degrees_north",
           "hemisphere", "first zero of [pr - evspsbl] poleward of its subtropical minimum (searched in "
           "surface.p_minus_e_window, 0-45 deg poleward); evaporation is made positive upward when the file "
           "stores it negative (global mean < 0)", PE_REF),
]
OLR_METRICS = [
    Metric("olr_edge_lat", "Tropical edge from outgoing longwave radiation", "degrees_north", "hemisphere",
           "latitude where [rlut] falls below surface.olr_threshold_w_m2 (250 W m-2) poleward of its subtropical "
           "maximum (searched in surface.olr_max_window, 0-40 deg poleward); linear interpolation", OLR_REF),
]


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
        zero = first_crossing(y, x, ext.index, direction="up")
        flag = np.where(ext.at_edge, "extremum_at_window_edge",
                        np.where(ext.valid_fraction < cfg["run"]["min_window_fraction"], "too_little_data", "ok"))
        _set(res, h, hemi, zero, flag)
    return {"p_minus_e_zero_lat": res}


@register_family("outgoing_longwave", inputs=("rlut",), levels=lambda cfg: {"rlut": None}, sectors=True,
                 metrics=OLR_METRICS)
def compute_olr(fields, cfg):
    from circtrack.kernels.crossings import level_crossing

    s = cfg["surface"]
    res = Result.empty(fields.n, 2)
    olr = fields.masked("rlut", cfg)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        y = olr[:, idx]
        ext = peak(y, x, s["olr_max_window"], cfg, None, None, h)
        pos = level_crossing(y, x, ext.index, s["olr_threshold_w_m2"], direction="down")
        flag = np.where(ext.at_edge, "extremum_at_window_edge",
                        np.where(ext.valid_fraction < cfg["run"]["min_window_fraction"], "too_little_data", "ok"))
        _set(res, h, hemi, pos, flag)
    return {"olr_edge_lat": res}
