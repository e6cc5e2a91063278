"""Jet streams from the zonal-mean zonal wind.

References
----------
Barnes, E. A. & Polvani, L. M. (2013) J. Climate 26, 7117-7135 (lower-tropospheric jet latitude
from the [u]850 maximum with quadratic refinement). The subtropical jet as the maximum of the
200-850 hPa shear follows the intercomparisons of Davis & Rosenlof (2012) J. Climate and
Waugh et al. (2018) J. Climate.
"""

from __future__ import annotations

import numpy as np

from circtrack.kernels.crossings import level_crossing, reverse
from circtrack.kernels.extrema import interp_at
from circtrack.kernels.vertical import at_level
from circtrack.metrics.common import HEMISPHERES, hemisphere_view, missing, peak, signed
from circtrack.registry import Metric, Result, register_family

SHEAR_REF = "Davis & Rosenlof (2012) J. Climate 25, 1061-1078; Waugh et al. (2018) J. Climate 31, 7565-7581"
EDDY_REF = "Barnes & Polvani (2013) J. Climate 26, 7117-7135"

METRICS = [
    Metric("subtropical_jet_lat", "Subtropical jet latitude", "degrees_north", "hemisphere",
           "maximum of [u]200 - [u]850 in jets.subtropical_window (10-60 deg poleward), 3-point parabola", SHEAR_REF),
    Metric("subtropical_jet_speed", "Subtropical jet speed", "m s-1", "hemisphere",
           "[u]200 at the subtropical jet latitude (linear interpolation)", SHEAR_REF),
    Metric("eddy_jet_lat", "Eddy-driven jet latitude", "degrees_north", "hemisphere",
           "maximum of [u]850 in jets.eddy_window (15-70 deg poleward), 3-point parabola", EDDY_REF),
    Metric("eddy_jet_speed", "Eddy-driven jet speed", "m s-1", "hemisphere",
           "parabola vertex value of [u]850 at the eddy-driven jet", EDDY_REF),
    Metric("eddy_jet_width", "Eddy-driven jet width", "degrees", "hemisphere",
           "distance between the latitudes on either side of the eddy-driven jet where [u]850 falls to "
           "half its maximum (linear interpolation)", EDDY_REF),
]


def _levels(cfg):
    j = cfg["jets"]
    return {"ua": sorted({float(j["upper_level_hpa"]), float(j["lower_level_hpa"])})}


@register_family("jets", inputs=("ua",), levels=_levels, sectors=True, metrics=METRICS)
def compute(fields, cfg):
    j = cfg["jets"]
    n = fields.n
    out = {m.id: Result.empty(n, 2) for m in METRICS}
    upper = fields.level("ua", j["upper_level_hpa"], cfg)
    lower = fields.level("ua", j["lower_level_hpa"], cfg)
    if upper is None or lower is None:
        missing(out.values(), "level_missing")
        return out
    # the eddy-driven jet from low-pass filtered wind when jets.eddy_lowpass_days > 0 (the engine
    # filters across chunk and file boundaries; samples without a full window are NaN)
    low = fields.info.get("lowpass", {}).get("ua")
    eddy_wind, no_window = lower, np.zeros(n, dtype=bool)
    if low is not None:
        cov = fields.coverage["ua"] >= cfg["run"]["min_coverage"]
        eddy_wind = at_level(np.where(cov, low, np.nan), fields.plev["ua"], j["lower_level_hpa"],
                             tolerance=cfg["run"]["level_tolerance_hpa"])
        no_window = ~np.isfinite(eddy_wind).any(axis=-1)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        u_up, u_lo = upper[:, idx], eddy_wind[:, idx]

        stj_lat, stj_speed = out["subtropical_jet_lat"], out["subtropical_jet_speed"]
        ext = peak(u_up - lower[:, idx], x, j["subtropical_window"], cfg, stj_lat, None, h)
        stj_speed.value[:, h] = interp_at(u_up, x, stj_lat.value[:, h])
        stj_speed.flag[:, h] = stj_lat.flag[:, h]
        stj_lat.value[:, h] = signed(hemi, stj_lat.value[:, h])

        lat_r, speed_r, width_r = out["eddy_jet_lat"], out["eddy_jet_speed"], out["eddy_jet_width"]
        ext = peak(u_lo, x, j["eddy_window"], cfg, lat_r, speed_r, h)
        half = ext.value / 2.0
        poleward = level_crossing(u_lo, x, ext.index, half, direction="down")
        ry, rx, ridx = reverse(u_lo, x, ext.index)
        equatorward = -level_crossing(ry, rx, ridx, half, direction="down")
        width = poleward - equatorward
        width_r.value[:, h] = width
        width_r.flag[:, h] = np.where(np.isnan(width), "no_half_max", "ok")
        notok = lat_r.flag[:, h] != "ok"
        width_r.flag[notok, h] = lat_r.flag[notok, h]
        width_r.value[notok, h] = np.nan
        lat_r.value[:, h] = signed(hemi, lat_r.value[:, h])
        for r in (lat_r, speed_r, width_r):
            r.value[no_window, h] = np.nan
            r.flag[no_window, h] = "lowpass_window_incomplete"
    return out


BAROCLINIC_METRICS = [
    Metric("baroclinic_zone_lat", "Latitude of the strongest lower-tropospheric temperature gradient",
           "degrees_north", "hemisphere",
           "maximum of |d[T]/dlat| at jets.baroclinic_level_hpa (850 hPa) in jets.baroclinic_window (20-70 deg "
           "poleward), centred differences, 3-point parabola (a polar-front proxy)",
           "Peixoto & Oort (1992) Physics of Climate, ch. 7 (meridional temperature gradient and baroclinicity)"),
]


@register_family("baroclinic_zone", inputs=("ta",), levels=lambda cfg: {"ta": [float(cfg["jets"]["baroclinic_level_hpa"])]},
                 sectors=True, metrics=BAROCLINIC_METRICS)
def compute_baroclinic(fields, cfg):
    j = cfg["jets"]
    res = Result.empty(fields.n, 2)
    t = fields.level("ta", j["baroclinic_level_hpa"], cfg)
    if t is None:
        missing([res], "level_missing")
        return {"baroclinic_zone_lat": res}
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        grad = np.abs(np.gradient(t[:, idx], x, axis=-1))
        peak(grad, x, j["baroclinic_window"], cfg, res, None, h)
        res.value[:, h] = signed(hemi, res.value[:, h])
    return {"baroclinic_zone_lat": res}
