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

WIND_METRICS = [
    Metric("surface_wind_zero_lat", "Edge between the trade winds and the surface westerlies", "degrees_north",
           "hemisphere", "first zero of [uas] poleward of the tropical easterly minimum (searched in "
           "surface.trades_window, 0-35 deg poleward); linear interpolation", WIND_REF),
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
