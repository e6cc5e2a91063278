"""Findings from a tidy circtrack CSV: seasonal/annual means, trends and the seasonal cycle.

Pure pandas/numpy/scipy (no command line here).

Conventions
-----------
* Only rows whose flag is ``ok`` (notes after ';' such as ``ok;provisional_data`` allowed) and
  whose value is finite are used.
* Times are ISO 8601 strings in the data's own calendar; year/month/day are parsed from the
  text (never through pandas datetimes, so 2001-02-30 of a 360_day calendar is fine).
* Daily (or sub-monthly) rows are first averaged to calendar months (mean of the available
  valid values), months to seasons and years. A season (DJF, MAM, JJA, SON) needs all three
  months and a year (``annual``, January-December) all twelve; incomplete ones are dropped.
  DJF is labelled by the year of its January (Dec 1999 + Jan/Feb 2000 -> DJF 2000).
* The time axis is in decimal years in the data's calendar: the middle of each month is
  (days from 1 January to the month start + half the month length) / days in that year, with
  month and year lengths from ``cftime`` (so 360_day years have 360 days). A season or year
  sits at the mean of its months' positions.

Trend methods
-------------
``ols_ar1``
    Ordinary least squares slope. Its standard error uses the effective sample size
    n_eff = n (1 - r1) / (1 + r1), with r1 the lag-1 autocorrelation of the OLS residuals
    (r1 = sum e_t e_{t+1} / sum e_t^2), following Santer et al. (2000), JGR 105(D6), 7337-7356:
    s_e^2 = sum e^2 / (n_eff - 2), s_b = s_e / sqrt(sum (t - mean t)^2), and the 95 %
    interval and two-sided p-value come from Student's t with n_eff - 2 degrees of freedom.
    r1 < 0 is not allowed to inflate the sample: n_eff is capped at n. With n_eff < 3 (less than
    one degree of freedom; ours) the interval and p-value are NaN: Student's t with a fraction of a
    degree of freedom gives intervals of any width (a nearly noise-free line whose residuals are
    strongly autocorrelated gave -5 to +6 deg/decade around a slope of 0.43).
``theil_sen``
    Median of pairwise slopes (Sen 1968, JASA 63, 1379-1389) with its 95 % interval from
    ``scipy.stats.theilslopes``; the p-value is the Mann-Kendall trend test (Kendall 1975,
    Rank Correlation Methods), implemented here: S = sum_{i<j} sign(y_j - y_i),
    Var(S) = [n(n-1)(2n+5) - sum_g t_g(t_g-1)(2t_g+5)] / 18 (tie correction over groups of
    equal values), Z = (S - sign(S)) / sqrt(Var S) (continuity correction), p = 2 (1 - Phi(|Z|)).
"""

from __future__ import annotations

import re
from functools import lru_cache

import numpy as np
import pandas as pd
from scipy import stats as sps

from circtrack.flags import usable

REQUIRED = ("source", "time", "hemisphere", "sector", "metric", "value", "units", "flag")
SEASONS = ("annual", "DJF", "MAM", "JJA", "SON")
SEASON_OF_MONTH = {12: "DJF", 1: "DJF", 2: "DJF", 3: "MAM", 4: "MAM", 5: "MAM",
                   6: "JJA", 7: "JJA", 8: "JJA", 9: "SON", 10: "SON", 11: "SON"}
METHODS = ("ols_ar1", "theil_sen")
_TIME_RE = re.compile(r"^\s*(-?\d+)-(\d{1,2})-(\d{1,2})")
_HOUR_RE = re.compile(r"^\s*-?\d+-\d{1,2}-\d{1,2}[T ](\d{1,2})(?::(\d{1,2}))?(?::(\d{1,2}(?:\.\d*)?))?")
# fewest annual or seasonal means a trend is fitted to: with 3 the OLS slope exists (and, with no
# autocorrelation, its interval); 'circtrack trend' and 'plot' ask for MIN_TREND_YEARS by default
FEWEST_FOR_SLOPE = 3
MIN_TREND_YEARS = 10


class StatsInputError(ValueError):
    """The table does not follow the circtrack CSV contract."""


# ----------------------------------------------------------------------------- input handling

def key_columns(df):
    """Key columns other than time: source, any extra keys, hemisphere, sector, metric.

    Extra keys are the columns between ``time`` and ``hemisphere`` (e.g. ``member``) and those
    between ``sector`` and ``metric`` (``variant``, from ``track --vary``): each gets its own series,
    trend and climatology."""
    cols = list(df.columns)
    extras = []
    if "time" in cols and "hemisphere" in cols:
        extras = cols[cols.index("time") + 1: cols.index("hemisphere")]
    if "sector" in cols and "metric" in cols:
        extras += cols[cols.index("sector") + 1: cols.index("metric")]
    return ["source", *extras, "metric", "hemisphere", "sector"], extras


def read_csv(path_or_buf):
    """Read a circtrack CSV keeping every key as text (no date or NA guessing)."""
    df = pd.read_csv(path_or_buf, dtype=str, keep_default_na=False)
    return df


def parse_times(times):
    """Arrays (year, month, day) parsed from ISO 8601 text in any calendar."""
    s = pd.Series(np.asarray(times, dtype=str))
    parts = s.str.extract(_TIME_RE)
    bad = parts.isna().any(axis=1)
    if bad.any():
        raise StatsInputError(f"time '{s[bad].iloc[0]}' is not ISO 8601 (YYYY-MM-DD...)")
    y, m, d = (parts[i].astype(int).to_numpy() for i in range(3))
    if ((m < 1) | (m > 12)).any():
        raise StatsInputError(f"time '{s[(m < 1) | (m > 12)].iloc[0]}' has a month outside 1-12")
    return y, m, d


def parse_hours(times):
    """Hour of the day (0 <= h < 24, with minutes and seconds as fractions) from ISO 8601 text;
    0 for dates without a time of day."""
    s = pd.Series(np.asarray(times, dtype=str))
    parts = s.str.extract(_HOUR_RE).astype(float).fillna(0.0)
    return (parts[0] + parts[1] / 60.0 + parts[2] / 3600.0).to_numpy()


def clean(df):
    """Rows with flag 'ok' and a finite value; value as float, plus year/month/day/hour columns."""
    missing = [c for c in REQUIRED if c not in df.columns]
    if missing:
        raise StatsInputError(f"missing column(s) {', '.join(missing)}")
    out = df[usable(df["flag"])].copy()
    out["value"] = pd.to_numeric(out["value"], errors="coerce").astype(float)
    out = out[np.isfinite(out["value"].to_numpy())]
    if out.empty:
        return out.assign(year=pd.Series(dtype=int), month=pd.Series(dtype=int), day=pd.Series(dtype=int),
                          hour=pd.Series(dtype=float))
    y, m, d = parse_times(out["time"])
    out["year"], out["month"], out["day"] = y, m, d
    out["hour"] = parse_hours(out["time"])
    return out.reset_index(drop=True)


def infer_calendar(times):
    """Best guess from the dates alone: Feb 30 -> 360_day, Feb 29 -> standard, else standard."""
    _, m, d = parse_times(times)
    if ((m == 2) & (d == 30)).any():
        return "360_day"
    return "standard"


# ----------------------------------------------------------------------------- calendar time

def cf_date(year, month, day, calendar, hour=0.0):
    """A ``cftime.datetime`` (year 0 allowed: climatologies count from it; cftime's note that CF does
    not define year 0 in some calendars is not shown)."""
    import warnings

    import cftime

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        base = cftime.datetime(int(year), int(month), int(day), calendar=calendar, has_year_zero=True)
    if hour:
        import datetime

        base = base + datetime.timedelta(hours=float(hour))
    return base


@lru_cache(maxsize=None)
def year_start_length(year, calendar):
    """1 January of ``year`` (a cftime date) and the length of that year in days, in ``calendar``."""
    y0, y1 = cf_date(year, 1, 1, calendar), cf_date(year + 1, 1, 1, calendar)
    return y0, (y1 - y0).total_seconds() / 86400.0


def decimal_time(years, months, days, hours, calendar="standard"):
    """Decimal year of each time step (day and hour of the day counted) in ``calendar``."""
    out = np.empty(len(years), float)
    cache = {}
    for i, key in enumerate(zip(years, months, days, hours)):
        if key not in cache:
            y, m, d, h = key
            y0, length = year_start_length(int(y), calendar)
            cache[key] = int(y) + (cf_date(y, m, d, calendar, h) - y0).total_seconds() / 86400.0 / length
        out[i] = cache[key]
    return out


@lru_cache(maxsize=None)
def _month_mid(year, month, calendar):
    def dt(y, mo):
        return cf_date(y, mo, 1, calendar)

    start = dt(year, month)
    nxt = dt(year + (month == 12), month % 12 + 1)
    y0, y1 = dt(year, 1), dt(year + 1, 1)
    days_in_year = (y1 - y0).total_seconds() / 86400.0
    offset = (start - y0).total_seconds() / 86400.0 + (nxt - start).total_seconds() / 86400.0 / 2.0
    return year + offset / days_in_year


def decimal_year(years, months, calendar="standard"):
    """Decimal year of the middle of each (year, month) in ``calendar``."""
    return np.array([_month_mid(int(y), int(m), calendar) for y, m in zip(years, months)], dtype=float)


# ----------------------------------------------------------------------------- aggregation

def monthly_means(df, calendar="standard"):
    """Average cleaned rows to calendar months: keys, units, year, month, t (decimal year), value."""
    keys, _ = key_columns(df)
    if df.empty:
        return pd.DataFrame(columns=[*keys, "units", "year", "month", "t", "value"])
    g = df.groupby([*keys, "year", "month"], sort=True, dropna=False)
    out = g.agg(value=("value", "mean"), units=("units", "first")).reset_index()
    out["t"] = decimal_year(out["year"], out["month"], calendar)
    return out[[*keys, "units", "year", "month", "t", "value"]]


def seasonal_means(monthly):
    """Season and annual means from monthly means; incomplete seasons/years dropped.

    Columns: keys, units, season, year (DJF: year of January), t, value, months.
    """
    keys = [c for c in monthly.columns if c not in ("units", "year", "month", "t", "value")]
    cols = [*keys, "units", "season", "year", "t", "value"]
    if monthly.empty:
        return pd.DataFrame(columns=cols)
    seas = monthly.copy()
    seas["season"] = seas["month"].map(SEASON_OF_MONTH)
    seas["year"] = seas["year"] + (seas["month"] == 12).astype(int)
    ann = monthly.copy()
    ann["season"] = "annual"
    both = pd.concat([ann, seas], ignore_index=True)
    g = both.groupby([*keys, "season", "year"], sort=True, dropna=False)
    out = g.agg(value=("value", "mean"), t=("t", "mean"), units=("units", "first"),
                months=("month", "nunique")).reset_index()
    need = np.where(out["season"] == "annual", 12, 3)
    out = out[out["months"].to_numpy() == need]
    return out[cols].reset_index(drop=True)


# ----------------------------------------------------------------------------- trend estimators

MIN_EFFECTIVE_N = 3.0     # ours: at least one degree of freedom (n_eff - 2) for the t interval


def ols_ar1(t, y, alpha=0.05):
    """OLS trend with the lag-1-autocorrelation (effective sample size) adjustment.

    Returns a dict: slope, intercept, se, ci_low, ci_high, p_value, n, r1, n_eff, s_e, t_mean,
    sxx, t_crit (all per unit of ``t``).
    """
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = len(t)
    res = dict(slope=np.nan, intercept=np.nan, se=np.nan, ci_low=np.nan, ci_high=np.nan, p_value=np.nan,
               n=n, r1=np.nan, n_eff=np.nan, s_e=np.nan, t_mean=np.nan, sxx=np.nan, t_crit=np.nan)
    if n < 3:
        return res
    tm = t.mean()
    sxx = np.sum((t - tm) ** 2)
    if sxx <= 0:
        return res
    b = np.sum((t - tm) * (y - y.mean())) / sxx
    a = y.mean() - b * tm
    e = y - (a + b * t)
    ss = np.sum(e ** 2)
    r1 = float(np.sum(e[:-1] * e[1:]) / ss) if ss > 0 else 0.0
    n_eff = min(float(n), n * (1.0 - r1) / (1.0 + r1)) if r1 > -1 else float(n)
    res.update(slope=b, intercept=a, r1=r1, n_eff=n_eff, t_mean=tm, sxx=sxx)
    if n_eff < MIN_EFFECTIVE_N:
        return res
    s_e = np.sqrt(ss / (n_eff - 2.0))
    se = s_e / np.sqrt(sxx)
    dof = n_eff - 2.0
    tcrit = sps.t.ppf(1 - alpha / 2, dof)
    p = 2 * sps.t.sf(abs(b) / se, dof) if se > 0 else (0.0 if b != 0 else np.nan)
    res.update(se=se, s_e=s_e, t_crit=tcrit, ci_low=b - tcrit * se, ci_high=b + tcrit * se, p_value=p)
    return res


def ols_band(fit, t):
    """Fitted line and half-width of its confidence band at ``t`` (uses n_eff like the slope)."""
    t = np.asarray(t, float)
    line = fit["intercept"] + fit["slope"] * t
    if not np.isfinite(fit["s_e"]):
        return line, np.full_like(t, np.nan)
    half = fit["t_crit"] * fit["s_e"] * np.sqrt(1.0 / fit["n_eff"] + (t - fit["t_mean"]) ** 2 / fit["sxx"])
    return line, half


def mann_kendall(y):
    """Mann-Kendall test: (S, Var S with tie correction, Z, two-sided p)."""
    y = np.asarray(y, float)
    n = len(y)
    if n < 3:
        return 0.0, np.nan, np.nan, np.nan
    diff = y[None, :] - y[:, None]
    s = float(np.sum(np.sign(diff[np.triu_indices(n, 1)])))
    _, counts = np.unique(y, return_counts=True)
    ties = np.sum(counts * (counts - 1) * (2 * counts + 5))
    var = (n * (n - 1) * (2 * n + 5) - ties) / 18.0
    if var <= 0:
        return s, var, np.nan, np.nan
    z = (s - np.sign(s)) / np.sqrt(var)
    p = 2 * sps.norm.sf(abs(z))
    return s, var, z, float(p)


def theil_sen(t, y, alpha=0.05):
    t = np.asarray(t, float)
    y = np.asarray(y, float)
    n = len(t)
    if n < 3:
        return dict(slope=np.nan, ci_low=np.nan, ci_high=np.nan, p_value=np.nan, n=n)
    r = sps.theilslopes(y, t, alpha=1 - alpha)
    return dict(slope=float(r[0]), ci_low=float(r[2]), ci_high=float(r[3]), p_value=mann_kendall(y)[3], n=n)


# ----------------------------------------------------------------------------- public API

def poleward_flip(df):
    """Flip SH latitude metrics (units degrees_north) so that poleward is positive."""
    out = df.copy()
    lat = out["units"] == "degrees_north"
    sel = (out["hemisphere"] == "SH") & lat
    out.loc[sel, "value"] = -out.loc[sel, "value"]
    # every hemisphere's latitudes now count poleward from the equator; a global latitude (the
    # boundary between the two Hadley cells) keeps its sign and its units
    out.loc[lat & out["hemisphere"].isin(["NH", "SH"]), "units"] = "degrees_poleward"
    return out


def trends(df, poleward_positive=False, calendar="standard", metrics=None, min_years=FEWEST_FOR_SLOPE,
           too_short=None):
    """Per key and season: OLS-AR(1) and Theil-Sen/Mann-Kendall trends per decade (tidy table).

    ``df`` is the raw CSV table (strings are fine). Slopes and intervals are in the metric's
    units per decade. A series (key and season) with fewer than ``min_years`` annual or seasonal
    means gets no rows (never below 3, where no slope exists); when ``too_short`` is a list, each
    such series is appended to it as ``(key tuple, n)``.
    """
    min_years = max(int(min_years), FEWEST_FOR_SLOPE)
    data = clean(df)
    keys, extras = key_columns(df)
    if metrics:
        data = data[data["metric"].isin(list(metrics))]
    if poleward_positive and not data.empty:
        data = poleward_flip(data)
    sea = seasonal_means(monthly_means(data, calendar))
    out_keys = ["source", *extras, "metric", "hemisphere", "sector"]
    cols = [*out_keys, "season", "method", "slope_per_decade", "ci_low", "ci_high", "p_value", "n", "units"]
    rows = []
    for k, g in sea.groupby([*out_keys, "season"], sort=False, dropna=False):
        g = g.sort_values("t")
        t, y = g["t"].to_numpy(), g["value"].to_numpy()
        if len(t) < min_years:
            if too_short is not None:
                too_short.append((k, len(t)))
            continue
        units = g["units"].iloc[0]
        for method, fit in (("ols_ar1", ols_ar1(t, y)), ("theil_sen", theil_sen(t, y))):
            rows.append([*k, method, 10 * fit["slope"], 10 * fit["ci_low"], 10 * fit["ci_high"],
                         fit["p_value"], int(fit["n"]), units])
    out = pd.DataFrame(rows, columns=cols)
    return sort_table(out, [*out_keys, "season", "method"])


def sort_table(df, keys):
    if df.empty:
        return df.reset_index(drop=True)
    tmp = df.copy()
    if "season" in keys:
        tmp["_season"] = tmp["season"].map({s: i for i, s in enumerate(SEASONS)})
        keys = ["_season" if k == "season" else k for k in keys]
    tmp = tmp.sort_values(keys, kind="mergesort")
    return tmp.drop(columns=[c for c in ("_season",) if c in tmp]).reset_index(drop=True)


def seasonal_cycle(df, base=None, calendar="standard", metrics=None):
    """Monthly climatology and anomalies.

    Returns ``(climatology, anomalies)``:

    * climatology: keys, month (1-12), mean, std (sample, ddof=1), n (years), amplitude
      (max - min of the 12 climatological means; NaN if a month is missing), extreme
      ("poleward" for hemispheric latitude metrics, i.e. max |lat|; "max" otherwise, e.g. the
      northernmost month of a global latitude), extreme_month, units;
    * anomalies: keys, year, month, value, anomaly (monthly mean minus its base climatology), units.

    ``base=(y0, y1)`` restricts the climatology to years y0..y1 inclusive (default: all years).
    """
    data = clean(df)
    keys, extras = key_columns(df)
    if metrics:
        data = data[data["metric"].isin(list(metrics))]
    mon = monthly_means(data, calendar)
    ccols = [*keys, "month", "mean", "std", "n", "amplitude", "extreme", "extreme_month", "units"]
    acols = [*keys, "year", "month", "value", "anomaly", "units"]
    if mon.empty:
        return pd.DataFrame(columns=ccols), pd.DataFrame(columns=acols)
    inbase = mon if base is None else mon[(mon["year"] >= base[0]) & (mon["year"] <= base[1])]
    if inbase.empty:
        raise StatsInputError(f"no data in the base period {base[0]}-{base[1]}")
    g = inbase.groupby([*keys, "month"], sort=True, dropna=False)
    clim = g.agg(mean=("value", "mean"), std=("value", "std"), n=("value", "size"),
                 units=("units", "first")).reset_index()
    parts = []
    for _, c in clim.groupby(keys, sort=False, dropna=False):
        c = c.sort_values("month").copy()
        # a hemisphere's latitude has a poleward extreme; a global one (e.g. the boundary between
        # the two Hadley cells) only a northernmost one
        lat = (c["units"].iloc[0] in ("degrees_north", "degrees_poleward")) and \
            str(c["hemisphere"].iloc[0]) in ("NH", "SH")
        full = len(c) == 12
        c["amplitude"] = float(c["mean"].max() - c["mean"].min()) if full else np.nan
        score = c["mean"].abs() if lat else c["mean"]
        c["extreme"] = "poleward" if lat else "max"
        c["extreme_month"] = int(c["month"].to_numpy()[int(np.argmax(score.to_numpy()))])
        parts.append(c)
    clim = pd.concat(parts, ignore_index=True)[ccols]
    anom = mon.merge(clim[[*keys, "month", "mean"]], on=[*keys, "month"], how="inner")
    anom["anomaly"] = anom["value"] - anom["mean"]
    anom = anom[acols]
    return sort_table(clim, [*keys, "month"]), sort_table(anom, [*keys, "year", "month"])


def table_to_csv(df, int_cols=("n", "month", "year", "extreme_month")):
    """CSV text with stable float formatting (rerun -> identical bytes)."""
    from circtrack.output import format_value

    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(list(df.columns))
    floats = [c for c in df.columns if c not in int_cols and pd.api.types.is_float_dtype(df[c])]
    for row in df.itertuples(index=False):
        out = []
        for c, v in zip(df.columns, row):
            if c in floats:
                out.append(format_value(float(v)))
            elif c in int_cols and v is not None and not (isinstance(v, float) and np.isnan(v)):
                out.append(str(int(v)))
            else:
                out.append(str(v))
        w.writerow(out)
    return buf.getvalue()
