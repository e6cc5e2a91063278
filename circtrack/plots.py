"""Figures of circtrack findings: annual-mean time series with the OLS-AR(1) trend and its
95 % band, and the monthly seasonal cycle (mean +- 1 std), one row per metric.

Matplotlib with the non-interactive Agg backend, a colour-blind-safe Okabe-Ito palette, and
the metric's units on every value axis.
"""

from __future__ import annotations

import os

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402
import numpy as np  # noqa: E402

from circtrack import stats as S  # noqa: E402

# Okabe & Ito (2008), "Color Universal Design": colour-blind-safe qualitative palette.
OKABE_ITO = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442", "#000000"]
FORMATS = ("png", "pdf", "svg")
MONTHS = "JFMAMJJASOND"

STYLE = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "legend.frameon": False,
    "legend.fontsize": 8,
    "savefig.dpi": 120,
    "svg.hashsalt": "circtrack",
}


def _label(row, keys, varying):
    parts = [str(row[k]) for k in keys if k in varying]
    return " ".join(parts) if parts else str(row.get("hemisphere", ""))


def figure(df, metrics=None, calendar="standard", poleward_positive=False):
    """Build and return the matplotlib Figure for the cleaned circtrack table ``df`` (raw CSV table)."""
    from circtrack import plot_variants as PV
    df, band, shown = PV.split(df, calendar, poleward_positive)      # several definitions: default line + band
    data = S.clean(df)
    keys, extras = S.key_columns(df)
    if metrics:
        data = data[data["metric"].isin(list(metrics))]
    if data.empty:
        raise S.StatsInputError("no usable rows (flag 'ok' with a finite value) for the requested metrics")
    if poleward_positive:
        data = S.poleward_flip(data)
    mon = S.monthly_means(data, calendar)
    sea = S.seasonal_means(mon)
    ann = sea[sea["season"] == "annual"]
    line_keys = [k for k in keys if k != "metric"]
    varying = [k for k in line_keys if mon[k].nunique() > 1] or ["hemisphere"]
    metric_ids = sorted(mon["metric"].unique())
    with plt.rc_context(STYLE):
        fig, axes = plt.subplots(len(metric_ids), 2, figsize=(10, 3.4 * len(metric_ids)),
                                 gridspec_kw={"width_ratios": [2.4, 1]}, squeeze=False)
        for i, mid in enumerate(metric_ids):
            ax_ts, ax_sc = axes[i]
            m_mon = mon[mon["metric"] == mid]
            units = m_mon["units"].iloc[0]
            groups = list(m_mon.groupby(line_keys, sort=True, dropna=False))
            for j, (k, g) in enumerate(groups):
                colour = OKABE_ITO[j % len(OKABE_ITO)]
                row = dict(zip(line_keys, k))
                label = _label(row, line_keys, varying)
                sel = np.ones(len(ann), bool)
                for kk in line_keys:
                    sel &= (ann[kk] == row[kk]).to_numpy()
                sel &= (ann["metric"] == mid).to_numpy()
                a = ann[sel].sort_values("t")
                g = g.sort_values("t")
                PV.draw(ax_ts, band, row, mid, colour)
                ax_ts.plot(g["t"], g["value"], color=colour, lw=0.5, alpha=0.35)
                if len(a):
                    ax_ts.plot(a["t"], a["value"], "o-", color=colour, ms=3, lw=1.2, label=f"{label} annual mean")
                    fit = S.ols_ar1(a["t"].to_numpy(), a["value"].to_numpy())
                    if np.isfinite(fit["slope"]):
                        tt = np.linspace(a["t"].min(), a["t"].max(), 50)
                        line, half = S.ols_band(fit, tt)
                        ax_ts.plot(tt, line, "--", color=colour, lw=1.2,
                                   label=f"{label} trend {10 * fit['slope']:+.3g} {units}/decade")
                        if np.all(np.isfinite(half)):
                            ax_ts.fill_between(tt, line - half, line + half, color=colour, alpha=0.18, lw=0)
                clim = g.groupby("month")["value"].agg(["mean", "std"]).reindex(range(1, 13))
                ax_sc.plot(clim.index, clim["mean"], "o-", color=colour, ms=3, lw=1.2, label=label)
                std = clim["std"].fillna(0).to_numpy()
                ax_sc.fill_between(clim.index, clim["mean"] - std, clim["mean"] + std, color=colour, alpha=0.18, lw=0)
            suffix = " (SH sign flipped: poleward > 0)" if poleward_positive and units == "degrees_north" else ""
            ax_ts.set_title(f"{mid}{suffix}" + (f"; line: {shown}" if shown else ""), loc="left")
            ax_ts.set_ylabel(f"{mid} ({units})")
            ax_ts.set_xlabel("year")
            # whole years on the axis (the data sit at fractional years, mid-month)
            ax_ts.xaxis.set_major_locator(MaxNLocator(integer=True))
            ax_ts.legend(loc="upper center", bbox_to_anchor=(0.5, -0.28), ncol=2)   # below, off the data
            ax_sc.set_title("seasonal cycle (mean \u00b1 1 std)", loc="left")
            ax_sc.set_ylabel(f"{mid} ({units})")
            ax_sc.set_xlabel("month")
            ax_sc.set_xticks(range(1, 13))
            ax_sc.set_xticklabels(list(MONTHS))
        fig.tight_layout()
    return fig


def save_figure(fig, path):
    """Write ``fig`` to ``path`` (format from the extension: png, pdf or svg) and close it: rendered
    in memory, then written like every output (synced temp file and rename; through a symbolic link;
    straight into a device). No dates in the metadata, so reruns give the same bytes."""
    import io

    from circtrack.output import emit, resolve_target

    ext = os.path.splitext(path)[1].lower().lstrip(".")
    if ext not in FORMATS:
        plt.close(fig)
        raise ValueError(f"{path}: unknown figure format '.{ext}'; use .png, .pdf or .svg")
    buf = io.BytesIO()
    try:
        meta = {"Creator": "circtrack"}
        if ext == "pdf":
            meta = {"Creator": "circtrack", "CreationDate": None}
        elif ext == "svg":
            meta = {"Creator": "circtrack", "Date": None}
        with plt.rc_context(STYLE):
            fig.savefig(buf, format=ext, metadata=meta)
    finally:
        plt.close(fig)
    target = resolve_target(path)
    emit(target, buf.getvalue())
    return target.path


def save(df, path, metrics=None, calendar="standard", poleward_positive=False):
    """Render the figure to ``path`` (format from the extension: png, pdf or svg), atomically."""
    ext = os.path.splitext(path)[1].lower().lstrip(".")
    if ext not in FORMATS:
        raise ValueError(f"{path}: unknown figure format '.{ext}'; use .png, .pdf or .svg")
    return save_figure(figure(df, metrics=metrics, calendar=calendar, poleward_positive=poleward_positive), path)
