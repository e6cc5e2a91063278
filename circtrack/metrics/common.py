"""Shared helpers for metric families: the zonal-mean field bundle and hemisphere views."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from circtrack.kernels.extrema import window_extremum
from circtrack.kernels.vertical import at_level
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

    Applies the shared quality rules: too few valid points -> NaN ``too_little_data``; extremum
    on the window edge -> NaN ``extremum_at_window_edge``. ``res_val`` may be None.
    """
    ext = window_extremum(y, x, window[0], window[1], kind=kind)
    bad_data = ext.valid_fraction < cfg["run"]["min_window_fraction"]
    for res, val in ((res_lat, ext.position), (res_val, ext.value)):
        if res is None:
            continue
        res.value[:, h] = val
        res.flag[:, h] = "ok"
        res.flag[ext.at_edge, h] = "extremum_at_window_edge"
        res.flag[bad_data, h] = "too_little_data"
        res.value[ext.at_edge | bad_data, h] = np.nan
    return ext


def missing(results, flag):
    """Set every result to NaN with ``flag``."""
    for r in results:
        r.value[:] = np.nan
        r.flag[:] = flag


def new_results(ids, n, scope_of):
    return {i: Result.empty(n, 2 if scope_of(i) == "hemisphere" else 1) for i in ids}
