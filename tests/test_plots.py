"""Tests of the figures and of the trend/season/plot commands (click CliRunner)."""

import json

import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from circtrack.cli import main

COLS = ["source", "time", "hemisphere", "sector", "metric", "value", "units", "flag"]


def write_csv(path, years=range(1981, 2011), trend=0.5, calendar="noleap", seed=4):
    rng = np.random.default_rng(seed)
    rows = []
    for y in years:
        for m in range(1, 13):
            t = y + (m - 0.5) / 12
            for h, sgn in (("NH", 1), ("SH", -1)):
                lat = sgn * (40 + trend / 10 * (t - years[0]) + 2 * np.cos(2 * np.pi * (m - 1) / 12) + rng.normal(0, 0.3))
                rows.append(["s", f"{y}-{m:02d}-15", h, "zonal", "eddy_jet_lat", f"{lat:.6g}", "degrees_north", "ok"])
                rows.append(["s", f"{y}-{m:02d}-15", h, "zonal", "eddy_jet_speed", f"{12 + rng.normal():.6g}", "m s-1", "ok"])
    rows.append(["s", "1990-01-15", "NH", "zonal", "hadley_edge_lat", "NaN", "degrees_north", "no_edge"])
    pd.DataFrame(rows, columns=COLS).to_csv(path, index=False)
    with open(str(path)[:-4] + ".provenance.json", "w") as f:
        json.dump({"calendar": calendar}, f)
    return str(path)


@pytest.fixture(scope="module")
def csv_file(tmp_path_factory):
    return write_csv(tmp_path_factory.mktemp("d") / "idx.csv")


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


# ---------------------------------------------------------------- trend

def test_trend_cli_recovers_injected_trend_and_is_byte_stable(csv_file, tmp_path):
    out = tmp_path / "trend.csv"
    r = run("trend", csv_file, "-o", out, "--poleward-positive")
    assert r.exit_code == 0, r.output
    first = out.read_bytes()
    tab = pd.read_csv(out)
    assert list(tab.columns) == ["source", "metric", "hemisphere", "sector", "season", "method", "slope_per_decade",
                                 "ci_low", "ci_high", "p_value", "n", "units"]
    ann = tab[(tab.metric == "eddy_jet_lat") & (tab.season == "annual")]
    assert len(ann) == 4
    assert np.allclose(ann.slope_per_decade, 0.5, atol=0.06)
    assert ((ann.ci_low < 0.5) & (ann.ci_high > 0.5)).all()
    assert not (tab.metric == "hadley_edge_lat").any()  # only flag == ok rows
    assert run("trend", csv_file, "-o", out, "--poleward-positive").exit_code == 0
    assert out.read_bytes() == first
    r = run("trend", csv_file, "--metrics", "eddy_jet_speed")
    assert r.exit_code == 0
    assert set(pd.read_csv(__import__("io").StringIO(r.output)).metric) == {"eddy_jet_speed"}


def test_metrics_without_ok_rows_are_named_when_left_out(csv_file, tmp_path):
    """trend, season and plot use only rows flagged ok; a metric with none is named on stderr in one
    line (hadley_edge_lat here: one row flagged no_edge), not dropped in silence."""
    for args in (["trend", csv_file, "-o", tmp_path / "t.csv"], ["season", csv_file, "-o", tmp_path / "s.csv"],
                 ["plot", csv_file, "-o", tmp_path / "p.png"]):
        r = CliRunner().invoke(main, [str(a) for a in args])
        assert r.exit_code == 0, r.output
        notes = [line for line in r.stderr.splitlines() if "left out of" in line]
        assert len(notes) == 1 and "hadley_edge_lat" in notes[0] and "no_edge" in notes[0], r.stderr
        assert "eddy_jet" not in notes[0]
    r = CliRunner().invoke(main, ["trend", csv_file, "--metrics", "eddy_jet_lat", "-o", str(tmp_path / "u.csv")])
    assert "left out of" not in r.stderr


def test_trend_cli_errors(tmp_path):
    r = CliRunner().invoke(main, ["trend", str(tmp_path / "missing.csv")])
    assert r.exit_code == 1 and "missing.csv: no such file" in r.output
    assert len(r.output.strip().splitlines()) == 1
    bad = tmp_path / "bad.csv"
    bad.write_text("source,time,value\ns,2000-01-15,1\n")
    r = CliRunner().invoke(main, ["trend", str(bad)])
    assert r.exit_code == 1 and "missing column(s)" in r.output and "bad.csv" in r.output
    noq = tmp_path / "noq.csv"
    noq.write_text(",".join(COLS) + "\ns,2000-01-15,NH,zonal,x,1,m,no_edge\n")
    r = CliRunner().invoke(main, ["trend", str(noq)])
    assert r.exit_code == 1 and "no rows with flag 'ok'" in r.output


# ---------------------------------------------------------------- season

def test_season_cli(csv_file, tmp_path):
    out, anom = tmp_path / "clim.csv", tmp_path / "anom.csv"
    r = run("season", csv_file, "-o", out, "--base", "1981:2010", "--anomalies", anom)
    assert r.exit_code == 0, r.output
    clim = pd.read_csv(out)
    lat = clim[(clim.metric == "eddy_jet_lat") & (clim.hemisphere == "NH")]
    assert list(lat.month) == list(range(1, 13)) and (lat.n == 30).all()
    assert lat.amplitude.iloc[0] == pytest.approx(4, abs=0.3)
    assert lat.extreme.iloc[0] == "poleward" and lat.extreme_month.iloc[0] in (12, 1, 2)
    a = pd.read_csv(anom)
    assert len(a) == 4 * 30 * 12
    r = CliRunner().invoke(main, ["season", csv_file, "--base", "1900:1910"])
    assert r.exit_code == 2 and "base period" in r.output
    r = CliRunner().invoke(main, ["season", csv_file, "--base", "xx"])
    assert r.exit_code == 2 and "--base" in r.output


def test_360_day_csv_via_cli(tmp_path):
    rows = [["m", f"{y}-{mo:02d}-30", "NH", "zonal", "eddy_jet_lat", str(40 + 0.05 * (y - 2000)), "degrees_north", "ok"]
            for y in range(2000, 2010) for mo in range(1, 13)]
    p = tmp_path / "c360.csv"
    pd.DataFrame(rows, columns=COLS).to_csv(p, index=False)
    r = run("trend", p)
    assert r.exit_code == 0, r.output
    # stdout only: the note that the 9 complete DJF seasons are too few (issue 16) goes to stderr
    tab = pd.read_csv(__import__("io").StringIO(r.stdout))
    ols = tab[(tab.season == "annual") & (tab.method == "ols_ar1")]
    assert ols.slope_per_decade.iloc[0] == pytest.approx(0.5, rel=1e-6)


# ---------------------------------------------------------------- plots

def test_plot_png_pdf_svg(csv_file, tmp_path):
    png = tmp_path / "f.png"
    r = run("plot", csv_file, "-o", png, "--metrics", "eddy_jet_lat,eddy_jet_speed", "--poleward-positive")
    assert r.exit_code == 0, r.output
    raw = png.read_bytes()
    assert raw[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpimg.imread(str(png))
    assert img.shape[0] > 400 and img.shape[1] > 800 and img.shape[2] in (3, 4)
    assert img[..., :3].std() > 0.05  # not blank
    pdf = tmp_path / "f.pdf"
    assert run("plot", csv_file, "-o", pdf, "--metrics", "eddy_jet_speed").exit_code == 0
    assert pdf.read_bytes()[:5] == b"%PDF-"
    svg = tmp_path / "f.svg"
    assert run("plot", csv_file, "-o", svg, "--metrics", "eddy_jet_speed").exit_code == 0
    text = svg.read_text()
    assert "<svg" in text and "m s-1" in text  # units on the axes
    r = CliRunner().invoke(main, ["plot", csv_file, "-o", str(tmp_path / "f.gif")])
    assert r.exit_code == 2 and ".png, .pdf or .svg" in r.output
    r = CliRunner().invoke(main, ["plot", csv_file, "-o", str(png), "--metrics", "nope"])
    assert r.exit_code == 2 and "nope" in r.output


def test_figure_axes_have_units(csv_file):
    from circtrack import plots, stats

    fig = plots.figure(stats.read_csv(csv_file), metrics=["eddy_jet_lat"], calendar="noleap")
    try:
        for ax in fig.axes:
            assert ax.get_xlabel() in ("year", "month")
            assert "(degrees_north)" in ax.get_ylabel()
        colours = {l.get_color() for l in fig.axes[0].get_lines()}
        assert colours <= set(plots.OKABE_ITO)
    finally:
        import matplotlib.pyplot as plt

        plt.close(fig)


def test_end_to_end_from_track(tmp_path):
    from circtrack import synthetic as S

    ds = S.dataset(np.arange(-90, 90.1, 6.0), np.arange(0, 360, 60.0), [1000, 850, 500, 200, 100],
                   S.monthly_times(2000, 3, "360_day"))
    nc = tmp_path / "s.nc"
    ds.to_netcdf(nc, encoding=S.time_encoding("360_day"))
    csv = tmp_path / "s.csv"
    r = run("track", nc, "-o", csv, "-q", "--metrics", "eddy_jet_lat,eddy_jet_speed")
    assert r.exit_code == 0, r.output
    out = tmp_path / "t.csv"
    # three years are below the default --min-years (10): refused with one line, exit 1 (issue 16)
    r = run("trend", csv, "-o", out)
    assert r.exit_code == 1 and "too short for a trend" in r.output and not out.exists()
    r = run("trend", csv, "-o", out, "--min-years", "3")
    assert r.exit_code == 0, r.output
    tab = pd.read_csv(out)
    # the two complete DJF seasons are too few for a slope: left out (they used to be all-NaN rows, issue 16)
    assert set(tab.season) == {"annual", "MAM", "JJA", "SON"}
    assert (tab[tab.season == "annual"].n == 3).all() and np.isfinite(tab.slope_per_decade).all()
    assert "DJF" in r.stderr and "fewer than 3" in r.stderr
