"""Overturning cells from the zonal-mean mass streamfunction.

References
----------
Peixoto, J. P. & Oort, A. H. (1992) Physics of Climate, AIP, ch. 7 (mass streamfunction).
Frierson, D. M. W., Lu, J. & Chen, G. (2007) GRL 34, L18804 (Hadley edge at the psi500 zero).
Davis, S. M. & Rosenlof, K. H. (2012) J. Climate 25, 1061-1078; Waugh, D. W. et al. (2018)
J. Climate 31, 7565-7581 (intercomparison of tropical-width metrics).
"""

from __future__ import annotations

import numpy as np

from circtrack.kernels.crossings import first_crossing
from circtrack.kernels.extrema import window_extremum
from circtrack.kernels.vertical import at_level, mass_streamfunction
from circtrack.metrics.common import HEMISPHERES, hemisphere_view, missing, peak, signed
from circtrack.registry import Metric, Result, register_family

PSI_REF = "Peixoto & Oort (1992) Physics of Climate, ch. 7"
EDGE_REF = "Frierson, Lu & Chen (2007) GRL 34, L18804; Davis & Rosenlof (2012) J. Climate; Waugh et al. (2018) J. Climate"

METRICS = [
    Metric("hadley_edge_lat", "Poleward edge of the Hadley cell", "degrees_north", "hemisphere",
           "first zero of psi at cells.level_hpa (500 hPa) poleward of the cell's extremum; the extremum is "
           "searched in cells.extremum_window (0-50 deg poleward), the zero up to cells.edge_search_limit; "
           "linear interpolation between grid latitudes",
           EDGE_REF),
    Metric("hadley_strength", "Hadley cell strength", "kg s-1", "hemisphere",
           "abs(psi500) at the cell's extremum (3-point parabola vertex), psi = 2 pi a cos(lat)/g * "
           "integral from the top to p of [v] dp", PSI_REF),
    Metric("ferrel_edge_lat", "Poleward edge of the Ferrel cell", "degrees_north", "hemisphere",
           "next zero of psi500 poleward of the Hadley edge (where the polar cell begins), up to "
           "cells.ferrel_search_limit; linear interpolation", PSI_REF),
    Metric("ferrel_strength", "Ferrel cell strength", "kg s-1", "hemisphere",
           "abs(psi500) at the Ferrel cell's extremum between the Hadley edge and the Ferrel edge "
           "(3-point parabola vertex)", PSI_REF),
    Metric("cell_boundary_lat", "Boundary between the two Hadley cells", "degrees_north", "global",
           "zero of psi500 between the southern cell's minimum and the northern cell's maximum, both "
           "searched in cells.boundary_window (the minimum south of the maximum)", PSI_REF),
]


def _levels(cfg):
    return {"va": None}


def streamfunction(fields):
    """psi (N, L, J) in kg s-1 from the zero-filled zonal-mean northward wind.

    Below-ground points count as zero wind: ``[v]`` is the sum over valid longitudes divided by
    all longitudes, i.e. ``mean * coverage``.
    """
    v = np.nan_to_num(fields.mean["va"]) * fields.coverage["va"]
    return mass_streamfunction(v, np.asarray(fields.plev["va"]) * 100.0, fields.lat)


@register_family("cells", inputs=("va",), levels=_levels, metrics=METRICS)
def compute(fields, cfg):
    c = cfg["cells"]
    n = fields.n
    edge, strength = Result.empty(n, 2), Result.empty(n, 2)
    boundary = Result.empty(n, 1)
    ferrel_edge, ferrel_strength = Result.empty(n, 2), Result.empty(n, 2)
    out = {"hadley_edge_lat": edge, "hadley_strength": strength, "cell_boundary_lat": boundary,
           "ferrel_edge_lat": ferrel_edge, "ferrel_strength": ferrel_strength}
    psi = streamfunction(fields)
    plev = fields.plev["va"]
    psi_l = at_level(psi, plev, c["level_hpa"], tolerance=cfg["run"]["level_tolerance_hpa"])
    if psi_l is None:
        missing(out.values(), "level_missing")
        return out
    cov = at_level(fields.coverage["va"], plev, c["level_hpa"], tolerance=cfg["run"]["level_tolerance_hpa"])
    thin = cov.mean(axis=-1) < cfg["run"]["min_coverage"]
    lat = fields.lat
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(lat, hemi)
        y = psi_l[:, idx] * (1.0 if hemi == "NH" else -1.0)   # the cell of this hemisphere is positive
        ext = peak(y, x, c["extremum_window"], cfg, None, strength, h)
        strength.value[:, h] = np.abs(strength.value[:, h])
        weak = np.isfinite(strength.value[:, h]) & ~(ext.value >= c["weak_cell_kg_s"])
        strength.flag[weak, h] = "weak_cell"
        pos = first_crossing(y, x, ext.index, stop=c["edge_search_limit"], direction="down")
        edge.value[:, h] = signed(hemi, pos)
        edge.flag[:, h] = np.where(np.isnan(pos), "no_zero_crossing", "ok")
        edge.flag[weak, h] = "weak_cell"
        bad = strength.flag[:, h] != "ok"
        edge.flag[bad, h] = strength.flag[bad, h]
        for r in (edge, strength):
            r.flag[thin, h] = "too_little_data"
        edge.value[(edge.flag[:, h] != "ok"), h] = np.nan
        strength.value[thin, h] = np.nan
        _ferrel(y, x, np.abs(edge.value[:, h]), edge.flag[:, h], hemi, h, ferrel_edge, ferrel_strength, c)

    lo, hi = c["boundary_window"]
    north = window_extremum(psi_l, lat, lo, hi, kind="max")
    # the southern cell's minimum is sought south of the northern cell's maximum
    south_of_max = np.where(lat[None, :] <= north.position[:, None], psi_l, np.nan)
    south = window_extremum(south_of_max, lat, lo, hi, kind="min")
    ordered = (south.index >= 0) & (north.index > south.index)
    pos = first_crossing(psi_l, lat, np.where(ordered, south.index, -1), direction="up")
    pos = np.where(pos <= north.position, pos, np.nan)
    boundary.value[:, 0] = pos
    boundary.flag[:, 0] = np.where(ordered, np.where(np.isnan(pos), "no_zero_crossing", "ok"), "cells_out_of_order")
    boundary.flag[thin, 0] = "too_little_data"
    boundary.value[thin, 0] = np.nan
    return out


def _ferrel(y, x, hadley_edge, hadley_flag, hemi, h, edge_r, strength_r, c):
    """Ferrel cell of one hemisphere view (Hadley cell positive, Ferrel cell negative)."""
    start = np.where(np.isfinite(hadley_edge), np.searchsorted(x, np.nan_to_num(hadley_edge, nan=0.0)), -1)
    pos = first_crossing(y, x, start, stop=c["ferrel_search_limit"], direction="up")
    between = (x[None, :] >= hadley_edge[:, None]) & (x[None, :] <= pos[:, None])
    ext = window_extremum(np.where(between, y, np.nan), x, 0.0, 90.0, kind="min")
    edge_r.value[:, h] = signed(hemi, pos)
    edge_r.flag[:, h] = np.where(np.isnan(pos), "no_zero_crossing", "ok")
    strength_r.value[:, h] = np.where(np.isfinite(pos) & (ext.value < 0), np.abs(ext.value), np.nan)
    strength_r.flag[:, h] = np.where(np.isnan(strength_r.value[:, h]), "no_zero_crossing", "ok")
    bad = hadley_flag != "ok"
    for r in (edge_r, strength_r):
        r.flag[bad, h] = hadley_flag[bad]
        r.value[bad, h] = np.nan
