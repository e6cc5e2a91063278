"""A latitude-pressure cross-section of one time step, to check the detection by eye.

Filled contours of the zonal-mean zonal wind [u], line contours of the mass streamfunction psi,
and the positions the engine detected for that time step: the Hadley cell edges and the
subtropical and eddy-driven jet cores. Nothing is re-implemented here: the positions are the
engine's rows (``engine.Run`` restricted to the chosen time step, the same code as
``circtrack track``), the zonal means come from the same readers and tasks (``Run.zonal_means``)
and psi from ``metrics.cells.streamfunction`` (``kernels.vertical.mass_streamfunction``).
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field

import numpy as np

from circtrack import plots_cores
from circtrack.errors import InputError, UsageError

# the rows drawn on the section; each family is run exactly as in 'circtrack track'
METRIC_IDS = ["hadley_edge_lat", "subtropical_jet_lat", "eddy_jet_lat"] + plots_cores.SECTION_IDS
PSI_UNIT = 1e10          # kg s-1 per contour label unit


@dataclass
class Section:
    """The data behind the picture (one time step, the full zonal mean)."""

    path: str
    source: str
    time: str                      # ISO 8601 as in the CSV 'time' column
    lat: np.ndarray                # (J,) degrees_north, ascending
    plev_u: np.ndarray             # (Lu,) hPa, ascending (top first)
    u: np.ndarray                  # (Lu, J) zonal-mean zonal wind, m s-1 (NaN where too few longitudes)
    plev_psi: np.ndarray           # (Lv,) hPa
    psi: np.ndarray                # (Lv, J) mass streamfunction, kg s-1
    edge_level_hpa: float          # cells.level_hpa
    upper_level_hpa: float         # jets.upper_level_hpa (subtropical jet)
    lower_level_hpa: float         # jets.lower_level_hpa (eddy-driven jet)
    rows: dict = field(default_factory=dict)   # (metric, hemisphere) -> (value, flag)
    member: str = ""               # which member, when the file holds several
    files: list = field(default_factory=list)   # the files read (one variable per file: several)

    def value(self, metric, hemisphere):
        return self.rows.get((metric, hemisphere), (float("nan"), "missing"))[0]


def _pick_time(times, wanted, path):
    from circtrack.engine import iso_time

    iso = [iso_time(t) for t in times]
    if not iso:
        raise InputError(f"{path}: no time steps to draw")
    if wanted is None:
        return iso[0]
    wanted = wanted.strip()
    if wanted in iso:
        return wanted
    raise UsageError(f"--time {wanted}: no such time step in {path}; it has {len(iso)} time step(s) from "
                     f"{iso[0]} to {iso[-1]} (give the date as in the CSV 'time' column, e.g. {iso[0]})")


def _with_siblings(path):
    """``path`` and, for one variable per file (``ua_Amon_...`` beside ``va_Amon_...``), the files in its
    directory named like it but for another variable; the engine joins those holding the same time steps."""
    from circtrack.inputs.files import SUFFIXES, _split_variable_token, same_period_siblings

    rest = _split_variable_token(path)[1]
    ext = os.path.splitext(path)[1]
    if not os.path.isfile(path) or not rest[:len(rest) - len(ext)]:
        return [path]                  # 'synth.nc' and 'other.nc' are not one variable per file
    d = os.path.dirname(os.path.abspath(path))
    try:
        names = sorted(n for n in os.listdir(d) if n.lower().endswith(SUFFIXES))
    except OSError:
        return [path]
    return [path] + same_period_siblings(path, [os.path.join(d, n) for n in names])


def section_data(path, cfg, time=None, overrides=None, label=None):
    """Read one time step of ``path`` and return the :class:`Section` behind the picture.

    ``time``: ISO date as in the CSV ``time`` column (exact match), default the first time step.
    """
    from circtrack import engine
    from circtrack.metrics.cells import streamfunction
    from circtrack.metrics.common import Fields

    if float(cfg["jets"].get("eddy_lowpass_days", 0) or 0) > 0:
        raise UsageError("--section draws one time step, but jets.eddy_lowpass_days in the config filters the "
                         "eddy-driven jet over the whole record; set jets.eddy_lowpass_days = 0 for the section")
    cfg = {**cfg, "sectors": {}, "vary": {}}           # the full zonal mean, one definition (the config's own)
    paths = _with_siblings(path)
    # planning only (reads no data): the time axis, to choose the time step
    plan = engine.Run(paths, cfg, metric_ids=METRIC_IDS, overrides=overrides, label=label)
    iso = _pick_time(plan.times, time, path)
    # the engine's rows for that time step: the same code and readers as 'circtrack track'
    out = engine.Run(paths, cfg, metric_ids=METRIC_IDS, overrides=overrides, label=label,
                     only_times={iso}).execute()
    c = out.columns
    extra = [k for k in out.key_columns if k not in ("source", "time", "hemisphere", "sector", "metric")]
    first = {k: c[k][0] for k in extra} if len(c["metric"]) else {}
    rows = {}
    for i in range(len(c["metric"])):
        if c["sector"][i] != "zonal" or any(c[k][i] != first[k] for k in extra):
            continue
        rows[(c["metric"][i], c["hemisphere"][i])] = (float(c["value"][i]), str(c["flag"][i]))
    # the zonal means behind them, ua and va on every level, first member when there are several
    zm = engine.Run(paths, cfg, metric_ids=METRIC_IDS, overrides=overrides, label=label,
                    only_times={iso}, all_levels=("ua", "va")).zonal_means()
    for role, what in (("ua", "eastward wind"), ("va", "northward wind")):
        n = np.size(zm["plev"].get(role, []))
        if n < 2:
            raise InputError(f"{path}: the section needs the {what} ({role}) on at least two pressure levels; "
                             f"the file has {n}; draw it from a file with the whole column")
    mean = {r: a.reshape((-1,) + a.shape[-2:])[:1] for r, a in zm["mean"].items()}
    cov = {r: a.reshape((-1,) + a.shape[-2:])[:1] for r, a in zm["coverage"].items()}
    fields = Fields(lat=zm["lat"], plev=zm["plev"], mean=mean, coverage=cov)
    psi = streamfunction(fields, cfg)[0]
    u = fields.masked("ua", cfg)[0]
    return Section(path=path, source=str(c["source"][0]) if len(c["source"]) else "", time=iso,
                   lat=np.asarray(zm["lat"], float), plev_u=np.asarray(zm["plev"]["ua"], float), u=u,
                   plev_psi=np.asarray(zm["plev"]["va"], float), psi=psi,
                   edge_level_hpa=float(cfg["cells"]["level_hpa"]),
                   upper_level_hpa=float(cfg["jets"]["upper_level_hpa"]),
                   lower_level_hpa=float(cfg["jets"]["lower_level_hpa"]),
                   rows=rows, member=", ".join(f"{k} {v}" for k, v in first.items()),
                   files=sorted({r.path for i in plan.infos for r in i.readers.values()}))


def _levels(vmax, n=10):
    """Symmetric contour levels about 0 on round steps."""
    from matplotlib.ticker import MaxNLocator

    lv = MaxNLocator(nbins=n, symmetric=True).tick_values(-vmax, vmax)
    return lv if lv.size >= 3 else np.linspace(-1, 1, 5)


def _nice_below(x):
    """The largest number of the 1-2-5 series not above ``x`` (x > 0)."""
    e = 10.0 ** np.floor(np.log10(x))
    return max(m * e for m in (1.0, 2.0, 5.0) if m * e <= x * (1 + 1e-9))


def psi_levels(pmax):
    """Streamfunction contour levels (positive; the picture uses them with both signs).

    Linear steps of a round size (about a quarter of the strongest cell) for the strong cells, and
    below the first step the 1-2-5 series down to about 1/40 of the strongest cell, so that a
    Ferrel cell or a summer Hadley cell a tenth as strong as the winter Hadley cell still gets
    two or three contours (with linear levels alone it would get none or one)."""
    if not np.isfinite(pmax) or pmax <= 0:
        return np.array([])
    step = _nice_below(pmax / 4.0)
    strong = np.arange(step, pmax * (1 + 1e-9), step)
    weak, v = [], _nice_below(step / 2.0)
    while v >= pmax / 40.0:
        weak.append(v)
        v = _nice_below(v * 0.99)
    return np.array(sorted(weak) + list(strong))


def _draw_psi(ax, sec):
    """psi contours: the levels of :func:`psi_levels` with both signs (dashed negative), and the
    psi = 0 contour, where the cells meet (the Hadley edge is its crossing of the edge level)."""
    psi = sec.psi / PSI_UNIT
    pmax = np.nanmax(np.abs(psi)) if np.isfinite(psi).any() else 0.0
    if pmax <= 0:
        return
    pos = psi_levels(pmax)
    levels = np.concatenate([-pos[::-1], pos])
    cs = ax.contour(sec.lat, sec.plev_psi, psi, levels=levels, colors="k", linewidths=0.9)
    cs.set_linestyles(["solid" if v > 0 else "dashed" for v in cs.levels])
    ax.clabel(cs, fmt="%g", fontsize=8, inline=True)
    # psi is zero by construction at the top (and, balanced, at the bottom) of the column: rounding
    # noise there would draw a broken line along the frame, so it is set to an exact 0 there
    quiet = np.abs(psi) <= 1e-6 * pmax
    quiet[1:-1] = False
    ax.contour(sec.lat, sec.plev_psi, np.where(quiet, 0.0, psi), levels=[0.0], colors=["#444444"],
               linewidths=2.2)


def _draw_positions(ax, sec):
    """Markers exactly at the engine's rows; returns the legend text per metric."""
    from circtrack.plots import OKABE_ITO

    found = {m: [] for m in METRIC_IDS}
    for hemi in ("NH", "SH"):
        e = sec.value("hadley_edge_lat", hemi)
        if np.isfinite(e):
            ax.axvline(e, color=OKABE_ITO[2], lw=2.2, ls=(0, (6, 3)), zorder=4)
            ax.plot([e], [sec.edge_level_hpa], "o", color=OKABE_ITO[2], ms=9, mec="k", zorder=5)
        s = sec.value("subtropical_jet_lat", hemi)
        if np.isfinite(s):
            ax.plot([s], [sec.upper_level_hpa], "*", color=OKABE_ITO[4], ms=18, mec="k", zorder=5)
        j = sec.value("eddy_jet_lat", hemi)
        if np.isfinite(j):
            ax.plot([j], [sec.lower_level_hpa], "D", color=OKABE_ITO[3], ms=10, mec="k", zorder=5)
        for m in METRIC_IDS:
            v, flag = sec.rows.get((m, hemi), (float("nan"), "missing"))
            found[m].append(f"{hemi} {v:.1f}\u00b0" if np.isfinite(v) else f"{hemi} none ({flag})")
    return found


def _legend(fig, sec, found, extra=()):
    from matplotlib.lines import Line2D

    from circtrack.plots import OKABE_ITO

    up, low = sec.upper_level_hpa, sec.lower_level_hpa
    handles = [
        Line2D([], [], color="k", lw=0.9, label="mass streamfunction > 0 (clockwise), labels in 1e10 kg s-1"),
        Line2D([], [], color="k", lw=0.9, ls="dashed", label="mass streamfunction < 0, labels in 1e10 kg s-1"),
        Line2D([], [], color="#444444", lw=2.2, label="mass streamfunction = 0 (where the cells meet)"),
        Line2D([], [], color=OKABE_ITO[2], lw=2.2, ls=(0, (6, 3)), marker="o", mec="k",
               label=f"Hadley cell edge, zero at {sec.edge_level_hpa:g} hPa: {', '.join(found['hadley_edge_lat'])}"),
        Line2D([], [], color=OKABE_ITO[4], ls="", marker="*", ms=14, mec="k",
               label=f"subtropical jet, max of [u]{up:g} - [u]{low:g}: {', '.join(found['subtropical_jet_lat'])}"),
        Line2D([], [], color=OKABE_ITO[3], ls="", marker="D", ms=8, mec="k",
               label=f"eddy-driven jet, max of [u]{low:g}: {', '.join(found['eddy_jet_lat'])}"),
    ]
    handles += list(extra)                    # e.g. the jet cores (plots_cores.mark_cores)
    # 'outside' with the constrained layout: the legend gets its own band inside the figure, below
    # the axes, in every mode (linear or logarithmic pressure)
    fig.legend(handles=handles, loc="outside lower center", ncol=2, frameon=False)


def _pressure_axis(ax, sec, log_pressure):
    top = min(sec.plev_u.min(), sec.plev_psi.min())
    bottom = max(sec.plev_u.max(), sec.plev_psi.max())
    if log_pressure:
        ax.set_yscale("log")
        ticks = [t for t in (1000, 850, 700, 500, 300, 200, 100, 50, 20, 10, 5, 2, 1) if top <= t <= bottom]
        ax.set_yticks(ticks)
        ax.set_yticklabels([f"{t:g}" for t in ticks])
        ax.minorticks_off()
    ax.set_ylim(bottom, top)                 # pressure increases downward
    ax.set_ylabel("pressure (hPa)")


def figure(sec, log_pressure=False):
    """The matplotlib Figure of a :class:`Section` (pressure axis downward, hPa)."""
    import matplotlib.pyplot as plt

    from circtrack.plots import STYLE

    style = {**STYLE, "font.size": 11, "axes.titlesize": 11, "axes.labelsize": 11, "legend.fontsize": 9,
             "axes.grid": False}
    with plt.rc_context(style), warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        fig, ax = plt.subplots(figsize=(9, 6.8), layout="constrained")
        umax = np.nanmax(np.abs(sec.u)) if np.isfinite(sec.u).any() else 1.0
        ulev = _levels(max(umax, 1.0), 12)
        cf = ax.contourf(sec.lat, sec.plev_u, sec.u, levels=ulev, cmap="RdBu_r", extend="both")
        cb = fig.colorbar(cf, ax=ax, pad=0.02)
        cb.set_label("zonal-mean zonal wind [u] (m s-1)")
        _draw_psi(ax, sec)
        _legend(fig, sec, _draw_positions(ax, sec), extra=plots_cores.mark_cores(ax, sec.rows))
        _pressure_axis(ax, sec, log_pressure)
        ax.set_xlim(sec.lat.min(), sec.lat.max())
        ax.set_xlabel("latitude (degrees_north)")
        who = f"{sec.source}" + (f", {sec.member}" if sec.member else "")
        files = sec.files or [sec.path]
        names = (" + ".join(os.path.basename(f) for f in files) if len(files) <= 3
                 else f"{os.path.basename(sec.path.rstrip('/'))} ({len(files)} files)")
        ax.set_title(f"{names}   {sec.time}   source: {who}", loc="left")
    return fig


def save(sec, path, log_pressure=False):
    """Render the section to ``path`` (png, pdf or svg by extension), atomically."""
    from circtrack.plots import save_figure

    return save_figure(figure(sec, log_pressure=log_pressure), path)
