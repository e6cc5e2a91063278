"""Command line through click.testing.CliRunner on circtrack.cli.main."""

import json
import os

import pytest
from click.testing import CliRunner

from circtrack.cli import main
from circtrack.output import sidecar_path
from circtrack.metrics import catalogue
from circtrack.registry import hemispheres

HEADER = "source,time,hemisphere,sector,metric,value,units,flag"
ALL_IDS = ["hadley_edge_lat", "hadley_strength", "cell_boundary_lat", "subtropical_jet_lat",
           "subtropical_jet_speed", "eddy_jet_lat", "eddy_jet_speed", "eddy_jet_width"]


def expected_rows(ntime=3, roles=("ua", "va")):
    """Rows for the default metric set: every metric whose inputs the file holds."""
    per_time = sum(len(hemispheres(m)) for m in catalogue().values() if set(m.inputs) <= set(roles))
    return ntime * per_time


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def assert_clean_error(result, code):
    assert result.exit_code == code, result.output
    text = result.stderr.strip()
    lines = text.splitlines()
    assert len(lines) == 1, text
    assert lines[0].startswith("circtrack: error:")
    assert "Traceback" not in result.output
    return lines[0]


def test_track_writes_csv_and_sidecar(tmp_path, default_nc):
    out = tmp_path / "out.csv"
    r = invoke("track", default_nc, "-o", out, "-q")
    assert r.exit_code == 0, r.output
    text = out.read_text()
    lines = text.splitlines()
    assert lines[0] == HEADER
    assert len(lines) == 1 + expected_rows()
    assert {ln.split(",")[4] for ln in lines[1:]} >= set(ALL_IDS)
    side = sidecar_path(str(out))
    assert side == str(tmp_path / "out.provenance.json")
    prov = json.loads(open(side).read())
    assert prov["time_steps"] == 3 and prov["calendar"] == "noleap"
    assert prov["columns"] == HEADER.split(",")
    assert set(ALL_IDS) <= set(prov["metrics"])
    # rerun: byte-identical CSV
    r2 = invoke("track", default_nc, "-o", out, "-q")
    assert r2.exit_code == 0
    assert out.read_text() == text


def test_track_to_stdout(tmp_path, default_nc):
    r = invoke("track", default_nc, "-o", "-", "-q")
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert lines[0] == HEADER
    assert len(lines) == 1 + expected_rows()
    assert not list(tmp_path.glob("*.json"))


def test_metric_subset_and_label(default_nc):
    r = invoke("track", default_nc, "-o", "-", "-q", "--metrics", "eddy_jet_lat", "--label", "MyRun")
    assert r.exit_code == 0, r.output
    rows = [ln.split(",") for ln in r.stdout.splitlines()[1:]]
    assert len(rows) == 6
    assert {row[4] for row in rows} == {"eddy_jet_lat"}
    assert {row[0] for row in rows} == {"MyRun"}
    nh = [float(row[5]) for row in rows if row[2] == "NH"]
    assert all(abs(v - 45.0) < 0.1 for v in nh)


def test_metrics_lists_all_ids():
    r = invoke("metrics")
    assert r.exit_code == 0
    for mid in ALL_IDS:
        assert mid in r.output
    for mid in catalogue():
        assert mid in r.output


def test_scan(default_nc):
    r = invoke("scan", default_nc)
    assert r.exit_code == 0, r.output
    assert "'ua'" in r.output and "'va'" in r.output
    assert "can run" in r.output
    assert "hadley_edge_lat" in r.output


def test_missing_file(tmp_path):
    r = invoke("track", tmp_path / "nope.nc", "-o", tmp_path / "o.csv")
    assert_clean_error(r, 1)
    assert not (tmp_path / "o.csv").exists()


def test_empty_file(tmp_path):
    p = tmp_path / "empty.nc"
    p.write_bytes(b"")
    line = assert_clean_error(invoke("track", p, "-o", tmp_path / "o.csv"), 1)
    assert "empty" in line


def test_text_file_named_nc(tmp_path):
    p = tmp_path / "text.nc"
    p.write_text("this is not netCDF\n")
    line = assert_clean_error(invoke("track", p, "-o", tmp_path / "o.csv"), 1)
    assert str(p) in line


def test_missing_variable_asks_for_var(tmp_path, make_nc):
    path = make_nc("only_ua.nc", transform=lambda ds: ds.drop_vars("va"))
    line = assert_clean_error(invoke("track", path, "-o", tmp_path / "o.csv", "--metrics", "hadley_edge_lat"), 1)
    assert "--var va=" in line
    # without --metrics the default set follows the variables present: jets only, no cell metrics
    r = invoke("track", path, "-o", "-", "-q")
    assert r.exit_code == 0, r.output
    metrics = {ln.split(",")[4] for ln in r.stdout.splitlines()[1:]}
    assert "eddy_jet_lat" in metrics and "hadley_edge_lat" not in metrics


def test_unknown_units(tmp_path, make_nc):
    def furlongs(ds):
        ds["va"].attrs["units"] = "furlongs"
        return ds

    line = assert_clean_error(invoke("track", make_nc("furl.nc", transform=furlongs), "-o", tmp_path / "o.csv"), 1)
    assert "furlongs" in line


def test_unknown_metric_id(tmp_path, default_nc):
    line = assert_clean_error(invoke("track", default_nc, "-o", tmp_path / "o.csv", "--metrics", "jet_stream_lat"), 2)
    assert "jet_stream_lat" in line


def test_bad_var_syntax(tmp_path, default_nc):
    assert_clean_error(invoke("track", default_nc, "-o", tmp_path / "o.csv", "--var", "uaU"), 2)
    assert_clean_error(invoke("track", default_nc, "-o", tmp_path / "o.csv", "--var", "wind=U"), 2)


def test_var_override_for_oddly_named_variables(tmp_path, make_nc, default_nc):
    def odd(ds):
        ds = ds.rename({"ua": "zonal_thing", "va": "merid_thing"})
        for v in ("zonal_thing", "merid_thing"):
            del ds[v].attrs["standard_name"]
        return ds

    path = make_nc("odd.nc", transform=odd)
    assert_clean_error(invoke("track", path, "-o", tmp_path / "o.csv"), 1)      # not detectable alone
    r = invoke("track", path, "-o", "-", "-q", "--label", "L", "--var", "ua=zonal_thing", "--var", "va=merid_thing")
    assert r.exit_code == 0, r.output
    ref = invoke("track", default_nc, "-o", "-", "-q", "--label", "L")
    assert r.stdout == ref.stdout


def test_failing_run_leaves_existing_output_untouched(tmp_path, default_nc):
    out = tmp_path / "keep.csv"
    out.write_text("precious\n")
    side = tmp_path / "keep.provenance.json"
    side.write_text("{}\n")
    r = invoke("track", tmp_path / "missing.nc", "-o", out)
    assert r.exit_code == 1
    assert out.read_text() == "precious\n"
    assert side.read_text() == "{}\n"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".keep")] == []


def test_sectors_of_zonally_uniform_field_equal_zonal(make_nc):
    # with no wave every longitude band has the zonal-mean profile: sector jets at the known latitudes
    path = make_nc("flat.nc", wave_amplitude=0.0)
    r = invoke("track", path, "-o", "-", "-q", "--metrics", "eddy_jet_lat,subtropical_jet_lat",
               "--sector", "pac=150:240", "--sector", "atl=-60:0")
    assert r.exit_code == 0, r.output
    rows = [ln.split(",") for ln in r.stdout.splitlines()[1:]]
    assert {row[3] for row in rows} == {"zonal", "pac", "atl"}
    expected = {("NH", "eddy_jet_lat"): 45.0, ("SH", "eddy_jet_lat"): -50.0,
                ("NH", "subtropical_jet_lat"): 30.0, ("SH", "subtropical_jet_lat"): -32.0}
    for row in rows:
        assert row[7] == "ok"
        assert float(row[5]) == pytest.approx(expected[(row[2], row[4])], abs=0.1)


def test_bad_sector_is_usage_error(tmp_path, default_nc):
    assert_clean_error(invoke("track", default_nc, "-o", tmp_path / "o.csv", "--sector", "pac"), 2)


def test_module_entry_point_imports_cleanly():
    """``python -m circtrack.cli`` loads cli.py as __main__; the command modules must not import it back."""
    import subprocess
    import sys

    r = subprocess.run([sys.executable, "-m", "circtrack.cli", "--help"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    for cmd in ("track", "scan", "metrics", "trend", "season", "plot", "update"):
        assert cmd in r.stdout


@pytest.mark.parametrize("args, needle", [
    (["track", "x.nc", "-o", "o.csv", "--on-bad-file", "maybe"], "--on-bad-file"),
    (["track", "x.nc", "-o", "o.csv", "--no-such-option"], "--no-such-option"),
    (["track", "x.nc"], "-o"),
    (["trend"], "CSV"),
    (["no-such-command"], "no-such-command"),
])
def test_click_usage_errors_are_one_line(args, needle):
    r = CliRunner().invoke(main, args)
    assert r.exit_code == 2
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:") and needle in lines[0], r.output
    assert "--help" in lines[0]


def test_help_and_version_still_exit_zero():
    assert CliRunner().invoke(main, ["--help"]).exit_code == 0
    assert CliRunner().invoke(main, ["track", "--help"]).exit_code == 0
    r = CliRunner().invoke(main, ["--version"])
    assert r.exit_code == 0 and "circtrack" in r.output


def test_sidecar_names():
    # Changed on purpose (issue 19): only a name ending in '.csv' loses its suffix; every other name
    # keeps its full name and gets '-provenance.json' ('OUT.CSV' and 'indices.txt' used to get
    # '.provenance.json'), so the sidecars of '-o x' and '-o x.csv' (or 'x.CSV') are never one file.
    assert sidecar_path("/d/run.csv") == "/d/run.provenance.json"
    assert sidecar_path("/d/OUT.CSV") == "/d/OUT.CSV-provenance.json"
    assert sidecar_path("/d/indices.txt") == "/d/indices.txt-provenance.json"
    names = ["x", "x.csv", "x.CSV", "x.csv.csv", "x.provenance", "x.provenance.json", "x.txt", "x.txt.csv"]
    sides = [sidecar_path("/d/" + n) for n in names]
    assert len(set(sides)) == len(names)
    assert all(side != "/d/" + n for side, n in zip(sides, names))
