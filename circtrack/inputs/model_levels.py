"""Hybrid sigma-pressure model levels (CF appendix D, atmosphere_hybrid_sigma_pressure_coordinate).

The pressure of model level ``k`` in a column is ``p = a(k) * p0 + b(k) * ps`` or ``p = ap(k) + b(k) * ps``,
with the terms named by the level variable's ``formula_terms`` attribute (e.g.
``"a: a b: b p0: p0 ps: ps"`` or ``"ap: ap b: b ps: ps"``). Fields are interpolated to pressure levels
linearly in log-pressure, one time chunk at a time; a target pressure outside a column's model levels
(below the lowest level, i.e. near or under the ground, or above the model top) is NaN.
"""

from __future__ import annotations

import numpy as np

HYBRID_STANDARD_NAMES = ("atmosphere_hybrid_sigma_pressure_coordinate",)


def parse_formula_terms(text):
    """``"a: a_var b: b_var ps: ps"`` -> ``{"a": "a_var", "b": "b_var", "ps": "ps"}``."""
    parts = str(text).replace(":", ": ").split()
    out, key = {}, None
    for tok in parts:
        if tok.endswith(":"):
            key = tok[:-1]
        elif key is not None:
            out[key] = tok
            key = None
    return out


def column_pressure(coef_a, coef_b, ps_pa, p0_pa=None):
    """Model-level pressure (Pa), ``(t, ..., L, J, I)`` from ``ps (t, ..., J, I)`` in Pa.

    ``coef_a`` is ``a`` (dimensionless, multiplied by ``p0_pa``) when ``p0_pa`` is given, else ``ap`` in Pa.
    """
    a = np.asarray(coef_a, float) * (float(p0_pa) if p0_pa is not None else 1.0)
    b = np.asarray(coef_b, float)
    ps = np.asarray(ps_pa, float)[..., None, :, :]
    return a[:, None, None] + b[:, None, None] * ps


def interpolate_log_p(values, p, targets, axis=-3):
    """Interpolate ``values`` given on pressures ``p`` (same shape, Pa) to ``targets`` (Pa), linear in ln p.

    The level axis (``axis``) may run either way but must be monotonic in every column. Returns the
    values with that axis replaced by the targets (in the order given); NaN where a target lies
    outside a column's levels or a bracketing value is missing. A target equal to a model-level
    pressure (to 1e-12 in ln p) takes that level's value exactly.
    """
    values, p = np.broadcast_arrays(np.asarray(values), np.asarray(p, float))
    values, p = np.moveaxis(values, axis, -1), np.moveaxis(p, axis, -1)
    if p.shape[-1] > 1 and np.nanmean(p[..., 0]) > np.nanmean(p[..., -1]):
        values, p = values[..., ::-1], p[..., ::-1]          # top first
    nlev = p.shape[-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        lp = np.log(np.where(p > 0, p, np.nan))                   # missing or bad surface pressure: NaN
    out = np.full(values.shape[:-1] + (len(targets),), np.nan, dtype=np.float64)
    if nlev < 2:
        return np.moveaxis(out, -1, axis)
    for k, target in enumerate(np.asarray(targets, float)):
        lt = np.log(target)
        n = np.count_nonzero(p <= target * (1 + 1e-12), axis=-1)        # levels at or above the target
        i0 = np.clip(n - 1, 0, nlev - 2)[..., None]
        l0 = np.take_along_axis(lp, i0, -1)[..., 0]
        l1 = np.take_along_axis(lp, i0 + 1, -1)[..., 0]
        v0 = np.take_along_axis(values, i0, -1)[..., 0].astype(np.float64)
        v1 = np.take_along_axis(values, i0 + 1, -1)[..., 0].astype(np.float64)
        with np.errstate(invalid="ignore", divide="ignore"):
            w = (lt - l0) / (l1 - l0)
        at0, at1 = np.abs(lt - l0) <= 1e-12, np.abs(lt - l1) <= 1e-12
        res = np.where(at0, v0, np.where(at1, v1, v0 + w * (v1 - v0)))
        inside = (n >= 1) & ((w <= 1.0) | at1) & (w >= 0.0) | at0
        out[..., k] = np.where(inside, res, np.nan)
    return np.moveaxis(out, -1, axis)


def levels_needed(coef_a, coef_b, targets_pa, p0_pa=None, ps_max_pa=110000.0):
    """Indices (ascending) of the model levels a chunk must read: from the level just above the
    highest target (at the highest surface pressure, where every level sits lowest) down to the
    surface; the levels above it can never bracket a target."""
    a = np.asarray(coef_a, float) * (float(p0_pa) if p0_pa is not None else 1.0)
    b = np.asarray(coef_b, float)
    ref = a + b * 100000.0
    p_hi = a + b * float(ps_max_pa)
    above = np.flatnonzero(p_hi <= float(np.min(targets_pa)) * (1 + 1e-12))
    if above.size == 0:
        return np.arange(a.size)
    top = above[np.argmax(p_hi[above])]
    return np.flatnonzero(ref >= ref[top])
