"""--vary: several settings from one read; each variant's rows equal a plain run with that setting."""

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import config, engine, variants
from circtrack.cli import main
from circtrack.errors import UsageError

SAMPLE = Path(__file__).resolve().parent.parent / "sample_inputs" / "model_q"
FILES = [str(p) for p in sorted(SAMPLE.glob("*.nc"))[:2]]
METRICS = ["hadley_edge_lat", "hadley_strength", "subtropical_jet_lat", "eddy_jet_lat", "olr_edge_lat",
           "surface_wind_zero_lat", "tropopause_break_lat"]


@pytest.fixture(scope="module")
def synth(tmp_path_factory):
    """The synthetic circulation of conftest plus an OLR belt and surface winds (invented)."""
    from tests.conftest import LAT, make_dataset, write

    ds = make_dataset(3)
    lat = np.deg2rad(ds["lat"].values)
    shape = (ds.sizes["time"], ds.sizes["lat"], ds.sizes["lon"])
    rlut = 290.0 - 120.0 * np.sin(lat) ** 2 - 30.0 * np.exp(-(np.rad2deg(lat) / 8.0) ** 2)
    uas = -6.0 * np.sin(np.pi * np.abs(np.rad2deg(lat)) / 30.0)     # trades peak at 15, zero at 30 deg
    ds["rlut"] = (("time", "lat", "lon"), np.broadcast_to(rlut[None, :, None], shape).astype("float32"),
                  {"standard_name": "toa_outgoing_longwave_flux", "units": "W m-2"})
    ds["uas"] = (("time", "lat", "lon"), np.broadcast_to(uas[None, :, None], shape).astype("float32"),
                 {"standard_name": "eastward_wind", "units": "m s-1", "height": 10.0})
    levels = ds["plev"].values
    zkm = 7.4 * np.log(1000.0 / levels)          # as tests/metrics/test_tropopause.py: a break near 30 deg
    H = 13.5 - 3.5 * np.tanh((np.abs(ds["lat"].values) - 30) / 6.0)
    T = 300 - 6.5 * np.minimum(zkm[:, None], H[None, :])
    ds["ta"] = (("time", "plev", "lat", "lon"),
                np.broadcast_to(T[None, :, :, None], (shape[0], levels.size) + shape[1:]).astype("float32"),
                {"standard_name": "air_temperature", "units": "K"})
    assert LAT.size == ds.sizes["lat"]
    return [write(ds, tmp_path_factory.mktemp("synth") / "synth.nc")]


def _cfg(vary=(), **settings):
    cfg = config.load()
    for key, val in settings.items():
        section, name = key.split("__")
        cfg[section][name] = val
    return variants.apply(cfg, vary)


def _rows(outcome, keep=None):
    """{(time, hemisphere, sector, metric): (value, flag)} of one outcome (or of one variant)."""
    c = outcome.columns
    sel = np.ones(len(c["metric"]), bool) if keep is None else (c["variant"] == keep)
    return {(c["time"][i], c["hemisphere"][i], c["sector"][i], c["metric"][i]): (c["value"][i], c["flag"][i])
            for i in np.flatnonzero(sel)}


def _same(a, b):
    assert a.keys() == b.keys()
    for k in a:
        va, vb = a[k][0], b[k][0]
        assert (np.isnan(va) and np.isnan(vb)) or va == vb, k
        assert a[k][1] == b[k][1], k


@pytest.mark.parametrize("key,values", [
    ("cells.level_hpa", [400.0, 600.0]),
    ("jets.upper_level_hpa", [250.0, 150.0]),
    ("surface.olr_threshold_w_m2", [240.0, 260.0]),
    ("run.min_coverage", [0.5, 0.9]),
    ("cells.psi_layer_hpa", [[], [300.0, 700.0]]),
    ("cells.edge_fraction", [0.0, 0.25]),
    ("jets.subtropical_method", ["shear", "upper_wind"]),
    ("surface.olr_fraction_of_max", [0.0, 0.9]),
    ("tropopause.break_method", ["steepest_slope", "height_threshold"]),
])
def test_each_variant_equals_a_plain_run_with_that_setting(synth, key, values):
    text = f"{key}=" + ",".join(str(v) for v in values)
    out = engine.track(synth, _cfg([text]), metric_ids=METRICS)
    assert set(out.columns["metric"]) == set(METRICS)
    assert out.key_columns[-2:] == ["variant", "metric"]
    names = sorted(set(out.columns["variant"]))
    assert names == sorted(variants.name_of({key: v}) for v in values)
    for v in values:
        plain = engine.track(synth, _cfg(**{key.replace(".", "__"): v}), metric_ids=METRICS)
        _same(_rows(out, variants.name_of({key: v})), _rows(plain))
    bad = ~np.isfinite(out.columns["value"])
    assert not bad.any(), set(zip(out.columns["metric"][bad], out.columns["flag"][bad]))


def test_product_of_two_vary_options():
    cfg = _cfg(["cells.level_hpa=400,500", "jets.upper_level_hpa=200,250"])
    out = engine.track(FILES, cfg, metric_ids=["hadley_edge_lat", "subtropical_jet_lat"])
    names = sorted(set(out.columns["variant"]))
    assert names == ["cells.level_hpa=400 jets.upper_level_hpa=200", "cells.level_hpa=400 jets.upper_level_hpa=250",
                     "cells.level_hpa=500 jets.upper_level_hpa=200", "cells.level_hpa=500 jets.upper_level_hpa=250"]
    plain = engine.track(FILES, _cfg(cells__level_hpa=400.0, jets__upper_level_hpa=250.0),
                         metric_ids=["hadley_edge_lat", "subtropical_jet_lat"])
    _same(_rows(out, "cells.level_hpa=400 jets.upper_level_hpa=250"), _rows(plain))
    # the level a variant moves changes what it finds
    a = _rows(out, "cells.level_hpa=400 jets.upper_level_hpa=200")
    b = _rows(out, "cells.level_hpa=500 jets.upper_level_hpa=200")
    assert any(a[k][0] != b[k][0] for k in a if k[3] == "hadley_edge_lat")


def test_vary_in_config_file_and_sidecar(tmp_path):
    conf = tmp_path / "c.toml"
    conf.write_text('[vary]\n"cells.level_hpa" = [400.0, 500.0]\n')
    out = tmp_path / "o.csv"
    r = CliRunner().invoke(main, ["track", *FILES, "-o", str(out), "-c", str(conf), "-q", "--metrics", "hadley_edge_lat"])
    assert r.exit_code == 0, r.output
    lines = out.read_text().splitlines()
    assert lines[0] == "source,time,hemisphere,sector,variant,metric,value,units,flag"
    assert {ln.split(",")[4] for ln in lines[1:]} == {"cells.level_hpa=400", "cells.level_hpa=500"}
    prov = json.loads((tmp_path / "o.provenance.json").read_text())
    found = prov["variants"]
    assert [v["variant"] for v in found] == ["cells.level_hpa=400", "cells.level_hpa=500"]
    assert found[0]["settings"] == {"cells.level_hpa": 400.0}
    # the variant with the run's own setting is named, like every other
    assert prov["variant_equal_to_parameters"] == "cells.level_hpa=500"
    # the same from --vary (CLI) and nested [vary] tables
    conf.write_text("[vary]\ncells.level_hpa = [400.0, 500.0]\n")
    out2 = tmp_path / "o2.csv"
    r = CliRunner().invoke(main, ["track", *FILES, "-o", str(out2), "-c", str(conf), "-q", "--metrics", "hadley_edge_lat"])
    out3 = tmp_path / "o3.csv"
    r = CliRunner().invoke(main, ["track", *FILES, "-o", str(out3), "-q", "--metrics", "hadley_edge_lat",
                                  "--vary", "cells.level_hpa=400,500"])
    assert r.exit_code == 0
    assert out.read_bytes() == out2.read_bytes() == out3.read_bytes()


def test_no_vary_keeps_todays_columns(tmp_path):
    out = tmp_path / "o.csv"
    r = CliRunner().invoke(main, ["track", *FILES, "-o", str(out), "-q", "--metrics", "hadley_edge_lat"])
    assert r.exit_code == 0
    assert out.read_text().splitlines()[0] == "source,time,hemisphere,sector,metric,value,units,flag"


@pytest.mark.parametrize("args,words", [
    (["--vary", "cells.level=400"], "unknown setting 'cells.level'"),
    (["--vary", "cells.level_hpa=high,500"], "cells.level_hpa = 'high'"),
    (["--vary", "cells.level_hpa=400,"], "an empty value"),
    (["--vary", "cells.extremum_window=[50,0]"], "lower bound first"),
    (["--vary", "cells.level_hpa"], "expected KEY=V1,V2"),
    (["--vary", "run.time_chunk=4,8"], "cannot vary within one run"),
    (["--vary", "variables.ua=U,V"], "cannot vary; run once per choice"),
    (["--vary", "cells.level_hpa=400,400.0"], "given twice"),
    (["--vary", "eddies.momentum_level_hpa=250,300", "--metrics", "eddy_momentum_flux_lat"], "read inside the read tasks"),
])
def test_bad_vary_is_one_line_exit_2(tmp_path, args, words):
    out = tmp_path / "o.csv"
    r = CliRunner().invoke(main, ["track", *FILES, "-o", str(out), "-q", *args])
    assert r.exit_code == 2, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:") and words in lines[0], r.output
    assert not out.exists()


def test_lists_and_text_values_parse_as_in_the_config():
    d = config.defaults()
    assert variants.parse_option("cells.extremum_window=[0,40],[0.0, 50.0]", d) == \
        ("cells.extremum_window", [[0, 40], [0.0, 50.0]])
    assert variants.parse_option("cells.balance=none,remove_net_flux", d) == ("cells.balance", ["none", "remove_net_flux"])
    assert variants.name_of({"cells.extremum_window": [0, 40.0], "cells.balance": "none"}) == \
        "cells.balance=none cells.extremum_window=[0 40]"
    with pytest.raises(UsageError, match="cells.top"):
        engine.track(FILES, _cfg(["cells.top=nowhere"]), metric_ids=["hadley_edge_lat"])


def test_declared_reducer_keys_cover_what_the_reducers_read():
    """Each reducer's declared settings are those it reads: run on a small field with a config that
    records every key looked up."""
    from circtrack.metrics import families

    class Rec(dict):
        def __init__(self, d, name, seen):
            super().__init__(d)
            self.name, self.seen = name, seen

        def __getitem__(self, k):
            v = super().__getitem__(k)
            if isinstance(v, dict):
                return Rec(v, k, self.seen)
            self.seen.add(f"{self.name}.{k}")
            return v

    rng = np.random.default_rng(0)
    lat, lon, plev = np.linspace(-80, 80, 17), np.arange(0.0, 360.0, 30.0), np.array([150.0, 250.0, 300.0, 500.0, 850.0])
    slabs = {r: rng.normal(size=(1, plev.size, lat.size, lon.size)) + (250.0 if r == "ta" else 0.0)
             for r in ("ua", "va", "ta", "zg", "hus")}
    slabs["hus"] = np.abs(slabs["hus"]) * 1e-3
    for fam in families().values():
        for fn in fam.reducers.values():
            seen = set()
            cfg = Rec(config.defaults(), "", seen)
            kw = {"lat": lat} if "lat" in fn.__code__.co_varnames[:fn.__code__.co_argcount] else {}
            fn({r: slabs[r] for r in fam.inputs}, {r: plev for r in fam.inputs}, lon, [None], cfg, **kw)
            seen = {k.lstrip(".") for k in seen} - {"cells.balance"}   # read by column_rules only to check its spelling
            assert seen <= set(fam.reducer_keys or ()), (fam.name, seen)


def test_update_with_vary_equals_one_track(tmp_path):
    files = [str(p) for p in sorted(SAMPLE.glob("*.nc"))[:3]]
    args = ["--metrics", "hadley_edge_lat,subtropical_jet_lat", "--vary", "cells.level_hpa=400,600", "-q"]
    up, whole = tmp_path / "up.csv", tmp_path / "whole.csv"
    for n in (2, 3):
        r = CliRunner().invoke(main, ["update", *files[:n], "-o", str(up), *args])
        assert r.exit_code == 0, r.output
    r = CliRunner().invoke(main, ["track", *files, "-o", str(whole), *args])
    assert r.exit_code == 0, r.output
    assert up.read_bytes() == whole.read_bytes()
    # other variants than the state's are a parameter change
    r = CliRunner().invoke(main, ["update", *files, "-o", str(up), "--metrics", "hadley_edge_lat,subtropical_jet_lat",
                                  "--vary", "cells.level_hpa=400,500"])
    assert r.exit_code == 2 and "--rebuild" in r.output


def test_engine_takes_a_config_files_vary_table_as_it_is(tmp_path):
    """engine.track with config.load() of a file holding [vary] (nested keys): no --vary needed."""
    conf = tmp_path / "c.toml"
    conf.write_text("[vary]\ncells.level_hpa = [400.0, 500.0]\n")
    out = engine.track(FILES, config.load(str(conf)), metric_ids=["hadley_edge_lat"])
    assert sorted(set(out.columns["variant"])) == ["cells.level_hpa=400", "cells.level_hpa=500"]
    conf.write_text("[vary]\ncells.level_hpa = 400.0\n")
    with pytest.raises(UsageError, match="expected a list of values"):
        engine.track(FILES, config.load(str(conf)), metric_ids=["hadley_edge_lat"])


def test_readme_worked_example_numbers(tmp_path):
    """The numbers README.md quotes in "Several definitions in one read" come from these commands
    (through the CSV files, as a user runs them: the SH jet's tiny slopes change sign with rounding)."""
    from circtrack import stats as S

    defs, trends = tmp_path / "defs.csv", tmp_path / "defs_trends.csv"
    r = CliRunner().invoke(main, ["track", str(SAMPLE), "-o", str(defs), "-q", "--metrics",
                                  "hadley_edge_lat,subtropical_jet_lat,eddy_jet_lat",
                                  "--vary", "cells.edge_fraction=0,0.25", "--vary", "jets.subtropical_method=shear,upper_wind"])
    assert r.exit_code == 0, r.output
    for args in (["spread", str(defs), "-o", str(tmp_path / "s.csv")], ["trend", str(defs), "-o", str(trends)],
                 ["spread", str(trends), "-o", str(tmp_path / "ts.csv")]):
        r = CliRunner().invoke(main, args)
        assert r.exit_code == 0, r.output
    sp = S.read_csv(tmp_path / "s.csv")
    sp["range"] = sp["range"].astype(float)
    mean_range = sp.groupby(["metric", "hemisphere"])["range"].mean().round(2)
    assert (mean_range["hadley_edge_lat", "NH"], mean_range["hadley_edge_lat", "SH"]) == (3.56, 4.13)
    assert (mean_range["subtropical_jet_lat", "NH"], mean_range["subtropical_jet_lat", "SH"]) == (0.30, 0.09)
    assert (mean_range["eddy_jet_lat", "NH"], mean_range["eddy_jet_lat", "SH"]) == (0.0, 0.0)
    assert (mean_range["tropical_edge", "NH"], mean_range["tropical_edge", "SH"]) == (5.44, 4.22)
    ts = S.read_csv(tmp_path / "ts.csv")
    for col in ("min", "max"):
        ts[col] = ts[col].astype(float)
    ann = ts[(ts["season"] == "annual") & (ts["method"] == "ols_ar1")].set_index(["metric", "hemisphere"])
    h = ann.loc[("hadley_edge_lat", "NH")]
    assert (round(h["min"], 2), round(h["max"], 2), h["signs_agree"]) == (0.31, 0.44, "true")
    h = ann.loc[("hadley_edge_lat", "SH")]
    assert (round(h["min"], 2), round(h["max"], 2), h["signs_agree"]) == (-0.36, -0.23, "true")
    for hemi in ("NH", "SH"):
        jet = ann.loc[("subtropical_jet_lat", hemi)]
        assert max(abs(jet["min"]), abs(jet["max"])) < 0.03           # no trend: slopes of 0.03/decade or less
        assert ann.loc[("tropical_edge", hemi), "signs_agree"] == "false"   # widening edges with still jets


def test_a_family_no_varied_setting_touches_runs_once(monkeypatch):
    from circtrack import registry

    calls = {"jets": 0, "cells": 0}
    for name in calls:
        fam = registry._FAMILIES[name]
        orig = fam.compute

        def counted(fields, cfg, _orig=orig, _name=name):
            calls[_name] += 1
            return _orig(fields, cfg)
        monkeypatch.setattr(fam, "compute", counted)
    cfg = _cfg(["cells.level_hpa=400,500,600"])
    cfg["run"]["time_chunk"] = 100                      # one batch of the two files' 24 steps
    engine.track(FILES, cfg, metric_ids=["hadley_edge_lat", "eddy_jet_lat"])
    assert calls["cells"] == 3 * calls["jets"] and calls["jets"] >= 1


def test_recorded_settings_decide_reuse():
    from circtrack.engine.features import _Reads, _setting

    seen = set()
    cfg = _Reads({"cells": {"level_hpa": 500.0, "top": "x"}, "jets": {"w": [1, 2]}}, seen)
    assert cfg["cells"]["level_hpa"] == 500.0 and cfg["jets"].get("w") == [1, 2] and cfg["jets"].get("no") is None
    assert seen == {"cells.level_hpa", "jets.w"}
    dict(cfg["cells"])                                  # a whole table walked
    assert "cells.*" in seen
    assert _setting({"cells": {"a": 1}}, "cells.*") == {"a": 1} and _setting({"cells": {}}, "jets.w") is None
