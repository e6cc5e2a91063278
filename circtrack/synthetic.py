"""Synthetic circulations with answers known in closed form, for tests, demos and benchmarks.

The mass streamfunction is prescribed as ``psi(lat, p, t) = S(lat, t) P(p)`` with
``S = A cos(lat)^2 exp(-(lat/30)^2) prod_i (lat - z_i)`` and ``P = sin^2(pi (p - p_t) / (p_s - p_t))`` between
``p_t`` (``top_hpa``, 50 hPa) and the surface, ``P = 0`` above: the circulation lives below ``p_t`` and psi vanishes at
both ends of that column with ``[v]`` going smoothly to 0 at ``p_t`` (no flow above, no net mass flux: the column
rules of kernels/vertical.py hold for data from ``p_t`` down, and nearly so for data whose top is a little lower,
e.g. 100 hPa, where 2.7 % of the peak is above the data). The zeros of psi at any level
are exactly the chosen latitudes ``z_i`` (southern Ferrel edge, southern Hadley edge, cell
boundary, northern Hadley edge, northern Ferrel edge). The northward wind follows from
``[v] = g / (2 pi a cos(lat)) dpsi/dp``; any vertical quadrature of ``[v]`` returns a multiple of
``S(lat)``, so the zero crossings do not depend on the number of levels.

The zonal wind is a sum of Gaussians ``U exp(-((lat - c)/w)^2)``: a barotropic eddy-driven jet at
every level (latitude ``c_e``, half-maximum width ``2 w sqrt(ln 2)``) and a subtropical jet that grows
linearly from 0 at 850 hPa to its full speed at 200 hPa, so ``[u]200 - [u]850`` peaks exactly at ``c_s``.

Longitudinal structure is a zonal wavenumber-``k`` wave with zero zonal mean on a regular grid, so
the zonal means are the analytic profiles.
"""

from __future__ import annotations

import cftime
import numpy as np
import xarray as xr

from circtrack.constants import EARTH_RADIUS, GRAVITY

DEFAULTS = dict(
    cell_zeros=(-60.0, -30.0, 5.0, 28.0, 62.0),   # SH Ferrel edge, SH Hadley edge, boundary, NH edge, NH Ferrel edge
    hadley_peak=1.0e11,                            # kg s-1, |psi| scale of the NH Hadley cell
    stj=(30.0, -32.0), stj_speed=(30.0, 35.0), stj_width=6.0,
    edj=(45.0, -50.0), edj_speed=(12.0, 15.0), edj_width=10.0,
    wave_amplitude=5.0, wavenumber=3, surface_hpa=1000.0, top_hpa=50.0,
)


def gaussian(lat, center, width):
    return np.exp(-(((np.asarray(lat) - center) / width) ** 2))


def cell_shape(lat, zeros):
    """``cos(lat) exp(-(lat/30)^2) prod(lat - z)`` (the streamfunction shape divided by cos(lat)), ``(T, J)``.

    The Gaussian envelope keeps the Ferrel and polar cells weaker than the Hadley cells; it has no
    zeros, so the cell edges stay exactly at ``z``."""
    lat = np.asarray(lat, dtype=float)
    zeros = np.atleast_2d(np.asarray(zeros, dtype=float))          # (T, 5)
    prod = np.prod(lat[None, :, None] - zeros[:, None, :], axis=-1)
    return (np.cos(np.deg2rad(lat)) * np.exp(-((lat / 30.0) ** 2)))[None, :] * prod


def fields(lat, lon, plev_hpa, ntime=1, **params):
    """Arrays ``ua, va`` of shape ``(T, L, J, I)`` (float64) and the parameters used.

    Any parameter in :data:`DEFAULTS` may be an array with a leading time axis to make the
    circulation change with time.
    """
    p = {**DEFAULTS, **params}
    lat = np.asarray(lat, float)
    lon = np.asarray(lon, float)
    plev = np.asarray(plev_hpa, float)
    zeros = np.broadcast_to(np.asarray(p["cell_zeros"], float), (ntime, 5))
    shape_c = cell_shape(lat, zeros)                                      # (T, J)
    # normalise so the northern Hadley cell's |psi| peak is hadley_peak at P = 1
    nh = (lat > zeros[:, 2:3]) & (lat < zeros[:, 3:4])
    cosl = np.cos(np.deg2rad(lat))
    s_full = shape_c * cosl[None, :]
    norm = np.where(nh, np.abs(s_full), 0).max(axis=1, keepdims=True)
    amp = np.broadcast_to(np.asarray(p["hadley_peak"], float), (ntime,))[:, None] / norm
    ps = p["surface_hpa"] * 100.0
    pt = p["top_hpa"] * 100.0                                            # the top of the circulation, Pa
    arg = np.pi * (plev * 100.0 - pt) / (ps - pt)
    dpdp = np.where(plev * 100.0 > pt, np.pi / (ps - pt) * np.sin(2.0 * arg), 0.0)   # dP/dp per Pa, (L,)
    v_zm = (GRAVITY / (2 * np.pi * EARTH_RADIUS)) * (amp * shape_c)[:, None, :] * dpdp[None, :, None]

    def hemi_param(name):
        a = np.asarray(p[name], float)
        if a.ndim == 1:
            return np.broadcast_to(a, (ntime, 2))
        return a                                                          # (T, 2)

    stj_c, stj_u = hemi_param("stj"), hemi_param("stj_speed")
    edj_c, edj_u = hemi_param("edj"), hemi_param("edj_speed")
    frac = np.clip((850.0 - plev) / 650.0, 0.0, None)                    # 0 at 850 hPa, 1 at 200 hPa
    u_zm = np.zeros((ntime, plev.size, lat.size))
    for h in range(2):
        g_s = stj_u[:, h:h + 1] * gaussian(lat[None, :], stj_c[:, h:h + 1], p["stj_width"])
        g_e = edj_u[:, h:h + 1] * gaussian(lat[None, :], edj_c[:, h:h + 1], p["edj_width"])
        u_zm += g_s[:, None, :] * frac[None, :, None] + g_e[:, None, :]
    wave = np.cos(p["wavenumber"] * np.deg2rad(lon))                      # zero mean on a regular circle
    wave -= wave.mean()
    env = cosl ** 2
    ua = u_zm[..., None] + p["wave_amplitude"] * env[None, None, :, None] * wave
    va = v_zm[..., None] + 0.5 * p["wave_amplitude"] * env[None, None, :, None] * np.roll(wave, 1)
    return ua, va, p


def monthly_times(start_year, nyears, calendar="standard"):
    return np.array([cftime.datetime(y, m, 15, calendar=calendar)
                     for y in range(start_year, start_year + nyears) for m in range(1, 13)])


def dataset(lat, lon, plev_hpa, times, dtype="float32", **params):
    """CF-conforming dataset with ``ua`` and ``va`` on pressure levels (hPa) from :func:`fields`."""
    ua, va, _ = fields(lat, lon, plev_hpa, ntime=len(times), **params)
    coords = {
        "time": ("time", np.asarray(times), {"standard_name": "time", "axis": "T"}),
        "plev": ("plev", np.asarray(plev_hpa, float), {"standard_name": "air_pressure", "units": "hPa",
                                                      "positive": "down", "axis": "Z"}),
        "lat": ("lat", np.asarray(lat, float), {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}),
        "lon": ("lon", np.asarray(lon, float), {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}),
    }
    dims = ("time", "plev", "lat", "lon")
    ds = xr.Dataset({
        "ua": (dims, ua.astype(dtype), {"standard_name": "eastward_wind", "units": "m s-1"}),
        "va": (dims, va.astype(dtype), {"standard_name": "northward_wind", "units": "m s-1"}),
    }, coords=coords)
    return ds


def time_encoding(calendar="standard", units="days since 1850-01-01"):
    return {"time": {"units": units, "calendar": calendar, "dtype": "float64"}}
