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
