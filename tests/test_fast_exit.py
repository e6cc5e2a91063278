"""``circtrack track`` run as a program ends without the interpreter's teardown once its outputs are
committed (cli_support.end_without_teardown): the atexit handlers still run, stdout and stderr are
flushed, the exit status is kept; a caller in the same process (CliRunner) is never ended."""

from __future__ import annotations

import os
import subprocess
import sys
import threading

from click.testing import CliRunner

from circtrack import cli_support as CS
from circtrack.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
IDS = "hadley_edge_lat,subtropical_jet_lat"
PROGRAM = ("import atexit, sys\n"
           "atexit.register(lambda: print('atexit handler ran', file=sys.stderr))\n"
           "{thread}"
           "from circtrack.cli import main\n"
           "sys.argv = ['circtrack'] + sys.argv[1:]\n"
           "main()\n")
# a thread that ends only after the main thread has finished: printed only by a normal exit, which waits
THREAD = ("import threading\n"
          "threading.Thread(target=lambda: (threading.main_thread().join(), print('thread ended', file=sys.stderr)))"
          ".start()\n")


def _program(args, thread=False):
    return subprocess.run([sys.executable, "-c", PROGRAM.format(thread=THREAD if thread else ""), *map(str, args)],
                          capture_output=True, text=True, env={**os.environ, "PYTHONPATH": ROOT}, timeout=300)


def test_track_as_a_program_flushes_and_runs_the_exit_handlers(tmp_path, default_nc):
    out = tmp_path / "o.csv"
    to_file = _program(["track", default_nc, "--metrics", IDS, "-o", out, "-q"])
    assert to_file.returncode == 0, to_file.stderr
    assert "atexit handler ran" in to_file.stderr
    to_stdout = _program(["track", default_nc, "--metrics", IDS, "-o", "-", "-q"])
    assert to_stdout.returncode == 0 and "atexit handler ran" in to_stdout.stderr
    assert to_stdout.stdout == out.read_text() and out.with_suffix(".provenance.json").is_file()
    # a thread still running: the normal exit waits for it
    waited = _program(["track", default_nc, "--metrics", IDS, "-o", tmp_path / "t.csv", "-q"], thread=True)
    assert waited.returncode == 0 and "thread ended" in waited.stderr and "atexit handler ran" in waited.stderr
    # an error keeps its one line and status
    bad = _program(["track", tmp_path / "missing.nc", "-o", tmp_path / "x.csv"])
    assert bad.returncode != 0 and bad.stderr.startswith("circtrack: error:") and "atexit handler ran" in bad.stderr


def test_a_caller_in_the_same_process_is_not_ended(tmp_path, default_nc, monkeypatch):
    ended = []
    monkeypatch.setattr(CS, "end_without_teardown", ended.append)
    monkeypatch.setitem(CS.OUTPUTS_CLOSED, "done", False)
    r = CliRunner().invoke(main, ["track", str(default_nc), "--metrics", IDS, "-o", str(tmp_path / "o.csv"), "-q"])
    assert r.exit_code == 0, r.output
    assert ended == [] and CS.OUTPUTS_CLOSED["done"]       # args given: not the program itself


def test_end_without_teardown_returns_while_another_thread_runs(monkeypatch):
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        exits = []
        monkeypatch.setattr(os, "_exit", exits.append)
        CS.end_without_teardown(0)
        assert exits == []
    finally:
        stop.set()
        t.join()
