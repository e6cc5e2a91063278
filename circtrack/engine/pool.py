"""Where tasks run: forked worker processes (default), threads, this process, or a dask cluster.

In: the config (``run.scheduler``, ``run.processes``), a task function and a list of jobs. Out:
the task results in the order of the jobs. The only module that knows worker pools; the reduce
tasks themselves are in reduce.py, the cluster set-up (``--workers``/``--scheduler``) in
circtrack/cluster.py.
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
from concurrent.futures import ProcessPoolExecutor

import dask

from circtrack.engine.reduce import close_cached
from circtrack.errors import UsageError


class Runner:
    """Runs a list of reduce tasks as dask.delayed calls on the chosen scheduler.

    * a dask.distributed client is active (``--workers``/``--scheduler``): its cluster;
    * ``run.scheduler = "processes"`` (default): a pool of forked worker processes, started once
      per run (HDF5 decompresses one call at a time per process, so threads cannot share it);
    * ``"threads"`` or ``"sync"``: dask's threaded or single-threaded scheduler in this process.
    With a single task, or a single core, everything runs in this process.
    """

    def __init__(self, cfg, n_tasks):
        self.mode = str(cfg["run"].get("scheduler", "processes"))
        if self.mode not in ("processes", "threads", "sync"):
            raise UsageError(f"run.scheduler = '{self.mode}' in the config: use processes, threads or sync")
        self.nproc = int(cfg["run"].get("processes") or 0) or (os.cpu_count() or 1)
        self.client = _active_client()
        self.pool = None
        if self.client is None and (n_tasks < 2 or self.nproc < 2) and self.mode == "processes":
            self.mode = "sync"

    def run(self, fn, jobs):
        if not jobs:
            return []
        tasks = [dask.delayed(fn, pure=False, traverse=False)(j) for j in jobs]
        if self.client is not None:
            return list(dask.compute(*tasks))
        if self.mode == "processes":
            if self.pool is None:
                close_cached()   # the children must not inherit open HDF5 handles
                self.pool = ProcessPoolExecutor(max_workers=self.nproc, initializer=_worker_ignores_interrupts,
                                                mp_context=multiprocessing.get_context("fork"))
            # chunksize=1: dask would otherwise hand up to 6 tasks to one worker as a single batch
            return list(dask.compute(*tasks, scheduler="processes", pool=self.pool, chunksize=1))
        return list(dask.compute(*tasks, scheduler=self.mode))

    def close(self, interrupted=False):
        """Shut the pool down; after Ctrl-C or an error the workers are stopped at once."""
        if self.pool is None:
            return
        if interrupted:
            procs = list((getattr(self.pool, "_processes", None) or {}).values())
            for proc in procs:
                proc.terminate()
            for proc in procs:       # gone before we return: they share our open files (e.g. update's lock)
                proc.join(timeout=10)
            self.pool.shutdown(wait=False, cancel_futures=True)
        else:
            self.pool.shutdown(wait=True, cancel_futures=True)
        self.pool = None


def _worker_ignores_interrupts():
    # Ctrl-C reaches the whole process group: the parent stops the workers itself, so workers
    # ignore SIGINT instead of dying half-way with tracebacks of their own
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _active_client():
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client
        return default_client()
    except (ValueError, ImportError):
        return None

