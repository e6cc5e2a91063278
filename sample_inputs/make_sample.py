"""Make the invented demo data in sample_inputs/ (run from the repository root).

Scenario (our own, not a real dataset): "Model Q", a fictional coarse climate model, runs 20
years (2031-2050, noleap calendar) of monthly means. Its Hadley cells widen by about 0.4 degrees
per decade in each hemisphere, its cells and jets migrate with the seasons (poleward in local
summer, in both hemispheres), and the winter Hadley cell is the stronger one. One file per year, like a model archive.

    python sample_inputs/make_sample.py
"""

from pathlib import Path

import numpy as np

from circtrack import synthetic as S

HERE = Path(__file__).parent


def main():
    lat = np.arange(-88.0, 88.1, 4.0)
    lon = np.arange(0.0, 360.0, 20.0)
    plev = [1000, 850, 700, 500, 400, 300, 200, 100]
    times = S.monthly_times(2031, 20, calendar="noleap")
    years = np.array([t.year + (t.month - 0.5) / 12 for t in times]) - 2031
    phase = np.array([np.cos(2 * np.pi * (t.month - 7) / 12) for t in times])   # +1 in July, -1 in January
    widen = 0.04 * years                                                            # degrees per year
    zeros = np.stack([-60 + 2 * phase - widen, -30 + 2 * phase - widen, 4 * phase,
                      28 + 2 * phase + widen, 60 + 2 * phase + widen], axis=1)
    params = dict(
        cell_zeros=zeros,
        hadley_peak=1.0e11 * (1.0 - 0.3 * phase),
        stj=np.stack([30 + 3 * phase, -30 + 2 * phase], axis=1),
        stj_speed=np.stack([30 - 8 * phase, 32 + 5 * phase], axis=1),
        edj=np.stack([45 + 4 * phase + 0.5 * widen, -50 + 2 * phase - 0.5 * widen], axis=1),
        edj_speed=np.stack([10 - 3 * phase, 13 + 2 * phase], axis=1),
    )
    ds = S.dataset(lat, lon, plev, times, **params)
    ds.attrs.update(title="Model Q invented demo run (synthetic; for circtrack examples only)",
                    source="circtrack sample_inputs/make_sample.py", Conventions="CF-1.8")
    enc = {v: {"zlib": True, "complevel": 6, "shuffle": True, "least_significant_digit": 3} for v in ("ua", "va")}
    enc.update(S.time_encoding("noleap", "days since 2031-01-01"))
    out = HERE / "model_q"
    out.mkdir(exist_ok=True)
    for year in range(2031, 2051):
        sel = np.array([t.year == year for t in times])
        ds.isel(time=sel).to_netcdf(out / f"model_q_monthly_{year}.nc", encoding=enc, engine="netcdf4")
    print(f"wrote 20 files to {out}")


if __name__ == "__main__":
    main()
