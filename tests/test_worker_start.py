"""Worker processes of a run: the parent keeps freed memory for reuse too."""

from __future__ import annotations

from circtrack import config as C
from circtrack.engine import pool as PL


def _cfg(**run):
    cfg = C.load(None)
    cfg["run"].update(run)
    return cfg


def test_the_parent_keeps_freed_memory_with_worker_processes(monkeypatch):
    calls = []
    monkeypatch.setattr(PL, "keep_freed_memory", lambda: calls.append(1))
    runner = PL.Runner(_cfg(processes=2), 4)
    assert runner.streams and calls == [1]      # it unpickles the results and runs the families
