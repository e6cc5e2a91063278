"""Where a run's time goes: wall time per stage and CPU time per task part and per family.

``circtrack track --profile`` turns it on (:func:`enable`) and prints :func:`table` to stderr at
the end. The stages of the parent process (locate, choose metrics, open and detect, plan, wait for
reduced batches, families, write) are wall times; the parts of the reduce tasks (read, zonal means,
each reducer) run in the worker processes, are summed over all tasks and come back inside the
task results (``result["timing"]``), so with two workers they can add up to twice the wall time:
their CPU time (of the thread running the task), and the wall time beyond it (reading from disk
rather than the page cache, or a core busy with another process).
Off by default: then nothing is timed and nothing is printed.
"""

from __future__ import annotations

import collections
import contextlib
import time

STAGES = "stages (wall time in this process)"
_ON = [False]
_TOTALS = collections.OrderedDict()     # (section, name) -> [seconds, count]


def enable(on=True):
    _ON[0] = bool(on)
    _TOTALS.clear()


def enabled():
    return _ON[0]


def add(section, name, seconds, count=1):
    if not _ON[0]:
        return
    entry = _TOTALS.setdefault((section, name), [0.0, 0])
    entry[0] += seconds
    entry[1] += count


@contextlib.contextmanager
def timed(section, name):
    """Add the wall time of the ``with`` block to ``(section, name)`` (nothing when off)."""
    if not _ON[0]:
        yield
        return
    t0 = time.perf_counter()
    try:
        yield
    finally:
        add(section, name, time.perf_counter() - t0)


TASK_CPU = "reduce tasks (CPU time in workers, summed)"
TASK_WAIT = "reduce tasks (wall time beyond CPU: waiting for the disk or for a core)"


def add_task_timing(timing):
    """Sum the per-part seconds a reduce task measured (``{part: (wall, cpu)}``)."""
    for name, (wall, cpu) in (timing or {}).items():
        add(TASK_CPU, name, cpu)
        add(TASK_WAIT, name, max(wall - cpu, 0.0))


def table():
    """The totals as a plain-text table (section, part, seconds, calls, share of the section)."""
    sections = collections.OrderedDict()
    for (sec, name), (s, n) in _TOTALS.items():
        sections.setdefault(sec, []).append((name, s, n))
    lines = ["circtrack profile (seconds)"]
    for sec, rows in sections.items():
        total = sum(s for _, s, _ in rows)
        lines.append(f"  {sec}: {total:.2f} s")
        for name, s, n in sorted(rows, key=lambda r: -r[1]):
            share = 100.0 * s / total if total > 0 else 0.0
            lines.append(f"    {name:<34} {s:9.3f} s  {n:6d} x  {share:5.1f} %")
    return "\n".join(lines)
