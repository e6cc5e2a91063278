"""Tests of circtrack.stats: trends against reference libraries and hand formulas, seasons, cycle."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats as sps

from circtrack import stats as S

COLS = ["source", "time", "hemisphere", "sector", "metric", "value", "units", "flag"]


def table(values, years, calendar_days=(31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31), months=range(1, 13),
          metric="eddy_jet_lat", hemi="NH", units="degrees_north", day=15):
    rows = []
    i = 0
    for y in years:
        for m in months:
            rows.append(("src", f"{y:04d}-{m:02d}-{day:02d}", hemi, "zonal", metric, values[i], units, "ok"))
            i += 1
    return pd.DataFrame(rows, columns=COLS)


# ---------------------------------------------------------------- OLS with AR(1) adjustment

def test_ols_matches_statsmodels_when_r1_is_zero():
    sm = pytest.importorskip("statsmodels.api")
    # residual pattern +1,+1,-1,-1 over 13 points: lag-1 autocorrelation of the OLS residuals ~ -0.014
    t = np.arange(13, dtype=float) + 1990
    y = 2.0 + 0.3 * t + np.array(([1, 1, -1, -1] * 4)[:13], dtype=float)
    fit = S.ols_ar1(t, y)
    ref = sm.OLS(y, sm.add_constant(t)).fit()
    resid = ref.resid
    r1 = np.sum(resid[:-1] * resid[1:]) / np.sum(resid ** 2)
    assert -0.05 < r1 <= 0
    assert fit["r1"] == pytest.approx(r1, abs=1e-12)
    assert fit["n_eff"] == 13  # r1 <= 0 never inflates the sample
    assert fit["slope"] == pytest.approx(ref.params[1], rel=1e-10)
    assert fit["se"] == pytest.approx(ref.bse[1], rel=1e-8)
    lo, hi = ref.conf_int(0.05)[1]
    assert fit["ci_low"] == pytest.approx(lo, rel=1e-8)
    assert fit["ci_high"] == pytest.approx(hi, rel=1e-8)
    assert fit["p_value"] == pytest.approx(ref.pvalues[1], rel=1e-6)


def test_ols_matches_statsmodels_white_noise():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(3)
    for _ in range(20):
        t = np.arange(30, dtype=float)
        y = 0.1 * t + rng.normal(size=30)
        fit = S.ols_ar1(t, y)
        if fit["r1"] > 0:
            continue
        ref = sm.OLS(y, sm.add_constant(t)).fit()
        assert fit["slope"] == pytest.approx(ref.params[1], rel=1e-12)
        assert fit["ci_low"] == pytest.approx(ref.conf_int(0.05)[1][0], rel=1e-10)
        assert fit["ci_high"] == pytest.approx(ref.conf_int(0.05)[1][1], rel=1e-10)
        assert fit["p_value"] == pytest.approx(ref.pvalues[1], rel=1e-8)
        return
    pytest.fail("no series with r1 <= 0 drawn")


def test_ar1_adjustment_worked_example():
    t = np.array([0.0, 1, 2, 3, 4, 5, 6, 7])
    y = np.array([1.0, 1.5, 2.6, 3.1, 3.2, 3.0, 4.4, 5.1])
    # by hand: least squares line
    tm, ym = t.mean(), y.mean()
    b = sum((ti - tm) * (yi - ym) for ti, yi in zip(t, y)) / sum((ti - tm) ** 2 for ti in t)
    a = ym - b * tm
    e = [yi - (a + b * ti) for ti, yi in zip(t, y)]
    r1 = sum(e[i] * e[i + 1] for i in range(7)) / sum(x * x for x in e)
    assert r1 > 0
    n_eff = 8 * (1 - r1) / (1 + r1)
    se = (sum(x * x for x in e) / (n_eff - 2)) ** 0.5 / sum((ti - tm) ** 2 for ti in t) ** 0.5
    tc = sps.t.ppf(0.975, n_eff - 2)
    p = 2 * sps.t.sf(abs(b) / se, n_eff - 2)
    fit = S.ols_ar1(t, y)
    assert fit["slope"] == pytest.approx(b)
    assert fit["r1"] == pytest.approx(r1)
    assert fit["n_eff"] == pytest.approx(n_eff)
    assert fit["se"] == pytest.approx(se)
    assert fit["ci_low"] == pytest.approx(b - tc * se)
    assert fit["ci_high"] == pytest.approx(b + tc * se)
    assert fit["p_value"] == pytest.approx(p)
    # the adjusted interval is wider than the naive one
    naive = (sum(x * x for x in e) / 6) ** 0.5 / sum((ti - tm) ** 2 for ti in t) ** 0.5
    assert fit["se"] > naive


def test_ar1_strong_autocorrelation_gives_nan_ci():
    """Less than one degree of freedom left (n_eff < 3): no interval and no p-value (Student's t with
    half a degree of freedom gave intervals of any width); the slope is still given."""
    t = np.arange(10.0)
    y = 0.1 * t + np.array([0, 1, 2, 3, 4, 4, 3, 2, 1, 0.0])  # smooth residuals: r1 = 0.6, n_eff = 2.5
    fit = S.ols_ar1(t, y)
    assert fit["r1"] == pytest.approx(0.6) and fit["n_eff"] == pytest.approx(2.5)
    assert np.isnan(fit["ci_low"]) and np.isnan(fit["ci_high"]) and np.isnan(fit["p_value"])
    assert np.isfinite(fit["slope"])
    y = 0.04 * np.arange(20.0) + 0.002 * np.sin(np.arange(20) / 3.0)       # n_eff = 3.09: one degree of freedom
    fit = S.ols_ar1(np.arange(20.0), y)
    assert fit["n_eff"] > 3 and fit["ci_low"] < 0.04 < fit["ci_high"]


# ---------------------------------------------------------------- Theil-Sen and Mann-Kendall

def test_theil_sen_matches_scipy():
    rng = np.random.default_rng(0)
    t = np.arange(25.0) + 1990
    y = 0.04 * t + rng.normal(size=25)
    ts = S.theil_sen(t, y)
    ref = sps.theilslopes(y, t, alpha=0.95)
    assert ts["slope"] == ref[0]
    assert (ts["ci_low"], ts["ci_high"]) == (ref[2], ref[3])


def test_mann_kendall_known_value_monotonic():
    s, var, z, p = S.mann_kendall(np.arange(10.0))
    assert s == 45
    assert var == pytest.approx(125.0)  # 10*9*25/18
    assert z == pytest.approx(44 / np.sqrt(125))
    assert p == pytest.approx(2 * sps.norm.sf(44 / np.sqrt(125)))
    assert p == pytest.approx(8.30e-5, rel=0.01)


def test_mann_kendall_against_kendalltau_with_ties():
    rng = np.random.default_rng(5)
    y = np.round(rng.normal(size=40) + 0.03 * np.arange(40), 1)  # rounding makes ties
    s, var, z, p = S.mann_kendall(y)
    t = np.arange(40.0)
    # independent: S = concordant - discordant from scipy's tau-b; var with tie correction by hand
    tau = sps.kendalltau(t, y).statistic
    n0 = 40 * 39 / 2
    _, c = np.unique(y, return_counts=True)
    n2 = np.sum(c * (c - 1) / 2)
    s_ref = tau * np.sqrt(n0 * (n0 - n2))
    assert s == pytest.approx(s_ref, abs=1e-6)
    var_ref = (40 * 39 * 85 - np.sum(c * (c - 1) * (2 * c + 5))) / 18
    assert var == pytest.approx(var_ref)
    # no continuity correction in scipy's asymptotic p: ours is slightly larger
    p_scipy = sps.kendalltau(t, y, method="asymptotic").pvalue
    assert p >= p_scipy * 0.999
    assert p == pytest.approx(2 * sps.norm.sf((abs(s) - 1) / np.sqrt(var_ref)))


# ---------------------------------------------------------------- seasons and calendars

def test_season_grouping_360_day():
    years = [2000, 2001, 2002]
    vals = [100 * (y - 2000) + m for y in years for m in range(1, 13)]
    df = table(vals, years, day=30)  # day 30 exists in every month of a 360_day calendar, incl. Feb
    df.loc[df["time"] == "2001-02-30", "time"] = "2001-02-30"
    assert S.infer_calendar(df["time"]) == "360_day"
    sea = S.seasonal_means(S.monthly_means(S.clean(df), "360_day"))
    djf = sea[sea["season"] == "DJF"].set_index("year")["value"]
    # DJF 2000 incomplete (no Dec 1999) -> dropped; DJF 2001 = Dec 2000, Jan, Feb 2001
    assert list(djf.index) == [2001, 2002]
    assert djf[2001] == pytest.approx((12 + 101 + 102) / 3)
    ann = sea[sea["season"] == "annual"].set_index("year")
    assert list(ann.index) == years
    assert ann.loc[2000, "value"] == pytest.approx(6.5)
    # 360-day time axis: the mid-January of year Y is Y + 15/360
    assert S.decimal_year([2001], [1], "360_day")[0] == pytest.approx(2001 + 15 / 360)
    assert ann.loc[2001, "t"] == pytest.approx(2001.5)
    jja = sea[sea["season"] == "JJA"].set_index("year")["value"]
    assert jja[2002] == pytest.approx(200 + 7)


def test_season_grouping_noleap_daily_and_incomplete():
    import cftime

    rows = []
    d = cftime.datetime(2000, 12, 1, calendar="noleap")
    end = cftime.datetime(2002, 3, 1, calendar="noleap")
    from datetime import timedelta
    while d < end:
        if not (d.year == 2001 and d.month == 7):  # July 2001 missing -> JJA 2001 and annual 2001 dropped
            rows.append(("s", d.strftime("%Y-%m-%d"), "SH", "zonal", "hadley_edge_lat", float(d.month), "degrees_north", "ok"))
        d = d + timedelta(days=1)
    rows.append(("s", "2001-05-10", "SH", "zonal", "hadley_edge_lat", "NaN", "degrees_north", "ok"))
    rows.append(("s", "2001-05-11", "SH", "zonal", "hadley_edge_lat", "999", "degrees_north", "no_edge"))
    df = pd.DataFrame(rows, columns=COLS)
    mon = S.monthly_means(S.clean(df), "noleap")
    assert len(mon) == 15 - 1
    assert mon.set_index(["year", "month"]).loc[(2001, 5), "value"] == 5.0
    sea = S.seasonal_means(mon)
    got = set(zip(sea["season"], sea["year"]))
    assert ("DJF", 2001) in got and ("DJF", 2002) in got  # labelled by January's year
    assert ("JJA", 2001) not in got and ("annual", 2001) not in got
    assert ("MAM", 2001) in got and ("SON", 2001) in got
    assert sea.set_index(["season", "year"]).loc[("DJF", 2001), "value"] == pytest.approx((12 + 1 + 2) / 3)
    assert S.decimal_year([2001], [2], "noleap")[0] == pytest.approx(2001 + (31 + 14) / 365)


def test_bad_times_rejected():
    with pytest.raises(S.StatsInputError):
        S.parse_times(["15/01/2000"])


# ---------------------------------------------------------------- trends table

def synthetic(trend_per_decade=0.5, years=range(1961, 2011), seed=2, extra=False):
    rng = np.random.default_rng(seed)
    rows = []
    for y in years:
        for m in range(1, 13):
            t = y + (m - 0.5) / 12
            base = 40 + trend_per_decade / 10 * (t - 1961) + 2 * np.cos(2 * np.pi * (m - 1) / 12)
            for h, sgn in (("NH", 1), ("SH", -1)):
                r = ["s", f"{y}-{m:02d}-16"] + (["r1i1p1f1"] if extra else []) + [
                    h, "zonal", "eddy_jet_lat", repr(float(sgn * (base + rng.normal(0, 0.3)))), "degrees_north", "ok"]
                rows.append(r)
    cols = COLS[:2] + (["member"] if extra else []) + COLS[2:]
    return pd.DataFrame(rows, columns=cols).astype(str)


def test_known_trend_recovered_and_poleward_flip():
    df = synthetic()
    tr = S.trends(df, poleward_positive=True, calendar="standard")
    assert list(tr.columns) == ["source", "metric", "hemisphere", "sector", "season", "method", "slope_per_decade",
                                "ci_low", "ci_high", "p_value", "n", "units"]
    ann = tr[tr["season"] == "annual"].set_index(["hemisphere", "method"])
    for h in ("NH", "SH"):
        for meth in ("ols_ar1", "theil_sen"):
            r = ann.loc[(h, meth)]
            assert r["slope_per_decade"] == pytest.approx(0.5, abs=0.05)
            assert r["ci_low"] < 0.5 < r["ci_high"]
            assert r["p_value"] < 1e-6
            assert r["n"] == 50
    assert set(tr["season"]) == set(S.SEASONS)
    assert tr[tr["season"] == "DJF"]["n"].iloc[0] == 49  # first DJF lacks December 1960
    raw = S.trends(df, poleward_positive=False)
    sh = raw[(raw["hemisphere"] == "SH") & (raw["season"] == "annual") & (raw["method"] == "ols_ar1")]
    assert sh["slope_per_decade"].iloc[0] == pytest.approx(-0.5, abs=0.05)


def test_extra_key_column_kept():
    tr = S.trends(synthetic(years=range(2000, 2010), extra=True))
    assert list(tr.columns[:3]) == ["source", "member", "metric"]
    assert set(tr["member"]) == {"r1i1p1f1"}


# ---------------------------------------------------------------- seasonal cycle

def test_seasonal_cycle_amplitude_extreme_and_anomalies():
    df = synthetic(trend_per_decade=0.0, years=range(1981, 1991))
    clim, anom = S.seasonal_cycle(df, base=(1981, 1985))
    nh = clim[clim["hemisphere"] == "NH"]
    sh = clim[clim["hemisphere"] == "SH"]
    assert list(nh["month"]) == list(range(1, 13))
    assert (nh["n"] == 5).all()
    assert nh["amplitude"].iloc[0] == pytest.approx(4.0, abs=0.4)  # 2 cos -> max-min = 4
    for part in (nh, sh):  # |lat| largest near January in both hemispheres (SH values are negative)
        expect = int(part["month"].to_numpy()[np.argmax(part["mean"].abs().to_numpy())])
        assert (part["extreme_month"] == expect).all()
        assert expect in (12, 1, 2)
    assert (sh["extreme"] == "poleward").all()
    assert nh.loc[nh["month"] == 7, "mean"].iloc[0] == pytest.approx(38, abs=0.3)
    assert len(anom) == 2 * 120
    a = anom[(anom["hemisphere"] == "NH") & (anom["year"] <= 1985)]
    assert abs(a["anomaly"].mean()) < 1e-10
    with pytest.raises(S.StatsInputError):
        S.seasonal_cycle(df, base=(1900, 1910))


def test_csv_text_is_stable():
    df = synthetic(years=range(2000, 2006))
    a = S.table_to_csv(S.trends(df))
    b = S.table_to_csv(S.trends(df.sample(frac=1, random_state=1)))
    assert a == b
    assert a.splitlines()[0].startswith("source,metric,hemisphere,sector,season,method,slope_per_decade")


def test_only_usable_rows_enter_the_statistics():
    import pandas as pd

    df = pd.DataFrame({"source": "s", "time": ["2001-01-15", "2001-02-15", "2001-03-15", "2001-04-15"],
                       "hemisphere": "NH", "sector": "zonal", "metric": "m", "value": [1.0, 2.0, 3.0, "NaN"],
                       "units": "u", "flag": ["ok", "ok;provisional_data", "extremum_at_window_edge", "ok"]})
    out = S.clean(df)
    assert list(out["value"]) == [1.0, 2.0]          # a note after ';' keeps a row; a doubtful flag or NaN drops it


def test_season_extreme_of_a_global_latitude_is_its_northernmost_month():
    import pandas as pd

    months = list(range(1, 13))
    vals = [5.0 * np.cos(2 * np.pi * (m - 8) / 12) for m in months]        # northernmost in August
    df = pd.DataFrame({"source": "s", "time": [f"2001-{m:02d}-15" for m in months], "hemisphere": "global",
                       "sector": "zonal", "metric": "cell_boundary_lat", "value": vals,
                       "units": "degrees_north", "flag": "ok"})
    clim, _ = S.seasonal_cycle(df, calendar="noleap")
    row = clim.iloc[0]
    assert row["extreme"] == "max" and row["extreme_month"] == 8
