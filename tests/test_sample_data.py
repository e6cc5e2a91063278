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


@pytest.fixture(scope="module")
def demo_cores_and_flux():
    ids = ["subtropical_jet_core_pressure", "eddy_jet_core_pressure", "subtropical_jet_core_lat",
           "eddy_momentum_flux_lat", "eddy_momentum_flux_max"]
    return engine.track([str(SAMPLE)], config.load(), metric_ids=ids).columns


def _zonal(c, metric, hemi):
    sel = (c["metric"] == metric) & (c["hemisphere"] == hemi) & (c["sector"] == "zonal")
    return c["value"][sel.astype(bool)], c["flag"][sel.astype(bool)]


def test_demo_jets_have_their_cores_where_the_scenario_puts_them(demo_cores_and_flux):
    """make_sample.py: the subtropical jet is strongest at 200 hPa, the eddy-driven jet at 300 hPa;
    the cores (parabola in ln p through the 3 levels around the maximum) lie near those levels."""
    c = demo_cores_and_flux
    for hemi in ("NH", "SH"):
        p_stj, f_stj = _zonal(c, "subtropical_jet_core_pressure", hemi)
        p_edj, f_edj = _zonal(c, "eddy_jet_core_pressure", hemi)
        assert set(f_stj) == {"ok"} and set(f_edj) == {"ok"}
        assert np.all((p_stj > 180) & (p_stj < 230)) and np.all((p_edj > 280) & (p_edj < 340))
        lat, _ = _zonal(c, "subtropical_jet_core_lat", hemi)
        assert 27 <= np.mean(np.abs(lat)) <= 33                      # scenario: 30 +- 3 (NH), -30 +- 2 (SH)


def test_demo_eddies_carry_momentum_poleward_out_of_the_subtropics(demo_cores_and_flux):
    """make_sample.py: the waves' envelope peaks at 35 +- 2 degrees (poleward in local summer), with
    [u'v'] = 0.5 * (9 m/s * level share)^2 > 0 northward in the NH, southward in the SH. Monthly
    means: the value is kept with the time_mean_input note; 250 hPa is interpolated."""
    c = demo_cores_and_flux
    for hemi, sign in (("NH", 1), ("SH", -1)):
        lat, flags = _zonal(c, "eddy_momentum_flux_lat", hemi)
        peak, _ = _zonal(c, "eddy_momentum_flux_max", hemi)
        assert set(flags) == {"time_mean_input;interpolated_level"}
        assert np.all(sign * lat > 32.5) and np.all(sign * lat < 37.5)
        assert np.all((peak > 30) & (peak < 45))


SURFACE = ["surface_wind_zero_lat", "polar_easterly_edge_lat", "trade_wind_speed", "surface_westerly_speed"]


@pytest.fixture(scope="module")
def demo_surface():
    """The surface wind belts of the demo, from ua at 1000 hPa (the demo has no uas), with the Hadley edge."""
    out = engine.track([str(SAMPLE)], config.load(), metric_ids=SURFACE + ["hadley_edge_lat"])
    c = out.columns
    return c, np.array([int(t[5:7]) for t in c["time"]])


def test_demo_surface_wind_belts_are_found_in_every_month(demo_surface):
    """Before the demo had trades, its surface wind was westerly everywhere: the trade-wind minimum sat
    on the edge of its window (NaN) and the westerlies' decay to a quantized 0.000 was taken for a
    polar-easterly edge (flagged ok). Now every belt is found, from a real sign change."""
    c, _ = demo_surface
    for m in SURFACE:
        values, flags = _zonal(c, m, "NH")
        values_sh, flags_sh = _zonal(c, m, "SH")
        assert set(flags) | set(flags_sh) == {"ok;wind_from_1000hPa"}, m
        assert np.isfinite(values).all() and np.isfinite(values_sh).all()


def test_demo_surface_wind_belts_sit_where_they_do_on_earth(demo_surface):
    # common practice: trades of a few m/s, the surface easterly-westerly boundary near 30 degrees and
    # close to the Hadley cell's edge (Kang & Polvani 2011 J. Climate 24, 563-568 relate the two), the
    # polar easterlies poleward of about 60 degrees; the trades are stronger in local winter
    c, month = demo_surface
    every = range(1, 13)
    for hemi, s in (("NH", 1), ("SH", -1)):
        assert 3.0 <= _mean(c, month, "trade_wind_speed", hemi, every) <= 9.0
        assert 25.0 <= s * _mean(c, month, "surface_wind_zero_lat", hemi, every) <= 35.0
        assert abs(_mean(c, month, "surface_wind_zero_lat", hemi, every)
                   - _mean(c, month, "hadley_edge_lat", hemi, every)) < 4.0
        assert 55.0 <= s * _mean(c, month, "polar_easterly_edge_lat", hemi, every) <= 70.0
    assert _mean(c, month, "trade_wind_speed", "NH", [12, 1, 2]) > _mean(c, month, "trade_wind_speed", "NH", [6, 7, 8])
    assert _mean(c, month, "trade_wind_speed", "SH", [6, 7, 8]) > _mean(c, month, "trade_wind_speed", "SH", [12, 1, 2])
