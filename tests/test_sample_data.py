"""The shipped demo run, checked against facts of the trade (common practice, no single source)."""

from pathlib import Path

import numpy as np
import pytest

from circtrack import config, engine

SAMPLE = Path(__file__).resolve().parent.parent / "sample_inputs" / "model_q"


@pytest.fixture(scope="module")
def demo():
    out = engine.track([str(SAMPLE)], config.load(), metric_ids=["hadley_edge_lat", "hadley_strength", "eddy_jet_lat"])
    c = out.columns
    month = np.array([int(t[5:7]) for t in c["time"]])
    return c, month


def _mean(c, month, metric, hemi, months):
    sel = (c["metric"] == metric) & (c["hemisphere"] == hemi) & np.isin(month, months)
    return np.nanmean(c["value"][sel.astype(bool)])


def test_all_demo_values_are_ok(demo):
    c, _ = demo
    assert set(c["flag"]) == {"ok"}
    assert len(c["metric"]) == 240 * 2 * 3


def test_hadley_cells_reach_about_30_degrees(demo):
    # common practice: Hadley cells reach roughly 30 degrees
    c, month = demo
    assert 25 <= _mean(c, month, "hadley_edge_lat", "NH", range(1, 13)) <= 35
    assert -35 <= _mean(c, month, "hadley_edge_lat", "SH", range(1, 13)) <= -25


def test_summer_hadley_cell_is_the_weaker_one(demo):
    # common practice: the summer hemisphere's Hadley cell is the weaker one
    c, month = demo
    assert _mean(c, month, "hadley_strength", "NH", [6, 7, 8]) < _mean(c, month, "hadley_strength", "NH", [12, 1, 2])
    assert _mean(c, month, "hadley_strength", "SH", [12, 1, 2]) < _mean(c, month, "hadley_strength", "SH", [6, 7, 8])


def test_edges_and_jets_move_poleward_in_local_summer(demo):
    c, month = demo
    assert _mean(c, month, "hadley_edge_lat", "NH", [6, 7, 8]) > _mean(c, month, "hadley_edge_lat", "NH", [12, 1, 2])
    assert _mean(c, month, "hadley_edge_lat", "SH", [12, 1, 2]) < _mean(c, month, "hadley_edge_lat", "SH", [6, 7, 8])
    assert _mean(c, month, "eddy_jet_lat", "SH", [12, 1, 2]) < _mean(c, month, "eddy_jet_lat", "SH", [6, 7, 8])


def test_readme_demo_excerpt_is_what_the_first_command_writes():
    """The README shows the head of model_q_indices.csv; it must be the real output, byte for byte."""
    from circtrack import output

    readme = (SAMPLE.parent.parent / "README.md").read_text()
    block = readme.split("source,time,hemisphere,sector,metric,value,units,flag\n", 1)[1].split("...\n", 1)[0]
    shown = ["source,time,hemisphere,sector,metric,value,units,flag"] + block.splitlines()
    lines = output.sorted_lines(engine.track([str(SAMPLE)], config.load()))
    assert lines[:len(shown)] == shown
