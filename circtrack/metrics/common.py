"""Shared helpers for metric families: the zonal-mean field bundle and hemisphere views."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from circtrack.kernels.crossings import find_crossing
from circtrack.kernels.extrema import window_extremum
from circtrack.kernels.vertical import at_level, interpolated
from circtrack.registry import Result

HEMISPHERES = ("NH", "SH")


@dataclass
class Fields:
    """Zonal means handed to a family for N samples (time steps x extra members).

    ``mean[role]`` has shape ``(N, L, J)`` for roles on pressure levels and ``(N, J)`` otherwise:
    the mean over valid longitudes. ``coverage[role]`` (same shape) is the fraction of longitudes
    that were valid. ``lat`` is ascending (degrees_north); ``plev`` ascending in hPa (top first).
    """

    lat: np.ndarray
    plev: dict = field(default_factory=dict)      # role -> hPa levels of that role's array
    mean: dict = field(default_factory=dict)
    coverage: dict = field(default_factory=dict)
    sector: str = "zonal"
    extras: dict = field(default_factory=dict)    # other reductions (e.g. eddy covariances)
    info: dict = field(default_factory=dict)      # time step, detected units, ...

    @property
    def n(self):
        return next(iter(self.mean.values())).shape[0]

    def masked(self, role, cfg):
        """Zonal mean with points of too little longitude coverage set to NaN."""
        m, c = self.mean[role], self.coverage[role]
        return np.where(c >= cfg["run"]["min_coverage"], m, np.nan)

    def level(self, role, hpa, cfg, *, masked=True):
        """``(N, J)`` slice of a level role at ``hpa``; None when the level is not available."""
        arr = self.masked(role, cfg) if masked else self.mean[role]
        return at_level(arr, self.plev[role], hpa, tolerance=cfg["run"]["level_tolerance_hpa"])

    def interpolated(self, role, hpa, cfg):
        """True when :meth:`level` interpolates ``hpa`` between two of the role's levels."""
        plev = self.plev.get(role)
        return plev is not None and interpolated(plev, hpa, tolerance=cfg["run"]["level_tolerance_hpa"])


def hemisphere_view(lat, hemi):
    """Indices ordering one hemisphere from the equator to the pole, and |lat| along them."""
    lat = np.asarray(lat, dtype=float)
    if hemi == "NH":
        idx = np.flatnonzero(lat >= 0)
    else:
        idx = np.flatnonzero(lat <= 0)[::-1]
    return idx, np.abs(lat[idx])


def signed(hemi, poleward):
    """Poleward-positive latitude back to degrees_north."""
    return poleward if hemi == "NH" else -poleward


def peak(y, x, window, cfg, res_lat, res_val, h, *, kind="max"):
    """Windowed extremum of ``y (N, J)`` written into results column ``h``; returns the Extremum.

    Applies the shared extremum rule (:meth:`circtrack.kernels.extrema.Extremum.reason`): too few
    valid points, extremum on the window edge, on a pole row or next to a missing point -> NaN with
    that flag. ``res_val`` may be None. ``ext.flag`` holds the flag codes.
    """
    ext = window_extremum(y, x, window[0], window[1], kind=kind)
    ext.flag = ext.reason(cfg["run"]["min_window_fraction"])
    bad = ext.flag != "ok"
    for res, val in ((res_lat, ext.position), (res_val, ext.value)):
        if res is None:
            continue
        res.value[:, h] = np.where(bad, np.nan, val)
        res.flag[:, h] = ext.flag
    return ext


def crossing(res, h, hemi, y, x, ext, *, direction, stop=None, level=None):
    """Zero (or ``level``) crossing of ``y (N, J)`` poleward of the extremum ``ext`` into results
    column ``h`` (signed latitude), by the shared crossing rule (:func:`find_crossing`: never across
    missing points or onto a pole row). Where the extremum itself is not trusted, its flag is kept."""
    yy = y if level is None else y - np.asarray(level, float)[..., None]
    start = np.where(ext.flag == "ok", ext.index, -1)
    c = find_crossing(yy, x, start, stop=stop, direction=direction)
    res.value[:, h] = signed(hemi, c.position)
    res.flag[:, h] = np.where(ext.flag == "ok", c.reason, ext.flag)
    return c


def add_note(results, note, where=True, h=None):
    """Append ``;note`` to the flags of rows whose value is kept (finite), where ``where`` holds
    (boolean ``(N,)`` or scalar), in column ``h`` or all columns."""
    for r in results:
        cols = range(r.flag.shape[1]) if h is None else [h]
        for c in cols:
            sel = np.isfinite(r.value[:, c]) & np.broadcast_to(where, r.value[:, c].shape)
            r.flag[sel, c] = r.flag[sel, c].astype(str).astype(object) + ";" + note


def is_ok(flags):
    """Boolean array: the flag is ``ok``, with or without notes after ';'."""
    f = np.asarray(flags, dtype=object)
    return np.array([str(v).split(";", 1)[0] == "ok" for v in f.ravel()], dtype=bool).reshape(f.shape)


def missing(results, flag):
    """Set every result to NaN with ``flag``."""
    for r in results:
        r.value[:] = np.nan
        r.flag[:] = flag


def new_results(ids, n, scope_of):
    return {i: Result.empty(n, 2 if scope_of(i) == "hemisphere" else 1) for i in ids}


def method_choice(cfg, section, key, allowed):
    """The text setting ``[section] key``, refused with one line when it is not one of ``allowed``."""
    from circtrack.errors import UsageError

    m = cfg[section][key]
    if m not in allowed:
        raise UsageError(f"{section}.{key} = {m!r} in the config: expected one of "
                         + ", ".join(f'"{a}"' for a in allowed))
    return m
