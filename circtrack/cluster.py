"""Where the reading tasks run when a dask.distributed cluster is asked for.

Without ``--workers``/``--scheduler`` the engine runs its own pool of forked worker processes
(see engine/pool.py). With them, a dask.distributed client is made inside the command and the
engine's tasks go to its workers:

* ``--workers N`` and ``[cluster] kind = "local"`` (default): a LocalCluster of N single-threaded
  worker processes on this machine;
* ``--workers N`` and ``kind = "slurm"`` or ``"pbs"``: a dask-jobqueue cluster started from the
  login node, N worker processes in batch jobs of ``[cluster] processes_per_job`` each;
* ``--scheduler ADDRESS``: a scheduler someone already runs.

Spill files go to ``[cluster] spill_dir``, by default ``$TMPDIR`` (node-local on most HPC
systems; in batch jobs expanded on each compute node), else the system temporary directory. HDF5 file locking is switched off for these
read-only runs (it fails or stalls on many shared file systems).
"""

from __future__ import annotations

import contextlib
import math
import os
import shutil
import tempfile

from circtrack.errors import InputError, UsageError

KINDS = ("local", "slurm", "pbs")


def spill_directory(cfg=None):
    """``[cluster] spill_dir``, else ``$TMPDIR``, else the system temporary directory."""
    given = str(((cfg or {}).get("cluster") or {}).get("spill_dir") or "")
    path = os.path.expandvars(os.path.expanduser(given)) if given else os.environ.get("TMPDIR") or tempfile.gettempdir()
    return path


def _worker_environment():
    # read-only runs: no HDF5 file locks; glibc trimming freed memory after every task costs system
    # time (dask's default threshold is 64 KiB), so let the allocator keep up to 64 MiB
    return {"HDF5_USE_FILE_LOCKING": "FALSE", "MALLOC_TRIM_THRESHOLD_": str(64 * 2 ** 20)}


def jobqueue_cluster(kind, workers, cfg, *, scale=True):
    """A dask-jobqueue SLURM or PBS cluster built from ``[cluster]`` of the config."""
    try:
        import dask_jobqueue
    except ImportError:
        raise UsageError(f"[cluster] kind = '{kind}' needs dask-jobqueue on the login node: "
                         "pip install 'circtrack[cluster]'")
    c = dict((cfg or {}).get("cluster") or {})
    submit = "sbatch" if kind == "slurm" else "qsub"
    if scale and shutil.which(submit) is None:
        raise UsageError(f"[cluster] kind = '{kind}' needs the batch command '{submit}', which is not on PATH here; "
                         "run circtrack on the cluster's login node (or use --workers without a cluster config)")
    per_job = max(1, int(c.get("processes_per_job", 1)))
    cores = max(per_job, int(c.get("cores_per_job", per_job)))
    env = _worker_environment()
    kwargs = dict(
        cores=cores, processes=per_job, memory=str(c.get("memory_per_job", "8GB")),
        # left unexpanded ("$TMPDIR") so each batch job's shell expands it on its own node
        walltime=str(c.get("walltime", "01:00:00")), local_directory=str(c.get("spill_dir") or "$TMPDIR"),
        job_script_prologue=[f"export {k}={v}" for k, v in env.items()] + list(c.get("job_prologue", [])),
        job_extra_directives=list(c.get("job_directives", [])), log_directory=c.get("log_dir") or None,
        python=c.get("python") or None,
    )
    if c.get("queue"):
        kwargs["queue"] = str(c["queue"])
    if c.get("account"):
        kwargs["account"] = str(c["account"])
    cls = dask_jobqueue.SLURMCluster if kind == "slurm" else dask_jobqueue.PBSCluster
    cluster = cls(**{k: v for k, v in kwargs.items() if v is not None})
    if scale:
        cluster.scale(jobs=math.ceil(int(workers) / per_job))
    return cluster


def probe_scheduler(address, timeout):
    """Connect to ``address`` and ask for the scheduler's identity, all within ``timeout`` seconds.

    distributed's own client waits for ever on a listener that accepts the connection but never
    answers (any TCP server that is not a dask scheduler), and reads garbage from other servers as
    message sizes; this probe runs first, so those cases are one line (InputError, exit 1).
    """
    import asyncio

    from distributed.comm import connect

    async def ask():
        comm = await asyncio.wait_for(connect(address, timeout=timeout), timeout)
        try:
            await asyncio.wait_for(comm.write({"op": "identity"}), timeout)
            return await asyncio.wait_for(comm.read(), timeout)
        finally:
            comm.abort()

    fix = "check that the scheduler is running and give the address it printed, e.g. tcp://10.0.0.5:8786"
    try:
        answer = asyncio.run(asyncio.wait_for(ask(), 2 * timeout))
    except (TimeoutError, asyncio.TimeoutError):
        raise InputError(f"--scheduler {address}: no answer from a dask scheduler within {timeout:g} s "
                         f"(cluster.connect_timeout_s); {fix}")
    except Exception as e:                     # refused, reset, or a server speaking another protocol
        why = " ".join(str(e).split()) or type(e).__name__
        raise InputError(f"--scheduler {address}: not a dask scheduler or cannot connect ({why[:120]}); {fix}")
    if not isinstance(answer, dict) or answer.get("type") != "Scheduler":
        raise InputError(f"--scheduler {address}: the server there is not a dask scheduler; {fix}")


@contextlib.contextmanager
def scheduler_context(workers=None, address=None, cfg=None):
    """Context in which ``dask.compute`` uses the chosen cluster; the cluster lives inside it."""
    os.environ.setdefault("HDF5_USE_FILE_LOCKING", "FALSE")
    if not workers and not address:
        yield None
        return
    import dask
    from distributed import Client, LocalCluster

    if address:
        from distributed.comm.addressing import parse_address, parse_host_port

        try:                     # check the form first: a failed Client can linger as the default client
            parse_host_port(parse_address(address)[1])
        except ValueError as e:
            raise UsageError(f"--scheduler {address}: not a scheduler address ({e}); give the address the "
                             "scheduler printed, e.g. tcp://10.0.0.5:8786")
        timeout = float(((cfg or {}).get("cluster") or {}).get("connect_timeout_s", 30.0))
        probe_scheduler(address, timeout)
        try:
            client = Client(address, timeout=f"{timeout}s")
        except (OSError, ValueError, TimeoutError) as e:
            raise InputError(f"--scheduler {address}: cannot connect ({e}); give the address the scheduler printed, "
                             "e.g. tcp://10.0.0.5:8786")
        with client:
            yield client
        return
    kind = str(((cfg or {}).get("cluster") or {}).get("kind", "local"))
    if kind not in KINDS:
        raise UsageError(f"[cluster] kind = '{kind}' in the config: use one of {', '.join(KINDS)}")
    if kind != "local":
        with jobqueue_cluster(kind, workers, cfg) as cluster, Client(cluster) as client:
            client.wait_for_workers(1, timeout=float(((cfg or {}).get("cluster") or {}).get("start_timeout_s", 600)))
            yield client
        return
    with dask.config.set({"distributed.nanny.pre-spawn-environ": _worker_environment()}):
        with LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                          dashboard_address=None, local_directory=spill_directory(cfg), silence_logs=40) as cluster:
            with Client(cluster) as client:
                yield client
