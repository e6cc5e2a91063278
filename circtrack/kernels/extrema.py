"""Windowed maxima and minima with 3-point parabolic refinement on the actual grid.

The rule every metric follows (:meth:`Extremum.reason`): an extremum is trusted only when the
window has enough valid points, the discrete extremum is not on the window's first or last point
(the true one may lie outside), not on a pole row (|x| = 90, where a zonal mean of a wind component
is not defined) and has no missing neighbour (the true extremum may lie in the gap). The reason
codes are the CSV flags (flags.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Extremum:
    """Result of :func:`window_extremum`; every field has the leading shape ``(...)``."""

    position: np.ndarray   # refined coordinate of the extremum (NaN when none)
    value: np.ndarray      # parabola vertex value (grid value when not refined)
    index: np.ndarray      # grid index of the discrete extremum (-1 when none)
    at_edge: np.ndarray    # discrete extremum sits on the first or last point of the window
    valid_fraction: np.ndarray  # share of finite points inside the window
    next_to_gap: np.ndarray = None   # a neighbour of the discrete extremum is missing
    at_pole: np.ndarray = None       # the discrete extremum sits on a pole row (|x| = 90)

    def reason(self, min_fraction):
        """Flag code per element: ``too_little_data`` (valid share below ``min_fraction``),
        ``extremum_at_window_edge``, ``extremum_at_pole_row``, ``extremum_next_to_missing_data``
        or ``ok``, the first that applies in this order."""
        out = np.full(np.shape(self.position), "ok", dtype=object)
        for bad, code in ((self._flag(self.next_to_gap), "extremum_next_to_missing_data"),
                          (self._flag(self.at_pole), "extremum_at_pole_row"),
                          (self.at_edge, "extremum_at_window_edge"),
                          (self.valid_fraction < min_fraction, "too_little_data")):
            out = np.where(bad, code, out)
        return out

    def ok(self, min_fraction):
        """``reason(min_fraction) == "ok"`` without building the flag strings."""
        bad = self._flag(self.next_to_gap) | self._flag(self.at_pole) | self.at_edge
        return ~(bad | (self.valid_fraction < min_fraction))

    def _flag(self, arr):
        return np.zeros(np.shape(self.position), bool) if arr is None else arr


def parabola_vertex(x0, x1, x2, y0, y1, y2):
    """Vertex ``(xv, yv)`` of the parabola through three points on a non-uniform grid.

    Notes
    -----
    With ``d = (x0-x1)(x0-x2)(x1-x2)``,
    ``A = (x2(y1-y0) + x1(y0-y2) + x0(y2-y1)) / d`` and
    ``B = (x2^2(y0-y1) + x1^2(y2-y0) + x0^2(y1-y2)) / d``, the vertex is ``xv = -B / 2A`` and
    ``yv = y1 + A (xv-x1)^2 + (B + 2 A x1)(xv - x1)``. Where the three points are collinear
    (``A == 0``) the middle point is returned; a vertex outside ``[x0, x2]`` is clipped to the bracket
    and the parabola's value there is returned.
    """
    x0, x1, x2, y0, y1, y2 = (np.asarray(v, dtype=float) for v in (x0, x1, x2, y0, y1, y2))
    with np.errstate(invalid="ignore", divide="ignore"):
        d = (x0 - x1) * (x0 - x2) * (x1 - x2)
        a = (x2 * (y1 - y0) + x1 * (y0 - y2) + x0 * (y2 - y1)) / d
        b = (x2 ** 2 * (y0 - y1) + x1 ** 2 * (y2 - y0) + x0 ** 2 * (y1 - y2)) / d
        xv = -b / (2 * a)
        yv = y1 + a * (xv - x1) ** 2 + (b + 2 * a * x1) * (xv - x1)
    flat = ~np.isfinite(xv) | (a == 0)
    clipped = np.clip(xv, np.minimum(x0, x2), np.maximum(x0, x2))
    with np.errstate(invalid="ignore"):
        yc = y1 + a * (clipped - x1) ** 2 + (b + 2 * a * x1) * (clipped - x1)   # the parabola at the clipped point
    yv = np.where(flat, y1, np.where(clipped == xv, yv, yc))
    xv = np.where(flat, x1, clipped)
    return xv, yv


def window_extremum(y, x, lo, hi, *, kind="max"):
    """Extremum of ``y(x)`` for ``lo <= x <= hi`` with 3-point parabolic refinement.

    Parameters
    ----------
    y : array ``(..., N)``; NaN points are ignored.
    x : array ``(N,)``, strictly increasing.
    lo, hi : float, the search window (inclusive).
    kind : {"max", "min"}

    Returns
    -------
    Extremum
        When the discrete extremum is on the window's first or last point it is not refined and
        ``at_edge`` is True (the true extremum may lie outside the window). All-NaN windows give
        NaN position/value and index -1.
    """
    y = np.asarray(y)
    if y.dtype != np.float32:     # float32 stays: its maximum is at the same index as in float64
        y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    lead = y.shape[:-1]
    inwin = np.flatnonzero((x >= lo) & (x <= hi))
    if inwin.size == 0:
        nan = np.full(lead, np.nan)
        no = np.zeros(lead, bool)
        return Extremum(nan, nan.copy(), np.full(lead, -1), no, np.zeros(lead), no.copy(), no.copy())
    i0, i1 = inwin[0], inwin[-1]
    w = y[..., i0:i1 + 1]
    s = w if kind == "max" else -w
    if np.isfinite(np.sum(s)):
        # no NaN or inf anywhere (the sum would not be finite; an overflowing one takes the path
        # below): nothing to fill, every point valid; the same index, the same numbers
        valid_fraction = np.ones(lead)
        has = np.ones(lead, bool)
        k = np.argmax(s, axis=-1)
    else:
        finite = np.isfinite(s)
        valid_fraction = finite.mean(axis=-1)
        has = finite.any(axis=-1)
        filled = np.where(finite, s, -np.inf)
        k = np.argmax(filled, axis=-1)
    idx = k + i0
    at_edge = has & ((k == 0) | (k == w.shape[-1] - 1))
    km = np.clip(idx - 1, 0, y.shape[-1] - 1)
    kp = np.clip(idx + 1, 0, y.shape[-1] - 1)
    take = lambda j: np.take_along_axis(y, j[..., None], -1)[..., 0].astype(float)  # noqa: E731
    yc, ym, yp = take(idx), take(km), take(kp)
    xv, yv = parabola_vertex(x[km], x[idx], x[kp], ym, yc, yp)
    refine = has & ~at_edge & np.isfinite(ym) & np.isfinite(yp)
    position = np.where(refine, xv, np.where(has, x[idx], np.nan))
    value = np.where(refine, yv, np.where(has, yc, np.nan))
    n = y.shape[-1]
    next_to_gap = has & (((idx > 0) & ~np.isfinite(ym)) | ((idx < n - 1) & ~np.isfinite(yp)))
    at_pole = has & np.isclose(np.abs(x[idx]), 90.0)
    return Extremum(position, value, np.where(has, idx, -1), at_edge, valid_fraction, next_to_gap, at_pole)


def interp_at(y, x, pos):
    """Linear interpolation of ``y(x)`` at positions ``pos`` (shape ``(...)``); NaN outside or at NaN."""
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    pos = np.asarray(pos, dtype=float)
    ok = np.isfinite(pos) & (pos >= x[0]) & (pos <= x[-1])
    p = np.where(ok, pos, x[0])
    j = np.clip(np.searchsorted(x, p, side="right") - 1, 0, x.size - 2)
    t = (p - x[j]) / (x[j + 1] - x[j])
    ya = np.take_along_axis(y, j[..., None], -1)[..., 0]
    yb = np.take_along_axis(y, (j + 1)[..., None], -1)[..., 0]
    return np.where(ok, ya + t * (yb - ya), np.nan)
