"""configs/ presets load and run on their layout; `circtrack scan` names the fix when detection fails."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from click.testing import CliRunner

from circtrack import config
from circtrack import output as O
from circtrack.cli import main
from circtrack.errors import InputError
from tests.layout_helpers import LAT, LON, PLEV, assert_rows_close, baseline, dates, make_dataset, run_cfg, write
from tests.test_layouts_model_levels import P0, _hybrid_file
from tests.test_layouts_styles import _cmip, _packed, _reanalysis, _write_cmip, _write_reanalysis

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    return baseline(tmp_path_factory.mktemp("base"))


def _capitals(ds):
    return xr.Dataset({"U": (("time", "lev", "lat", "lon"), ds["ua"].values, {"units": "m s-1"}),
                       "V": (("time", "lev", "lat", "lon"), ds["va"].values, {"units": "m s-1"})},
                      coords={"time": ("time", dates("standard")), "lev": ("lev", ds["plev"].values, {"units": "hPa"}),
                              "lat": ("lat", LAT, {"units": "degrees_north"}), "lon": ("lon", LON, {"units": "degrees_east"})})


def _make(kind, tmp_path):
    ds = make_dataset(3)
    if kind == "reanalysis":
        return _write_reanalysis(_reanalysis(ds), tmp_path / "era.nc")
    if kind == "model-intercomparison":
        return _write_cmip(_cmip(ds, "360_day", 2000), tmp_path / "cmip.nc", "360_day")
    if kind == "older-reanalysis":
        p = str(tmp_path / "ncep.nc")
        _packed(ds).to_netcdf(p, encoding={"time": {"units": "hours since 1800-01-01", "calendar": "standard"}})
        return p
    if kind == "older-reanalysis-capitals":
        p = str(tmp_path / "caps.nc4")
        _capitals(ds).to_netcdf(p, encoding={"time": {"units": "minutes since 2000-01-01", "calendar": "standard"}})
        return p
    if kind == "model-levels":
        return _hybrid_file(tmp_path / "ml.nc", ds["ua"].values, ds["va"].values,
                            np.full((3, LAT.size, LON.size), P0), PLEV * 100.0, "a*p0", False)
    raise AssertionError(kind)


PRESETS = ["reanalysis", "model-intercomparison", "older-reanalysis", "older-reanalysis-capitals", "model-levels"]


def test_every_layout_preset_file_is_tested():
    layout_presets = [p.stem for p in CONFIGS.glob("*.toml") if p.stem != "default" and not p.stem.startswith("cluster")]
    assert sorted(layout_presets) == sorted(PRESETS)


@pytest.mark.parametrize("name", PRESETS)
def test_preset_loads_and_runs_on_its_layout(tmp_path, base, name):
    rows, metrics = base
    cfg = config.load(str(CONFIGS / f"{name}.toml"))
    path = _make(name, tmp_path)
    if name == "model-levels":
        # the preset's target levels (950 hPa, ...) sample the column otherwise than the baseline's
        # levels, so the column balance (cells.balance) removes a different quadrature residual (1e-3
        # of the strength); without it psi500 uses the same levels as the baseline and must be equal
        cfg["cells"]["balance"] = "none"
        base_cfg = config.load()
        base_cfg["cells"]["balance"] = "none"
        rows = O.sorted_lines(run_cfg(write(make_dataset(3), tmp_path / "base.nc"), cfg=base_cfg,
                                      metric_ids=metrics))[1:]
    out = run_cfg(path, cfg=cfg, metric_ids=metrics)
    got = O.sorted_lines(out)[1:]
    if name == "older-reanalysis":
        assert_rows_close(got, rows, atol_lat=0.01, rtol=2e-3)        # int16 packing
    elif name == "model-levels":
        # other target levels: the net column flux, a quadrature residual here, differs (layout_helpers)
        assert [r for r in got if ",column_net_mass_flux," not in r] == \
            [r for r in rows if ",column_net_mass_flux," not in r]
    else:
        assert got == rows
    pinned = cfg["variables"]
    if "ua" in pinned:
        found = out.provenance["inputs"][0]["variables"]
        assert found["ua"] == pinned["ua"] and out.provenance["inputs"][0]["found_by"]["ua"] == "set by --var/config"


def test_model_levels_preset_sets_the_target_levels(tmp_path):
    cfg = config.load(str(CONFIGS / "model-levels.toml"))
    out = run_cfg(_make("model-levels", tmp_path), cfg=cfg, metric_ids=["hadley_edge_lat"])
    levels = out.provenance["inputs"][0]["pressure_levels_hpa"]["va"]
    assert 950.0 in levels and 30.0 not in levels                      # 30 hPa lies above this model's top (50 hPa)


# --------------------------------------------------------------------------- scan
def _scan(*args):
    res = CliRunner().invoke(main, ["scan", *map(str, args)])
    return res.exit_code, res.output


def snippets(text):
    """Every config snippet scan prints (the lines after one ending in "config file:" or
    "config file (-c FILE):"), each parsed with tomllib: it must be valid TOML."""
    import tomllib

    out, lines = [], text.splitlines()
    for i, line in enumerate(lines):
        if line.rstrip().endswith(("config file:", "config file (-c FILE):")):
            block = []
            for nxt in lines[i + 1:]:
                stripped = nxt.strip()
                if not (stripped == "[variables]" or (block and " = " in stripped and nxt.startswith("      "))):
                    break
                block.append(nxt)
            assert block and block[0].strip() == "[variables]", (line, block)
            out.append(tomllib.loads("\n".join(block)))
    assert out, "scan printed no config snippet"
    return out


def _odd_names(tmp_path):
    """The northward wind under a name no rule knows, with nothing but its units."""
    ds = make_dataset(1)
    ds["wind_north"] = ds["va"].copy()
    ds["wind_north"].attrs = {"units": "m s-1"}
    return write(ds.drop_vars("va"), tmp_path / "odd_names.nc")


def test_scan_config_snippets_are_valid_toml(tmp_path):
    """The snippets scan prints parse with tomllib; the printed lines of a chosen variable, written
    to a config file as they are, make scan find it."""
    path = _odd_names(tmp_path)
    code, text = _scan(path)
    assert code == 0 and '[variables] va = "' not in text          # never the header and a key on one line
    assert snippets(text)[-1]["variables"]["va"] == "wind_north"
    lines = text.splitlines()
    start = lines.index("  or in a config file (-c FILE):") + 1
    block = [ln for ln in lines[start:] if ln.startswith("      ")]
    conf = tmp_path / "vars.toml"
    conf.write_text("\n".join(ln for ln in block if "NAME" not in ln) + "\n")   # the placeholder lines left out
    code, text = _scan(path, "-c", conf)
    assert code == 0 and "va       = 'wind_north' (set by --var/config" in text, text


def test_scan_names_the_exact_line_when_a_variable_is_not_recognised(tmp_path):
    path = _odd_names(tmp_path)
    code, text = _scan(path)
    assert code == 0
    assert "va (northward wind on pressure levels): add --var va=wind_north" in text
    assert {"va": "wind_north"}.items() <= snippets(text)[-1]["variables"].items()
    assert "hadley_edge_lat                cannot run: needs va" in text
    # the track error says the same in one line
    with pytest.raises(InputError, match=r"odd_names\.nc: .*\(va\) not found .*--var va=wind_north"):
        run_cfg(path, metric_ids=["hadley_edge_lat"])
    # and the suggested line works
    code, text = _scan(path, "--var", "va=wind_north")
    assert "va       = 'wind_north' (set by --var/config" in text and "hadley_edge_lat                can run" in text


def test_scan_says_which_candidate_it_chose_and_why(tmp_path):
    ds = make_dataset(1)
    ds["u"] = ds["ua"] * 1.0                                             # a second eastward wind, by name only
    ds["u"].attrs = {"units": "m s-1"}
    ds["va_copy"] = ds["va"] * 1.0                                       # same standard_name, same rank
    code, text = _scan(write(ds, tmp_path / "two.nc"))
    assert code == 0
    assert ("ua       = 'ua' (standard_name 'eastward_wind'; chosen over 'u' (variable name 'u'): a CF standard_name "
            "match ranks above an exact name match; units 'm s-1')") in text
    assert "to use another, add --var ua=u  or in a config file:" in text
    assert {"variables": {"ua": "u"}} in snippets(text)
    assert "chosen over 'va_copy' (standard_name 'northward_wind'): same rank, 'va' comes first alphabetically" in text


def test_scan_names_the_line_for_an_unrecognised_coordinate(tmp_path):
    ds = make_dataset(1).rename({"lat": "row"})
    ds["row"].attrs = {}                                                 # nothing tells it is latitude
    path = write(ds, tmp_path / "no_lat.nc")
    code, text = _scan(path)
    assert code == 0
    assert ("latitude axis: not found by name, standard_name, axis or units; add --var lat=DIM  (or give it units "
            "'degrees_north'); dimensions without a part: row; or in a config file:") in text
    assert {"variables": {"lat": "DIM"}} in snippets(text)
    code, text = _scan(path, "--var", "lat=row")
    assert "lat = 'row' (set by --var/config)" in text and "hadley_edge_lat                can run" in text
    out = run_cfg(path, metric_ids=["hadley_edge_lat"], overrides={"lat": "row"})
    assert set(out.columns["flag"]) == {"ok"}


def test_scan_reports_layout_notes(tmp_path):
    ds = _reanalysis(make_dataset(3), stream="coord", number=0)
    code, text = _scan(_write_reanalysis(ds, tmp_path / "era.nc"))
    assert code == 0
    assert "streams: 'expver' along time with values 0001, 0005" in text
    assert "time = 'valid_time' (named 'valid_time')" in text
    path = _make("model-levels", tmp_path)
    code, text = _scan(path)
    assert "hybrid sigma-pressure levels, p = a*p0 + b*ps from formula_terms" in text


def test_track_cli_with_a_preset_and_a_grib_without_the_extra_is_one_line(tmp_path, monkeypatch):
    import builtins
    real = builtins.__import__

    def no_cfgrib(name, *a, **k):
        if name == "cfgrib":
            raise ImportError("No module named 'cfgrib'")
        return real(name, *a, **k)

    bad = tmp_path / "x.grib2"
    bad.write_bytes(b"GRIB" + b"\0" * 100)
    monkeypatch.setattr(builtins, "__import__", no_cfgrib)
    res = CliRunner().invoke(main, ["track", str(bad), "-o", str(tmp_path / "o.csv"), "-c", str(CONFIGS / "reanalysis.toml")])
    assert res.exit_code == 1
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "x.grib2" in lines[0] and "pip install 'circtrack[grib]'" in lines[0]


def test_scan_joins_one_variable_per_file_inputs(tmp_path):
    ds = _cmip(make_dataset(2), "noleap", 2000)
    for var in ("ua", "va"):
        _write_cmip(ds[[var, "time_bnds"]], tmp_path / f"{var}_Amon_INVENTED-1_historical_r1i1p1f1_gn_200001-200002.nc", "noleap")
    code, text = _scan(tmp_path)
    assert code == 0
    assert "va       = 'va' in " in text and "va_Amon_INVENTED-1_historical_r1i1p1f1_gn_200001-200002.nc (same time steps" in text
    assert "hadley_edge_lat                can run" in text


def test_scan_names_the_fix_for_units_it_does_not_know(tmp_path):
    ds = make_dataset(1)
    ds["ua"].attrs["units"] = "furlongs per fortnight"
    code, text = _scan(write(ds, tmp_path / "units.nc"))
    assert code == 0
    assert "units 'furlongs per fortnight' are not understood for speed: set them, e.g. ncatted -a units,ua,o,c,'m s-1'" in text


def test_scan_gives_the_latitudes_in_their_stored_order(tmp_path):
    """A file with latitudes from north to south: scan says 'N..S (descending)', as stored."""
    path = write(make_dataset(2).isel(lat=slice(None, None, -1)), tmp_path / "desc.nc")
    r = CliRunner().invoke(main, ["scan", str(path)])
    assert r.exit_code == 0, r.output
    first, last = LAT.max(), LAT.min()
    assert f"latitudes {first:g}..{last:g} (descending)" in r.output
