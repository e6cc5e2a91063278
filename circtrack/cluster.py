"""Where dask runs: threads in this process (default), a local cluster, or a running scheduler."""

from __future__ import annotations

import contextlib
import os

from circtrack.errors import UsageError


@contextlib.contextmanager
def scheduler_context(workers=None, address=None, cfg=None):
    """Context in which ``dask.compute`` uses the chosen scheduler; the cluster lives inside it."""
    # read-only runs on shared file systems: HDF5 file locking only gets in the way
    os.environ.setdefault("HDF5_USE_FILE_LOCKING", "FALSE")
    if not workers and not address:
        yield None
        return
    from distributed import Client, LocalCluster

    if address:
        try:
            client = Client(address, timeout="20s")
        except OSError as e:
            raise UsageError(f"--scheduler {address}: cannot connect ({e}); check the address printed by the scheduler")
        with client:
            yield client
        return
    spill = os.environ.get("TMPDIR", "/tmp")
    with LocalCluster(n_workers=int(workers), threads_per_worker=1, processes=True,
                      dashboard_address=None, local_directory=spill, silence_logs=40) as cluster:
        with Client(cluster) as client:
            yield client
