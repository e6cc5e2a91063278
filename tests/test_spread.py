"""circtrack spread: statistics across variants and across the metrics of a feature group,
checked against pandas' own groupby statistics (an independent implementation)."""

import io

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from circtrack import spread as SP
from circtrack.cli import main
from circtrack.metrics import catalogue, groups

TIMES = ["2001-01-15", "2001-02-15", "2001-03-15"]


def _table(rng):
    rows = []
    for t in TIMES:
        for hemi in ("NH", "SH"):
            for v in ("cells.level_hpa=400", "cells.level_hpa=500", "cells.level_hpa=600"):
                for m in ("hadley_edge_lat", "olr_edge_lat", "hadley_strength"):
                    val = rng.normal(30, 2) if m != "hadley_strength" else rng.normal(1e11, 1e10)
                    flag = "ok"
                    if m == "olr_edge_lat" and v.endswith("600") and t == TIMES[1]:
                        val, flag = float("nan"), "no_sign_change_in_window"
                    if m == "hadley_edge_lat" and v.endswith("400") and t == TIMES[2]:
                        flag = "ok;interpolated_level"
                    units = "kg s-1" if m == "hadley_strength" else "degrees_north"
                    rows.append(["q", t, hemi, "zonal", v, m, f"{val:.6g}", units, flag])
    return pd.DataFrame(rows, columns=["source", "time", "hemisphere", "sector", "variant", "metric", "value",
                                       "units", "flag"]).astype(str)


def test_spread_across_variants_and_groups_equals_pandas():
    df = _table(np.random.default_rng(1))
    out = SP.spread(df, {"tropical_edge": ("hadley_edge_lat", "olr_edge_lat")})
    ok = df[df["flag"].str.split(";").str[0] == "ok"].copy()
    ok["x"] = ok["value"].astype(float)
    ref = ok.groupby(["time", "hemisphere", "metric"])["x"].agg(["count", "min", "max", "mean", "std"])
    per = out[out["across"] == "variants"].set_index(["time", "hemisphere", "metric"])
    assert len(per) == len(ref) == 3 * 2 * 3
    for k, r in ref.iterrows():
        got = per.loc[k]
        assert got["n"] == r["count"]
        assert got["min"] == r["min"] and got["max"] == r["max"]
        assert got["range"] == pytest.approx(r["max"] - r["min"])
        assert got["mean"] == pytest.approx(r["mean"], rel=1e-12)
        assert got["std"] == pytest.approx(r["std"], rel=1e-12)
    assert per.loc[(TIMES[1], "NH", "olr_edge_lat"), "n"] == 2            # the flagged variant is left out
    grp = ok[ok["metric"] != "hadley_strength"].groupby(["time", "hemisphere"])["x"].agg(["count", "mean", "std"])
    g = out[out["across"] == "metrics"].set_index(["time", "hemisphere"])
    assert set(g["metric"]) == {"tropical_edge"}
    for k, r in grp.iterrows():
        assert g.loc[k, "n"] == r["count"]
        assert g.loc[k, "mean"] == pytest.approx(r["mean"], rel=1e-12)
        assert g.loc[k, "std"] == pytest.approx(r["std"], rel=1e-12)
    assert list(out.columns) == ["source", "time", "hemisphere", "sector", "metric", "across", "n", "min", "max",
                                 "range", "mean", "std", "units"]


def test_spread_of_trends_and_sign_agreement():
    rows = []
    slopes = {"cells.level_hpa=400": 0.3, "cells.level_hpa=500": 0.1, "cells.level_hpa=600": -0.05}
    for v, s in slopes.items():
        for m, f in (("hadley_edge_lat", 1.0), ("olr_edge_lat", 2.0)):
            rows.append(["q", v, m, "NH", "zonal", "annual", "ols_ar1", s * f, s * f - 0.1, s * f + 0.1, 0.01, 20,
                         "degrees_north"])
    df = pd.DataFrame(rows, columns=["source", "variant", "metric", "hemisphere", "sector", "season", "method",
                                     "slope_per_decade", "ci_low", "ci_high", "p_value", "n", "units"]).astype(str)
    out = SP.spread(df, {"tropical_edge": ("hadley_edge_lat", "olr_edge_lat")})
    h = out[(out["metric"] == "hadley_edge_lat")].iloc[0]
    assert h["n"] == 3 and h["n_positive"] == 2 and h["n_negative"] == 1 and h["signs_agree"] == "false"
    assert h["std"] == pytest.approx(pd.Series([0.3, 0.1, -0.05]).std())
    g = out[out["metric"] == "tropical_edge"].iloc[0]
    assert g["n"] == 6 and g["range"] == pytest.approx(0.6 - -0.1)
    one = SP.spread(df[~df["variant"].str.endswith("600")], {})
    assert set(one["signs_agree"]) == {"true"}


def test_groups_in_catalogue_and_listing():
    cat = catalogue()
    gs = groups()
    assert gs["tropical_edge"].metric_ids == ("hadley_edge_lat", "surface_wind_zero_lat", "subtropical_jet_lat",
                                              "subtropical_high_lat", "tropopause_break_lat", "p_minus_e_zero_lat",
                                              "olr_edge_lat")
    for g in gs.values():
        assert len(g.metric_ids) >= 2
        assert len({cat[m].units for m in g.metric_ids}) == 1 and all(cat[m].scope == "hemisphere" for m in g.metric_ids)
    r = CliRunner().invoke(main, ["metrics"])
    assert "tropical_edge: Poleward edge of the tropics: hadley_edge_lat" in r.output
    r = CliRunner().invoke(main, ["metrics", "--format", "markdown"])
    assert "| `tropical_edge` (Poleward edge of the tropics) |" in r.output


def test_spread_command(tmp_path):
    df = _table(np.random.default_rng(2))
    src = tmp_path / "v.csv"
    df.to_csv(src, index=False)
    out = tmp_path / "s.csv"
    r = CliRunner().invoke(main, ["spread", str(src), "-o", str(out)])
    assert r.exit_code == 0, r.output
    tab = pd.read_csv(out)
    assert set(tab["across"]) == {"variants", "metrics"}
    # nothing to compare: one metric, no variants
    plain = df[(df["variant"] == "cells.level_hpa=500") & (df["metric"] == "hadley_edge_lat")].drop(columns="variant")
    plain.to_csv(src, index=False)
    r = CliRunner().invoke(main, ["spread", str(src), "-o", str(out)])
    assert r.exit_code == 1 and "nothing to compare" in r.output
    (tmp_path / "bad.csv").write_text("a,b\n1,2\n")
    r = CliRunner().invoke(main, ["spread", str(tmp_path / "bad.csv")])
    assert r.exit_code == 1 and "neither a 'track' table" in r.output and len(r.output.strip().splitlines()) == 1


def test_trend_and_season_keep_variants_apart():
    from circtrack import stats as S
    rows = []
    for y in range(2000, 2010):
        for mth in range(1, 13):
            for v, slope in (("a=1", 0.1), ("a=2", -0.2)):
                rows.append(["q", f"{y:04d}-{mth:02d}-15", "NH", "zonal", v, "hadley_edge_lat",
                             str(30 + slope * (y - 2000 + (mth - 0.5) / 12)), "degrees_north", "ok"])
    df = pd.DataFrame(rows, columns=["source", "time", "hemisphere", "sector", "variant", "metric", "value", "units",
                                     "flag"])
    tr = S.trends(df)
    ann = tr[(tr["season"] == "annual") & (tr["method"] == "ols_ar1")].set_index("variant")
    assert ann.loc["a=1", "slope_per_decade"] == pytest.approx(1.0, rel=1e-3)
    assert ann.loc["a=2", "slope_per_decade"] == pytest.approx(-2.0, rel=1e-3)
    clim, _ = S.seasonal_cycle(df)
    assert set(clim["variant"]) == {"a=1", "a=2"} and len(clim) == 24
    assert io.StringIO(S.table_to_csv(tr)).readline().startswith("source,variant,metric")


def test_plot_draws_the_variant_band(tmp_path):
    """The line is the variant with the packaged defaults; the band spans the variants' annual means."""
    from circtrack import plot_variants as PV
    rows = []
    for y in range(2000, 2004):
        for mth in range(1, 13):
            for v, off in (("cells.level_hpa=400", -1.0), ("cells.level_hpa=500", 0.0), ("cells.level_hpa=600", 2.0)):
                rows.append(["q", f"{y:04d}-{mth:02d}-15", "NH", "zonal", v, "hadley_edge_lat",
                             str(30 + off + 0.1 * y), "degrees_north", "ok"])
    df = pd.DataFrame(rows, columns=["source", "time", "hemisphere", "sector", "variant", "metric", "value", "units",
                                     "flag"])
    shown, band, name = PV.split(df)
    assert name == "cells.level_hpa=500" and "variant" not in shown.columns and len(shown) == 48
    assert band["lo"].to_numpy() == pytest.approx(29.0 + 0.1 * np.arange(2000, 2004))
    assert band["hi"].to_numpy() == pytest.approx(32.0 + 0.1 * np.arange(2000, 2004))
    assert PV.default_variant(["jets.subtropical_method=upper_wind", "jets.subtropical_method=shear"]) == \
        "jets.subtropical_method=shear"
    src = tmp_path / "v.csv"
    df.to_csv(src, index=False)
    r = CliRunner().invoke(main, ["plot", str(src), "-o", str(tmp_path / "p.png")])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "p.png").stat().st_size > 1000
