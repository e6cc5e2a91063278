"""Pictures of jet cores: markers for the latitude-pressure section, and the per-longitude strip.

- :func:`mark_cores` draws the detected cores (latitude and pressure) of the zonal-mean jets on a
  section's axes and returns legend handles (called from :mod:`circtrack.section`).
- :func:`strip_figure` draws the per-longitude cores written by ``circtrack track
  --cores-by-longitude FILE``: longitude on x, core latitude on y, core speed as colour, one marker
  per jet, for one time step or the mean over the file's time steps.
"""

from __future__ import annotations

import numpy as np

from circtrack.errors import InputError, UsageError

JETS = (("subtropical", "subtropical jet core", "o"), ("eddy", "eddy-driven jet core", "^"))
SECTION_IDS = [f"{j}_jet_core_{q}" for j, _, _ in JETS for q in ("lat", "pressure", "speed")]


SHORT = {"extremum_at_window_edge": "edge", "merged_jets": "merged", "weak_jet_core": "weak",
         "too_little_data": "no data", "column_too_short": "few levels",
         "extremum_next_to_missing_data": "gap"}


def mark_cores(ax, rows):
    """Mark the cores in ``rows`` ({(metric, hemisphere): (value, flag)}) at (latitude, pressure).

    Returns legend handles, one per jet, naming the cores found (or why none) per hemisphere."""
    from matplotlib.lines import Line2D

    handles = []
    for jet, name, marker in JETS:
        said = []
        for hemi in ("NH", "SH"):
            lat, flag = rows.get((f"{jet}_jet_core_lat", hemi), (float("nan"), "missing"))
            p = rows.get((f"{jet}_jet_core_pressure", hemi), (float("nan"), ""))[0]
            if np.isfinite(lat) and np.isfinite(p):
                ax.plot([lat], [p], marker, color="white", ms=11, mec="k", mew=1.6, zorder=6)
                said.append(f"{hemi} {lat:.1f}°/{p:.0f} hPa")
            else:
                said.append(f"{hemi} none ({SHORT.get(flag, flag)})")
        handles.append(Line2D([], [], ls="", marker=marker, color="white", mec="k", mew=1.6, ms=9,
                              label=f"{name.replace(' jet', '')}: {', '.join(said)}"))
    return handles


TABLE_COLUMNS = ("source", "time", "hemisphere", "lon", "metric", "value", "units", "flag")


def load_table(path):
    """Read the per-longitude table written by ``track --cores-by-longitude``; one-line errors."""
    import os

    import pandas as pd

    hint = "give the file written by 'circtrack track ... --cores-by-longitude FILE.csv'"
    if not os.path.isfile(path):
        raise InputError(f"{path}: no such file; {hint}")
    try:
        df = pd.read_csv(path, dtype={"time": str, "source": str, "hemisphere": str, "metric": str, "flag": str},
                         keep_default_na=False, na_values={"value": ["NaN"]})
    except Exception as e:            # pandas raises several types for unreadable text
        raise InputError(f"{path}: not a readable CSV ({type(e).__name__}); {hint}")
    missing = [c for c in TABLE_COLUMNS if c not in df.columns]
    if missing:
        raise InputError(f"{path}: not a per-longitude jet-core table (no column {', '.join(missing)}); {hint}")
    try:
        df["lon"] = df["lon"].astype(float)
        df["value"] = df["value"].astype(float)
    except ValueError:
        raise InputError(f"{path}: the lon and value columns must hold numbers; {hint}")
    return df


def check_strip_options(strip, given):
    """``plot --cores-strip``: the options that belong to other pictures are refused."""
    used = [name for name, value in given.items() if value]
    if used:
        raise UsageError(f"{', '.join(used)}: not with --cores-strip {strip} (it takes only -o and --time)")


def strip_data(df, time=None):
    """Per-longitude core latitude and speed from the per-longitude table ``df`` (pandas).

    ``time``: one time step (as in the ``time`` column), else the mean over all time steps (and
    members) of the cores found. Returns ``({jet: DataFrame(hemisphere, lon, lat, speed, n)}, title)``
    where ``n`` counts the time steps with a core at that longitude.
    """
    import pandas as pd

    need = {"time", "hemisphere", "lon", "metric", "value", "flag"}
    missing = need - set(df.columns)
    if missing:
        raise InputError(f"not a per-longitude jet-core table: no column(s) {', '.join(sorted(missing))}; "
                         "write one with 'circtrack track ... --cores-by-longitude FILE.csv'")
    times = sorted(df["time"].astype(str).unique())
    if time is not None:
        if time not in times:
            raise UsageError(f"--time {time}: no such time step in the table; it has {len(times)} from "
                             f"{times[0] if times else '-'} to {times[-1] if times else '-'}")
        df = df[df["time"].astype(str) == time]
        title = time
    else:
        title = f"mean of {len(times)} time step(s)" + (f", {times[0]} to {times[-1]}" if len(times) > 1 else
                                                        (f", {times[0]}" if times else ""))
    ok = df["flag"].astype(str).str.split(";", n=1).str[0] == "ok"
    df = df[ok & np.isfinite(df["value"].astype(float))]
    out = {}
    for jet, _, _ in JETS:
        lat = df[df["metric"] == f"{jet}_jet_core_lat"]
        spd = df[df["metric"] == f"{jet}_jet_core_speed"]
        keys = [k for k in df.columns if k not in ("metric", "value", "units", "flag")]
        both = lat.merge(spd, on=keys, suffixes=("_lat", "_speed"))
        g = both.groupby(["hemisphere", "lon"])
        out[jet] = pd.DataFrame({"lat": g["value_lat"].mean(), "speed": g["value_speed"].mean(),
                                 "n": g["value_lat"].size()}).reset_index()
    if not any(len(v) for v in out.values()):
        raise InputError("no usable jet cores in the table (no row with flag ok)")
    return out, title


def strip_figure(df, time=None, source=""):
    """The strip: core latitude against longitude, speed as colour, for both jets and hemispheres."""
    import matplotlib.pyplot as plt
    from matplotlib.colors import Normalize
    from matplotlib.lines import Line2D

    from circtrack.plots import STYLE

    data, title = strip_data(df, time)
    speeds = np.concatenate([d["speed"].to_numpy(float) for d in data.values()])
    norm = Normalize(vmin=float(np.floor(np.nanmin(speeds) / 5) * 5), vmax=float(np.ceil(np.nanmax(speeds) / 5) * 5))
    with plt.rc_context({**STYLE, "font.size": 11, "axes.titlesize": 12, "axes.labelsize": 11, "legend.fontsize": 10}):
        fig, ax = plt.subplots(figsize=(9, 5.6), layout="constrained")
        sc = None
        lons = np.unique(df["lon"].to_numpy(float))            # every band of the table, with a core or not
        step = float(np.median(np.diff(lons))) if lons.size > 1 else 360.0
        for jet, name, marker in JETS:
            d = data[jet]
            for hemi in ("NH", "SH"):
                h = d[d["hemisphere"] == hemi].sort_values("lon")
                if h.empty:
                    continue
                ax.plot(*_gapped(h["lon"].to_numpy(float), h["lat"].to_numpy(float), step), color="0.6", lw=0.8,
                        zorder=2)
                sc = ax.scatter(h["lon"], h["lat"], c=h["speed"], cmap="viridis", norm=norm, marker=marker,
                                s=46, edgecolors="k", linewidths=0.5, zorder=3)
        cb = fig.colorbar(sc, ax=ax, pad=0.02)
        cb.set_label("core speed (m s-1)")
        ax.axhline(0.0, color="0.3", lw=0.8)
        ax.set_xlim(0.0, 360.0)
        ax.set_xticks(np.arange(0, 361, 60))
        ax.set_xticklabels(["0", "60E", "120E", "180", "120W", "60W", "0"])
        ax.set_ylim(-90.0, 90.0)
        ax.set_yticks(np.arange(-90, 91, 30))
        ax.set_xlabel("longitude (degrees_east)")
        ax.set_ylabel("core latitude (degrees_north)")
        ax.legend(handles=[Line2D([], [], ls="", marker=m, color="white", mec="k", ms=8, label=n) for _, n, m in JETS],
                  loc="upper left", bbox_to_anchor=(0.0, -0.12), ncol=2)
        # two lines, so a long time span and source name stay inside the 9-inch picture
        ax.set_title(f"jet cores per longitude\n{title}" + (f"   source: {source}" if source else ""), loc="left")
    return fig


def _gapped(x, y, step):
    """Line coordinates broken (NaN) where consecutive longitudes are more than 1.5 grid steps apart."""
    if x.size < 2:
        return x, y
    gap = np.flatnonzero(np.diff(x) > 1.5 * step) + 1
    return np.insert(x, gap, np.nan), np.insert(y, gap, np.nan)


def save_strip(df, path, time=None):
    """Render the strip of the table ``df`` to ``path`` (png, pdf or svg), atomically."""
    from circtrack.plots import save_figure

    src = ", ".join(sorted(df["source"].astype(str).unique())) if "source" in df.columns else ""
    return save_figure(strip_figure(df, time=time, source=src), path)
