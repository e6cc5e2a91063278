"""Vertical operations on pressure levels: the column rules (top and balance), the mass
streamfunction integral, level picking and the lapse-rate tropopause."""

from __future__ import annotations

import numpy as np

from circtrack.constants import EARTH_RADIUS, GRAVITY

# The two column rules, stated once and used by the streamfunction (metrics/cells.py) and by the
# energy transport's mass correction (metrics/transport.py, kernels/zonal.column_sums); the
# parameters are cells.top and cells.balance.
#
# Top: "zero_at_top_level" (default) integrates from the top data level, where psi = 0: no flow is
# assumed above the data (the integral starts where the data start, as the streamfunction is
# computed from pressure-level analyses by Peixoto & Oort 1992, ch. 7, and Trenberth 1991).
# "constant_above_top" holds [v] at its top-level value from the top level up to p = 0 (the form
# used before; for data stopping at 100 hPa it adds 10-30 % to the Hadley strength).
TOP_RULES = ("zero_at_top_level", "constant_above_top")
# Balance: "remove_net_flux" (default) subtracts from [v] a constant c per column, applied only
# where there is air (weighted by the share of valid longitudes), so that the column carries no net
# mass across the latitude circle and psi vanishes at the bottom as well as at the top. This is the
# barotropic mass correction of Trenberth (1991) J. Climate 4, 707-722, applied to the
# streamfunction as in Peixoto & Oort (1992) section 7.4 (no net mass transport in the long-term
# mean); pressure-level data are routinely unbalanced (interpolation, values below ground, monthly
# means of products). "none" keeps [v] as it is (psi at the bottom is then the column's net flux).
BALANCE_RULES = ("remove_net_flux", "none")


def layer_weights(p, top="zero_at_top_level"):
    """Pressure thickness of each level's layer, ``(L,)``, in the units of ``p`` (increasing, top first).

    Trapezoid rule between levels: ``w_0 = (p_1 - p_0)/2``, ``w_k = (p_{k+1} - p_{k-1})/2``,
    ``w_{L-1} = (p_{L-1} - p_{L-2})/2``; with ``top="constant_above_top"`` the top level also stands
    for the slab from p = 0 to ``p_0`` (``w_0 += p_0``). ``sum_k w_k f_k`` is the integral from the
    top to the lowest level, the same rule as :func:`cumulative_pressure_integral`.
    """
    _check_top(top)
    p = np.asarray(p, dtype=float)
    if p.size == 1:
        return p.copy() if top == "constant_above_top" else np.zeros(1)
    w = np.empty_like(p)
    w[0] = 0.5 * (p[1] - p[0]) + (p[0] if top == "constant_above_top" else 0.0)
    w[1:-1] = 0.5 * (p[2:] - p[:-2])
    w[-1] = 0.5 * (p[-1] - p[-2])
    return w


def _check_top(top):
    if top not in TOP_RULES:
        raise ValueError(f"top must be one of {TOP_RULES}, not {top!r}")


def cumulative_pressure_integral(v, p, top="zero_at_top_level"):
    """Integral of ``v`` from the top of the column down to each level.

    Parameters
    ----------
    v : array ``(..., L)`` on pressure levels ``p`` (any units of v).
    p : array ``(L,)`` in Pa, strictly increasing (top level first).
    top : "zero_at_top_level" (the integral is 0 at the top data level) or "constant_above_top"
        (``v`` held at its top value from p = 0 to the top level: ``I(p_0) = v_0 p_0``).

    Returns
    -------
    array ``(..., L)``: ``I(p_k) = I(p_0) + sum_{j<k} (v_j + v_{j+1})/2 (p_{j+1} - p_j)``.

    Notes
    -----
    Between levels the trapezoid rule applies. Missing values (NaN: below the ground or masked fill
    values) contribute zero: no mass moves below the surface (Peixoto & Oort 1992, section 7.4).
    """
    _check_top(top)
    v = np.nan_to_num(np.asarray(v, dtype=float), nan=0.0)
    p = np.asarray(p, dtype=float)
    dp = np.diff(p)
    steps = 0.5 * (v[..., 1:] + v[..., :-1]) * dp
    first = v[..., :1] * p[0] if top == "constant_above_top" else np.zeros_like(v[..., :1])
    return np.concatenate([first, first + np.cumsum(steps, axis=-1)], axis=-1)


def balance_column(v, air, p, *, top="zero_at_top_level", balance="remove_net_flux"):
    """Remove the column's net mass flux from ``v (..., L)`` where there is air.

    ``air (..., L)`` is the share of the latitude circle above the ground at each level (1 for a
    full level, 0 below the ground; e.g. the zonal-mean coverage); ``v`` is the zero-filled zonal
    mean (NaN counts as 0). Returns ``(v - c * air, net)`` with ``c = sum w v / sum w air`` (``w``
    from :func:`layer_weights`) and ``net = sum w v`` the uncorrected column integral (``(...)``, in
    the units of v times p). With ``balance="none"`` ``v`` is returned zero-filled, ``net`` the same.
    """
    if balance not in BALANCE_RULES:
        raise ValueError(f"balance must be one of {BALANCE_RULES}, not {balance!r}")
    v = np.nan_to_num(np.asarray(v, dtype=float), nan=0.0)
    air = np.nan_to_num(np.asarray(air, dtype=float), nan=0.0)
    w = layer_weights(p, top)
    net = v @ w
    if balance == "none":
        return v, net
    mass = air @ w
    with np.errstate(invalid="ignore", divide="ignore"):
        c = np.where(mass > 0, net / mass, 0.0)
    return v - c[..., None] * air, net


def mass_streamfunction(v, p, lat, *, top="zero_at_top_level", balance="remove_net_flux", air=None):
    """Meridional mass streamfunction of the zonal-mean meridional wind.

    Parameters
    ----------
    v : array ``(..., L, J)`` zonal-mean northward wind in m s-1 (NaN below ground counts as 0).
    p : array ``(L,)`` pressure in Pa, increasing.
    lat : array ``(J,)`` latitude in degrees.
    top, balance : the column rules (``TOP_RULES``, ``BALANCE_RULES`` above).
    air : array like ``v``, the share of the circle above the ground (default: 1 where v is finite).

    Returns
    -------
    psi : array ``(..., L, J)`` in kg s-1.

    Notes
    -----
    ``psi(lat, p) = 2 pi a cos(lat) / g * integral_top^p ([v] - c) dp'`` (Peixoto & Oort 1992,
    eq. 7.4, with the column balance ``c`` of :func:`balance_column`); positive values mean
    clockwise circulation seen with north on the right, so the northern Hadley cell is positive and
    the southern one negative.
    """
    v = np.asarray(v, dtype=float)
    if air is None:
        air = np.isfinite(v).astype(float)
    vt = np.moveaxis(v, -2, -1)                    # (..., J, L)
    vb, _ = balance_column(vt, np.moveaxis(np.asarray(air, float), -2, -1), p, top=top, balance=balance)
    integral = np.moveaxis(cumulative_pressure_integral(vb, p, top), -1, -2)
    return integral * _psi_factor(lat)


def column_net_mass_flux(v, p, lat, *, top="zero_at_top_level"):
    """The column's net northward mass flux across each latitude circle, ``(..., J)`` in kg s-1:
    ``2 pi a cos(lat)/g * integral [v] dp`` over the column (``v (..., L, J)``, NaN as 0), i.e. psi at
    the lowest level before the balance is applied."""
    vt = np.moveaxis(np.asarray(v, dtype=float), -2, -1)
    _, net = balance_column(vt, np.ones_like(vt), p, top=top, balance="none")
    return net * _psi_factor(lat)


def _psi_factor(lat):
    return 2.0 * np.pi * EARTH_RADIUS * np.cos(np.deg2rad(np.asarray(lat, float))) / GRAVITY


def interpolated(p, target, *, tolerance):
    """True when :func:`at_level` interpolates ``target`` (no level within ``tolerance``, but inside
    the levels); False when a level is taken as it is or ``target`` lies outside the levels."""
    p = np.asarray(p, dtype=float)
    if p.size == 0 or np.min(np.abs(p - target)) <= tolerance:
        return False
    return bool(p.min() < target < p.max())


def at_level(field, p, target, *, tolerance):
    """Value of ``field (..., L, J)`` at pressure ``target`` (same units as ``p``).

    Takes the nearest level when it lies within ``tolerance``; otherwise interpolates linearly
    in log-pressure between the two levels that bracket ``target``. Returns ``None`` when
    ``target`` lies outside the levels (the caller flags the metric as ``level_missing``).
    """
    p = np.asarray(p, dtype=float)
    field = np.asarray(field, dtype=float)
    k = int(np.argmin(np.abs(p - target)))
    if abs(p[k] - target) <= tolerance:
        return field[..., k, :]
    if target < p.min() or target > p.max():
        return None
    order = np.argsort(p)
    ps = p[order]
    j = int(np.searchsorted(ps, target)) - 1
    a, b = order[j], order[j + 1]
    t = (np.log(target) - np.log(p[a])) / (np.log(p[b]) - np.log(p[a]))
    return field[..., a, :] + t * (field[..., b, :] - field[..., a, :])


def layer_mean(field, p, bounds, *, tolerance):
    """Pressure-weighted mean of ``field (..., L, J)`` over the layer ``bounds = [low, high]`` (same
    units as ``p``): trapezoids in pressure over the levels inside the layer, the two bounds taken by
    :func:`at_level` (a level within ``tolerance``, else linear in log-p). ``None`` when the levels do
    not reach both bounds.
    """
    lo, hi = float(bounds[0]), float(bounds[1])
    p = np.asarray(p, dtype=float)
    field = np.asarray(field, dtype=float)
    top, bottom = at_level(field, p, lo, tolerance=tolerance), at_level(field, p, hi, tolerance=tolerance)
    if top is None or bottom is None or not hi > lo:
        return None
    inside = np.flatnonzero((p > lo + tolerance) & (p < hi - tolerance))
    inside = inside[np.argsort(p[inside])]
    ps = np.concatenate([[lo], p[inside], [hi]])
    prof = np.concatenate([top[..., None, :], field[..., inside, :], bottom[..., None, :]], axis=-2)
    dp = np.diff(ps)[:, None]
    return np.sum(0.5 * (prof[..., 1:, :] + prof[..., :-1, :]) * dp, axis=-2) / (hi - lo)


def hypsometric_heights(t, p):
    """Heights (m) of pressure levels above the lowest valid level from temperature.

    ``t (..., L)`` in K on ``p (L,)`` (any pressure unit), ``p`` increasing (top first).
    ``z_k - z_{k+1} = R_d / g * (T_k + T_{k+1}) / 2 * ln(p_{k+1} / p_k)`` (hypsometric equation with the
    layer-mean temperature; dry air, no virtual-temperature correction). Layers with a missing
    temperature (below the ground) have no thickness; levels with a missing temperature get NaN.
    """
    from circtrack.constants import R_DRY

    t = np.asarray(t, dtype=float)
    p = np.asarray(p, dtype=float)
    dz = R_DRY / GRAVITY * 0.5 * (t[..., 1:] + t[..., :-1]) * np.log(p[1:] / p[:-1])   # (..., L-1)
    dz = np.nan_to_num(dz, nan=0.0)
    z = np.zeros_like(t)
    z[..., :-1] = np.cumsum(dz[..., ::-1], axis=-1)[..., ::-1]
    return np.where(np.isfinite(t), z, np.nan)


TROPOPAUSE_REASONS = ("ok", "no_tropopause_in_range", "data_end_within_2km")


def lapse_rate_tropopause(t, p, *, threshold=2.0, depth=2000.0, p_bottom=550.0, p_top=75.0):
    """WMO (1957) lapse-rate tropopause of temperature profiles.

    Parameters
    ----------
    t : array ``(..., L)`` temperature in K on pressure levels ``p`` (hPa, increasing, top first).
    threshold : lapse rate in K km-1 (2 K/km).
    depth : the layer above the candidate, in m, whose mean lapse rate must not exceed the
        threshold (2 km).
    p_bottom, p_top : the search is limited to this pressure range (hPa).

    Returns
    -------
    (pressure hPa, height m above the lowest level, reason), each ``(...)``; NaN where none is
    found; ``reason`` is ``"ok"``, ``"no_tropopause_in_range"`` or ``"data_end_within_2km"`` (a
    candidate was found but the data's levels end less than ``depth`` above it, so the 2-km
    condition cannot be checked).

    Notes
    -----
    WMO (1957): "the lowest level at which the lapse rate decreases to 2 K/km or less, provided also
    the average lapse rate between this level and all higher levels within 2 km does not exceed
    2 K/km". Layer lapse rates are taken on layer mid-heights (heights from the hypsometric equation)
    and the crossing of the threshold is interpolated linearly in height; pressure at that height is
    interpolated in log-pressure. The average lapse rate between the candidate and each higher level
    within ``depth`` is the height-weighted (thickness-weighted) mean of that lapse-rate profile
    (:func:`_mean_lapse_within`), so thin and thick layers count by their thickness, not by their
    number; the data's levels must reach ``depth`` above the candidate.
    """
    t = np.asarray(t, dtype=float)
    p = np.asarray(p, dtype=float)
    shape = t.shape[:-1]
    t = t.reshape(-1, t.shape[-1])                                  # profiles as rows
    z = hypsometric_heights(t, p)
    T, Z, P = t[..., ::-1], z[..., ::-1], p[::-1]                  # bottom-up order
    with np.errstate(invalid="ignore", divide="ignore"):
        gam = -(T[..., 1:] - T[..., :-1]) / (Z[..., 1:] - Z[..., :-1]) * 1000.0      # K/km, (..., L-1)
    zh = 0.5 * (Z[..., 1:] + Z[..., :-1])
    ph = np.sqrt(P[1:] * P[:-1])
    z_top = np.max(np.where(np.isfinite(T), Z, -np.inf), axis=-1)   # highest level with data
    lead = t.shape[:-1]
    zt = np.full(lead, np.nan)
    reason = np.full(lead, "no_tropopause_in_range", dtype=object)
    todo = np.ones(lead, bool)
    for j in range(gam.shape[-1]):
        if not (p_top <= ph[j] <= p_bottom):
            continue
        with np.errstate(invalid="ignore"):
            cand = todo & (gam[..., j] <= threshold)
        if not cand.any():
            continue
        if j > 0:
            g0, g1 = gam[..., j - 1], gam[..., j]
            with np.errstate(invalid="ignore", divide="ignore"):
                f = np.where(np.isfinite(g0) & (g0 > threshold), (g0 - threshold) / (g0 - g1), 1.0)
            zc = zh[..., j - 1] + np.clip(f, 0, 1) * (zh[..., j] - zh[..., j - 1])
            zc = np.where(np.isfinite(zc), zc, zh[..., j])
        else:
            zc = zh[..., j]
        covered = z_top >= zc + depth
        ok = cand & covered
        if ok.any():                            # the 2-km check only where a covered candidate is
            ok[ok] = _mean_lapse_within(gam[ok], zh[ok], zc[ok], depth, threshold)
        zt = np.where(ok, zc, zt)
        reason = np.where(ok, "ok", np.where(cand & ~covered, "data_end_within_2km", reason))
        todo &= ~ok & ~(cand & ~covered)       # the data end: no higher candidate can be checked either
    lnp = _interp_rows(zt, _fill_up(Z), np.broadcast_to(np.log(P), Z.shape))
    return np.exp(lnp).reshape(shape), zt.reshape(shape), reason.reshape(shape)


def _mean_lapse_within(gam, zh, zc, depth, threshold, samples=40):
    """The mean lapse rate from height ``zc`` up to every height within ``depth`` above it is at most
    ``threshold``. ``gam (..., L-1)`` layer lapse rates on mid-heights ``zh`` (bottom-up), taken as
    varying linearly in height between mid-heights and constant beyond the last one (the profile the
    candidate was found on); means are height-weighted (the mean over the layer's thickness),
    evaluated at ``samples`` evenly spaced heights. Missing lapse rates there fail."""
    zf, gf = _fill_up(zh), _fill_up(gam)
    z_last = np.max(np.where(np.isfinite(gam), zh, -np.inf), axis=-1)
    total = np.zeros(np.shape(zc))
    ok = np.ones(np.shape(zc), bool)
    for i in range(samples):
        at = np.minimum(zc + depth * (i + 0.5) / samples, z_last)
        at = np.maximum(at, zf[..., 0])
        total = total + _interp_rows(at, zf, gf)
        with np.errstate(invalid="ignore"):
            ok &= total / (i + 1) <= threshold
    return ok


def _fill_up(a):
    """Bottom-up profiles with NaN below the lowest valid level replaced by that level's value, so
    that row-wise interpolation in height never meets a missing point below the data."""
    a = np.array(a, dtype=float, copy=True)
    for k in range(a.shape[-1] - 2, -1, -1):
        a[..., k] = np.where(np.isfinite(a[..., k]), a[..., k], a[..., k + 1])
    return a


def _interp_rows(x, xp, fp):
    """Row-wise linear interpolation of ``fp(xp)`` (``(..., L)``, xp increasing) at ``x (...)``."""
    x = np.asarray(x, float)
    j = np.sum(xp <= x[..., None], axis=-1) - 1
    j = np.clip(j, 0, xp.shape[-1] - 2)
    xa = np.take_along_axis(xp, j[..., None], -1)[..., 0]
    xb = np.take_along_axis(xp, (j + 1)[..., None], -1)[..., 0]
    fa = np.take_along_axis(fp, j[..., None], -1)[..., 0]
    fb = np.take_along_axis(fp, (j + 1)[..., None], -1)[..., 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(np.isfinite(x), fa + (x - xa) / (xb - xa) * (fb - fa), np.nan)
