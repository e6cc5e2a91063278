"""Cluster set-up: batch-job scripts for SLURM/PBS from the config presets, spill directory, errors."""

from __future__ import annotations

import os

import pytest

from circtrack import config as C
from circtrack.cluster import jobqueue_cluster, scheduler_context, spill_directory
from circtrack.errors import UsageError

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def test_spill_directory_defaults_to_tmpdir(monkeypatch, tmp_path):
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    assert spill_directory(C.load(None)) == str(tmp_path)
    cfg = C.load(None)
    cfg["cluster"]["spill_dir"] = "$TMPDIR/spill"
    assert spill_directory(cfg) == os.path.join(str(tmp_path), "spill")


@pytest.mark.parametrize("preset, directive", [("cluster-slurm.toml", "#SBATCH"), ("cluster-pbs.toml", "#PBS")])
def test_batch_job_script_from_preset(preset, directive, monkeypatch, tmp_path):
    pytest.importorskip("dask_jobqueue")
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    cfg = C.load(os.path.join(ROOT, "configs", preset))
    cfg["cluster"]["account"] = "climate42"
    cfg["cluster"]["job_prologue"] = ["module load netcdf"]
    cluster = jobqueue_cluster(cfg["cluster"]["kind"], 8, cfg, scale=False)   # no job is submitted
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    assert directive in script
    assert "climate42" in script and "02:00:00" in script
    assert "export HDF5_USE_FILE_LOCKING=FALSE" in script and "module load netcdf" in script
    assert "--local-directory $TMPDIR" in script           # expanded by the job's shell on its node
    assert "--nworkers 4" in script or "--nprocs 4" in script         # 4 single-threaded workers per job


def test_unknown_cluster_kind_is_a_usage_error():
    cfg = C.load(None)
    cfg["cluster"]["kind"] = "cloud"
    with pytest.raises(UsageError, match="kind = 'cloud'"):
        with scheduler_context(2, None, cfg):
            pass
