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
import threading
from concurrent.futures import ProcessPoolExecutor

from circtrack.engine.reduce import close_cached
from circtrack.errors import UsageError


class Runner:
    """Runs a list of reduce tasks on the chosen scheduler.

    * a dask.distributed client is active (``--workers``/``--scheduler``): its cluster (dask.delayed calls);
    * ``run.scheduler = "processes"`` (default): a pool of forked worker processes, started once
      per run (HDF5 decompresses one call at a time per process, so threads cannot share it); the
      jobs go to it directly (dask is not imported);
    * ``"threads"``: dask's threaded scheduler in this process; ``"sync"``: one after the other here.
    With a single task, or a single core, everything runs in this process.
    """

    def __init__(self, cfg, n_tasks):
        self.mode = str(cfg["run"].get("scheduler", "processes"))
        if self.mode not in ("processes", "threads", "sync"):
            raise UsageError(f"run.scheduler = '{self.mode}' in the config: use processes, threads or sync")
        cores = os.cpu_count() or 1
        # more processes than cores only cost memory (run.processes = 100000 once forked 5,300 workers)
        self.nproc = min(int(cfg["run"].get("processes") or 0) or cores, cores)
        self.client = _active_client()
        self.pool = None
        self.early = False        # the pool was forked by start_early (release() gives it back)
        if self.client is None and (n_tasks < 2 or self.nproc < 2) and self.mode == "processes":
            self.mode = "sync"
        # this process too: it runs the tasks (sync, threads) or unpickles their results and runs the
        # families on them, batch after batch of the same sizes (without it, with worker processes, the
        # parent took as many page faults as a whole run in one process: +0.2 s CPU on 12 months)
        keep_freed_memory()

    def run(self, fn, jobs):
        if not jobs:
            return []
        if self.mode == "sync" and self.client is None:
            return [fn(j) for j in jobs]
        if self.streams:
            # straight to the pool, one job per call, results in the order of the jobs: dask's
            # process scheduler did the same but imported dask.distributed (0.4 s) to look for a client
            return self.submit(fn, jobs).results()
        import dask
        import dask.threaded

        tasks = [dask.delayed(fn, pure=False, traverse=False)(j) for j in jobs]
        if self.client is not None:
            return list(dask.compute(*tasks))
        return list(dask.compute(*tasks, scheduler=dask.threaded.get))    # a callable: no client lookup

    @property
    def streams(self):
        """True when tasks sent with :meth:`submit` run in the background at once (worker processes):
        the caller may send the next tasks before collecting these."""
        return self.client is None and self.mode == "processes"

    def submit(self, fn, jobs):
        """Send ``fn(job)`` for every job; returns a :class:`Sent` whose ``results()`` waits for them.

        With worker processes the tasks start at once, so a caller can keep the workers busy with
        the next tasks while it works on earlier results (no pause between batches); elsewhere the
        tasks run when ``results()`` is called, as :meth:`run` does."""
        if not self.streams or not jobs:
            return Sent(lambda: self.run(fn, jobs))
        if self.pool is None:
            self.pool = _take_early(self.nproc)       # forked while this process planned (start_early)
            self.early = self.pool is not None
        if self.pool is None:
            close_cached()       # the children must not inherit open HDF5 handles
            self.pool = _start_pool(self.nproc)
        import cloudpickle        # as dask sends tasks: closures and partials of reducers travel too

        futures = [self.pool.submit(_call_pickled, cloudpickle.dumps((fn, j), protocol=5)) for j in jobs]
        return Sent(lambda: [f.result() for f in futures])

    def close(self, interrupted=False):
        """Shut the pool down; after Ctrl-C or an error the workers are stopped at once."""
        if self.pool is None:
            return
        _shutdown(self.pool, interrupted)
        self.pool = None

    def release(self):
        """Done with the pool; a pool forked early (start_early) goes back to wait for the next
        :class:`Runner` of this process that wants as many workers (e.g. the workers that read the
        headers of many files then run the tasks: one fork per run). Any other pool shuts down."""
        if self.pool is not None and self.early and _keep_early(self.nproc, self.pool):
            self.pool = None
        self.close()


def _shutdown(pool, interrupted):
    if interrupted:
        procs = list((getattr(pool, "_processes", None) or {}).values())
        for proc in procs:
            proc.terminate()
        for proc in procs:       # gone before we return: they share our open files (e.g. update's lock)
            proc.join(timeout=10)
        pool.shutdown(wait=False, cancel_futures=True)
    else:
        pool.shutdown(wait=True, cancel_futures=True)


# --------------------------------------------------------------------------- workers forked early
# Planning a run (opening and detecting every input) takes a few tenths of a second in this process
# while the second core is idle; a worker forked when the first tasks are sent then spent the first
# tenths of its first task importing what the tasks need (h5py, threadpoolctl) and setting BLAS up.
# start_early() forks the pool before the planning instead, and each worker warms up (warm_up in
# reduce.py) while this process plans: the first tasks start on ready workers. The next Runner
# wanting as many workers takes the pool (Runner.submit); close_early() stops one nobody took.
EARLY_MIN_BYTES = 64 * 2 ** 20     # a single input smaller than this may well be one task: no pool early
_EARLY = {}                        # process id -> (nproc, ProcessPoolExecutor) forked early, not yet taken


def start_early(cfg, files):
    """Fork the worker pool of a run over ``files`` now (see above), when the run will use worker
    processes and most likely has two tasks or more (two files or more, or a large one). Local files
    only: with objects in object storage the pool forks after planning, as before (remote.py sets the
    forked child's event loop and sessions up from what the parent opened)."""
    if os.getpid() in _EARLY or not files or not all(isinstance(f, str) and os.path.isfile(f) for f in files):
        return
    if len(files) < 2 and _local_size(files[0]) < EARLY_MIN_BYTES:
        return
    runner = Runner(cfg, 2)
    if not runner.streams or runner.nproc < 2:
        return
    close_cached()                 # the children must not inherit open HDF5 handles
    _EARLY[os.getpid()] = (runner.nproc, _start_pool(runner.nproc, warm=_looks_hdf5(files[0])))


def close_early():
    """Stop the workers forked early if no Runner took them (e.g. the run failed while planning,
    or it has a single task and runs it here)."""
    entry = _EARLY.pop(os.getpid(), None)
    if entry is not None:
        _shutdown(entry[1], interrupted=True)      # idle or still warming up: nothing to wait for


def _take_early(nproc):
    entry = _EARLY.get(os.getpid())
    if entry is None or entry[0] != nproc:
        return None
    del _EARLY[os.getpid()]
    return entry[1]


def _keep_early(nproc, pool):
    if os.getpid() in _EARLY:
        return False
    _EARLY[os.getpid()] = (nproc, pool)
    return True


def _local_size(path):
    try:
        return os.path.getsize(path)
    except (OSError, TypeError, ValueError):
        return 0


def _looks_hdf5(path):
    """True for a local netCDF-4/HDF5 file (the workers then import h5py and netCDF4 ahead)."""
    from circtrack.inputs.opening import HDF5_SIGNATURE

    try:
        with open(path, "rb") as f:
            return f.read(8) == HDF5_SIGNATURE
    except (OSError, TypeError, ValueError):
        return False


class Sent:
    """Tasks sent by :meth:`Runner.submit`; ``results()`` waits for them (once) and returns them in order."""

    def __init__(self, wait):
        self._wait, self._results = wait, None

    def results(self):
        if self._results is None:
            self._results = self._wait()
            self._wait = None
        return self._results


def _call_pickled(payload):
    import cloudpickle

    fn, job = cloudpickle.loads(payload)
    return fn(job)


# --------------------------------------------------------------------------- workers die with their parent
# A killed parent (SIGKILL, SIGTERM, the OOM killer) must not leave forked workers behind: orphans
# kept reading for minutes, held the caller's stdout pipe open and (before update's lock became a
# per-process lock) the lock. Two independent ways out for each worker:
# * the kernel's parent-death signal (Linux prctl PR_SET_PDEATHSIG = SIGKILL), set in the worker
#   right after the fork. The kernel sends it when the *thread* that forked the worker ends, so it
#   is only used when the pool is started (all workers forked at once) from the main thread;
# * a pipe whose write end only the parent holds: a thread in each worker blocks reading it and
#   ends the worker when it reads end-of-file, i.e. when the parent is gone, however it died.
PR_SET_PDEATHSIG = 1
_LIFELINE = None            # (pid, read fd, write fd) of the process that owns the pipe


def _lifeline():
    global _LIFELINE
    if _LIFELINE is None or _LIFELINE[0] != os.getpid():
        r, w = os.pipe()
        _LIFELINE = (os.getpid(), r, w)
    return _LIFELINE


def _start_pool(nproc, warm=None):
    """A pool of ``nproc`` forked workers, all started now, from this thread, tied to this process.

    ``warm``: the pool is forked ahead of its tasks (start_early); each worker then warms up
    (``True``: netCDF-4/HDF5 inputs, h5py and netCDF4 too) and this call does not wait for it."""
    parent, r, w = _lifeline()
    deathsig = threading.current_thread() is threading.main_thread()
    pool = ProcessPoolExecutor(max_workers=nproc, initializer=_worker_setup,
                               initargs=(parent, r, w, deathsig, warm),
                               mp_context=multiprocessing.get_context("fork"))
    first = pool.submit(int)         # forks every worker now, from this thread (see above)
    _widen_result_pipe(pool)
    if warm is None:
        first.result()
    return pool


RESULT_PIPE_BYTES = 1 << 20


def _widen_result_pipe(pool):
    """Let a worker write a whole task result (about 1 MB for a month of 0.5-degree data) into the
    pipe at once and go on to its next task. In a 64 kB pipe it waited for this process to read the
    result piece by piece, and while the families ran here each piece waited for the GIL (measured:
    0.1-0.2 s of idle workers per run over 12 months). Linux only; elsewhere, or beyond
    /proc/sys/fs/pipe-max-size, the pipe stays as it is."""
    try:
        import fcntl

        fd = pool._result_queue._writer.fileno()
        fcntl.fcntl(fd, getattr(fcntl, "F_SETPIPE_SZ", 1031), RESULT_PIPE_BYTES)
    except (AttributeError, ImportError, OSError, ValueError):
        pass


def _parent_death_signal():
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
    except (OSError, AttributeError):     # not Linux: the pipe alone does the job
        pass


def _watch_parent(fd):
    try:
        while os.read(fd, 1):
            pass
    except OSError:
        pass
    os._exit(1)                            # end of file: the parent is gone


# --------------------------------------------------------------------------- memory reuse in workers
# Every task reads fields of tens of MB. glibc hands allocations that large out as fresh memory maps
# and unmaps them when freed, so each task paid the kernel for page faults on zeroed pages again
# (measured: a fifth of the CPU time of a run went to the kernel). A worker keeps freed memory in its
# heap instead and reuses it for the next task of the same size; its resident size stays at the
# largest task's, which it reaches anyway.
M_TRIM_THRESHOLD, M_MMAP_THRESHOLD = -1, -3
KEEP_FREED_BYTES = 1 << 30


def keep_freed_memory():
    """Ask glibc to reuse freed memory for large arrays rather than returning it to the kernel (no-op
    where the C library is not glibc)."""
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        libc.mallopt(M_MMAP_THRESHOLD, KEEP_FREED_BYTES)
        libc.mallopt(M_TRIM_THRESHOLD, KEEP_FREED_BYTES)
    except (OSError, AttributeError):
        pass


def _worker_setup(parent, r, w, deathsig, warm=None):
    """Runs first in every worker: ignore Ctrl-C, die with the parent (both ways above), and keep
    freed memory for the next task (see keep_freed_memory); a worker forked early (``warm`` not
    None) also warms up for its tasks."""
    keep_freed_memory()
    # Ctrl-C reaches the whole process group: the parent stops the workers itself, so workers
    # ignore SIGINT instead of dying half-way with tracebacks of their own
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        os.close(w)                        # only the parent may hold the write end
    except OSError:
        pass
    if deathsig:
        _parent_death_signal()
    if os.getppid() != parent:             # the parent died before the signal was armed
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(r,), daemon=True, name="circtrack-parent-watch").start()
    if warm is not None:
        from circtrack.engine.reduce import warm_up

        warm_up(hdf5=warm)


def _active_client():
    if "distributed" not in sys.modules:
        return None
    try:
        from distributed import default_client
        return default_client()
    except (ValueError, ImportError):
        return None

