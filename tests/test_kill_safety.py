"""Workers die with their parent, and the lock dies with its owner: real processes, killed for real.

A run with forked worker processes is slowed down with ``CIRCTRACK_TASK_PAUSE_S`` (every read
task sleeps first, see DEVELOPERS.md), its parent alone is killed with SIGKILL (or SIGTERM), and
within a few seconds no worker may be left, the caller's pipe must be closed, and the next
``update`` must run.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

from .conftest import make_dataset, write

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
IDS = "hadley_edge_lat,eddy_jet_lat"


def children(pid):
    out = []
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as f:
                    fields = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid and fields[0] != "Z":
                out.append(int(d))
    return out


def alive(pid):
    """Running or sleeping (a zombie waiting for its new parent to reap it counts as dead)."""
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0] not in ("Z", "X")
    except OSError:
        return False


def start(tmp_path, command, *extra, stdout=subprocess.DEVNULL, pause="30"):
    files = [write(make_dataset(4).isel(time=[k]), tmp_path / "in" / f"m{k}.nc") for k in range(4)]
    cfg = tmp_path / "slow.toml"
    cfg.write_text("[run]\ntime_chunk = 1\nprocesses = 2\n")
    env = {**os.environ, "PYTHONPATH": ROOT, "CIRCTRACK_TASK_PAUSE_S": pause}
    proc = subprocess.Popen([sys.executable, "-m", "circtrack.cli", command, str(tmp_path / "in"), "--metrics", IDS,
                             "-c", str(cfg), "-q", *extra], stdout=stdout, stderr=subprocess.PIPE,
                            start_new_session=True, env=env)
    workers = []
    t0 = time.time()
    while time.time() - t0 < 60 and len(workers) < 2:
        time.sleep(0.2)
        if proc.poll() is not None:
            pytest.fail(f"the run ended early: {proc.stderr.read()}")
        workers = children(proc.pid)
    if len(workers) < 2:
        os.killpg(proc.pid, signal.SIGKILL)
        pytest.skip("the worker processes did not start within 60 s (machine too busy)")
    return proc, workers, files, cfg


def assert_workers_gone(workers, within=5.0):
    t0 = time.time()
    while time.time() - t0 < within and any(alive(w) for w in workers):
        time.sleep(0.1)
    left = [w for w in workers if alive(w)]
    for w in left:                                     # pragma: no cover - clean up before failing
        os.kill(w, signal.SIGKILL)
    assert not left, f"workers {left} outlived their parent"


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM])
def test_killing_the_parent_of_an_update_leaves_no_worker_and_no_lock(tmp_path, sig):
    (tmp_path / "in").mkdir()
    out = tmp_path / "o.csv"
    proc, workers, files, cfg = start(tmp_path, "update", "-o", str(out), "--label", "L")
    os.kill(proc.pid, sig)                             # the parent only, as a job scheduler or OOM killer would
    proc.wait(timeout=30)
    assert_workers_gone(workers)
    assert not out.exists()
    env = {**os.environ, "PYTHONPATH": ROOT}
    r = subprocess.run([sys.executable, "-m", "circtrack.cli", "update", str(tmp_path / "in"), "--metrics", IDS,
                        "-c", str(cfg), "-q", "-o", str(out), "--label", "L"],
                       capture_output=True, text=True, env=env, timeout=300)
    assert r.returncode == 0, r.stderr
    t = subprocess.run([sys.executable, "-m", "circtrack.cli", "track", *files, "--metrics", IDS, "-c", str(cfg),
                        "-q", "-o", "-", "--label", "L"], capture_output=True, text=True, env=env, timeout=300)
    assert out.read_text() == t.stdout


def test_killing_the_parent_of_a_track_closes_the_callers_pipe(tmp_path):
    (tmp_path / "in").mkdir()
    proc, workers, _, _ = start(tmp_path, "track", "-o", "-", stdout=subprocess.PIPE)
    os.kill(proc.pid, signal.SIGKILL)
    t0 = time.time()
    proc.stdout.read()                                 # EOF only once no worker holds the pipe
    assert time.time() - t0 < 5
    assert_workers_gone(workers)
