"""Transports by the atmosphere: the eddy momentum flux and the poleward moist-static-energy transport.

Both need products of two fields averaged over longitude, so each family declares a reducer that
runs inside the read task on the full fields (``registry.Family.reducers``).

From monthly (or any time-mean) input the products contain only the time-mean flow: the mean
meridional circulation and the stationary eddies; the transient eddies, which carry most of the
midlatitude momentum and energy flux, are averaged away. Such rows keep their value and carry the
flag ``time_mean_input``.

References
----------
Peixoto, J. P. & Oort, A. H. (1992) Physics of Climate, AIP, ch. 11 (eddy momentum flux [u'v'])
and ch. 13 (energy transport). Trenberth, K. E. (1991) J. Climate 4, 707-722 (barotropic mass
correction of atmospheric energy transports); Trenberth, K. E. & Caron, J. M. (2001) J. Climate 14,
3433-3443 (estimates of the poleward atmospheric transport).
"""

from __future__ import annotations

import numpy as np

from circtrack.constants import EARTH_RADIUS, GRAVITY, HPA, PETAWATT
from circtrack.kernels import zonal as Z
from circtrack.kernels.vertical import interpolated, layer_weights
from circtrack.metrics.cells import column_rules
from circtrack.metrics.common import HEMISPHERES, add_note, hemisphere_view, missing, peak, signed
from circtrack.registry import Metric, Result, register_family

MOMENTUM_REF = "Peixoto & Oort (1992) Physics of Climate, ch. 11 (eddy momentum flux [u'v'] = [uv] - [u][v])"
ENERGY_REF = ("Trenberth (1991) J. Climate 4, 707-722 (the barotropic mass correction); Trenberth & Caron (2001) "
              "J. Climate 14, 3433-3443 (the atmosphere's poleward transport, peaking near 5 PW); Peixoto & Oort (1992) "
              "Physics of Climate, ch. 13 (moist static energy transport); its peak and latitude as indices are this "
              "project's")

MOMENTUM_METRICS = [
    Metric("eddy_momentum_flux_lat", "Latitude of the strongest poleward eddy momentum flux", "degrees_north",
           "hemisphere",
           "maximum of the poleward eddy momentum flux [u'v'] = [uv] - [u][v] (zonal covariance of the instantaneous "
           "winds; northward positive, so the SH uses -[u'v']) at eddies.momentum_level_hpa (250 hPa) in "
           "eddies.momentum_window (15-60 deg poleward), 3-point parabola (NaN, flag weak_peak, when the peak is below "
           "eddies.min_momentum_flux_m2_s2); transient plus stationary eddies from "
           "sub-daily or daily input, stationary only from time means (flag time_mean_input); u and v interpolated "
           "linearly in log-p when 250 hPa is absent (note interpolated_level); latitudes where fewer than "
           "run.min_coverage of the longitudes have both winds are missing; an extremum is never taken on the window "
           "edge, a pole row or next to a missing latitude", MOMENTUM_REF + "; the latitude index is this project's"),
    Metric("eddy_momentum_flux_max", "Strongest poleward eddy momentum flux", "m2 s-2", "hemisphere",
           "parabola vertex value of the poleward [u'v'] at eddy_momentum_flux_lat (positive poleward in both "
           "hemispheres); same rules as eddy_momentum_flux_lat", MOMENTUM_REF + "; the index is this project's"),
]
ENERGY_METRICS = [
    Metric("energy_transport_max", "Peak poleward atmospheric energy transport", "PW", "hemisphere",
           "maximum over energy.window (10-80 deg poleward) of the poleward moist-static-energy transport "
           "F = 2 pi a cos(lat)/g (integral [v E] dp - M_net E_mean), E = cp T + g z + L q, with the barotropic mass "
           "correction: M_net = integral [v] dp is the net column mass flux across the latitude circle and E_mean "
           "the mass-weighted mean of E over the section (no net mass crosses the latitude); the same column rules as "
           "the streamfunction: integral from the top data level (cells.top) to the lowest level, the correction "
           "only where there is air, none with cells.balance = \"none\"; trapezoid layer weights on the levels all "
           "four variables share; below-ground points (missing v, T or z) left out; specific humidity missing above "
           "the ground counted as 0 (common practice; note humidity_filled_aloft); latitudes where fewer than "
           "run.min_coverage of the longitudes have data are missing; NaN (too_little_data) on grids that do not go "
           "round the circle; 3-point parabola (its latitude NaN, flag weak_peak, below energy.min_transport_pw); an "
           "extremum is never taken on the window edge, a pole row or next to a missing latitude; time-mean input "
           "gives the mean-circulation and stationary-eddy part only (flag time_mean_input)", ENERGY_REF),
    Metric("energy_transport_max_lat", "Latitude of the peak poleward atmospheric energy transport", "degrees_north",
           "hemisphere", "latitude of energy_transport_max (3-point parabola)", ENERGY_REF),
]


def time_mean_flag(fields, cfg):
    """``"ok"``, ``"time_mean_input"`` (time step longer than eddies.max_time_step_days) or
    ``"time_step_unknown"`` (a single time step) for the eddy-dependent metrics."""
    step = fields.info.get("time_step_days", float("nan"))
    if step is None or not np.isfinite(step):
        return "time_step_unknown"
    return "time_mean_input" if step > cfg["eddies"]["max_time_step_days"] else "ok"


def _apply_time_flag(results, flag):
    if flag == "ok":
        return
    for r in results:
        r.flag[r.flag == "ok"] = flag


def _weak_peak(lat_res, val_res, h, threshold, y, x, window):
    """A poleward peak weaker than ``threshold`` has no meaningful latitude: NaN, flag weak_peak; the
    peak value is kept (the largest grid value in the window), with the same flag. Rows already
    flagged too_little_data keep that flag."""
    inwin = (x >= window[0]) & (x <= window[1])
    with np.errstate(invalid="ignore"):
        part = np.where(np.isfinite(y[:, inwin]), y[:, inwin], -np.inf)
        top = part.max(axis=1) if part.shape[1] else np.full(y.shape[0], -np.inf)
        weak = np.isfinite(top) & (top < threshold) & (val_res.flag[:, h] != "too_little_data")
    lat_res.value[weak, h] = np.nan
    lat_res.flag[weak, h] = "weak_peak"
    val_res.value[weak, h] = top[weak]
    val_res.flag[weak, h] = "weak_peak"


def _common_levels(plev, roles):
    """Levels (hPa) shared by all ``roles`` and, per role, the indices of those levels."""
    base = np.asarray(plev[roles[0]], float)
    keep = [p for p in base if all(np.any(np.isclose(np.asarray(plev[r], float), p, atol=1e-6)) for r in roles)]
    keep = np.array(sorted(keep))
    idx = {r: np.array([int(np.argmin(np.abs(np.asarray(plev[r], float) - p))) for p in keep], dtype=int)
           for r in roles}
    return keep, idx


def _level_available(p, target, tol):
    p = np.asarray(p, float) if p is not None else np.array([])
    return p.size > 0 and (np.min(np.abs(p - target)) <= tol or (p.min() < target < p.max()))


# --------------------------------------------------------------------------- eddy momentum flux
def eddy_momentum_reducer(slabs, plev, lon, masks, cfg):
    """In-task reduction: ``[u'v']`` and the valid share at eddies.momentum_level_hpa.

    ``slabs["ua"], slabs["va"]`` are ``(T, *extra, L, J, I)``; returns ``(T, *extra, J, 2, S)`` with
    ``[..., 0, s]`` the covariance and ``[..., 1, s]`` the share of longitudes where both are valid.
    """
    level = float(cfg["eddies"]["momentum_level_hpa"])
    tol = cfg["run"]["level_tolerance_hpa"]
    # the level as lazy slabs: the covariance converts (or interpolates) a few rows at a time
    u = Z.level_slab(slabs["ua"], plev["ua"], level, tolerance=tol)
    v = Z.level_slab(slabs["va"], plev["va"], level, tolerance=tol)
    shape = slabs["ua"].shape[:-3] + (slabs["ua"].shape[-2], 2, len(masks))
    out = np.full(shape, np.nan)
    if u is None or v is None:
        out[..., 1, :] = 0.0
        return out
    # the family is zonal only: the full circle (mask None, first) is reduced, the sectors stay NaN
    cov, frac = Z.zonal_covariance(u, v, masks[0])
    out[..., 0, 0] = cov
    out[..., 1, 0] = frac
    return out


def _momentum_levels(cfg):
    lev = [float(cfg["eddies"]["momentum_level_hpa"])]
    return {"ua": lev, "va": lev}


@register_family("eddy_momentum", inputs=("ua", "va"), levels=_momentum_levels, metrics=MOMENTUM_METRICS,
                 reducers={"eddy_momentum_flux": eddy_momentum_reducer},
                 reducer_keys=("eddies.momentum_level_hpa", "run.level_tolerance_hpa"))
def compute_momentum(fields, cfg):
    e = cfg["eddies"]
    out = {m.id: Result.empty(fields.n, 2) for m in MOMENTUM_METRICS}
    tol = cfg["run"]["level_tolerance_hpa"]
    lev = e["momentum_level_hpa"]
    if not (_level_available(fields.plev.get("ua"), lev, tol) and _level_available(fields.plev.get("va"), lev, tol)):
        missing(out.values(), "level_missing")
        return out
    arr = fields.extras["eddy_momentum_flux"]                    # (N, J, 2)
    flux = np.where(arr[..., 1] >= cfg["run"]["min_coverage"], arr[..., 0], np.nan)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        poleward = flux[:, idx] * (1.0 if hemi == "NH" else -1.0)
        peak(poleward, x, e["momentum_window"], cfg, out["eddy_momentum_flux_lat"], out["eddy_momentum_flux_max"], h)
        out["eddy_momentum_flux_lat"].value[:, h] = signed(hemi, out["eddy_momentum_flux_lat"].value[:, h])
        _weak_peak(out["eddy_momentum_flux_lat"], out["eddy_momentum_flux_max"], h, e["min_momentum_flux_m2_s2"],
                   poleward, x, e["momentum_window"])
    _apply_time_flag(out.values(), time_mean_flag(fields, cfg))
    if any(interpolated(fields.plev[r], lev, tolerance=tol) for r in ("ua", "va")):
        add_note(out.values(), "interpolated_level")
    return out


# --------------------------------------------------------------------------- energy transport
ENERGY_ROLES = ("va", "ta", "zg", "hus")


def energy_reducer(slabs, plev, lon, masks, cfg):
    """In-task reduction for the energy transport on the levels all four roles share.

    Returns ``(T, *extra, J, 6, S)``: zonal means over all longitudes of the column sums
    ``sum w v E``, ``sum w v``, ``sum w E``, ``sum w`` (Pa-weighted under cells.top,
    :func:`kernels.zonal.column_sums`; a longitude without valid levels contributes zeros), the share
    of longitudes with data and the share of points above the ground whose humidity was missing and
    counted as 0 (:func:`kernels.zonal.humidity_filled_aloft`).
    """
    levels, idx = _common_levels(plev, ENERGY_ROLES)
    lead = slabs["va"].shape[:-3]
    nj = slabs["va"].shape[-2]
    out = np.full(lead + (nj, 6, len(masks)), np.nan)
    if levels.size < 2 or not Z.covers_circle(lon):   # the transport crosses the whole latitude circle
        out[..., 4, :] = 0.0
        return out
    top, _ = column_rules(cfg)
    p_pa = levels * HPA
    row_values = int(np.prod(slabs["va"].shape[1:-3], dtype=np.int64)) * levels.size * slabs["va"].shape[-1]
    rows = max(1, ENERGY_BLOCK_VALUES // max(row_values, 1))
    # one time step at a time, and a block of latitude rows at a time: the float64 fields (energy,
    # products) of a few rows in memory (in cache), not of the whole chunk; the same numbers, each
    # row is independent (the step's all-valid test is made once, so every block sums as the whole
    # step would)
    w = layer_weights(p_pa, top)
    for t in range(lead[0]):
        take = {r: (slabs[r][t] if np.array_equal(idx[r], np.arange(slabs[r].shape[-3]))
                    else np.take(slabs[r][t], idx[r], axis=-3)) for r in ENERGY_ROLES}
        if _all_valid_step(take, w, rows, out[t]):
            continue
        # e is finite where ta and zg are (missing humidity aloft counts as 0, see below)
        valid = bool(np.isfinite(take["va"]).all() and np.isfinite(take["ta"]).all()
                     and np.isfinite(take["zg"]).all())
        for j0 in range(0, nj, rows):
            part = {r: a[..., j0:j0 + rows, :] for r, a in take.items()}
            q, filled = Z.humidity_filled_aloft(part["hus"], part["ta"])
            e = Z.moist_static_energy(part["ta"], part["zg"], q)
            sums = Z.column_sums(part["va"], e, p_pa, top, all_valid=valid)     # four (..., jb, I)
            # the family is zonal only: the full circle (first mask) is reduced, the sectors stay NaN
            for k in range(4):
                out[t, ..., j0:j0 + rows, k, 0] = sums[k].mean(axis=-1)
            out[t, ..., j0:j0 + rows, 4, 0] = (sums[3] > 0).mean(axis=-1)
            out[t, ..., j0:j0 + rows, 5, 0] = filled.mean(axis=(-3, -1))
    return out


ENERGY_BLOCK_VALUES = 2 ** 17   # values per role and block of latitude rows (a few MB of float64 temporaries)


def _all_valid_step(take, w, rows, out):
    """The energy reducer's usual case: every value of the time step ``take`` (role -> ``(*extra, L,
    J, I)``) valid, no humidity filled. Writes ``out (*extra, J, 6, S)`` and returns True, or returns
    False (``out`` to be written again) when a value is missing or a sum is not finite.
    :func:`kernels.zonal.energy_column_means` gives the first three columns without the masking
    passes; ``sum w`` is the constant of :func:`kernels.zonal.column_sums`' all-valid path, and its
    zonal mean is taken over the same broadcast blocks of ``rows`` rows as there."""
    extra = take["va"].shape[:-3]
    nj, ni = take["va"].shape[-2:]
    for ex in np.ndindex(*extra):
        sums = Z.energy_column_means(*(take[r][ex] for r in ENERGY_ROLES), w, rows)
        if sums is None:
            return False
        out[ex + (slice(None), slice(0, 3), 0)] = sums
    wsum = {}
    for j0 in range(0, nj, rows):
        jb = min(rows, nj - j0)
        if jb not in wsum:
            sw = np.broadcast_to(w.sum(), extra + (jb, ni))
            wsum[jb] = (sw.mean(axis=-1), (sw > 0).mean(axis=-1))
        out[..., j0:j0 + jb, 3, 0], out[..., j0:j0 + jb, 4, 0] = wsum[jb]
    out[..., 5, 0] = 0.0                     # no humidity was missing: nothing filled
    return True


def poleward_energy_transport(sums, lat, balance="remove_net_flux"):
    """Mass-corrected northward energy transport (W) from the reducer's zonal-mean column sums.

    ``sums (..., J, 4)`` = ``[sum w v E], [sum w v], [sum w E], [sum w]`` (Pa-weighted).
    ``F = 2 pi a cos(lat) / g * ([sum w v E] - [sum w v] [sum w E] / [sum w])``: the second term removes
    the energy carried by the net mass flux across the latitude circle at the section's mass-weighted
    mean energy, so adding a constant to E leaves F unchanged. It is the column balance of
    :func:`circtrack.kernels.vertical.balance_column` (``v - c`` where there is air, ``c = [sum w v] /
    [sum w]``) applied to ``sum w v E``; with ``balance="none"`` it is left out.
    """
    sums = np.asarray(sums, float)
    fac = 2.0 * np.pi * EARTH_RADIUS * np.cos(np.deg2rad(np.asarray(lat, float))) / GRAVITY
    if balance == "none":
        return fac * sums[..., 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        corrected = sums[..., 0] - sums[..., 1] * sums[..., 2] / sums[..., 3]
    return fac * corrected


def _energy_levels(cfg):
    column_rules(cfg)
    return {r: None for r in ENERGY_ROLES}


@register_family("energy_transport", inputs=ENERGY_ROLES, levels=_energy_levels, metrics=ENERGY_METRICS,
                 reducers={"energy_column_sums": energy_reducer}, reducer_keys=("cells.top",))
def compute_energy(fields, cfg):
    out = {m.id: Result.empty(fields.n, 2) for m in ENERGY_METRICS}
    levels, _ = _common_levels(fields.plev, ENERGY_ROLES)
    if levels.size < 2:
        missing(out.values(), "level_missing")
        return out
    arr = fields.extras["energy_column_sums"]                    # (N, J, 6)
    transport = poleward_energy_transport(arr[..., :4], fields.lat, column_rules(cfg)[1]) / PETAWATT
    transport = np.where(arr[..., 4] >= cfg["run"]["min_coverage"], transport, np.nan)
    for h, hemi in enumerate(HEMISPHERES):
        idx, x = hemisphere_view(fields.lat, hemi)
        poleward = transport[:, idx] * (1.0 if hemi == "NH" else -1.0)
        peak(poleward, x, cfg["energy"]["window"], cfg, out["energy_transport_max_lat"],
             out["energy_transport_max"], h)
        out["energy_transport_max_lat"].value[:, h] = signed(hemi, out["energy_transport_max_lat"].value[:, h])
        _weak_peak(out["energy_transport_max_lat"], out["energy_transport_max"], h, cfg["energy"]["min_transport_pw"],
                   poleward, x, cfg["energy"]["window"])
    _apply_time_flag(out.values(), time_mean_flag(fields, cfg))
    filled = np.nan_to_num(arr[..., 5]).max(axis=-1) > 0                 # (N,)
    add_note(out.values(), "humidity_filled_aloft", filled)
    return out
