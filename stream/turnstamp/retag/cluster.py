"""The Dask cluster a re-tagging run uses.

Embedded by default: a ``LocalCluster`` of worker processes on this machine (one
thread each: the tagging step is single-threaded numpy), listening on loopback
only, with Dask's dashboard when its optional ``bokeh`` is installed. With a
scheduler address, the existing cluster is used as it is: nothing is started,
resized or stopped.
"""

from __future__ import annotations

import importlib.util
import logging
import os
from collections.abc import Iterator
from contextlib import contextmanager

from ..errors import InputError

__all__ = ["cluster_client", "dashboard_link"]


# Worker processes as the tagging step wants them: one BLAS/OpenMP thread (threaded
# BLAS on a busy machine is slow, DEVELOPERS.md), but glibc's own memory trimming
# (Dask's MALLOC_TRIM_THRESHOLD_=65536 made every fragment 35 % slower here: the
# step's large arrays went back to the system and were faulted in again), no
# statistical profiler sampling every thread each 10 ms, and the event loop's
# watchdogs woken every second rather than every 20 ms (each wake takes the
# interpreter lock from the tagging thread). With all three a fragment's task took
# the time it takes in a plain process (1.75x that with Dask's defaults, measured on
# 2e6 events; the machine's load makes single runs vary by up to 1.5x).
_WORKER_CONFIG = {
    "distributed.nanny.pre-spawn-environ": {"OMP_NUM_THREADS": 1, "MKL_NUM_THREADS": 1,
                                            "OPENBLAS_NUM_THREADS": 1},
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
}


def _local(workers: int | None, dashboard: bool):
    import dask
    from distributed import LocalCluster

    count = workers if workers is not None else (os.cpu_count() or 1)
    with dask.config.set(_WORKER_CONFIG):  # read as the worker processes are made
        return LocalCluster(n_workers=count, threads_per_worker=1, processes=True,
                            host="127.0.0.1", dashboard_address=":0",  # any free port
                            scheduler_kwargs={"dashboard": dashboard},
                            silence_logs=logging.ERROR)


@contextmanager
def cluster_client(scheduler: str | None = None, workers: int | None = None, *,
                   dashboard: bool = True) -> Iterator:
    """A ``distributed.Client`` for the run, closed (with its embedded cluster) after.

    Parameters
    ----------
    scheduler : str, optional
        Address of an existing scheduler (``tcp://host:8786``); None starts a local
        cluster.
    workers : int, optional
        Worker processes of the local cluster (default: one per CPU); refused with
        ``scheduler``, whose cluster is used unchanged.
    dashboard : bool
        Serve the local cluster's dashboard (on a free port) when possible.

    Raises
    ------
    InputError
        ``workers`` below 1 or given with ``scheduler``; a scheduler that cannot be
        reached.
    """
    from distributed import Client

    logging.getLogger("distributed").setLevel(logging.ERROR)  # its progress lines are ours
    if workers is not None and workers < 1:
        raise InputError("--workers", workers, "must be at least 1")
    if scheduler is not None:
        if workers is not None:
            raise InputError("--workers", workers, "applies to the local cluster only; the "
                             "cluster at --scheduler is used as it is")
        try:
            client = Client(scheduler, timeout="10s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError("--scheduler", scheduler, f"cannot connect: {exc}") from None
        with client:
            yield client
        return
    with _local(workers, dashboard) as cluster, Client(cluster) as client:
        yield client


def dashboard_link(client) -> str | None:
    """The dashboard's address, when the scheduler serves one (Dask draws it with the
    optional ``bokeh``; without it there is nothing to see)."""
    if importlib.util.find_spec("bokeh") is None:
        return None
    try:
        info = client.scheduler_info()
        if "dashboard" not in info.get("services", {}):
            return None
        return client.dashboard_link
    except (OSError, KeyError, AttributeError):
        return None
