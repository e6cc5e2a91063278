"""Real open data: the monthly marine surface climatology shipped by Debian's ``ferret-datasets``
package (coads_climatology.cdf: UWND, VWND, SLP on a 2-degree grid, land masked, time counted in
hours from year 0). circtrack must read it without hand edits, and the tropical-edge measures from
the surface must sit near 30 degrees and move poleward in each hemisphere's summer.

The expectations are facts of the trade, not values from a paper: the surface trades give way to
the westerlies, and the subtropical highs sit, near 30 degrees latitude (common practice), and both
shift poleward in the summer hemisphere (common practice). The bands below are deliberately wide.
"""

import os

import numpy as np
import pytest

from circtrack import config, engine

CANDIDATES = ["/usr/share/ferret-vis/data/coads_climatology.cdf",
              "/usr/share/ferret/data/coads_climatology.cdf",
              "/usr/share/ferret-datasets/data/coads_climatology.cdf"]
PATH = next((p for p in CANDIDATES if os.path.exists(p)), None)

pytestmark = pytest.mark.skipif(
    PATH is None, reason="Debian package ferret-datasets not installed (apt-get install ferret-datasets); "
                         "real-data checks skipped")

METRICS = ["surface_wind_zero_lat", "subtropical_high_lat"]


@pytest.fixture(scope="module")
def table():
    out = engine.track([PATH], config.load(), metric_ids=METRICS)
    c = out.columns
    rows = {}
    for i in range(len(c["metric"])):
        assert c["sector"][i] == "zonal"
        month = int(c["time"][i][5:7])
        rows[(c["metric"][i], c["hemisphere"][i], month)] = (float(c["value"][i]), c["flag"][i])
    return rows, out


def _season(rows, metric, hemi, months):
    vals = [rows[(metric, hemi, m)][0] for m in months]
    return float(np.mean(np.abs(vals)))


def test_reads_the_climatology_without_hand_edits(table):
    rows, out = table
    assert out.provenance["time_steps"] == 12
    found = out.provenance["inputs"][0]["variables"]
    assert found["uas"] == "UWND" and found["psl"] == "SLP"
    assert out.provenance["inputs"][0]["units"]["psl"] == "MB"          # capital millibar, read as hPa
    assert len(rows) == 12 * 2 * len(METRICS)


@pytest.mark.parametrize("metric", METRICS)
@pytest.mark.parametrize("hemi", ["NH", "SH"])
def test_near_30_degrees(table, metric, hemi):
    # common practice: the trades/westerlies boundary and the subtropical highs lie near 30 deg
    rows, _ = table
    sign = 1 if hemi == "NH" else -1
    vals = np.array([rows[(metric, hemi, m)][0] for m in range(1, 13)])
    flags = {rows[(metric, hemi, m)][1] for m in range(1, 13)}
    assert flags == {"ok"}
    assert np.all(sign * vals > 0)                                     # in the right hemisphere
    assert 25.0 <= abs(vals.mean()) <= 36.0                            # annual mean near 30
    assert np.all((abs(vals) >= 20.0) & (abs(vals) <= 45.0))           # every month within the subtropics


@pytest.mark.parametrize("metric", METRICS)
def test_summer_poleward_migration(table, metric):
    # common practice: both belts sit further poleward in the summer hemisphere
    rows, _ = table
    jja, djf = (6, 7, 8), (12, 1, 2)
    nh_shift = _season(rows, metric, "NH", jja) - _season(rows, metric, "NH", djf)
    sh_shift = _season(rows, metric, "SH", djf) - _season(rows, metric, "SH", jja)
    assert nh_shift > 2.0, nh_shift
    assert sh_shift > 2.0, sh_shift


def test_through_the_command_line(tmp_path):
    # the file as it ships, no edits: CSV with year-0 ISO times and a sidecar naming the calendar choice
    import json

    from click.testing import CliRunner

    from circtrack.cli import main
    from circtrack.output import sidecar_path

    out = tmp_path / "coads.csv"
    r = CliRunner().invoke(main, ["track", PATH, "-o", str(out), "--metrics", "subtropical_high_lat", "-q"])
    assert r.exit_code == 0, r.output
    lines = out.read_text().splitlines()
    assert lines[0] == "source,time,hemisphere,sector,metric,value,units,flag"
    assert len(lines) == 1 + 12 * 2
    assert lines[1].split(",")[1].startswith("0000-01-")
    side = json.loads(open(sidecar_path(str(out))).read())
    assert side["calendar"] == "proleptic_gregorian"
    assert "year 0" in side["inputs"][0]["found_by"]["time"]


# --------------------------------------------------------------------------- gaps and pole rows (issue 12)
def _numpy_zonal(path, var, ylat):
    """Zonal means over valid longitudes with points of less than half the longitudes valid missing
    (run.min_coverage), latitudes ascending: (lat, [x] (T, J))."""
    import netCDF4

    with netCDF4.Dataset(path) as f:
        lat = np.asarray(f[ylat][:], float)
        x = np.ma.masked_invalid(f[var][:])
    cov = x.count(axis=-1) / x.shape[-1]
    zm = np.where(cov >= 0.5, x.mean(axis=-1).filled(np.nan), np.nan)
    o = np.argsort(lat)
    return lat[o], zm[:, o]


def _after_westerly_max(lat, u):
    """From the NH [uas] maximum in 25-70 N: the values poleward of it, up to and including the first
    negative valid value, as (lat, value) pairs."""
    win = (lat >= 25) & (lat <= 70)
    k = int(np.nanargmax(np.where(win, u, -np.inf)))
    if k in (np.flatnonzero(win)[0], np.flatnonzero(win)[-1]):
        return [(lat[k], np.nan)]                    # maximum on the window's edge: not a case for these checks
    out = []
    for j in range(k, lat.size):
        out.append((lat[j], u[j]))
        if np.isfinite(u[j]) and u[j] < 0:
            break
    return out


def test_no_crossing_taken_across_a_data_gap(table):
    # coads_climatology, February: [uas] stays positive poleward of the westerly maximum up to a latitude
    # band with too few valid longitudes (land), and turns negative only beyond it. The zero lies somewhere
    # in the gap: NaN, crossing_in_data_gap (before: 58.9 N flagged ok, taken beyond the gap)
    rows, _ = table
    lat, u = _numpy_zonal(PATH, "UWND", "COADSY")
    walk = _after_westerly_max(lat, u[1])
    values = np.array([v for _, v in walk])
    assert np.isnan(values).any() and values[-1] < 0                     # a gap before the sign change
    first_gap = int(np.flatnonzero(np.isnan(values))[0])
    assert np.all(values[:first_gap] > 0)                                 # no sign change before the gap
    out = engine.track([PATH], config.load(), metric_ids=["polar_easterly_edge_lat"])
    got = {(out.columns["time"][i][5:7], out.columns["hemisphere"][i]): (out.columns["value"][i], out.columns["flag"][i])
           for i in range(len(out.columns["metric"]))}
    value, flag = got[("02", "NH")]
    assert np.isnan(value) and flag == "crossing_in_data_gap"


NAVY = next((p for p in [c.replace("coads_climatology", "monthly_navy_winds") for c in CANDIDATES]
             if os.path.exists(p)), None)


@pytest.mark.skipif(NAVY is None, reason="monthly_navy_winds.cdf (Debian ferret-datasets) not installed")
def test_no_crossing_taken_onto_the_pole_row():
    # monthly_navy_winds.cdf (ferret-datasets, 2.5-degree grid with a 90 N row): in some months the
    # first sign change poleward of the westerly maximum is the step onto the pole row, where the zonal
    # mean of a wind component is not defined: NaN, crossing_at_pole_row (before: 90.0 flagged ok)
    lat, u = _numpy_zonal(NAVY, "UWND", "FNOCY")
    onto_pole = []
    for t in range(u.shape[0]):
        walk = _after_westerly_max(lat, u[t])
        vals = np.array([v for _, v in walk])
        if np.all(np.isfinite(vals)) and walk[-1][0] == 90.0 and vals[-1] <= 0 and np.all(vals[:-1] > 0):
            onto_pole.append(t)
    assert len(onto_pole) >= 3
    out = engine.track([NAVY], config.load(), metric_ids=["polar_easterly_edge_lat"])
    c = out.columns
    got = {c["time"][i]: (float(c["value"][i]), c["flag"][i]) for i in range(len(c["metric"])) if c["hemisphere"][i] == "NH"}
    times = sorted(got)                                  # the file's time steps, in order
    assert len(times) == u.shape[0]
    for t in onto_pole:
        value, flag = got[times[t]]
        assert flag == "crossing_at_pole_row" and np.isnan(value), (times[t], value, flag)
    assert not any(v == 90.0 for v, _ in got.values())
