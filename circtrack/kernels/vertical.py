"""Vertical operations on pressure levels: the mass streamfunction integral and level picking."""

from __future__ import annotations

import numpy as np

from circtrack.constants import EARTH_RADIUS, GRAVITY


def cumulative_pressure_integral(v, p):
    """Integral of ``v`` from the top of the atmosphere (p = 0) down to each level.

    Parameters
    ----------
    v : array ``(..., L)`` on pressure levels ``p`` (any units of v).
    p : array ``(L,)`` in Pa, strictly increasing (top level first).

    Returns
    -------
    array ``(..., L)``: ``I(p_k) = v_0 p_0 + sum_{j<k} (v_j + v_{j+1})/2 (p_{j+1} - p_j)``.

    Notes
    -----
    Above the top level ``v`` is taken as equal to its top value; between levels the trapezoid
    rule applies. Missing values (NaN: below the ground or masked fill values) contribute zero,
    which is the usual convention for the mass streamfunction, where no mass moves below the
    surface (Peixoto & Oort 1992, section 7.4).
    """
    v = np.nan_to_num(np.asarray(v, dtype=float), nan=0.0)
    p = np.asarray(p, dtype=float)
    dp = np.diff(p)
    steps = 0.5 * (v[..., 1:] + v[..., :-1]) * dp
    top = v[..., :1] * p[0]
    return np.concatenate([top, top + np.cumsum(steps, axis=-1)], axis=-1)


def mass_streamfunction(v, p, lat):
    """Meridional mass streamfunction of the zonal-mean meridional wind.

    Parameters
    ----------
    v : array ``(..., L, J)`` zonal-mean northward wind in m s-1 (NaN below ground).
    p : array ``(L,)`` pressure in Pa, increasing.
    lat : array ``(J,)`` latitude in degrees.

    Returns
    -------
    psi : array ``(..., L, J)`` in kg s-1.

    Notes
    -----
    ``psi(lat, p) = 2 pi a cos(lat) / g * integral_0^p [v] dp'`` (Peixoto & Oort 1992, eq. 7.4);
    positive values mean clockwise circulation seen with north on the right, so the northern
    Hadley cell is positive and the southern one negative.
    """
    v = np.asarray(v, dtype=float)
    vt = np.moveaxis(v, -2, -1)                    # (..., J, L)
    integral = np.moveaxis(cumulative_pressure_integral(vt, p), -1, -2)
    factor = 2.0 * np.pi * EARTH_RADIUS * np.cos(np.deg2rad(np.asarray(lat, float))) / GRAVITY
    return integral * factor


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


def hypsometric_heights(t, p):
    """Heights (m) of pressure levels above the lowest level from temperature.

    ``t (..., L)`` in K on ``p (L,)`` (any pressure unit), ``p`` increasing (top first).
    ``z_k - z_{k+1} = R_d / g * (T_k + T_{k+1}) / 2 * ln(p_{k+1} / p_k)`` (hypsometric equation with the
    layer-mean temperature; dry air, no virtual-temperature correction).
    """
    from circtrack.constants import R_DRY

    t = np.asarray(t, dtype=float)
    p = np.asarray(p, dtype=float)
    dz = R_DRY / GRAVITY * 0.5 * (t[..., 1:] + t[..., :-1]) * np.log(p[1:] / p[:-1])   # (..., L-1)
    z = np.zeros_like(t)
    z[..., :-1] = np.cumsum(dz[..., ::-1], axis=-1)[..., ::-1]
    return z


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
    (pressure hPa, height m above the lowest level), each ``(...)``; NaN where none is found.

    Notes
    -----
    WMO (1957): "the lowest level at which the lapse rate decreases to 2 K/km or less, provided also
    the average lapse rate between this level and all higher levels within 2 km does not exceed
    2 K/km". Lapse rates are taken on layer mid-heights and the crossing of the threshold is
    interpolated linearly in height; pressure at that height is interpolated in log-pressure. The
    2-km condition is checked on the mean of the layer lapse rates from the candidate layer up to
    each layer whose mid-height lies within 2 km of the crossing.
    """
    t = np.asarray(t, dtype=float)
    p = np.asarray(p, dtype=float)
    z = hypsometric_heights(t, p)
    # bottom-up order
    T, Z, P = t[..., ::-1], z[..., ::-1], p[::-1]
    gam = -(T[..., 1:] - T[..., :-1]) / (Z[..., 1:] - Z[..., :-1]) * 1000.0      # K/km, (..., L-1)
    zh = 0.5 * (Z[..., 1:] + Z[..., :-1])
    ph = np.sqrt(P[1:] * P[:-1])
    lead = t.shape[:-1]
    zt = np.full(lead, np.nan)
    todo = np.ones(lead, bool)
    for j in range(gam.shape[-1]):
        if not (p_top <= ph[j] <= p_bottom):
            continue
        cand = todo & (gam[..., j] <= threshold)
        if not cand.any():
            continue
        if j > 0 and p_top <= ph[j - 1] <= p_bottom + 1e9:
            g0, g1 = gam[..., j - 1], gam[..., j]
            with np.errstate(invalid="ignore", divide="ignore"):
                f = np.where(g0 > threshold, (g0 - threshold) / (g0 - g1), 1.0)
            zc = zh[..., j - 1] + np.clip(f, 0, 1) * (zh[..., j] - zh[..., j - 1])
        else:
            zc = zh[..., j]
        # average lapse rate from the candidate layer up to every layer within `depth` above
        ok = cand.copy()
        total = np.zeros(lead)
        for m in range(j, gam.shape[-1]):
            within = zh[..., m] <= zc + depth
            total = total + gam[..., m]
            ok &= ~(within & (total / (m - j + 1) > threshold))
        zt = np.where(ok, zc, zt)
        todo &= ~ok
    lnp = _interp_rows(zt, Z, np.broadcast_to(np.log(P), Z.shape))
    return np.exp(lnp), zt


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
