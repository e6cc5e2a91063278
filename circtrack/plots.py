"""Figures of circtrack findings, sized for a screen or a journal page.

Layout
------
* One *page* per metric family (the registry's families: cells, jets, surface winds, ...), at most
  :data:`MAX_ROWS` panel rows per page (a larger family continues on further pages, evenly filled); a ``metrics``
  selection that fits one page is one page. A page is
  9 inches wide and at most about 9.8 inches high (1080 x 1170 pixels at the default 120 dpi); the
  section (section.py, 1080 x 816) and the jet-core strip (plots_cores.py, 1080 x 672) are 9 inches
  wide too. A legend never reaches past its panel (:func:`_legend_above_data`).
  A multi-page selection goes into one multi-page PDF, or one PNG/SVG file per page named
  ``OUT-FAMILY.png`` (``OUT-FAMILY-2.png`` for a continued family); one page is written to OUT itself.
* A panel row per metric; per sector too when the table has several sectors; per hemisphere when
  latitudes are drawn in degrees_north (NH and SH never share one latitude axis, so neither
  hemisphere's variability is squashed). By default latitudes are drawn poleward-positive (SH
  sign flipped), so both hemispheres share one axis in "degrees poleward" and a widening of the
  tropics shows as both lines rising.
* Ensemble members (an extra key column with more than one value) are drawn as thin lines and their
  mean as the bold line that carries the trend.

What each panel shows depends on the record
-------------------------------------------
* Time series (left): the values as a line (daily and sub-daily steps included; over several years
  faint, with their monthly means over them) against a date
  axis in the data's own calendar (dates for records shorter than three years, whole years
  otherwise); annual means (complete years) as dots; the OLS trend with its AR(1)-adjusted 95 %
  band only when there are at least ``min_years`` annual means, labelled with the slope, n and the
  p-value (:func:`circtrack.stats.ols_ar1`).
* Seasonal cycle (right): monthly climatology with month names, +- 1 standard deviation across
  years when there are at least two; shown for records of two years or more.
* A climatology (year 0, or one year of monthly values) gets only the seasonal-cycle panel.

Matplotlib with the non-interactive Agg backend, the colour-blind-safe Okabe-Ito palette, the
metric's units on every value axis; no warning reaches stderr.
"""

from __future__ import annotations

import datetime
import os
import warnings

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from circtrack import stats as S  # noqa: E402

# Okabe & Ito (2008), "Color Universal Design": colour-blind-safe qualitative palette.
OKABE_ITO = ["#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#F0E442", "#000000"]
FORMATS = ("png", "pdf", "svg")
MONTH_NAMES = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"]
MAX_ROWS = 5                 # panel rows per page
ROW_HEIGHT = 1.85            # inches per panel row
WIDTH = 9.0                  # inches
SUBMONTHLY_DAYS = 20         # a median time step shorter than this: daily or sub-daily data
DATE_AXIS_YEARS = 3          # records shorter than this get dates on the time axis, longer ones years

STYLE = {
    "font.size": 8,
    "axes.titlesize": 9,
    "axes.labelsize": 8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "legend.frameon": True,
    "legend.framealpha": 0.8,
    "legend.edgecolor": "none",
    "legend.fontsize": 7,
    "savefig.dpi": 120,
    "svg.hashsalt": "circtrack",
}


# ----------------------------------------------------------------------------- the record

def _prepare(df, metrics, calendar, poleward_positive):
    """Usable rows with a decimal-year position ``x`` (day and hour counted) in ``calendar``."""
    data = S.clean(df)
    if metrics:
        data = data[data["metric"].isin(list(metrics))]
    if data.empty:
        raise S.StatsInputError("no usable rows (flag 'ok' with a finite value) for the requested metrics")
    if poleward_positive:
        data = S.poleward_flip(data)
    data = data.reset_index(drop=True)
    data["x"] = S.decimal_time(data["year"], data["month"], data["day"], data["hour"], calendar)
    return data


def describe_record(data, keys):
    """What the record is: ``{"climatology", "submonthly", "seasonal_panel", "years"}``."""
    years = sorted(int(y) for y in data["year"].unique())
    per_month = int(data.groupby([*keys, "year", "month"], dropna=False).size().max())
    xs = np.unique(data["x"].to_numpy())
    step_days = float(np.median(np.diff(xs))) * 365.25 if xs.size > 1 else float("nan")
    climatology = years == [0] or (len(years) == 1 and per_month == 1)
    months = data[["year", "month"]].drop_duplicates().shape[0]
    return {"climatology": climatology,
            "submonthly": per_month > 1 or (np.isfinite(step_days) and step_days < SUBMONTHLY_DAYS),
            "seasonal_panel": climatology or (len(years) >= 2 and months >= 24),
            "years": years}


def _family_order(metric_ids):
    """[(family, [metric ids])] in catalogue order; metrics the catalogue does not know go last."""
    from circtrack.metrics import catalogue

    cat = catalogue()
    order = {m: i for i, m in enumerate(cat)}
    fams = {}
    for mid in sorted(metric_ids, key=lambda m: (order.get(m, len(order)), m)):
        fam = cat[mid].family if mid in cat and cat[mid].family else "other"
        fams.setdefault(fam, []).append(mid)
    return list(fams.items())


def _panel_rows(data, metric_ids, poleward_positive):
    """Panel rows of one family: (metric, sector, hemisphere or None for all)."""
    rows = []
    for mid in metric_ids:
        d = data[data["metric"] == mid]
        sectors = sorted(d["sector"].unique(), key=lambda s: (s != "zonal", s))
        for sec in sectors:
            ds = d[d["sector"] == sec]
            hemis = [h for h in ("NH", "SH") if (ds["hemisphere"] == h).any()]
            split = (not poleward_positive and ds["units"].iloc[0] == "degrees_north" and len(hemis) == 2)
            rows.extend((mid, sec, h) for h in (hemis if split else [None]))
    return rows


# ----------------------------------------------------------------------------- date axis

_STEPS = [("h", 1), ("h", 3), ("h", 6), ("h", 12), ("D", 1), ("D", 2), ("D", 5), ("D", 10),
          ("M", 1), ("M", 2), ("M", 3), ("M", 6), ("M", 12)]
_STEP_DAYS = {"h": 1 / 24, "D": 1.0, "M": 30.44}


def _date_at(x, calendar):
    y = int(np.floor(x))
    y0, length = S.year_start_length(y, calendar)
    return y0 + datetime.timedelta(days=(x - y) * length)


def date_ticks(x0, x1, calendar, max_ticks=7):
    """Tick positions (decimal years) and labels for a short record, in its own calendar."""
    span = max((x1 - x0) * 365.25, 1e-6)
    unit, n = next(((u, k) for u, k in _STEPS if span / (_STEP_DAYS[u] * k) <= max_ticks), ("M", 12))
    d = _date_at(x0, calendar)
    if unit == "h":
        d = S.cf_date(d.year, d.month, d.day, calendar, (d.hour // n) * n)
    elif unit == "D":
        d = S.cf_date(d.year, d.month, 1 + ((d.day - 1) // n) * n, calendar)
    else:
        d = S.cf_date(d.year, 1 + ((d.month - 1) // n) * n, 1, calendar)
    pos, labels = [], []
    fmt = {"h": "%Y-%m-%d %H:00", "D": "%Y-%m-%d", "M": "%Y-%m"}[unit]
    for _ in range(200):
        x = S.decimal_time([d.year], [d.month], [d.day], [d.hour], calendar)[0]
        if x > x1 + 1e-9:
            break
        if x >= x0 - 1e-9:
            pos.append(x)
            labels.append(d.strftime(fmt))
        if unit == "M":
            m = d.month - 1 + n
            d = S.cf_date(d.year + m // 12, m % 12 + 1, 1, calendar)
        else:
            d = d + datetime.timedelta(hours=n) if unit == "h" else d + datetime.timedelta(days=n)
    return pos, labels


def _time_axis(ax, x0, x1, calendar):
    if x1 - x0 < DATE_AXIS_YEARS:
        pad = max((x1 - x0) * 0.04, 1e-4)
        pos, labels = date_ticks(x0 - pad, x1 + pad, calendar)
        ax.set_xticks(pos)
        ax.set_xticklabels(labels, rotation=20, ha="right")
        ax.set_xlim(x0 - pad, x1 + pad)
        ax.set_xlabel(f"date ({calendar} calendar)")
    else:
        # whole years on the axis (the data sit at fractional years)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax.set_xlabel("year")


# ----------------------------------------------------------------------------- one panel row

def _p_text(p):
    if not np.isfinite(p):
        return "p n/a"
    return "p<0.001" if p < 0.001 else f"p={p:.2g}"


def _groups(d, keys, extras):
    """Line groups of one panel: {label key: (member frames)}. Members (an extra key with several
    values) are kept together so that their mean can be drawn."""
    ensemble = [k for k in extras if d[k].nunique() > 1]
    line_keys = [k for k in keys if k not in ("metric", "sector", *ensemble)]
    return line_keys, ensemble, list(d.groupby(line_keys, sort=True, dropna=False))


def _monthly(g, calendar):
    """Monthly means of one line group (members averaged): year, month, t, value."""
    mon = S.monthly_means(g, calendar)
    return mon.groupby(["year", "month"], as_index=False).agg(t=("t", "mean"), value=("value", "mean"))


def _annual(mon):
    """Annual means of complete years (all twelve months)."""
    a = mon.groupby("year").agg(t=("t", "mean"), value=("value", "mean"), months=("month", "nunique"))
    return a[a["months"] == 12].reset_index().sort_values("t")


def _values(g, mon, submonthly):
    """What the line shows: every step of daily or sub-daily data, else the monthly means."""
    if submonthly:
        g = g.sort_values("x")
        return g["x"].to_numpy(), g["value"].to_numpy()
    return mon["t"].to_numpy(), mon["value"].to_numpy()


def _draw_trend(ax, ann, colour, label, units):
    fit = S.ols_ar1(ann["t"].to_numpy(), ann["value"].to_numpy())
    if not np.isfinite(fit["slope"]):
        return
    tt = np.linspace(ann["t"].min(), ann["t"].max(), 50)
    line, half = S.ols_band(fit, tt)
    short = "\u00b0" if units.startswith("degrees") else f" {units}"
    ax.plot(tt, line, "--", color=colour, lw=1.2,
            label=f"{label} trend {10 * fit['slope']:+.3g}{short}/decade (n={fit['n']}, {_p_text(fit['p_value'])})")
    if np.all(np.isfinite(half)):
        ax.fill_between(tt, line - half, line + half, color=colour, alpha=0.18, lw=0)


def _draw_time_series(ax, sub, keys, extras, rec, colours, calendar, min_years, units):
    line_keys, ensemble, groups = _groups(sub, keys, extras)
    for k, g in groups:
        row = dict(zip(line_keys, k if isinstance(k, tuple) else (k,)))
        colour = colours[row.get("hemisphere"), row.get("source")]
        label = _label(row, line_keys, sub)
        mon = _monthly(g, calendar)
        if ensemble:
            for _, gm in g.groupby(ensemble, sort=True):
                ax.plot(*_values(gm, _monthly(gm, calendar), rec["submonthly"]), color=colour, lw=0.5, alpha=0.3)
            label = f"{label} mean of {g[ensemble].drop_duplicates().shape[0]} members"
            x, y = _values(g, mon, False)
        else:
            x, y = _values(g, mon, rec["submonthly"])
        from circtrack import plot_variants as PV
        PV.draw(ax, rec.get("band"), row, sub["metric"].iloc[0], colour)
        ann = _annual(mon)
        main = len(ann) < 2            # no annual means to draw: the values are the main line
        if rec["submonthly"] and not main and not ensemble:
            # years of daily data: every step faint, the monthly means over it
            ax.plot(x, y, "-", color=colour, lw=0.3, alpha=0.2)
            x, y = mon["t"].to_numpy(), mon["value"].to_numpy()
        ax.plot(x, y, "o-" if len(x) <= 40 else "-", color=colour, ms=3, lw=1.2 if main else 0.6,
                alpha=1.0 if main else 0.45, label=label if main else None)
        trend = len(ann) >= min_years
        if len(ann) >= 2:
            ax.plot(ann["t"], ann["value"], "o-", color=colour, ms=3, lw=1.2,
                    label=None if trend else f"{label} annual mean")
        if trend:
            _draw_trend(ax, ann, colour, label, units)
    x = sub["x"].to_numpy()
    _time_axis(ax, float(x.min()), float(x.max()), calendar)
    _legend_above_data(ax, len(groups))


def _legend_above_data(ax, entries):
    """The legend in a band of head room above the data, so it never covers a line; two entries
    side by side only when they fit inside the axes (long trend labels are stacked instead, so the
    legend never reaches into the next panel)."""
    leg = ax.legend(loc="upper left", ncol=2 if entries == 2 else 1, borderaxespad=0.2)
    ncol = 2 if entries == 2 else 1
    if ncol == 2 and not _fits_inside(ax, leg):
        ncol = 1
        leg = ax.legend(loc="upper left", ncol=1, borderaxespad=0.2)
    lines = -(-entries // ncol)
    lo, hi = ax.get_ylim()
    ax.set_ylim(lo, hi + (hi - lo) * (0.12 + 0.16 * lines))


# share of the axes' width a legend may take: the axes shrink when the layout makes room for the
# tick labels and titles, so a legend measured before that needs some margin
LEGEND_WIDTH_SHARE = 0.9


def _fits_inside(ax, leg):
    renderer = ax.figure.canvas.get_renderer()
    return leg.get_window_extent(renderer).width <= LEGEND_WIDTH_SHARE * ax.get_window_extent(renderer).width


def _draw_seasonal(ax, sub, keys, extras, rec, colours, calendar, legend):
    line_keys, ensemble, groups = _groups(sub, keys, extras)
    most = 0
    for k, g in groups:
        k = k if isinstance(k, tuple) else (k,)
        row = dict(zip(line_keys, k))
        colour = colours[row.get("hemisphere"), row.get("source")]
        mon = _monthly(g, calendar)          # one value per year and month (members averaged)
        clim = mon.groupby("month")["value"].agg(["mean", "std", "size"]).reindex(range(1, 13))
        most = max(most, int(clim["size"].max()))
        ax.plot(clim.index, clim["mean"], "o-", color=colour, ms=3, lw=1.2, label=_label(row, line_keys, sub))
        if (clim["size"] >= 2).any():
            std = clim["std"].to_numpy()
            ax.fill_between(clim.index, clim["mean"] - std, clim["mean"] + std, color=colour, alpha=0.18, lw=0)
    if most >= 2 and not rec["climatology"]:
        ax.set_title(f"seasonal cycle (mean \u00b1 1 std, {most} years)", loc="right")
    ax.set_xlabel("month")
    ax.set_xticks(range(1, 13))
    # full month names where the panel has the page's width, initials beside a time series
    ax.set_xticklabels(MONTH_NAMES if rec["climatology"] else [m[0] for m in MONTH_NAMES])
    ax.set_xlim(0.6, 12.4)
    if legend:
        _legend_above_data(ax, len(groups))


def _label(row, line_keys, sub):
    varying = [k for k in line_keys if sub[k].nunique() > 1]
    if "hemisphere" not in varying:
        varying = ["hemisphere"] + varying
    return " ".join(str(row[k]) for k in varying if k in row)


def _quantity(mid, units):
    """A short axis name: 'latitude' for latitudes, else the last word of the metric id."""
    if units in ("degrees_north", "degrees_poleward"):
        return "latitude"
    return mid.rsplit("_", 1)[-1]


def _row_title(mid, sector, hemi, units, poleward_positive):
    parts = [mid] + ([sector] if sector != "zonal" else []) + ([hemi] if hemi else [])
    note = " (SH sign flipped: poleward > 0)" if poleward_positive and units == "degrees_poleward" else ""
    return " ".join(parts) + note


# ----------------------------------------------------------------------------- pages

def _page(data, rows, keys, extras, rec, colours, calendar, min_years, poleward_positive, title):
    ts = not rec["climatology"]
    sc = rec["seasonal_panel"]
    ncols = int(ts) + int(sc)
    width = WIDTH if ts else 6.0
    fig, axes = plt.subplots(len(rows), ncols, figsize=(width, 0.5 + ROW_HEIGHT * len(rows)), squeeze=False,
                             gridspec_kw={"width_ratios": [2.4, 1] if ncols == 2 else [1]}, layout="constrained")
    for i, (mid, sector, hemi) in enumerate(rows):
        sel = (data["metric"] == mid) & (data["sector"] == sector)
        if hemi:
            sel &= data["hemisphere"] == hemi
        sub = data[sel]
        units = sub["units"].iloc[0]
        row_title = _row_title(mid, sector, hemi, units, poleward_positive)
        col = 0
        if ts:
            ax = axes[i][col]
            _draw_time_series(ax, sub, keys, extras, rec, colours, calendar, min_years, units)
            ax.set_title(row_title, loc="left")
            ax.set_ylabel(f"{_quantity(mid, units)} ({units})")
            col += 1
        if sc:
            ax = axes[i][col]
            _draw_seasonal(ax, sub, keys, extras, rec, colours, calendar, legend=not ts)
            ax.set_ylabel(f"{_quantity(mid, units)} ({units})")
            if not ts:
                ax.set_title(row_title, loc="left")
    fig.suptitle(title, x=0.01, ha="left", fontsize=10, fontweight="bold")
    return fig


def pages(df, metrics=None, calendar="standard", poleward_positive=True, min_years=S.MIN_TREND_YEARS):
    """The figures of the raw circtrack table ``df``: a list of ``(page name, Figure)``, one page per
    metric family (continued on further pages beyond :data:`MAX_ROWS` panel rows)."""
    from circtrack import plot_variants as PV

    df, band, shown = PV.split(df, calendar, poleward_positive)      # several definitions: default line + band
    keys, extras = S.key_columns(df)
    with warnings.catch_warnings(), np.errstate(all="ignore"), plt.rc_context(STYLE):
        warnings.simplefilter("ignore")
        data = _prepare(df, metrics, calendar, poleward_positive)
        rec = describe_record(data, keys)
        rec["band"], rec["variant_shown"] = band, shown
        colour_keys = data[["hemisphere", "source"]].drop_duplicates()
        colour_keys = sorted(map(tuple, colour_keys.to_numpy().tolist()),
                             key=lambda hs: ({"NH": 0, "SH": 1}.get(hs[0], 2), hs[0], hs[1]))
        colours = {hs: OKABE_ITO[i % len(OKABE_ITO)] for i, hs in enumerate(colour_keys)}
        out = []
        families = _family_order(data["metric"].unique())
        if metrics:      # a --metrics selection that fits one page is one page, whatever the families
            ids = [m for _, fam_ids in families for m in fam_ids]
            if len(_panel_rows(data, ids, poleward_positive)) <= MAX_ROWS:
                families = [("selection", ids)]
        for fam, ids in families:
            rows = _panel_rows(data, ids, poleward_positive)
            per = -(-len(rows) // -(-len(rows) // MAX_ROWS))      # the pages of a family evenly filled
            chunks = [rows[i:i + per] for i in range(0, len(rows), per)]
            for j, chunk in enumerate(chunks):
                name = fam if j == 0 else f"{fam}-{j + 1}"
                what = "time series"
                if rec["climatology"]:
                    year = rec["years"][0]
                    what = "seasonal cycle, " + ("climatology (year 0)" if year == 0 else f"monthly means of {year}")
                title = ("" if fam == "selection" else f"{fam.replace('_', ' ')} ") + what
                title = title[0].upper() + title[1:]
                title = title + (f" ({j + 1}/{len(chunks)})" if len(chunks) > 1 else "")
                if shown:
                    title += f"; line: {shown}, shading: range of the definitions"
                out.append((name, _page(data, chunk, keys, extras, rec, colours, calendar, min_years,
                                        poleward_positive, title)))
    return out


def figure(df, metrics=None, calendar="standard", poleward_positive=False, min_years=S.MIN_TREND_YEARS):
    """The first page (see :func:`pages`)."""
    figs = pages(df, metrics=metrics, calendar=calendar, poleward_positive=poleward_positive, min_years=min_years)
    for _, f in figs[1:]:
        plt.close(f)
    return figs[0][1]


def _render(fig, ext):
    """The bytes of ``fig`` in format ``ext``; no dates in the metadata, so reruns give the same bytes."""
    import io

    meta = {"Creator": "circtrack"}
    if ext == "pdf":
        meta = {"Creator": "circtrack", "CreationDate": None}
    elif ext == "svg":
        meta = {"Creator": "circtrack", "Date": None}
    buf = io.BytesIO()
    try:
        with plt.rc_context(STYLE), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fig.savefig(buf, format=ext, metadata=meta)
    finally:
        plt.close(fig)
    return buf.getvalue()


def _ext(path):
    ext = os.path.splitext(path)[1].lower().lstrip(".")
    if ext not in FORMATS:
        raise ValueError(f"{path}: unknown figure format '.{ext}'; use .png, .pdf or .svg")
    return ext


def save_figure(fig, path):
    """Write ``fig`` to ``path`` (format from the extension: png, pdf or svg) and close it: rendered
    in memory, then written like every output (synced temp file and rename; through a symbolic link;
    straight into a device). No dates in the metadata, so reruns give the same bytes."""
    from circtrack.output import emit, resolve_target

    try:
        ext = _ext(path)
    except ValueError:
        plt.close(fig)
        raise
    data = _render(fig, ext)
    target = resolve_target(path)
    emit(target, data)
    return target.path


def page_paths(path, names):
    """Where each page goes: OUT for one page or a PDF, else ``OUT-NAME.ext`` per page."""
    if len(names) == 1 or path.lower().endswith(".pdf"):
        return [path] * len(names)
    stem, ext = os.path.splitext(path)
    return [f"{stem}-{n}{ext}" for n in names]


def _pdf_bytes(figs):
    """One multi-page PDF of ``figs`` (closed afterwards), in memory."""
    import io

    from matplotlib.backends.backend_pdf import PdfPages

    buf = io.BytesIO()
    try:
        with plt.rc_context(STYLE), warnings.catch_warnings():
            warnings.simplefilter("ignore")
            with PdfPages(buf, metadata={"Creator": "circtrack", "CreationDate": None}) as pdf:
                for f in figs:
                    pdf.savefig(f)
    finally:
        for f in figs:
            plt.close(f)
    return buf.getvalue()


def save(df, path, metrics=None, calendar="standard", poleward_positive=True, min_years=S.MIN_TREND_YEARS):
    """Render the pages to ``path`` (format from the extension: png, pdf or svg); returns the files
    written: one for a single page or a PDF, else one per page (see :func:`page_paths`), committed
    together (all or none)."""
    from circtrack.output import commit, emit, resolve_target

    ext = _ext(path)
    figs = pages(df, metrics=metrics, calendar=calendar, poleward_positive=poleward_positive, min_years=min_years)
    if ext == "pdf" or len(figs) == 1:
        data = _pdf_bytes([f for _, f in figs]) if ext == "pdf" else _render(figs[0][1], ext)
        target = resolve_target(path)
        emit(target, data)
        return [target.path]
    targets = [resolve_target(p) for p in page_paths(path, [n for n, _ in figs])]
    data = [_render(f, ext) for _, f in figs]
    files = [(t.path, d) for t, d in zip(targets, data) if t.kind == "file"]
    if files:
        commit(files)
    for t, d in zip(targets, data):
        if t.kind != "file":
            emit(t, d)
    return [t.path for t in targets]


__all__ = ["pages", "figure", "save", "save_figure", "page_paths", "date_ticks", "describe_record",
           "OKABE_ITO", "FORMATS", "STYLE", "MAX_ROWS", "pd"]
