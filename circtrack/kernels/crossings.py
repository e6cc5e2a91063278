"""Zero crossings with linear interpolation, searched from a start index in one direction."""

from __future__ import annotations

import numpy as np


def first_crossing(y, x, start, *, stop=None, direction="down"):
    """Find the first zero crossing of ``y(x)`` at or after index ``start`` (towards larger index).

    Parameters
    ----------
    y : array ``(..., N)``
        Values on the grid ``x``. NaN points never take part in a crossing.
    x : array ``(N,)``
        Strictly increasing coordinate.
    start : int array ``(...)`` or int
        Index where the search begins (inclusive). Negative values mean "no start" and give NaN.
    stop : float, optional
        The crossing must lie at ``x <= stop``.
    direction : {"down", "up", "any"}
        ``"down"``: from positive to non-positive values (a maximum's poleward zero);
        ``"up"``: from negative to non-negative; ``"any"``: either.

    Returns
    -------
    pos : array ``(...)``
        Linearly interpolated position ``x_k + (x_{k+1}-x_k) * y_k / (y_k - y_{k+1})``; NaN if none.

    Notes
    -----
    A crossing lies in segment ``k`` (between ``x_k`` and ``x_{k+1}``) when ``y_k`` and ``y_{k+1}`` have
    opposite signs, or ``y_{k+1}`` is exactly zero. The first such segment with ``k >= start`` wins.
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    n = y.shape[-1]
    lead = y.shape[:-1]
    start = np.broadcast_to(np.asarray(start), lead)
    if n < 2:
        return np.full(lead, np.nan)
    y0, y1 = y[..., :-1], y[..., 1:]
    with np.errstate(invalid="ignore"):
        if direction == "down":
            seg = (y0 > 0) & (y1 <= 0)
        elif direction == "up":
            seg = (y0 < 0) & (y1 >= 0)
        elif direction == "any":
            seg = ((y0 > 0) & (y1 <= 0)) | ((y0 < 0) & (y1 >= 0))
        else:
            raise ValueError(f"direction must be down, up or any, not {direction!r}")
    k = np.arange(n - 1)
    seg &= k >= start[..., None]
    if stop is not None:
        seg &= x[:-1] <= stop
    found = seg.any(axis=-1) & (start >= 0)
    kk = np.argmax(seg, axis=-1)
    ya = np.take_along_axis(y0, kk[..., None], -1)[..., 0]
    yb = np.take_along_axis(y1, kk[..., None], -1)[..., 0]
    xa, xb = x[kk], x[kk + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        pos = xa + (xb - xa) * ya / (ya - yb)
    if stop is not None:
        found &= pos <= stop
    return np.where(found, pos, np.nan)


def level_crossing(y, x, start, level, *, direction="down", stop=None):
    """First crossing of ``y = level`` (array ``(...)`` or scalar) at or after ``start``.

    Same rules as :func:`first_crossing` applied to ``y - level``.
    """
    level = np.asarray(level, dtype=float)
    return first_crossing(np.asarray(y, float) - level[..., None], x, start,
                          direction=direction, stop=stop)


def reverse(y, x, index):
    """Mirror a search: return ``(y[..., ::-1], -x[::-1], n-1-index)`` to search towards smaller x.

    Positions found on the mirrored grid are mapped back by negation.
    """
    n = np.shape(y)[-1]
    return np.asarray(y)[..., ::-1], -np.asarray(x, float)[::-1], np.where(np.asarray(index) >= 0, n - 1 - np.asarray(index), -1)
