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

from circtrack.kernels.crossings import find_level_crossing, reverse
from circtrack.kernels.extrema import interp_at
from circtrack.kernels.vertical import at_level
from circtrack.metrics.common import HEMISPHERES, add_note, hemisphere_view, method_choice, missing, peak, signed
from circtrack.registry import Metric, Result, register_family

SHEAR_REF = ("Davis & Rosenlof (2012) J. Climate 25, 1061-1078 and Waugh et al. (2018) J. Climate 31, 7565-7581 "
             "(the subtropical jet from the maximum of the upper- minus lower-level wind)")
EDDY_REF = "Barnes & Polvani (2013) J. Climate 26, 7117-7135 (latitude and speed of the [u]850 maximum)"
UPPER_REF = ("the subtropical jet from the maximum of the upper-level [u] itself (no shear): among the jet measures "
             "compared by Davis & Rosenlof (2012) J. Climate 25, 1061-1078 and Waugh et al. (2018) J. Climate 31, "
             "7565-7581 (from memory)")
SUBTROPICAL_METHODS = ("shear", "upper_wind")
OURS = "; this project's companion diagnostic, not defined in the paper"
_RULES = ("; points with fewer than run.min_coverage of the longitudes valid are missing; levels absent from the data "
          "are interpolated linearly in log-p (note interpolated_level); an extremum is never taken on the window "
          "edge, a pole row or next to a missing latitude, a crossing never across missing latitudes (NaN with a flag "
          "naming which); a window needs run.min_window_fraction valid points")

METRICS = [
    Metric("subtropical_jet_lat", "Subtropical jet latitude", "degrees_north", "hemisphere",
           "maximum of [u]200 - [u]850 in jets.subtropical_window (10-60 deg poleward), 3-point parabola" + _RULES +
           "; alternative (jets.subtropical_method = \"upper_wind\"; default \"shear\"): the maximum of [u]200 itself "
           "[" + UPPER_REF + "]", SHEAR_REF + "; " + UPPER_REF),
    Metric("subtropical_jet_speed", "Subtropical jet speed", "m s-1", "hemisphere",
           "[u]200 at the subtropical jet latitude (linear interpolation)" + _RULES, SHEAR_REF + OURS),
    Metric("eddy_jet_lat", "Eddy-driven jet latitude", "degrees_north", "hemisphere",
           "maximum of [u]850 in jets.eddy_window (15-70 deg poleward), 3-point parabola; with jets.eddy_lowpass_days > 0 "
           "of the low-pass filtered wind" + _RULES, EDDY_REF),
    Metric("eddy_jet_speed", "Eddy-driven jet speed", "m s-1", "hemisphere",
           "parabola vertex value of [u]850 at the eddy-driven jet" + _RULES, EDDY_REF),
    Metric("eddy_jet_width", "Eddy-driven jet width", "degrees", "hemisphere",
           "distance between the latitudes on either side of the eddy-driven jet where [u]850 falls to "
           "half its maximum (linear interpolation; NaN, no_half_max, when it does not on one side)" + _RULES,
           EDDY_REF + OURS),
]


def subtropical_method(cfg):
    """jets.subtropical_method, refused with one line when unknown."""
    return method_choice(cfg, "jets", "subtropical_method", SUBTROPICAL_METHODS)


def _levels(cfg):
    j = cfg["jets"]
    subtropical_method(cfg)
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
        shear = subtropical_method(cfg) == "shear"
        ext = peak(u_up - lower[:, idx] if shear else u_up, x, j["subtropical_window"], cfg, stj_lat, None, h)
        stj_speed.value[:, h] = interp_at(u_up, x, stj_lat.value[:, h])
        stj_speed.flag[:, h] = stj_lat.flag[:, h]
        stj_lat.value[:, h] = signed(hemi, stj_lat.value[:, h])

        lat_r, speed_r, width_r = out["eddy_jet_lat"], out["eddy_jet_speed"], out["eddy_jet_width"]
        ext = peak(u_lo, x, j["eddy_window"], cfg, lat_r, speed_r, h)
        half = ext.value / 2.0
        start = np.where(ext.flag == "ok", ext.index, -1)
        poleward = find_level_crossing(u_lo, x, start, half, direction="down")
        ry, rx, ridx = reverse(u_lo, x, start)
        equatorward = find_level_crossing(ry, rx, ridx, half, direction="down")
        width = poleward.position + equatorward.position     # the mirrored grid's positions are negated
        width_r.value[:, h] = width
        why = np.where(poleward.reason != "ok", poleward.reason, equatorward.reason)
        width_r.flag[:, h] = np.where(why == "no_sign_change_in_window", "no_half_max", why)
        width_r.value[why != "ok", h] = np.nan
        notok = lat_r.flag[:, h] != "ok"
        width_r.flag[notok, h] = lat_r.flag[notok, h]
        width_r.value[notok, h] = np.nan
        lat_r.value[:, h] = signed(hemi, lat_r.value[:, h])
        for r in (lat_r, speed_r, width_r):
            r.value[no_window, h] = np.nan
            r.flag[no_window, h] = "lowpass_window_incomplete"
    for level, ids in ((j["upper_level_hpa"], ("subtropical_jet_lat", "subtropical_jet_speed")),
                       (j["lower_level_hpa"], [m.id for m in METRICS])):
        if fields.interpolated("ua", level, cfg):
            add_note([out[i] for i in ids], "interpolated_level")
    return out


BAROCLINIC_METRICS = [
    Metric("baroclinic_zone_lat", "Latitude of the strongest lower-tropospheric temperature gradient",
           "degrees_north", "hemisphere",
           "maximum of |d[T]/dlat| at jets.baroclinic_level_hpa (850 hPa) in jets.baroclinic_window (20-70 deg "
           "poleward), centred differences, 3-point parabola (a polar-front proxy)" + _RULES,
           "this project's proxy for the baroclinic zone, not an index from the cited book; Peixoto & Oort (1992) Physics "
           "of Climate, ch. 7 (meridional temperature gradient and baroclinicity)"),
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
    if fields.interpolated("ta", j["baroclinic_level_hpa"], cfg):
        add_note([res], "interpolated_level")
    return {"baroclinic_zone_lat": res}
