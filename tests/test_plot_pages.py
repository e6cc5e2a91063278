"""The overview pictures fit the reader and the record (issue 16): one page per metric family,
daily series on a date axis, climatologies as seasonal cycles, trends only from long enough
records (with n and p), hemispheres, members and sectors kept readable, no warnings."""

import io
import re
import warnings

import matplotlib.image as mpimg
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from circtrack import plots
from circtrack import stats as S
from circtrack.cli import main

COLS = ["source", "time", "hemisphere", "sector", "metric", "value", "units", "flag"]
UNITS = {"hadley_edge_lat": "degrees_north", "hadley_strength": "kg s-1", "ferrel_edge_lat": "degrees_north",
         "ferrel_strength": "kg s-1", "eddy_jet_lat": "degrees_north", "eddy_jet_speed": "m s-1",
         "subtropical_jet_lat": "degrees_north", "subtropical_jet_speed": "m s-1", "eddy_jet_width": "degrees"}


def table(times, metrics=("hadley_edge_lat", "eddy_jet_speed"), members=None, sectors=("zonal",), seed=1,
          trend=0.05):
    """Rows in the circtrack layout; latitudes 30 + trend * years (+ noise), NH positive, SH negative."""
    rng = np.random.default_rng(seed)
    rows = []
    for i, t in enumerate(times):
        y = int(t[:4])
        for mem in (members or [None]):
            for sec in sectors:
                for h, sgn in (("NH", 1), ("SH", -1)):
                    for m in metrics:
                        v = 30 + trend * (y - int(times[0][:4])) + rng.normal(0, 0.3) + np.sin(2 * np.pi * i / 12)
                        if UNITS[m] == "degrees_north":
                            v = sgn * v
                        rows.append(["s", t] + ([mem] if members else []) + [h, sec, m, f"{v:.6g}", UNITS[m], "ok"])
    cols = COLS[:2] + (["member"] if members else []) + COLS[2:]
    return pd.DataFrame(rows, columns=cols)


def monthly(y0, n_years, day=15):
    return [f"{y:04d}-{m:02d}-{day:02d}" for y in range(y0, y0 + n_years) for m in range(1, 13)]


def write(df, path):
    df.to_csv(path, index=False)
    return str(path)


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def _close(pages):
    for _, f in pages:
        plt.close(f)


def _ts_axes(fig):
    return [ax for ax in fig.axes if ax.get_xlabel() == "year" or ax.get_xlabel().startswith("date")]


def _labels(ax):
    return [t.get_text() for t in ax.get_legend().get_texts()] if ax.get_legend() else []


# ---------------------------------------------------------------- pages

def test_one_page_per_family_fits_a_screen(tmp_path):
    df = table(monthly(2001, 12), metrics=("hadley_edge_lat", "hadley_strength", "eddy_jet_lat", "eddy_jet_speed"))
    csv = write(df, tmp_path / "idx.csv")
    r = invoke("plot", csv, "-o", tmp_path / "ov.png")
    assert r.exit_code == 0, r.output
    # two families: one file per page, named after the family; the command names them
    for fam in ("cells", "jets"):
        img = mpimg.imread(str(tmp_path / f"ov-{fam}.png"))
        assert img.shape[0] <= 1200 and img.shape[1] <= 1100, img.shape      # a screen (or a page) holds it
        assert img[..., :3].std() > 0.05
    assert not (tmp_path / "ov.png").exists()
    assert "ov-cells.png" in r.stderr and "ov-jets.png" in r.stderr
    # a PDF holds every page
    r = invoke("plot", csv, "-o", tmp_path / "ov.pdf")
    assert r.exit_code == 0, r.output
    raw = (tmp_path / "ov.pdf").read_bytes()
    assert len(re.findall(rb"/Type\s*/Page\b", raw)) == 2
    # one family: exactly OUT
    r = invoke("plot", csv, "--metrics", "eddy_jet_lat,eddy_jet_speed", "-o", tmp_path / "jets.png")
    assert r.exit_code == 0 and (tmp_path / "jets.png").exists() and r.stderr == ""
    # a missing output directory: one line before any work
    r = invoke("plot", csv, "-o", tmp_path / "missing" / "ov.png")
    assert r.exit_code == 2 and r.stderr.count("\n") == 1 and "mkdir -p" in r.stderr


def test_a_large_family_continues_on_a_second_page():
    metrics = ("subtropical_jet_lat", "subtropical_jet_speed", "eddy_jet_lat", "eddy_jet_speed", "eddy_jet_width")
    df = table(monthly(2001, 3), metrics=metrics, sectors=("zonal", "pacific"))
    pages = plots.pages(df)
    try:
        assert [n for n, _ in pages] == ["jets", "jets-2"]
        rows = [len(_ts_axes(f)) for _, f in pages]
        assert sum(rows) == 2 * len(metrics)                  # a row per metric and sector
        assert max(rows) <= plots.MAX_ROWS and max(rows) - min(rows) <= 1      # pages evenly filled
        for _, f in pages:
            w, h = f.get_size_inches()
            assert w <= 9.01 and h <= 10.0
    finally:
        _close(pages)


def test_pages_of_a_family_are_evenly_filled():
    metrics = ("subtropical_jet_lat", "subtropical_jet_speed", "eddy_jet_lat")
    df = table(monthly(2001, 3), metrics=metrics, sectors=("zonal", "atlantic"))    # 6 rows
    pages = plots.pages(df)
    try:
        assert [len(_ts_axes(f)) for _, f in pages] == [3, 3]
    finally:
        _close(pages)


def test_latitudes_poleward_positive_by_default_or_hemispheres_apart():
    df = table(monthly(2001, 3), metrics=("hadley_edge_lat",))
    pages = plots.pages(df)
    try:
        (ax,) = _ts_axes(pages[0][1])
        assert "degrees_poleward" in ax.get_ylabel()
        lo, hi = ax.get_ylim()
        assert lo > 20 and hi < 45                    # both hemispheres near 30 degrees poleward
    finally:
        _close(pages)
    pages = plots.pages(df, poleward_positive=False)
    try:
        nh, sh = _ts_axes(pages[0][1])
        assert "NH" in nh.get_title(loc="left") and "SH" in sh.get_title(loc="left")
        assert min(nh.get_ylim()) > 20 and max(sh.get_ylim()) < -20     # neither squashed by the other
    finally:
        _close(pages)


def test_members_around_their_mean_and_sectors_on_their_own_rows():
    df = table(monthly(2001, 12), metrics=("eddy_jet_speed",), members=["r1", "r2", "r3", "r4"],
               sectors=("zonal", "atlantic"))
    pages = plots.pages(df, min_years=10)
    try:
        fig = pages[0][1]
        axes = _ts_axes(fig)
        assert [ax.get_title(loc="left") for ax in axes] == ["eddy_jet_speed", "eddy_jet_speed atlantic"]
        labels = _labels(axes[0])
        assert any("mean of 4 members" in t for t in labels)
        assert not any("r1" in t for t in labels)            # members are thin lines, not legend entries
        thin = [ln for ln in axes[0].get_lines() if ln.get_linewidth() < 0.6]
        assert len(thin) == 4 * 2                             # 4 members x NH, SH
    finally:
        _close(pages)


# ---------------------------------------------------------------- the record

def test_short_daily_record_is_drawn_on_a_date_axis(tmp_path, capfd):
    times = [f"2001-01-{d:02d}T12:00:00" for d in range(1, 6)]
    df = table(times, metrics=("hadley_edge_lat",))
    with warnings.catch_warnings():
        warnings.simplefilter("error")                     # any warning fails the test
        pages = plots.pages(df, calendar="noleap")
    try:
        fig = pages[0][1]
        assert len(fig.axes) == 1                           # no seasonal cycle from five days
        ax = fig.axes[0]
        lines = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == 5]
        assert len(lines) == 2                              # NH and SH, every day drawn
        lo, hi = ax.get_xlim()
        assert 2001.0 < lo and hi < 2001.02                 # days, not decades
        ticks = [t.get_text() for t in ax.get_xticklabels()]
        assert "2001-01-03" in ticks and ax.get_xlabel() == "date (noleap calendar)"
        assert not any("trend" in t for t in _labels(ax))
    finally:
        _close(pages)
    csv = write(df, tmp_path / "d.csv")
    r = invoke("plot", csv, "-o", tmp_path / "d.png")
    assert r.exit_code == 0 and r.stderr == "" and r.stdout == ""
    out, err = capfd.readouterr()
    assert "Warning" not in err


def test_sub_daily_ticks_and_days_in_a_360_day_calendar():
    pos, labels = plots.date_ticks(*S.decimal_time([2001, 2001], [2, 2], [29, 30], [0, 18], "360_day"), "360_day")
    assert labels[0].startswith("2001-02-29") and "2001-02-30 12:00" in labels
    assert np.all(np.diff(pos) > 0)


def test_year_zero_climatology_is_a_seasonal_cycle_with_month_names(tmp_path):
    df = table([f"0000-{m:02d}-15" for m in range(1, 13)], metrics=("hadley_edge_lat", "hadley_strength"))
    pages = plots.pages(df)
    try:
        fig = pages[0][1]
        assert len(fig.axes) == 2                           # one seasonal-cycle panel per metric, nothing else
        for ax in fig.axes:
            assert [t.get_text() for t in ax.get_xticklabels()] == plots.MONTH_NAMES
            assert "std" not in ax.get_title(loc="right")   # one value per month: no spread to show
            assert not ax.collections                       # no band
        assert "climatology (year 0)" in fig._suptitle.get_text()
    finally:
        _close(pages)
    csv = write(df, tmp_path / "clim.csv")
    r = invoke("trend", csv)
    assert r.exit_code == 1 and r.stdout == ""
    assert len(r.stderr.strip().splitlines()) == 1 and "too short for a trend" in r.stderr


def test_trend_line_only_from_enough_years_with_n_and_p():
    short = table(monthly(2001, 4), metrics=("hadley_edge_lat",))
    pages = plots.pages(short)
    try:
        ax = _ts_axes(pages[0][1])[0]
        assert not any("trend" in t for t in _labels(ax))
        assert any("annual mean" in t for t in _labels(ax))
    finally:
        _close(pages)
    long = table(monthly(2001, 11), metrics=("hadley_edge_lat",), trend=0.1)
    pages = plots.pages(long)
    try:
        ax = _ts_axes(pages[0][1])[0]
        trends = [t for t in _labels(ax) if "trend" in t]
        assert len(trends) == 2
        for t in trends:
            assert "n=11" in t and re.search(r"p(<|=)0\.\d+", t), t
            slope = float(re.search(r"trend ([+-][0-9.]+)", t).group(1))
            assert slope == pytest.approx(1.0, abs=0.3)     # 0.1 degrees poleward per year = 1 per decade
    finally:
        _close(pages)
    pages = plots.pages(short, min_years=4)                   # --min-years lowers the bar
    try:
        assert any("n=4" in t for t in _labels(_ts_axes(pages[0][1])[0]))
    finally:
        _close(pages)


# ---------------------------------------------------------------- trend command

def test_trend_leaves_out_short_series_and_says_so(tmp_path):
    df = table(monthly(2001, 10), metrics=("hadley_edge_lat",))
    csv = write(df, tmp_path / "ten.csv")
    r = invoke("trend", csv)
    assert r.exit_code == 0, r.output
    tab = pd.read_csv(io.StringIO(r.stdout))
    assert set(tab.season) == {"annual", "MAM", "JJA", "SON"}        # DJF has only 9 complete seasons
    assert (tab.n >= 10).all() and np.isfinite(tab.slope_per_decade).all()
    assert "note: 2 series with fewer than 10" in r.stderr           # DJF NH and SH
    r = invoke("trend", csv, "--min-years", "3")
    tab = pd.read_csv(io.StringIO(r.stdout))
    assert "DJF" in set(tab.season) and r.stderr == ""
    r = invoke("trend", csv, "--min-years", "2")
    assert r.exit_code == 2 and "--min-years" in r.stderr
    # no NaN rows with n < 3 from the library either
    few = S.trends(table(monthly(2001, 2), metrics=("hadley_edge_lat",)))
    assert few.empty


def test_legends_stay_inside_their_panel():
    """Long trend labels (tiny slopes in m s-1, as the demo's wave amplitudes had) are stacked rather
    than set side by side past the panel's right edge into the seasonal-cycle panel."""
    rng = np.random.default_rng(3)
    rows = []
    for t in monthly(2031, 20):
        for h in ("NH", "SH"):
            rows.append(["model_q_monthly", t, h, "zonal", "planetary_wave_3_amplitude",
                         f"{1.117 + 2e-5 * rng.standard_normal():.6g}", "m s-1", "ok"])
    figs = plots.pages(pd.DataFrame(rows, columns=COLS))
    try:
        for _, fig in figs:
            fig.canvas.draw()
            renderer = fig.canvas.get_renderer()
            for ax in _ts_axes(fig):
                box, leg = ax.get_window_extent(renderer), ax.get_legend().get_window_extent(renderer)
                assert leg.x0 >= box.x0 - 1 and leg.x1 <= box.x1 + 1, (leg, box)
    finally:
        _close(figs)
