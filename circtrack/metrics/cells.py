"""Overturning cells from the zonal-mean mass streamfunction.

The column rules (top and balance) are stated once in :mod:`circtrack.kernels.vertical`
(``TOP_RULES``, ``BALANCE_RULES``) and chosen by cells.top and cells.balance; the energy transport's
mass correction follows the same two parameters.

References
----------
Peixoto, J. P. & Oort, A. H. (1992) Physics of Climate, AIP, ch. 7 (mass streamfunction from
pressure-level winds, integrated from the top; no net mass flux in the long-term mean).
Trenberth, K. E. (1991) J. Climate 4, 707-722 (removing the column's net mass flux, the barotropic
correction). Frierson, D. M. W., Lu, J. & Chen, G. (2007) GRL 34, L18804 (Hadley edge at the first
zero of psi500 poleward of its extremum). Davis, S. M. & Rosenlof, K. H. (2012) J. Climate 25,
1061-1078; Waugh, D. W. et al. (2018) J. Climate 31, 7565-7581 (intercomparisons of tropical-width
metrics, psi500 among them).
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import UsageError
from circtrack.kernels.crossings import find_crossing
from circtrack.kernels.extrema import parabola_vertex, window_extremum
from circtrack.kernels.vertical import (BALANCE_RULES, TOP_RULES, at_level, column_net_mass_flux, interpolated,
                                        layer_mean, mass_streamfunction)
from circtrack.metrics.common import HEMISPHERES, add_note, crossing, hemisphere_view, missing, peak, signed
from circtrack.registry import Metric, Result, register_family

PSI_REF = ("Peixoto & Oort (1992) Physics of Climate, ch. 7 (streamfunction); Trenberth (1991) J. Climate 4, "
           "707-722 (net mass flux removed)")
EDGE_REF = ("Frierson, Lu & Chen (2007) GRL 34, L18804 (edge at the first psi500 zero poleward of the extremum); "
            "Davis & Rosenlof (2012) J. Climate; Waugh et al. (2018) J. Climate")
_PSI = ("psi = 2 pi a cos(lat)/g * integral of ([v] - c) dp from the top data level (psi = 0 there, cells.top) to p; "
        "[v] zero-filled below the ground (the mean over valid longitudes times their share); c removes the column's "
        "net mass flux where there is air, so psi = 0 at the bottom too (cells.balance); psi at cells.level_hpa "
        "(500 hPa), or its pressure-weighted mean over cells.psi_layer_hpa when that is given, interpolated linearly "
        "in log-p when a level is absent (note interpolated_level)")
LAYER_REF = ("psi averaged over a layer (e.g. 700-300 hPa) instead of one level: among the streamfunction variants "
             "compared by Davis & Rosenlof (2012) J. Climate 25, 1061-1078 and Waugh et al. (2018) J. Climate 31, "
             "7565-7581 (from memory)")
FRACTION_REF = ("the edge where psi falls to a fraction of its extremum instead of to zero: among the streamfunction "
                "variants compared by Davis & Rosenlof (2012) J. Climate 25, 1061-1078 (from memory)")
_ALT = ("; alternatives: psi averaged (pressure-weighted) over cells.psi_layer_hpa (e.g. [300, 700]; empty: at "
        "cells.level_hpa, the default) [" + LAYER_REF + "]")
_RULES = ("; a crossing is never taken across missing latitudes or onto a pole row, an extremum never on the window "
          "edge, a pole row or next to a missing latitude (NaN with a flag naming which); NaN (too_little_data) when "
          "fewer than run.min_coverage of the longitudes are valid at that level on average")

METRICS = [
    Metric("hadley_edge_lat", "Poleward edge of the Hadley cell", "degrees_north", "hemisphere",
           "first zero of psi500 poleward of the cell's extremum (searched in cells.extremum_window, 0-50 deg "
           "poleward), up to cells.edge_search_limit (70 deg); linear interpolation between grid latitudes; NaN "
           "(weak_cell) when the cell is weaker than cells.weak_cell_kg_s; " + _PSI + _RULES + _ALT +
           "; and the first latitude poleward of the extremum where psi falls to cells.edge_fraction of it (0, the "
           "zero, by default; e.g. 0.25) [" + FRACTION_REF + "]",
           EDGE_REF + "; " + PSI_REF + "; " + LAYER_REF + "; " + FRACTION_REF),
    Metric("hadley_strength", "Hadley cell strength", "kg s-1", "hemisphere",
           "abs(psi500) at the cell's extremum (3-point parabola vertex); " + _PSI + _RULES, PSI_REF),
    Metric("ferrel_edge_lat", "Poleward edge of the Ferrel cell", "degrees_north", "hemisphere",
           "next zero of psi500 poleward of the Hadley cell's zero (where the polar cell begins), up to "
           "cells.ferrel_search_limit (85 deg), whatever the Hadley cell's strength; linear interpolation; NaN "
           "(weak_cell) when the Ferrel cell is weaker than cells.ferrel_weak_cell_kg_s; " + _PSI + _RULES,
           PSI_REF + "; the edge and strength definitions are this project's, by analogy with the Hadley cell"),
    Metric("ferrel_strength", "Ferrel cell strength", "kg s-1", "hemisphere",
           "abs(psi500) at the Ferrel cell's extremum between the Hadley cell's zero and the Ferrel edge "
           "(3-point parabola vertex); " + _PSI + _RULES,
           PSI_REF + "; the strength definition is this project's, by analogy with the Hadley cell"),
    Metric("cell_boundary_lat", "Boundary between the two Hadley cells", "degrees_north", "global",
           "zero of psi500 between the southern cell's minimum and the northern cell's maximum, both "
           "searched in cells.boundary_window (-25 to 25 deg; the minimum south of the maximum); " + _PSI + _RULES,
           PSI_REF + "; the boundary definition is this project's"),
    Metric("column_net_mass_flux", "Largest net mass flux of the column across a latitude circle", "kg s-1",
           "hemisphere",
           "max over the latitudes from the equator to cells.edge_search_limit of abs(2 pi a cos(lat)/g * integral of "
           "[v] dp over the column) before the balance (psi at the lowest level if nothing were removed); the "
           "streamfunction metrics of a hemisphere get the note unbalanced_column when it exceeds "
           "cells.max_imbalance_fraction (0.25) of the Hadley strength; a data-quality diagnostic of this project",
           PSI_REF + "; the diagnostic is this project's"),
]


def column_rules(cfg):
    """``(top, balance)`` from cells.top and cells.balance, refused with one line when unknown.
    The streamfunction and the energy transport's mass correction both follow them."""
    c = cfg["cells"]
    for key, allowed in (("top", TOP_RULES), ("balance", BALANCE_RULES)):
        if c[key] not in allowed:
            raise UsageError(f"cells.{key} = {c[key]!r} in the config: expected one of "
                             + ", ".join(f'"{a}"' for a in allowed))
    return c["top"], c["balance"]


def _levels(cfg):
    column_rules(cfg)
    psi_layer(cfg)
    frac = cfg["cells"]["edge_fraction"]
    if not 0.0 <= frac < 1.0:
        raise UsageError(f"cells.edge_fraction = {frac!r} in the config: expected a number from 0 (the zero of psi) "
                         "up to but not including 1, e.g. 0.25")
    return {"va": None}


def psi_layer(cfg):
    """cells.psi_layer_hpa: None (psi at cells.level_hpa) or ``(low, high)`` hPa; refused with one line
    when it is not two increasing pressures."""
    layer = cfg["cells"]["psi_layer_hpa"]
    if not layer:
        return None
    if len(layer) != 2 or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in layer) \
            or not 0 < layer[0] < layer[1]:
        raise UsageError(f"cells.psi_layer_hpa = {layer!r} in the config: expected [] (psi at cells.level_hpa) or two "
                         "pressures [low, high] in hPa, lower first, e.g. [300.0, 700.0]")
    return float(layer[0]), float(layer[1])


def psi_used(psi, plev, cfg):
    """``(psi (N, J), interpolated, where)``: psi where the metrics look, at cells.level_hpa or the
    layer mean over cells.psi_layer_hpa; whether a level was interpolated; the level or the layer
    (for the coverage there). psi is None when the data do not reach that level or layer."""
    tol = cfg["run"]["level_tolerance_hpa"]
    layer = psi_layer(cfg)
    if layer is None:
        level = cfg["cells"]["level_hpa"]
        return at_level(psi, plev, level, tolerance=tol), interpolated(plev, level, tolerance=tol), level
    return layer_mean(psi, plev, layer, tolerance=tol), any(interpolated(plev, b, tolerance=tol) for b in layer), layer


def streamfunction(fields, cfg=None):
    """psi (N, L, J) in kg s-1 from the zero-filled zonal-mean northward wind under the column rules.

    Below-ground points count as zero wind: ``[v]`` is the sum over valid longitudes divided by
    all longitudes, i.e. ``mean * coverage``; the balance is applied where there is air, in
    proportion to the coverage. ``cfg`` None: the default rules.
    """
    if cfg is None:
        from circtrack.config import defaults
        cfg = defaults()
    top, balance = column_rules(cfg)
    cov = fields.coverage["va"]
    v = np.nan_to_num(fields.mean["va"]) * cov
    return mass_streamfunction(v, np.asarray(fields.plev["va"]) * 100.0, fields.lat, top=top, balance=balance,
                               air=cov)


@register_family("cells", inputs=("va",), levels=_levels, metrics=METRICS)
def compute(fields, cfg):
    c = cfg["cells"]
    n = fields.n
    out = {m.id: Result.empty(n, 1 if m.scope == "global" else 2) for m in METRICS}
    edge, strength, net_r = out["hadley_edge_lat"], out["hadley_strength"], out["column_net_mass_flux"]
    psi = streamfunction(fields, cfg)
    plev = fields.plev["va"]
    tol = cfg["run"]["level_tolerance_hpa"]
    psi_l, was_interpolated, where = psi_used(psi, plev, cfg)
    if psi_l is None:
        missing(out.values(), "level_missing")
        return out
    cov = (at_level(fields.coverage["va"], plev, where, tolerance=tol) if np.ndim(where) == 0
           else layer_mean(fields.coverage["va"], plev, where, tolerance=tol))
    thin = cov.mean(axis=-1) < cfg["run"]["min_coverage"]
    lat = fields.lat
    top, _ = column_rules(cfg)
    net = column_net_mass_flux(np.nan_to_num(fields.mean["va"]) * fields.coverage["va"],
                               np.asarray(plev) * 100.0, lat, top=top)           # (N, J)
    unbalanced = np.zeros((n, 2), bool)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(lat, hemi)
        y = psi_l[:, idx] * (1.0 if hemi == "NH" else -1.0)   # the cell of this hemisphere is positive
        ext = peak(y, x, c["extremum_window"], cfg, None, strength, h)
        strength.value[:, h] = np.abs(strength.value[:, h])
        weak = np.isfinite(strength.value[:, h]) & ~(ext.value >= c["weak_cell_kg_s"])
        strength.flag[weak, h] = "weak_cell"
        zero = crossing(edge, h, hemi, y, x, ext, direction="down", stop=c["edge_search_limit"])
        if c["edge_fraction"] > 0:      # where psi falls to that fraction of its extremum (the Ferrel cell still starts at the zero)
            crossing(edge, h, hemi, y, x, ext, direction="down", stop=c["edge_search_limit"],
                     level=c["edge_fraction"] * ext.value)
        edge.flag[weak & (ext.flag == "ok"), h] = "weak_cell"
        for r in (edge, strength):
            r.flag[thin, h] = "too_little_data"
        edge.value[edge.flag[:, h] != "ok", h] = np.nan
        strength.value[thin, h] = np.nan
        hadley_flag = np.where(thin, "too_little_data", np.where(ext.flag == "ok", zero.reason, ext.flag))
        _ferrel(y, x, np.where(hadley_flag == "ok", zero.position, np.nan), hadley_flag, hemi, h,
                out["ferrel_edge_lat"], out["ferrel_strength"], c)
        inside = x <= c["edge_search_limit"]
        largest = np.nanmax(np.abs(net[:, idx][:, inside]), axis=-1) if inside.any() else np.full(n, np.nan)
        net_r.value[:, h] = np.where(thin, np.nan, largest)
        net_r.flag[:, h] = np.where(thin, "too_little_data", "ok")
        with np.errstate(invalid="ignore", divide="ignore"):
            unbalanced[:, h] = largest > c["max_imbalance_fraction"] * np.abs(ext.value)
        add_note([edge, strength, out["ferrel_edge_lat"], out["ferrel_strength"]], "unbalanced_column",
                 unbalanced[:, h], h)
    _boundary(psi_l, lat, c, cfg, out["cell_boundary_lat"], thin)
    add_note([out["cell_boundary_lat"]], "unbalanced_column", unbalanced.any(axis=1))
    if was_interpolated:
        add_note(out.values(), "interpolated_level")
    return out


def _boundary(psi_l, lat, c, cfg, res, thin):
    """The zero of psi between the southern cell's minimum and the northern cell's maximum."""
    lo, hi = c["boundary_window"]
    frac = cfg["run"]["min_window_fraction"]
    north = window_extremum(psi_l, lat, lo, hi, kind="max")
    # the southern cell's minimum is sought south of the northern cell's maximum
    south_of_max = np.where(lat[None, :] <= north.position[:, None], psi_l, np.nan)
    south = window_extremum(south_of_max, lat, lo, hi, kind="min")
    south.next_to_gap = _missing_neighbour(psi_l, south.index)     # the mask above is no gap in the data
    south.valid_fraction = north.valid_fraction
    ordered = (south.index >= 0) & (north.index > south.index)
    zero = find_crossing(psi_l, lat, np.where(ordered, south.index, -1), stop=north.position, direction="up")
    flag = np.where(ordered, zero.reason, "cells_out_of_order")
    for ext in (south, north):
        reason = ext.reason(frac)
        flag = np.where(reason != "ok", reason, flag)
    flag = np.where(thin, "too_little_data", flag)
    res.flag[:, 0] = flag
    res.value[:, 0] = np.where(flag == "ok", zero.position, np.nan)


def _missing_neighbour(y, index):
    """True where a neighbour of ``y[..., index]`` (inside the array) is missing."""
    n = y.shape[-1]
    take = lambda j: np.take_along_axis(y, np.clip(j, 0, n - 1)[..., None], -1)[..., 0]  # noqa: E731
    has = index >= 0
    left = has & (index > 0) & ~np.isfinite(take(index - 1))
    right = has & (index < n - 1) & ~np.isfinite(take(index + 1))
    return left | right


def _ferrel(y, x, hadley_zero, hadley_flag, hemi, h, edge_r, strength_r, c):
    """Ferrel cell of one hemisphere view (Hadley cell positive, Ferrel cell negative): from the
    Hadley cell's zero (found whatever that cell's strength) to the next zero, by the same crossing
    rule; its strength is the parabola vertex of the minimum between the two zeros."""
    start = np.where(np.isfinite(hadley_zero), np.searchsorted(x, np.nan_to_num(hadley_zero, nan=0.0)), -1)
    zero = find_crossing(y, x, start, stop=c["ferrel_search_limit"], direction="up")
    pos = zero.position
    between = (x[None, :] >= hadley_zero[:, None]) & (x[None, :] <= pos[:, None]) & np.isfinite(y)
    k = np.argmax(np.where(between, -y, -np.inf), axis=-1)
    closed = between.any(axis=-1)
    n = x.size
    km, kp = np.clip(k - 1, 0, n - 1), np.clip(k + 1, 0, n - 1)
    take = lambda j: np.take_along_axis(y, j[..., None], -1)[..., 0]  # noqa: E731
    _, vertex = parabola_vertex(x[km], x[k], x[kp], take(km), take(k), take(kp))
    interior = (k > 0) & (k < n - 1) & np.isfinite(take(km)) & np.isfinite(take(kp))
    low = np.where(interior, vertex, take(k))
    strength = np.where(closed & (low < 0), -low, np.nan)
    flag = np.where(hadley_flag != "ok", hadley_flag, zero.reason)
    flag = np.where((flag == "ok") & ~np.isfinite(strength), "no_sign_change_in_window", flag)
    weak = (flag == "ok") & (strength < c["ferrel_weak_cell_kg_s"])
    edge_r.flag[:, h] = np.where(weak, "weak_cell", flag)
    edge_r.value[:, h] = np.where(edge_r.flag[:, h] == "ok", signed(hemi, pos), np.nan)
    strength_r.flag[:, h] = np.where(weak, "weak_cell", flag)
    strength_r.value[:, h] = np.where((flag == "ok"), strength, np.nan)
