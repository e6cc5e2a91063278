"""Mistakes a new user makes: each is one clear line (or a correct result), never a silent wrong answer."""

from __future__ import annotations

import os
import signal
import stat
import subprocess
import sys
import time

import numpy as np
import pytest
from click.testing import CliRunner

from circtrack import config, engine, synthetic
from circtrack.cli import main
from tests.conftest import csv_rows, make_dataset, write


def run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def one_error(r, code):
    assert r.exit_code == code, r.output
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("circtrack: error:") and "Traceback" not in r.output, r.output
    return lines[0]


def test_a_mistyped_var_name_is_an_error_not_fewer_metrics(tmp_path, default_nc):
    line = one_error(run("track", default_nc, "--var", "ua=UU", "-o", tmp_path / "o.csv"), 1)
    assert "'UU' given for ua" in line and "circtrack scan" in line
    assert not (tmp_path / "o.csv").exists()


def test_latitudes_in_radians_are_converted(tmp_path):
    ds = make_dataset(2)
    base = write(ds, tmp_path / "deg.nc")
    rad = ds.assign_coords(lat=np.deg2rad(ds["lat"].values))
    rad["lat"].attrs.update(units="radians")
    rad = write(rad, tmp_path / "rad.nc")
    cfg = config.load()
    ids = ["hadley_edge_lat", "subtropical_jet_lat"]
    assert csv_rows(engine.track([rad], cfg, metric_ids=ids, label="L")) == \
        csv_rows(engine.track([base], cfg, metric_ids=ids, label="L"))


def test_levels_in_pa_labelled_hpa_are_refused(tmp_path):
    ds = make_dataset(1)
    ds = ds.assign_coords(plev=ds["plev"].values * 100.0)
    ds["plev"].attrs.update(units="hPa")
    path = write(ds, tmp_path / "pa_as_hpa.nc")
    line = one_error(run("track", path, "-o", tmp_path / "o.csv"), 1)
    assert "look like Pa" in line and "ncatted -a units,plev,o,c,Pa" in line


def test_label_with_a_comma_is_refused(tmp_path, default_nc):
    line = one_error(run("track", default_nc, "--label", "Model Q, run 1", "-o", tmp_path / "o.csv"), 2)
    assert "--label 'Model Q run 1'" in line


@pytest.mark.parametrize("toml, needle", [
    ('[cells]\nlevel_hpa = "five hundred"\n', "cells.level_hpa = 'five hundred' in the config: expected a number"),
    ("[cells]\nextremum_window = [50.0, 0.0]\n", "give the lower bound first"),
    ("[jets]\neddy_window = [15.0]\n", "expected two numbers"),
])
def test_config_values_of_the_wrong_kind(tmp_path, default_nc, toml, needle):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(toml)
    line = one_error(run("track", default_nc, "-c", cfg, "-o", tmp_path / "o.csv"), 2)
    assert needle in line


def test_outputs_are_readable_by_the_group_like_any_new_file(tmp_path, default_nc):
    old = os.umask(0o022)
    try:
        assert run("track", default_nc, "-o", tmp_path / "o.csv", "-q").exit_code == 0
    finally:
        os.umask(old)
    for name in ("o.csv", "o.provenance.json"):
        assert stat.S_IMODE((tmp_path / name).stat().st_mode) == 0o644


def test_findings_into_a_missing_directory(tmp_path):
    sample = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "sample_inputs", "model_q")
    assert run("track", sample, "--metrics", "hadley_edge_lat", "-o", tmp_path / "o.csv", "-q").exit_code == 0
    line = one_error(run("trend", tmp_path / "o.csv", "-o", tmp_path / "nodir" / "t.csv"), 2)
    assert "mkdir -p" in line


def test_cluster_config_without_the_batch_system_is_one_line(tmp_path, default_nc, monkeypatch):
    pytest.importorskip("dask_jobqueue")
    monkeypatch.setenv("PATH", str(tmp_path))          # no sbatch here
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    line = one_error(run("track", default_nc, "-c", os.path.join(root, "configs", "cluster-slurm.toml"),
                         "--workers", "2", "-o", tmp_path / "o.csv"), 2)
    assert "'sbatch'" in line and "login node" in line


def test_scheduler_address_that_is_not_one(tmp_path, default_nc):
    pytest.importorskip("distributed")
    line = one_error(run("track", default_nc, "--scheduler", "nonsense", "-o", tmp_path / "o.csv"), 2)
    assert "--scheduler nonsense" in line


def test_ctrl_c_during_a_run_is_one_line_and_stops_the_workers(tmp_path):
    """A real process with worker processes, interrupted the way a terminal does (the whole group)."""
    paths = [write(make_dataset(3).isel(time=[k]), tmp_path / f"m{k}.nc") for k in range(3)]
    out = tmp_path / "o.csv"
    out.write_text("previous\n")
    cfg = tmp_path / "slow.toml"
    cfg.write_text("[run]\ntime_chunk = 1\nprocesses = 2\n")
    env = {**os.environ, "CIRCTRACK_TASK_PAUSE_S": "20"}          # every task waits: the interrupt finds them busy
    proc = subprocess.Popen([sys.executable, "-c", "import sys; from circtrack.cli import main; main()", "track",
                             *paths, "-o", str(out), "-c", str(cfg), "-q"],
                            stderr=subprocess.PIPE, text=True, start_new_session=True, env=env)
    time.sleep(3.0)
    if proc.poll() is not None:                                   # pragma: no cover - machine too fast
        pytest.skip("the run ended before the interrupt")
    os.killpg(proc.pid, signal.SIGINT)
    t0 = time.time()
    _, err = proc.communicate(timeout=60)
    assert time.time() - t0 < 10                                  # the busy workers were stopped, not awaited
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert proc.returncode == 130 and lines == ["circtrack: error: interrupted; the previous output is untouched"]
    assert out.read_text() == "previous\n"

