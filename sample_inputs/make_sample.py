"""Make the invented demo data in sample_inputs/ (run from the repository root).

Scenario (our own, not a real dataset): "Model Q", a fictional coarse climate model, runs 20
years (2031-2050, noleap calendar) of monthly means. Its Hadley cells widen by about 0.4 degrees
per decade in each hemisphere, its cells and jets migrate with the seasons (poleward in local
summer, in both hemispheres), and the winter Hadley cell is the stronger one. Its Hadley edges and
eddy-driven jets wander from month to month (0.5 degrees, independent months). Its subtropical jet
is strongest at 200 hPa and its eddy-driven jet at 300 hPa (both weaker above, so each has a core
in the latitude-pressure plane), and travelling waves of zonal wavenumber 5 carry westerly momentum
poleward out of the subtropics into the mid-latitudes, most strongly at 250 hPa. Near the surface
(1000 hPa) it has trade winds, easterlies strongest near 13 degrees (about 6 m/s, stronger in
winter, poleward in summer), and polar easterlies poleward of about 65 degrees, beside the
surface westerlies under the eddy-driven jet; they are shallow (1000 hPa only, below the trade
inversion), so nothing above the surface changes. One file per year, like a model archive.

    python sample_inputs/make_sample.py
"""

import sys
from pathlib import Path

import numpy as np

from circtrack import synthetic as S

HERE = Path(__file__).parent
# the share of each jet's speed at each level (1000 ... 100 hPa): the subtropical jet grows with
# height to 200 hPa, the eddy-driven jet is strongest at 300 hPa; both weaken above
STJ_PROFILE = {1000: 0.0, 850: 0.0, 700: 0.23, 500: 0.54, 400: 0.69, 300: 0.85, 200: 1.0, 100: 0.55}
EDJ_PROFILE = {1000: 0.8, 850: 1.0, 700: 1.25, 500: 1.6, 400: 1.8, 300: 1.9, 200: 1.6, 100: 0.9}
EDDY_PROFILE = {1000: 0.2, 850: 0.35, 700: 0.55, 500: 0.8, 400: 0.9, 300: 1.0, 200: 0.9, 100: 0.5}
EDDY_WAVENUMBER = 5


def surface_easterlies(lat, phase):
    """``(T, J)`` m/s: the trade winds and polar easterlies added at 1000 hPa (negative = easterly)."""
    y = np.abs(lat)[None, :]
    out = np.zeros((phase.size, lat.size))
    for sign in (1.0, -1.0):                                        # NH, SH
        share = np.where(sign * lat > 0, 1.0, np.where(lat == 0, 0.5, 0.0))[None, :]   # the equator: half each
        summer = (sign * phase)[:, None]                            # +1 in the local summer
        trades = (6.0 - 1.5 * summer) * np.exp(-((y - (13.0 + 2.0 * summer)) / 10.0) ** 2)
        polar = 4.0 * np.exp(-((y - 80.0) / 12.0) ** 2)
        out -= share * (trades + polar)
    return out


def main():
    lat = np.arange(-88.0, 88.1, 4.0)
    lon = np.arange(0.0, 360.0, 20.0)
    plev = [1000, 850, 700, 500, 400, 300, 200, 100]
    times = S.monthly_times(2031, 20, calendar="noleap")
    years = np.array([t.year + (t.month - 0.5) / 12 for t in times]) - 2031
    phase = np.array([np.cos(2 * np.pi * (t.month - 7) / 12) for t in times])   # +1 in July, -1 in January
    widen = 0.04 * years                                                            # degrees per year
    # weather: the edges and jets wander from month to month (independent, 0.5 degrees), so trends
    # are fitted through scatter, as in any real record
    rng = np.random.default_rng(2031)
    wander = rng.normal(0.0, 0.5, (len(times), 4))                                 # NH edge, SH edge, NH jet, SH jet
    zeros = np.stack([-60 + 2 * phase - widen, -30 + 2 * phase - widen + wander[:, 1], 4 * phase,
                      28 + 2 * phase + widen + wander[:, 0], 60 + 2 * phase + widen], axis=1)
    params = dict(
        cell_zeros=zeros,
        hadley_peak=1.0e11 * (1.0 - 0.3 * phase),
        stj=np.stack([30 + 3 * phase, -30 + 2 * phase], axis=1),
        stj_speed=np.stack([30 - 8 * phase, 32 + 5 * phase], axis=1),
        edj=np.stack([45 + 4 * phase + 0.5 * widen + wander[:, 2], -50 + 2 * phase - 0.5 * widen + wander[:, 3]],
                     axis=1),
        edj_speed=np.stack([10 - 3 * phase, 13 + 2 * phase], axis=1),
    )
    ds = S.dataset(lat, lon, plev, times, **params)
    # the two jets with their own vertical profiles (the module's fields are linear in each speed)
    calm = np.zeros((len(times), 2))
    stj_only, _, _ = S.fields(lat, lon, plev, len(times), **{**params, "edj_speed": calm, "wave_amplitude": 0.0})
    edj_only, _, _ = S.fields(lat, lon, plev, len(times), **{**params, "stj_speed": calm, "wave_amplitude": 0.0})
    ua = ds["ua"].values.astype(np.float64) - stj_only - edj_only     # the module's stationary wave
    frac = np.clip((850.0 - np.asarray(plev, float)) / 650.0, 0.0, None)   # the module's subtropical jet profile
    stj_scale = np.array([STJ_PROFILE[p] / f if f > 0 else 0.0 for p, f in zip(plev, frac)])
    ua += stj_only * stj_scale[None, :, None, None]
    ua += edj_only * np.array([EDJ_PROFILE[p] for p in plev])[None, :, None, None]
    # travelling waves: u' and v' in phase north of the equator and in opposite phase south of it,
    # so [u'v'] is poleward momentum transport in both hemispheres, peaking near 35 degrees
    lam = np.deg2rad(lon)
    peak = 35.0 + 2.0 * phase                                       # poleward in northern summer
    env = np.exp(-((np.abs(lat)[None, :] - peak[:, None]) / 12.0) ** 2)             # (T, J)
    wave = np.cos(EDDY_WAVENUMBER * lam)                            # zero mean on the 18 longitudes
    level = np.array([EDDY_PROFILE[p] for p in plev])
    amp = 9.0 * level[None, :, None] * env[:, None, :]                              # (T, L, J), m s-1
    ua += (amp[..., None] * wave)
    va = ds["va"].values.astype(np.float64) + amp[..., None] * np.sign(lat)[None, None, :, None] * wave
    # near-surface easterlies at 1000 hPa: trades (strongest near 13 degrees, moving 2 degrees poleward
    # in local summer, stronger in local winter) and polar easterlies (strongest near 80 degrees)
    ua[:, plev.index(1000)] += surface_easterlies(lat, phase)[..., None]
    ds["ua"].values[...] = ua.astype(np.float32)
    ds["va"].values[...] = va.astype(np.float32)
    ds.attrs.update(title="Model Q invented demo run (synthetic; for circtrack examples only)",
                    source="circtrack sample_inputs/make_sample.py", Conventions="CF-1.8")
    enc = {v: {"zlib": True, "complevel": 6, "shuffle": True, "least_significant_digit": 3} for v in ("ua", "va")}
    enc.update(S.time_encoding("noleap", "days since 2031-01-01"))
    out = Path(sys.argv[1]) if len(sys.argv) > 1 else HERE / "model_q"
    out.mkdir(exist_ok=True)
    for year in range(2031, 2051):
        sel = np.array([t.year == year for t in times])
        ds.isel(time=sel).to_netcdf(out / f"model_q_monthly_{year}.nc", encoding=enc, engine="netcdf4")
    print(f"wrote 20 files to {out}")


if __name__ == "__main__":
    main()
