"""circtrack update: incremental runs equal one clean track; state, lock, refusals, kill safety."""

from __future__ import annotations

import json
import os
import selectors
import signal
import subprocess
import sys
import time

import pytest
from click.testing import CliRunner

from circtrack import output as O
from circtrack import synthetic
from circtrack import update as U
from circtrack.cli import main

from .conftest import CALENDAR, LAT, LON, PLEV

MAIN = "import sys; from circtrack.cli import main; main()"


def monthly(tmp_path, k, nt=2, name=None, **params):
    """File k holds months k*nt .. k*nt+nt-1 counted from January 2000 (noleap)."""
    times = synthetic.monthly_times(2000, 10, CALENDAR)[k * nt:(k + 1) * nt]
    ds = synthetic.dataset(LAT, LON, PLEV, times, **params)
    path = tmp_path / "data" / (name or f"mon_{k:02d}.nc")
    path.parent.mkdir(exist_ok=True)
    ds.to_netcdf(str(path), encoding=synthetic.time_encoding(CALENDAR))
    return str(path)


def invoke(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def track_bytes(tmp_path, files, *extra):
    ref = tmp_path / "ref.csv"
    r = invoke("track", *files, "-o", ref, "-q", *extra)
    assert r.exit_code == 0, r.output
    return ref.read_bytes()


def one_error_line(r, code):
    assert r.exit_code == code, r.output
    lines = [ln for ln in r.output.splitlines() if ln.strip()]
    assert len(lines) == 1, r.output
    assert lines[0].startswith("circtrack: error:")
    return lines[0]


def test_drops_one_at_a_time_equal_clean_track(tmp_path):
    out = tmp_path / "out.csv"
    files = []
    for k in range(4):
        files.append(monthly(tmp_path, k))
        r = invoke("update", *files, "-o", out, "-q", "--label", "L")
        assert r.exit_code == 0, r.output
        assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L")
    state = json.loads((tmp_path / "out.state.json").read_text())
    assert state["source"] == "L"
    rec = state["files"][os.path.abspath(files[2])]
    assert rec["times"] == ["2000-05-15", "2000-06-15"] == rec["owned"]
    assert rec["size"] == os.path.getsize(files[2]) and len(rec["checksum"]) == 64
    side = json.loads((tmp_path / "out.provenance.json").read_text())
    assert [i["path"] for i in side["inputs"]] == [os.path.abspath(f) for f in files]
    assert side["time_steps"] == 8
    # the unchanged files were not reprocessed on the last drop
    assert side["updated_incrementally"]["processed"] == [files[3]]


def test_nothing_new(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(2)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    before = out.read_bytes()
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0
    assert r.output.strip().splitlines() == [f"circtrack: nothing new for {out} (2 files up to date)"]
    assert out.read_bytes() == before


def test_modified_and_removed_files_are_reprocessed(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(3)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    before = out.read_bytes()
    monthly(tmp_path, 1, edj=(40.0, -45.0))                 # rewrite in place, different circulation
    r = invoke("update", *files, "-o", out, "-q", "--label", "L")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() != before
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L")
    assert b"2000-03-15,NH,zonal,eddy_jet_lat,40," in out.read_bytes()
    # a file left out of PATH... loses its rows
    r = invoke("update", files[0], files[2], "-o", out, "-q", "--label", "L")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, [files[0], files[2]], "--label", "L")


def test_changed_parameters_refused_then_rebuild(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(2)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    before = out.read_bytes()
    line = one_error_line(invoke("update", *files, "-o", out, "-q", "--label", "L", "--metrics", "eddy_jet_lat"), 2)
    assert "--rebuild" in line
    line = one_error_line(invoke("update", *files, "-o", out, "-q", "--label", "M"), 2)
    assert "--label" in line and "--rebuild" in line
    assert out.read_bytes() == before
    r = invoke("update", *files, "-o", out, "-q", "--label", "L", "--metrics", "eddy_jet_lat", "--rebuild")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L", "--metrics", "eddy_jet_lat")


def test_derived_source_change_needs_label(tmp_path):
    out = tmp_path / "out.csv"
    f0 = monthly(tmp_path, 0)
    assert invoke("update", f0, "-o", out, "-q").exit_code == 0        # source 'mon_00' from the one name
    f1 = monthly(tmp_path, 1)
    line = one_error_line(invoke("update", f0, f1, "-o", out, "-q"), 2)
    assert "--label 'mon_00'" in line and "--rebuild" in line
    r = invoke("update", f0, f1, "-o", out, "-q", "--label", "mon_00")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, [f0, f1], "--label", "mon_00")


def test_duplicate_time_steps(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(2)]
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 0
    dup = monthly(tmp_path, 1, name="mon_01b.nc", edj=(40.0, -45.0))   # same months as mon_01
    line = one_error_line(invoke("update", *files, dup, "-o", out, "-q", "--label", "L"), 1)
    assert "mon_01b.nc" in line and "mon_01.nc" in line and "--repeated-times" in line
    r = invoke("update", *files, dup, "-o", out, "-q", "--label", "L", "--repeated-times", "keep-first")
    assert r.exit_code == 0, r.output
    assert out.read_bytes() == track_bytes(tmp_path, [*files, dup], "--label", "L", "--repeated-times", "keep-first")
    r = invoke("update", *files, dup, "-o", out, "-q", "--label", "L", "--repeated-times", "keep-last", "--rebuild")
    assert r.exit_code == 0, r.output
    assert b"2000-03-15,NH,zonal,eddy_jet_lat,40," in out.read_bytes()
    assert out.read_bytes() == track_bytes(tmp_path, [*files, dup], "--label", "L", "--repeated-times", "keep-last")


def test_lock_held_by_another_process(tmp_path):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, 0)]
    # another update: it takes the lock the way update does (a per-process lockf record lock)
    holder = subprocess.Popen([sys.executable, "-c",
                               "import sys, time; from circtrack.update import acquire_lock; acquire_lock(sys.argv[1]); "
                               "print('locked', flush=True); time.sleep(60)", str(out)],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        line = one_error_line(invoke("update", *files, "-o", out, "-q"), 1)
        assert "another update is running on" in line and U.lock_path(str(out)) in line
        assert not out.exists()
    finally:
        holder.kill()
        holder.wait()
    assert invoke("update", *files, "-o", out, "-q").exit_code == 0


def test_kill_between_csv_and_state_is_recovered(tmp_path, monkeypatch):
    out = tmp_path / "out.csv"
    files = [monthly(tmp_path, k) for k in range(3)]
    assert invoke("update", *files[:2], "-o", out, "-q", "--label", "L").exit_code == 0
    # CSV, sidecar and state are committed together (output.commit: all synced, then renamed in
    # that order); the interrupt comes after the CSV and sidecar renames, before the state's
    real = O.os.replace

    def dies_at_state(src, dst, *a, **kw):
        if str(dst).endswith(".state.json"):
            raise KeyboardInterrupt
        return real(src, dst, *a, **kw)

    monkeypatch.setattr(O.os, "replace", dies_at_state)
    assert invoke("update", *files, "-o", out, "-q", "--label", "L").exit_code == 130
    monkeypatch.setattr(O.os, "replace", real)
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0, r.output
    assert "rebuilding" in r.output
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L")


def wait_for_line(stream, text, timeout=60.0):
    """Read stderr lines of a child until one contains ``text``; fail (never skip) otherwise."""
    sel = selectors.DefaultSelector()
    sel.register(stream, selectors.EVENT_READ)
    seen, deadline = [], time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not sel.select(timeout=max(0.0, deadline - time.monotonic())):
            break
        line = stream.readline()
        if not line:                                        # the child ended without pausing
            break
        seen.append(line)
        if text in line:
            return line
    raise AssertionError(f"update never reported '{text}'; its stderr: {''.join(seen)!r}")


@pytest.mark.parametrize("phase", U.PAUSE_PHASES)
def test_sigkill_at_each_write_phase(tmp_path, monkeypatch, phase):
    """A real update process is paused at a named phase (CIRCTRACK_PAUSE_AT) and SIGKILLed there."""
    monkeypatch.delenv(U.PAUSE_ENV, raising=False)
    out = tmp_path / "out.csv"
    side, state = tmp_path / "out.provenance.json", tmp_path / "out.state.json"
    files = [monthly(tmp_path, k) for k in range(3)]
    assert invoke("update", *files[:2], "-o", out, "-q", "--label", "L").exit_code == 0
    before = {p: p.read_bytes() for p in (out, side, state)}
    cmd = [sys.executable, "-c", MAIN, "update", *files, "-o", str(out), "-q", "--label", "L"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            env={**os.environ, U.PAUSE_ENV: phase})
    try:
        line = wait_for_line(proc.stderr, f"circtrack: paused at {phase}")
        assert f"(pid {proc.pid})" in line
        proc.send_signal(signal.SIGKILL)
        assert proc.wait(timeout=30) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stderr.close()
    temps = sorted(p.name for p in tmp_path.glob(".out.*.tmp"))
    assert state.read_bytes() == before[state]              # the state is always the previous one
    # Changed on purpose (issue 19, all or nothing): CSV, sidecar and state are all written and
    # synced to temp files before the first rename, so the killed run leaves those temp files
    if phase == "before-csv-rename":
        # the new files sat synced in their temp files: OUT, its sidecar and state are the previous ones
        assert out.read_bytes() == before[out] and side.read_bytes() == before[side]
        assert [t.split(".")[2] for t in temps] == ["csv", "provenance", "state"]
    else:
        # CSV and sidecar renamed into place, the state not yet renamed: the CSV is the new one
        assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L")
        assert len(temps) == 1 and temps[0].startswith(".out.state.json.")
    # the next run completes the job (rebuilding when the CSV no longer matches the state)
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0, r.output
    assert ("rebuilding" in r.output) == (phase == "before-state-write")
    assert out.read_bytes() == track_bytes(tmp_path, files, "--label", "L")
    assert list(tmp_path.glob(".out.*.tmp")) == []           # the killed run's temp file is gone
    st = json.loads(state.read_text())
    assert st["csv_sha256"] == U._sha_text(out.read_text()) and len(st["files"]) == 3
    r = invoke("update", *files, "-o", out, "--label", "L")
    assert r.exit_code == 0 and "nothing new" in r.output


def test_skipped_file_line_does_not_advise_the_option_already_given(tmp_path):
    """update --on-bad-file skip says what track says of a skipped file: no advice to pass the option."""
    good = monthly(tmp_path, 0)
    empty = tmp_path / "data" / "mon_99.nc"
    empty.write_bytes(b"")
    lines = {}
    for cmd in ("track", "update"):
        out = tmp_path / f"{cmd}.csv"
        r = invoke(cmd, good, empty, "-o", out, "-q", "--label", "L", "--on-bad-file", "skip")
        assert r.exit_code == 0, r.output
        lines[cmd] = [ln for ln in r.stderr.splitlines() if "skipped" in ln]
    assert lines["update"] == lines["track"] and len(lines["track"]) == 1
    assert "mon_99.nc" in lines["update"][0] and "--on-bad-file" not in lines["update"][0]
