"""Jet wobble and planetary waves: reductions along longitude before any zonal mean.

``jet_waviness`` is the spread over longitudes of the latitude of the lower-tropospheric westerly
maximum: at every longitude the eddy-driven jet is located like ``eddy_jet_lat`` (maximum of u at
waves.jet_level_hpa, 850 hPa, in jets.eddy_window, 3-point parabola) and the population standard
deviation of those latitudes is taken over the longitudes (of the sector, per sector). A zonally
straight jet gives 0; a jet meandering as ``lat0 + A sin(k lon)`` gives ``A / sqrt(2)``. Longitudes
where the maximum sits on the window edge or the window lacks data are left out.

``planetary_wave_K_amplitude`` is the amplitude of zonal wavenumber K (1, 2, 3) of the northward
wind at waves.level_hpa (300 hPa), ``v(lon) = [v] + sum_K A_K cos(K lon - theta_K)``, computed per
latitude and averaged with cos(lat) weights over waves.band (35-65 deg poleward). From time means
these are the stationary waves; from daily input they include the travelling ones. An amplitude
below waves.min_amplitude_m_s is noise (float rounding of a zonally uniform field), not a wave: its
value is kept with the flag ``weak_wave``, so no trend is fitted to it (the rule is this project's).

References
----------
Woollings, Hannachi & Hoskins (2010) QJRMS 136, 856-868 (a latitude of the eddy-driven jet and its
variability); Barnes & Polvani (2013) J. Climate 26, 7117-7135 (jet latitude from the 850 hPa wind
maximum with quadratic refinement); Cattiaux et al. (2016) GRL 43, 8259-8268 (waviness of the
midlatitude flow); Peixoto & Oort (1992) Physics of Climate, ch. 4 (zonal harmonic analysis).
"""

from __future__ import annotations

import numpy as np

from circtrack.kernels import zonal as Z
from circtrack.metrics.common import HEMISPHERES, add_note, missing
from circtrack.metrics.transport import _level_available
from circtrack.registry import Metric, Result, register_family

WAVINESS_REF = ("this project's index: the spread over longitudes of the jet latitude located as in Barnes & Polvani "
                "(2013) J. Climate 26, 7117-7135 (latitude of the [u]850 maximum); related measures of meandering: "
                "Woollings, Hannachi & Hoskins (2010) QJRMS 136, 856-868 (jet latitude and its variability), "
                "Cattiaux et al. (2016) GRL 43, 8259-8268 (sinuosity of geopotential contours, a different index)")
WAVE_REF = ("Peixoto & Oort (1992) Physics of Climate, ch. 4 (zonal harmonic analysis); the choice of v at 300 hPa "
            "and the band average are this project's")
WAVENUMBERS = (1, 2, 3)

WAVINESS_METRICS = [
    Metric("jet_waviness", "Meandering of the eddy-driven jet", "degrees", "hemisphere",
           "population standard deviation over longitudes of the per-longitude latitude of the maximum of u at "
           "waves.jet_level_hpa (850 hPa) in jets.eddy_window (15-70 deg poleward, 3-point parabola); longitudes "
           "whose maximum is not trusted (window edge, pole row, next to a missing latitude, or fewer than "
           "run.min_window_fraction valid latitudes) are left out (at least run.min_coverage of them must remain); "
           "u interpolated linearly in log-p when 850 hPa is absent (note interpolated_level); "
           "0 for a zonally straight jet, A/sqrt(2) for a jet at lat0 + A sin(k lon)", WAVINESS_REF),
]
WAVE_METRICS = [
    Metric(f"planetary_wave_{k}_amplitude", f"Amplitude of zonal wavenumber {k} of the upper-level northward wind",
           "m s-1", "hemisphere",
           f"amplitude A_{k} of v(lon) = [v] + sum_k A_k cos(k lon - theta_k) at waves.level_hpa (300 hPa), "
           "per latitude (discrete Fourier transform weighted by the longitude spacing), cos(lat)-weighted mean "
           "over waves.band (35-65 deg poleward); latitudes with any missing longitude are left out (at least "
           "run.min_window_fraction of the band's weight must remain); NaN (too_little_data) when the grid does not go "
           "round the circle; v interpolated linearly in log-p when 300 hPa is absent (note interpolated_level); "
           "an amplitude below waves.min_amplitude_m_s (0.05 m s-1, ours) is noise, not a wave: value kept, flag "
           "weak_wave (so trend, season and plot leave it out)",
           WAVE_REF)
    for k in WAVENUMBERS
]


# --------------------------------------------------------------------------- jet waviness
def jet_waviness_reducer(slabs, plev, lon, masks, cfg, lat):
    """In-task: per-longitude jet latitudes reduced to ``(T, *extra, 2, 3, S)``: for NH/SH the
    standard deviation and mean of the latitudes (poleward degrees) and the share of the band's
    longitudes where a jet was found."""
    # a lazy level: the per-longitude search reads only its window's rows (float32 as read at a level
    # of the file)
    u = Z.level_slab(slabs["ua"], plev["ua"], float(cfg["waves"]["jet_level_hpa"]),
                     tolerance=cfg["run"]["level_tolerance_hpa"])
    lead = slabs["ua"].shape[:-3]
    out = np.full(lead + (2, 3, len(masks)), np.nan)
    if u is None:
        out[..., 2, :] = 0.0
        return out
    for h, hemi in enumerate(HEMISPHERES):
        pos = Z.per_longitude_peak(u, lat, hemi, cfg["jets"]["eddy_window"],
                                   min_fraction=cfg["run"]["min_window_fraction"])   # (..., I)
        for s, m in enumerate(masks):
            std, mean, frac = Z.spread(pos, m)
            out[..., h, 0, s] = std
            out[..., h, 1, s] = mean
            out[..., h, 2, s] = frac
    return out


@register_family("jet_waviness", inputs=("ua",), sectors=True, metrics=WAVINESS_METRICS,
                 levels=lambda cfg: {"ua": [float(cfg["waves"]["jet_level_hpa"])]},
                 reducers={"jet_latitude_spread": jet_waviness_reducer},
                 reducer_keys=("waves.jet_level_hpa", "run.level_tolerance_hpa", "jets.eddy_window",
                               "run.min_window_fraction"))
def compute_waviness(fields, cfg):
    res = Result.empty(fields.n, 2)
    if not _level_available(fields.plev.get("ua"), cfg["waves"]["jet_level_hpa"], cfg["run"]["level_tolerance_hpa"]):
        missing([res], "level_missing")
        return {"jet_waviness": res}
    arr = fields.extras["jet_latitude_spread"]                   # (N, 2, 3)
    for h in range(2):
        enough = arr[:, h, 2] >= cfg["run"]["min_coverage"]
        res.value[:, h] = np.where(enough, arr[:, h, 0], np.nan)
        res.flag[:, h] = np.where(enough, "ok", "too_little_data")
    if fields.interpolated("ua", cfg["waves"]["jet_level_hpa"], cfg):
        add_note([res], "interpolated_level")
    return {"jet_waviness": res}


# --------------------------------------------------------------------------- planetary waves
def planetary_wave_reducer(slabs, plev, lon, masks, cfg):
    """In-task: amplitudes of zonal wavenumbers 1-3 of v at waves.level_hpa per latitude,
    ``(T, *extra, J, K, S)``; full circle only (the sectors' entries are NaN)."""
    # a lazy level: the amplitudes convert it one time step at a time
    v = Z.level_slab(slabs["va"], plev["va"], float(cfg["waves"]["level_hpa"]),
                     tolerance=cfg["run"]["level_tolerance_hpa"])
    lead = slabs["va"].shape[:-3]
    out = np.full(lead + (slabs["va"].shape[-2], len(WAVENUMBERS), len(masks)), np.nan)
    if v is not None and Z.covers_circle(lon):      # a regional grid has no zonal wavenumbers: NaN
        out[..., 0] = Z.fourier_amplitudes(v, lon, WAVENUMBERS)
    return out


@register_family("planetary_waves", inputs=("va",), metrics=WAVE_METRICS,
                 levels=lambda cfg: {"va": [float(cfg["waves"]["level_hpa"])]},
                 reducers={"wave_amplitudes": planetary_wave_reducer},
                 reducer_keys=("waves.level_hpa", "run.level_tolerance_hpa"))
def compute_waves(fields, cfg):
    w = cfg["waves"]
    out = {m.id: Result.empty(fields.n, 2) for m in WAVE_METRICS}
    if not _level_available(fields.plev.get("va"), w["level_hpa"], cfg["run"]["level_tolerance_hpa"]):
        missing(out.values(), "level_missing")
        return out
    amp = fields.extras["wave_amplitudes"]                       # (N, J, K)
    lat = np.asarray(fields.lat, float)
    for h, hemi in enumerate(HEMISPHERES):
        poleward = lat if hemi == "NH" else -lat
        band = (poleward >= w["band"][0]) & (poleward <= w["band"][1])
        wt = np.cos(np.deg2rad(lat[band]))
        a = amp[:, band, :]                                      # (N, Jb, K)
        ok = np.isfinite(a)
        wsum = (ok * wt[None, :, None]).sum(axis=1)
        share = wsum / max(wt.sum(), 1e-300)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = (np.where(ok, a, 0.0) * wt[None, :, None]).sum(axis=1) / wsum
        enough = share >= cfg["run"]["min_window_fraction"]
        for k, m in enumerate(WAVE_METRICS):
            out[m.id].value[:, h] = np.where(enough[:, k], mean[:, k], np.nan)
            weak = enough[:, k] & (mean[:, k] < w["min_amplitude_m_s"])
            out[m.id].flag[:, h] = np.where(enough[:, k], np.where(weak, "weak_wave", "ok"), "too_little_data")
    if fields.interpolated("va", w["level_hpa"], cfg):
        add_note(out.values(), "interpolated_level")
    return out
