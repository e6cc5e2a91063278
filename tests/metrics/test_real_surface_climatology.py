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
