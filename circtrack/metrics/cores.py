"""Jet cores in the latitude-pressure plane: where each jet's wind maximum is, how high and how fast,
in the zonal mean (and sectors) and at every longitude.

The core of a jet is the strongest local maximum of the zonal wind inside that jet's latitude-pressure
window (``[cores]`` in the config), refined by a parabola in latitude and one in log-pressure
(:mod:`circtrack.kernels.cores`). Two families share the definition:

- ``jet_cores``: the cores of the zonal-mean (or sector-mean) wind [u];
- ``jet_core_geography``: the cores at every longitude (or longitude band), found inside the read
  tasks (:func:`per_longitude_reducer`), summarised as the share of longitudes where the two jets are
  split and the longitudinal spread of each core's latitude and pressure.

References
----------
Peixoto & Oort (1992) Physics of Climate, ch. 7 (the zonal-mean wind in the latitude-pressure plane,
subtropical jet cores near 200 hPa); Lee & Kim (2003) JAS 60, 1490-1503 (subtropical and eddy-driven
jets, split and merged); Eichelberger & Hartmann (2007) J. Climate 20, 5149-5163 (the zonal jet
structure and its split and merged states); Koch, Wernli & Davies (2006) Int. J. Climatol. 26, 283-301
(jets located by the wind maximum in the vertical, at every longitude).
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import UsageError
from circtrack.kernels import cores as K
from circtrack.registry import Metric, Result, register_family

CORE_REF = ("Peixoto & Oort (1992) Physics of Climate, ch. 7; Lee & Kim (2003) JAS 60, 1490-1503; "
            "Eichelberger & Hartmann (2007) J. Climate 20, 5149-5163")
GEO_REF = CORE_REF + "; Koch, Wernli & Davies (2006) Int. J. Climatol. 26, 283-301"
JET_NAMES = {"subtropical": "subtropical jet", "eddy": "eddy-driven jet"}
WINDOW_TEXT = {"subtropical": "cores.subtropical_lat_window x cores.subtropical_pressure_window (10-45 deg "
                              "poleward, 100-400 hPa)",
               "eddy": "cores.eddy_lat_window x cores.eddy_pressure_window (30-70 deg poleward, 150-850 hPa)"}
CORE_RULE = ("strongest local maximum of [u] strictly inside {w} (a grid point at least as large as its 8 "
             "neighbours), refined by a 3-point parabola in latitude and one in ln p; NaN when the window's "
             "maximum sits on its edge with no interior maximum, when a neighbour is missing, when the window "
             "holds fewer than 3 levels, or below cores.min_core_speed_m_s")


def _core_metrics():
    out = []
    for jet, name in JET_NAMES.items():
        rule = CORE_RULE.format(w=WINDOW_TEXT[jet])
        merged = ("; a merged jet (both windows give the same grid point) is reported here with flag "
                  "ok;merged_jets" if jet == "subtropical" else
                  "; NaN with flag merged_jets when both windows give the same grid point (reported as the "
                  "subtropical core)")
        out += [
            Metric(f"{jet}_jet_core_lat", f"Latitude of the {name} core", "degrees_north", "hemisphere",
                   rule + merged, CORE_REF),
            Metric(f"{jet}_jet_core_pressure", f"Pressure of the {name} core", "hPa", "hemisphere",
                   "exp of the vertex of the parabola in ln p through the core "
                   "level and its neighbours at the core latitude", CORE_REF),
            Metric(f"{jet}_jet_core_speed", f"Speed of the {name} core", "m s-1", "hemisphere",
                   "[u] at the refined core: u_c + (vertex of the latitude parabola - u_c) + (vertex of the "
                   "ln p parabola - u_c)", CORE_REF),
        ]
    return out


METRICS = _core_metrics()
GEO_METRICS = [
    Metric("jet_core_split_share", "Share of longitudes where the subtropical and eddy-driven jets are split",
           "1", "hemisphere",
           "jet cores found at every longitude (or cores.longitude_band_deg band) of u as for the zonal mean; "
           "share of the longitudes with any core where both the subtropical and the eddy-driven core are "
           "found at different grid points; too_little_data when fewer than run.min_coverage of the "
           "longitudes have a core", GEO_REF),
] + [
    Metric(f"{jet}_jet_core_{q}_spread", f"Longitudinal spread of the {name} core {word}", unit, "hemisphere",
           f"population standard deviation over longitudes (or bands) of the per-longitude {name} core {word} "
           f"(found as for the zonal mean); longitudes without that core are left out, too_little_data when "
           f"fewer than run.min_coverage of them remain", GEO_REF)
    for jet, name in JET_NAMES.items()
    for q, word, unit in (("lat", "latitude", "degrees"), ("pressure", "pressure", "hPa"))
]


def windows(cfg):
    """``{"subtropical": (lat_window, p_window), "eddy": (...)}`` from ``[cores]``."""
    c = cfg["cores"]
    return {jet: (tuple(c[f"{jet}_lat_window"]), tuple(c[f"{jet}_pressure_window"])) for jet in K.JETS}


def _search(cfg):
    return {"min_fraction": cfg["run"]["min_window_fraction"], "min_speed": cfg["cores"]["min_core_speed_m_s"]}


def _levels(cfg):
    """Every level of ua (the core's pressure is sought in the data's own levels). Called while the
    run is planned, so the ``[cores]`` values are checked here, before any data is read."""
    c = cfg["cores"]
    if c["longitude_band_deg"] < 0 or c["longitude_band_deg"] > 360:
        raise UsageError(f"cores.longitude_band_deg = {c['longitude_band_deg']!r} in the config: give 0 (every "
                         "longitude) or a band width in degrees up to 360")
    for jet in K.JETS:
        lo, hi = c[f"{jet}_pressure_window"]
        if lo <= 0:
            raise UsageError(f"cores.{jet}_pressure_window = [{lo!r}, {hi!r}] in the config: pressures are hPa "
                             "above 0, e.g. [100.0, 400.0]")
    return {"ua": None}


def reason_flags(code):
    """Reason codes (float, as in kernels.cores) to flag strings; a negative code is ok with a note."""
    code = np.asarray(code)
    out = np.full(code.shape, "too_little_data", dtype=object)
    fin = np.isfinite(code)
    for i, name in enumerate(K.REASONS):
        out[fin & (code == i)] = name
    out[fin & (code == -K.MERGED)] = "ok;merged_jets"
    return out


@register_family("jet_cores", inputs=("ua",), levels=_levels, sectors=True, metrics=METRICS)
def compute(fields, cfg):
    out = {m.id: Result.empty(fields.n, 2) for m in METRICS}
    u = fields.masked("ua", cfg)                                  # (N, L, J)
    c = K.hemisphere_cores(u, fields.lat, fields.plev["ua"], windows(cfg), **_search(cfg))   # (N, 2, 2, 4)
    for q, jet in enumerate(K.JETS):
        flags = reason_flags(c[:, :, q, 3])
        for i, what in enumerate(("lat", "pressure", "speed")):
            r = out[f"{jet}_jet_core_{what}"]
            r.value[:] = c[:, :, q, i]
            r.flag[:] = flags
    return out


def per_longitude_reducer(slabs, plev, lon, masks, cfg, lat):
    """In-task: jet cores at every longitude (band), summarised per sector to ``(T, *extra, 2, 8, S)``
    (hemisphere x :data:`circtrack.kernels.cores.SUMMARY`)."""
    u = slabs["ua"]                                              # (T, *extra, L, J, I)
    # the summaries count cores and spread their positions: why a longitude has none is not asked
    cores, _, band = K.cores_by_longitude(u, lat, plev["ua"], lon, windows(cfg),
                                          band_width=cfg["cores"]["longitude_band_deg"], reasons=False,
                                          **_search(cfg))
    nb = cores.shape[-1]
    out = np.full(u.shape[:-3] + (2, len(K.SUMMARY), len(masks)), np.nan)
    for s, m in enumerate(masks):
        out[..., s] = K.summarize(cores, K.bands_in(m, band, nb))
    return out


@register_family("jet_core_geography", inputs=("ua",), levels=_levels, sectors=True, metrics=GEO_METRICS,
                 reducers={"jet_core_summary": per_longitude_reducer},
                 reducer_keys=("cores.subtropical_lat_window", "cores.subtropical_pressure_window",
                               "cores.eddy_lat_window", "cores.eddy_pressure_window", "cores.min_core_speed_m_s",
                               "cores.longitude_band_deg", "run.min_coverage", "run.min_window_fraction"))
def compute_geography(fields, cfg):
    out = {m.id: Result.empty(fields.n, 2) for m in GEO_METRICS}
    arr = fields.extras["jet_core_summary"]                       # (N, 2, 8)
    need = cfg["run"]["min_coverage"]
    pick = {"jet_core_split_share": (0, 1)}
    for q, jet in enumerate(K.JETS):
        pick[f"{jet}_jet_core_lat_spread"] = (2 + 3 * q, 4 + 3 * q)
        pick[f"{jet}_jet_core_pressure_spread"] = (3 + 3 * q, 4 + 3 * q)
    for mid, (col, share) in pick.items():
        enough = arr[:, :, share] >= need
        out[mid].value[:] = np.where(enough, arr[:, :, col], np.nan)
        out[mid].flag[:] = np.where(enough, "ok", "too_little_data")
    return out



# --------------------------------------------------------------------------- per-longitude table
TABLE_NAME = "jet_cores_by_longitude"
TABLE_METRICS = [f"{jet}_jet_core_{q}" for jet in K.JETS for q in ("lat", "pressure", "speed")]


def by_longitude_reducer(slabs, plev, lon, masks, cfg, lat):
    """In-task, only for ``track --cores-by-longitude``: the cores themselves per longitude (band),
    ``(T, *extra, 2, 2, 4, B, S)`` (hemisphere x jet x lat/pressure/speed/reason x band); the
    full circle only (the sectors' entries are NaN). A few numbers per longitude, never the fields."""
    u = slabs["ua"]
    cores, _, _ = K.cores_by_longitude(u, lat, plev["ua"], lon, windows(cfg),
                                       band_width=cfg["cores"]["longitude_band_deg"], **_search(cfg))
    out = np.full(cores.shape + (len(masks),), np.nan)
    out[..., 0] = cores
    return out


def band_centres(lon, cfg):
    """Longitudes (degrees east, 0..360) of the table's bands for a grid's longitudes."""
    return K.longitude_bands(lon, cfg["cores"]["longitude_band_deg"])[1]


def table_rows(cores):
    """``cores (N, 2, 2, 4, B)`` -> ``{metric: (value (N, 2, B), flag (N, 2, B))}`` for the table."""
    out = {}
    for q, jet in enumerate(K.JETS):
        flags = reason_flags(cores[:, :, q, 3, :])
        for i, what in enumerate(("lat", "pressure", "speed")):
            out[f"{jet}_jet_core_{what}"] = (cores[:, :, q, i, :], flags)
    return out
