"""Worker processes of a run: forked before the planning and warmed up (pool.start_early), taken by
the run's tasks, stopped when no task takes them; the parent keeps freed memory for reuse too."""

from __future__ import annotations

import os
import sys
import time

import pytest
from tests.conftest import csv_rows, make_dataset, write

from circtrack import config as C
from circtrack import engine
from circtrack.engine import pool as PL
from circtrack.errors import CircError


@pytest.fixture
def two_files(tmp_path):
    ds = make_dataset(6)
    return [write(ds.isel(time=slice(k, k + 3)), tmp_path / f"part_{k // 3}.nc") for k in (0, 3)]


def _cfg(**run):
    cfg = C.load(None)
    cfg["run"].update(run)
    return cfg


@pytest.fixture
def pools(monkeypatch):
    """Every pool forked: its ``warm`` argument and the pids of its workers."""
    started = []
    real = PL._start_pool

    def spy(nproc, warm=None):
        pool = real(nproc, warm)
        started.append((warm, pool))
        return pool

    monkeypatch.setattr(PL, "_start_pool", spy)
    return started


def _gone(pids, timeout=10.0):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        alive = []
        for p in pids:
            try:
                os.kill(p, 0)
                alive.append(p)
            except ProcessLookupError:
                pass
        if not alive:
            return True
        time.sleep(0.05)
    return False


def _worker_state(_job):
    from circtrack.engine import reduce as R
    return [os.getpid(), "h5py" in sys.modules, os.getpid() in R._BLAS_LIMITED]


def test_the_parent_keeps_freed_memory_with_worker_processes(monkeypatch):
    calls = []
    monkeypatch.setattr(PL, "keep_freed_memory", lambda: calls.append(1))
    runner = PL.Runner(_cfg(processes=2), 4)
    assert runner.streams and calls == [1]      # it unpickles the results and runs the families


def test_track_forks_its_workers_once_before_planning_and_gives_the_same_rows(two_files, pools):
    ref = engine.track(two_files, _cfg(scheduler="sync"), label="x")
    assert pools == []
    out = engine.track(two_files, _cfg(processes=2, time_chunk=1), label="x")
    assert [w for w, _ in pools] == [True]       # one pool, forked early, warmed for netCDF-4 inputs
    assert csv_rows(out) == csv_rows(ref)
    assert PL._EARLY == {}


def test_early_workers_warm_up_and_run_the_tasks(two_files):
    PL.start_early(_cfg(processes=2), two_files)
    assert os.getpid() in PL._EARLY
    runner = PL.Runner(_cfg(processes=2), 4)
    try:
        states = runner.run(_worker_state, [1, 2, 3, 4])
    finally:
        runner.close()
    assert PL._EARLY == {}                       # the Runner took the pool
    assert all(s[1] and s[2] for s in states)    # h5py imported, BLAS on one thread, before any task


def test_a_released_early_pool_goes_on_to_the_next_runner(two_files):
    cfg = _cfg(processes=2)
    PL.start_early(cfg, two_files)
    first = PL.Runner(cfg, 4)
    first.run(_worker_state, [1, 2])
    pool = first.pool
    workers = set((pool._processes or {}).keys())
    first.release()
    assert first.pool is None and PL._EARLY[os.getpid()] == (2, pool)
    second = PL.Runner(cfg, 4)
    try:
        ran = {s[0] for s in second.run(_worker_state, [1, 2, 3, 4])}
        assert second.pool is pool and ran <= workers          # no new fork
    finally:
        second.close()
        PL.close_early()
    assert PL._EARLY == {}
    third = PL.Runner(cfg, 4)               # a pool forked when the tasks came shuts down on release
    third.run(_worker_state, [1, 2])
    pids = [p.pid for p in (third.pool._processes or {}).values()]
    third.release()
    assert PL._EARLY == {} and _gone(pids)


def test_no_early_workers_for_one_small_file_or_in_this_process(two_files, pools):
    PL.start_early(_cfg(processes=2), two_files[:1])       # a few MB: maybe a single task
    PL.start_early(_cfg(scheduler="sync"), two_files)
    PL.start_early(_cfg(processes=1), two_files)
    assert pools == [] and PL._EARLY == {}


def test_early_workers_stop_when_planning_fails(two_files, tmp_path, pools):
    bad = tmp_path / "z_not_netcdf.nc"
    bad.write_text("not a netCDF file\n")
    with pytest.raises(CircError):
        engine.track(two_files + [str(bad)], _cfg(processes=2, on_bad_file="stop"), label="x")
    assert len(pools) == 1 and PL._EARLY == {}
    pids = [p.pid for p in (pools[0][1]._processes or {}).values()]
    assert _gone(pids)


def test_a_single_task_run_stops_the_unused_early_workers(two_files, pools, monkeypatch):
    monkeypatch.setattr(PL, "EARLY_MIN_BYTES", 0)          # one small file gets early workers too
    out = engine.track(two_files[:1], _cfg(processes=2, time_chunk=1000), label="x")
    assert out.columns["metric"].size > 0 and len(pools) == 1 and PL._EARLY == {}
    assert _gone([p.pid for p in (pools[0][1]._processes or {}).values()])


def test_many_files_read_headers_and_run_tasks_on_one_early_pool(tmp_path, pools):
    from circtrack.engine import run as RUN

    ds = make_dataset(RUN.HEADERS_IN_WORKERS)
    paths = [write(ds.isel(time=slice(k, k + 1)), tmp_path / f"day_{k:03d}.nc") for k in range(ds.sizes["time"])]
    ref = engine.track(paths, _cfg(scheduler="sync"), label="x")
    out = engine.track(paths, _cfg(processes=2), label="x")
    assert [w for w, _ in pools] == [True]      # the headers and the tasks: one fork
    assert csv_rows(out) == csv_rows(ref) and PL._EARLY == {}


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="pipe sizes are Linux's")
def test_workers_write_a_whole_result_into_the_pipe():
    import fcntl

    runner = PL.Runner(_cfg(processes=2), 4)
    try:
        runner.run(_worker_state, [1, 2])
        fd = runner.pool._result_queue._writer.fileno()
        assert fcntl.fcntl(fd, getattr(fcntl, "F_GETPIPE_SZ", 1032)) >= min(PL.RESULT_PIPE_BYTES, _pipe_max())
    finally:
        runner.close()


def _pipe_max():
    try:
        with open("/proc/sys/fs/pipe-max-size") as f:
            return int(f.read())
    except OSError:
        return 65536
