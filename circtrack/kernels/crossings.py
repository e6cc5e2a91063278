"""Zero crossings with linear interpolation, searched from a start index in one direction.

The rule every metric follows (:func:`find_crossing`): the search walks from the start point
towards larger index and never steps over a missing point. The first sign change is the crossing:
a strictly positive value followed by a strictly negative one (for ``direction="down"``; the
reverse for ``"up"``), either as neighbours (the zero interpolated linearly between them) or with
exact zeros between them (the zero is the first of them). Values that fall to exactly zero and
stay there, or turn back, touch zero without changing sign (quantized data decaying to 0.000):
no crossing. If the walk meets a missing point first, the zero may
lie hidden in the gap and the answer is NaN with the reason ``crossing_in_data_gap``; a sign change
in the segment that ends on a pole row (|x| = 90, where a zonal mean of a wind component is not
defined) gives NaN with ``crossing_at_pole_row``; no sign change up to ``stop`` (or the end of the
data) gives NaN with ``no_sign_change_in_window``. The reason codes are the CSV flags (flags.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

OK = "ok"
NO_SIGN_CHANGE = "no_sign_change_in_window"
IN_GAP = "crossing_in_data_gap"
AT_POLE = "crossing_at_pole_row"


@dataclass
class Crossing:
    """Result of :func:`find_crossing`; both fields have the leading shape ``(...)``."""

    position: np.ndarray   # interpolated position, NaN unless reason is "ok"
    reason: np.ndarray     # object array of flag codes: ok, no_sign_change_in_window, crossing_in_data_gap, crossing_at_pole_row


def find_crossing(y, x, start, *, stop=None, direction="down", pole=90.0):
    """The first zero crossing of ``y(x)`` at or after index ``start``, with the reason when there is none.

    Parameters
    ----------
    y : array ``(..., N)``; NaN marks missing points.
    x : array ``(N,)``, strictly increasing.
    start : int array ``(...)`` or int; negative means "no start" (NaN, reason no_sign_change_in_window).
    stop : float or array ``(...)``, optional; the crossing must lie at ``x <= stop``.
    direction : {"down", "up", "any"}; ``"down"``: strictly positive to strictly negative, perhaps
        through exact zeros (a maximum's poleward zero), ``"up"``: negative to positive, ``"any"``: either.
    pole : |x| of a pole row (90 for latitudes); None when ``x`` is no latitude.

    Returns
    -------
    Crossing
        ``x_k + (x_{k+1} - x_k) y_k / (y_k - y_{k+1})`` in the first segment ``k >= start`` whose
        end points are valid and change sign (or that ends exactly on zero, when the first value
        after the zeros has the opposite sign: then ``x_{k+1}``), when no missing point comes
        before it; see the module docstring for the reasons.
    """
    y = np.asarray(y, dtype=float)
    x = np.asarray(x, dtype=float)
    n = y.shape[-1]
    lead = y.shape[:-1]
    start = np.broadcast_to(np.asarray(start), lead)
    pos = np.full(lead, np.nan)
    reason = np.full(lead, NO_SIGN_CHANGE, dtype=object)
    if n < 2:
        return Crossing(pos, reason)
    if pole is not None and np.isclose(abs(x[-1]), pole):
        # the zonal mean of a wind component on a pole row is zero up to rounding (the longitudes cancel,
        # e.g. 4e-10 m/s in float64 from float32 data): a value that small counts as zero there
        scale = np.nanmax(np.abs(y), axis=-1, initial=0.0)
        y = y.copy()
        y[..., -1] = np.where(np.abs(y[..., -1]) <= 1e-6 * scale, 0.0, y[..., -1])
    y0, y1 = y[..., :-1], y[..., 1:]
    if direction not in ("down", "up", "any"):
        raise ValueError(f"direction must be down, up or any, not {direction!r}")
    # the sign of the first value at or after each point that is not exactly zero (a missing point
    # counts: its sign is NaN, so a run of zeros ending in a gap confirms nothing); beyond the data:
    # 0, or -1/+1 on a pole row whose value is zero (a wind's zonal mean there is zero by
    # construction, so a run of zeros onto it may hide a sign change: crossing_at_pole_row below)
    ahead, to_pole = _sign_ahead(y, bool(pole is not None and np.isclose(abs(x[-1]), pole)))
    nxt = ahead[..., 1:]
    with np.errstate(invalid="ignore"):
        down = (y0 > 0) & (((y1 < 0)) | ((y1 == 0) & (nxt < 0)))
        up = (y0 < 0) & (((y1 > 0)) | ((y1 == 0) & (nxt > 0)))
    seg = down if direction == "down" else up if direction == "up" else down | up
    k = np.arange(n - 1)
    searched = k >= start[..., None]
    if stop is not None:
        searched = searched & (x[:-1] <= np.asarray(stop, float)[..., None])
    seg &= searched
    gap = searched & ~np.isfinite(y1)                  # stepping from k to k+1 meets a missing point
    big = n + 1
    kc = np.where(seg.any(axis=-1), np.argmax(seg, axis=-1), big)
    kg = np.where(gap.any(axis=-1), np.argmax(gap, axis=-1), big)
    found = (kc < kg) & (start >= 0)
    kk = np.clip(np.where(found, kc, 0), 0, n - 2)
    ya = np.take_along_axis(y0, kk[..., None], -1)[..., 0]
    yb = np.take_along_axis(y1, kk[..., None], -1)[..., 0]
    xa, xb = x[kk], x[kk + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        p = xa + (xb - xa) * ya / (ya - yb)
    if stop is not None:
        found &= p <= np.asarray(stop, float)
    onto_pole = np.take_along_axis(to_pole[..., 1:], kk[..., None], -1)[..., 0]
    at_pole = found & ((np.isclose(np.abs(xb), pole) if pole is not None else False) | onto_pole)
    pos = np.where(found & ~at_pole, p, np.nan)
    reason = np.where(found & ~at_pole, OK, reason)
    reason = np.where(at_pole, AT_POLE, reason)
    reason = np.where((kg < kc) & (kg < big) & (start >= 0), IN_GAP, reason)
    return Crossing(pos, reason)


def _sign_ahead(y, pole_row):
    """``(ahead, to_pole)``, both ``(..., N)``: the sign of the first value at or after each index that
    is not exactly 0 (NaN for a missing one; 0 where only zeros follow), and whether only zeros
    follow up to a pole row (``pole_row``: the last point is one). A run of zeros onto a pole row
    may hide a sign change (a wind's zonal mean there is zero by construction), so there ``ahead``
    is the opposite of the sign before the run: a possible crossing, reported at the pole row."""
    sgn = np.sign(y)                                     # NaN stays NaN
    n = y.shape[-1]
    idx = np.where(sgn != 0, np.arange(n), n)            # NaN != 0 is True: a gap stops the run
    first = np.minimum.accumulate(idx[..., ::-1], axis=-1)[..., ::-1]
    padded = np.concatenate([sgn, np.zeros(sgn.shape[:-1] + (1,))], axis=-1)
    ahead = np.take_along_axis(padded, first, axis=-1)
    to_pole = (first == n) & pole_row
    if pole_row:
        run = np.argmax(first == n, axis=-1)             # where the final run of zeros starts
        lead = np.take_along_axis(padded, np.maximum(run - 1, 0)[..., None], -1)
        lead = np.where((run > 0)[..., None], lead, 0.0)
        ahead = np.where(to_pole, -lead, ahead)
    return ahead, to_pole


def first_crossing(y, x, start, *, stop=None, direction="down"):
    """Position of :func:`find_crossing` (NaN when there is none, whatever the reason)."""
    return find_crossing(y, x, start, stop=stop, direction=direction, pole=None).position


def find_level_crossing(y, x, start, level, *, direction="down", stop=None, pole=90.0):
    """:func:`find_crossing` of ``y = level`` (array ``(...)`` or scalar): the same rules applied to
    ``y - level``."""
    level = np.asarray(level, dtype=float)
    return find_crossing(np.asarray(y, float) - level[..., None], x, start,
                         direction=direction, stop=stop, pole=pole)


def level_crossing(y, x, start, level, *, direction="down", stop=None):
    """Position of :func:`find_level_crossing` (NaN when there is none, whatever the reason)."""
    return find_level_crossing(y, x, start, level, direction=direction, stop=stop, pole=None).position


def reverse(y, x, index):
    """Mirror a search: return ``(y[..., ::-1], -x[::-1], n-1-index)`` to search towards smaller x.

    Positions found on the mirrored grid are mapped back by negation.
    """
    n = np.shape(y)[-1]
    return np.asarray(y)[..., ::-1], -np.asarray(x, float)[::-1], np.where(np.asarray(index) >= 0, n - 1 - np.asarray(index), -1)
