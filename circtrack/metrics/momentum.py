"""Angular momentum of the Hadley cell's upper branch: the local Rossby number.

References
----------
Walker, C. C. & Schneider, T. (2006) J. Atmos. Sci. 63, 3333-3350 (local Rossby number
Ro = -[zeta]/f of the Hadley cell's upper branch). Held, I. M. & Hou, A. Y. (1980) J. Atmos. Sci. 37,
515-533 (angular-momentum-conserving wind u_M = Omega a sin^2(lat)/cos(lat), for which Ro = 1).
"""

from __future__ import annotations

import numpy as np

from circtrack.constants import EARTH_RADIUS, OMEGA
from circtrack.metrics import cells
from circtrack.metrics.common import HEMISPHERES, is_ok
from circtrack.registry import Metric, Result, register_family

METRICS = [
    Metric("hadley_rossby_number", "Local Rossby number of the Hadley cell's upper branch", "1", "hemisphere",
           "-[zeta]/f with [zeta] = -1/(a cos(lat)) d([u] cos(lat))/d(lat), f = 2 Omega sin(lat), cos-weighted mean over "
           "levels in momentum.upper_branch_hpa (150-300 hPa) and latitudes from momentum.min_lat (5 deg) to the "
           "Hadley edge (hadley_edge_lat, grid bands counted with the share inside; NaN with the edge's flag when the "
           "edge is NaN, with the edge's notes when it has some); [u] points with fewer than run.min_coverage of the longitudes valid are left out; 1 for "
           "angular-momentum-conserving flow, 0 for flow with no relative vorticity",
           "Walker & Schneider (2006) J. Atmos. Sci. 63, 3333-3350 (local Rossby number Ro = -[zeta]/f); Held & Hou "
           "(1980) J. Atmos. Sci. 37, 515-533 (u_M); the average over the upper branch is this project's"),
]


def angular_momentum_wind(lat):
    """``u_M = Omega a sin^2(lat) / cos(lat)`` (m s-1): zonal wind of a ring at rest at the equator that
    conserves its angular momentum while moving to ``lat`` (Held & Hou 1980)."""
    phi = np.deg2rad(np.asarray(lat, float))
    return OMEGA * EARTH_RADIUS * np.sin(phi) ** 2 / np.cos(phi)


def local_rossby_number(u, lat):
    """``Ro = -zeta / f`` of zonal-mean wind ``u (..., J)``; NaN within 1 degree of the equator."""
    phi = np.deg2rad(np.asarray(lat, float))
    with np.errstate(invalid="ignore", divide="ignore"):
        zeta = -np.gradient(u * np.cos(phi), phi, axis=-1) / (EARTH_RADIUS * np.cos(phi))
        f = 2 * OMEGA * np.sin(phi)
        ro = -zeta / f
    return np.where(np.abs(np.asarray(lat)) > 1.0, ro, np.nan)


@register_family("angular_momentum", inputs=("ua", "va"), levels=lambda cfg: {"ua": None, "va": None},
                 metrics=METRICS)
def compute(fields, cfg):
    m = cfg["momentum"]
    res = Result.empty(fields.n, 2)
    edges = cells.compute(fields, cfg)["hadley_edge_lat"]
    plev = np.asarray(fields.plev["ua"])
    sel = (plev >= m["upper_branch_hpa"][0]) & (plev <= m["upper_branch_hpa"][1])
    if not sel.any():
        res.value[:] = np.nan
        res.flag[:] = "level_missing"
        return {"hadley_rossby_number": res}
    lat = fields.lat
    u = fields.masked("ua", cfg)[:, sel, :]                      # (N, L', J)
    ro = local_rossby_number(u, lat)
    w = np.cos(np.deg2rad(lat))
    # each latitude stands for the band between the midpoints to its neighbours; a band counts
    # with the share of it that lies between min_lat and the edge, so the mean changes smoothly
    # as the edge moves across a grid latitude
    mid = (lat[1:] + lat[:-1]) / 2.0
    lo = np.concatenate([[lat[0] - (mid[0] - lat[0])], mid])
    hi = np.concatenate([mid, [lat[-1] + (lat[-1] - mid[-1])]])
    for h, hemi in enumerate(HEMISPHERES):
        edge = np.abs(edges.value[:, h])
        a, b = (np.abs(lo), np.abs(hi)) if hemi == "NH" else (np.abs(hi), np.abs(lo))
        a = np.where((lat > 0) if hemi == "NH" else (lat < 0), a, np.inf)     # the other hemisphere: none
        with np.errstate(invalid="ignore"):
            share = (np.minimum(b[None, :], edge[:, None]) - np.maximum(a[None, :], m["min_lat"])) / (b - a)[None, :]
        share = np.clip(np.nan_to_num(share), 0.0, 1.0)
        wt = (share * w[None, :])[:, None, :] * np.isfinite(ro)
        with np.errstate(invalid="ignore", divide="ignore"):
            val = np.nansum(np.nan_to_num(ro) * wt, axis=(1, 2)) / wt.sum(axis=(1, 2))
        res.value[:, h] = val
        res.flag[:, h] = np.where(np.isfinite(val), "ok", "too_little_data")
        bad = ~is_ok(edges.flag[:, h])
        res.flag[bad, h] = edges.flag[bad, h]
        res.value[bad, h] = np.nan
        # the edge's notes (e.g. unbalanced_column) hold for a number averaged up to it
        noted = ~bad & (res.flag[:, h] == "ok") & np.array([";" in str(f) for f in edges.flag[:, h]], dtype=bool)
        res.flag[noted, h] = edges.flag[noted, h]
    return {"hadley_rossby_number": res}
