"""Running per-chunk work in parallel with dask, the same way in every stage.

A stage splits its shots (or trajectory frames) into contiguous ranges and calls
:func:`map_ranges`; the scheduler is chosen by the config's ``compute`` section:

- ``threads`` (default), ``processes``, ``synchronous`` (debugging): dask's local schedulers;
- ``local-cluster``: a dask.distributed ``LocalCluster`` of ``compute.workers`` worker
  processes (one thread each, ``compute.memory_per_worker`` each), started on first use
  and shared by every stage that runs in the same process, closed by
  :func:`close_local_clusters` (``movieproc run`` calls it when the workflow ends; a
  Snakemake job process closes it when it exits). One cluster per process rather than
  per stage call: Snakemake's local executor runs several stages at once in one process,
  and starting worker processes (and compiling their numba kernels) for every stage would
  cost more than most stages take;
- ``tcp://host:port`` or ``tls://...``: a running dask.distributed scheduler, used as given;
  one that does not answer within ``compute.connect_timeout_s`` is refused with the
  address and the timeout named.

Workers of a distributed scheduler may run in another working directory (or on another
machine): everything a stage sends them names files by absolute path (the workflow's
``stage()`` gives stages absolute paths). A worker that dies while a stage runs (killed,
out of memory) is replaced and its chunks are computed again on another worker: chunks
write disjoint parts of a store or return values, so a re-computed chunk gives the same
result. A chunk whose workers die more often than ``distributed.scheduler.allowed-failures``
(dask's setting, 3 by default) fails the stage with that reason named; nothing of the stage is
kept (its output is written atomically), and running again completes it.
"""

from __future__ import annotations

import atexit
import contextvars
import logging
import threading
from contextlib import contextmanager

import dask
import numpy as np

from . import progress as _progress
from .errors import WorkflowFailed

log = logging.getLogger(__name__)

#: dask's local schedulers, by their names in ``compute.scheduler``.
LOCAL_SCHEDULERS = ("threads", "processes", "synchronous")
#: ``compute.scheduler`` value that starts a dask.distributed LocalCluster for the run.
LOCAL_CLUSTER = "local-cluster"
#: Seconds to wait for a distributed scheduler to answer (the schema's default of compute.connect_timeout_s).
DEFAULT_CONNECT_TIMEOUT_S = 10.0
#: Memory limit per LocalCluster worker (the schema's default of compute.memory_per_worker): dask's
#: "auto" shares the machine's memory equally among the workers.
DEFAULT_MEMORY_PER_WORKER = "auto"

_SETTINGS: contextvars.ContextVar[dict | None] = contextvars.ContextVar("movieproc_compute", default=None)
_CLUSTERS: dict = {}
_CLUSTERS_LOCK = threading.Lock()


def chunk_ranges(n: int, chunk: int):
    """Contiguous [start, stop) ranges of at most ``chunk`` items covering range(n)."""
    if chunk <= 0:
        raise ValueError("chunk must be positive")
    starts = np.arange(0, n, chunk)
    return [(int(s), min(int(s) + chunk, n)) for s in starts]


@contextmanager
def compute_settings(compute: dict):
    """Use the distributed options of a config's ``compute`` section in :func:`map_ranges` calls
    made inside this block (in this thread or task), e.g. around a stage.

    Parameters
    ----------
    compute : dict
        The ``compute`` section: ``connect_timeout_s`` (s) and ``memory_per_worker``
        (e.g. ``"4GB"`` or ``"auto"``) are read, and ``progress`` (show progress bars in the
        block, :mod:`movieproc.progress`); other keys are ignored.
    """
    token = _SETTINGS.set({key: compute[key] for key in ("connect_timeout_s", "memory_per_worker")
                           if compute.get(key) is not None})
    try:
        with _progress.enabled_in(compute.get("progress", True) is not False):
            yield
    finally:
        _SETTINGS.reset(token)


def map_ranges(fn, ranges, workers: int = 1, scheduler: str = "threads", progress=True,
               label: str = "chunks"):
    """Call ``fn(start, stop)`` for every range in parallel; return results in order.

    Parameters
    ----------
    fn : callable
        Function of (start, stop) returning any value (small: per-chunk sums,
        or None when it writes its own output). With a distributed scheduler it is
        pickled and sent to the workers: files it names must be absolute paths.
    ranges : list of (int, int)
        From :func:`chunk_ranges`.
    workers : int
        Number of threads or processes (of a LocalCluster: worker processes).
    scheduler : str
        ``threads``, ``processes``, ``synchronous``, ``local-cluster`` or a
        dask.distributed scheduler address (``tcp://host:port``, ``tls://...``).
    progress : bool or tqdm
        Show a bar of the chunks on stderr (:mod:`movieproc.progress`; not in quiet mode), or
        advance this bar (made with :func:`movieproc.progress.bar`) by one per chunk: one bar
        over several calls.
    label : str
        Name used in the log line and the bar.

    Raises
    ------
    ValueError
        ``scheduler ...`` for an unknown scheduler, or an address that does not
        answer within the connect timeout (:func:`compute_settings`).
    WorkflowFailed
        A chunk lost with its workers more often than dask retries it.
    """
    def guarded(a, b):
        # Capture a failure instead of raising inside dask: dask's local schedulers
        # return on the first exception while other chunks still run, and their late
        # writes could land after the caller has cleaned up. Raise after all finished.
        try:
            return True, fn(a, b)
        except BaseException as exc:  # noqa: BLE001 - re-raised below, unchanged
            return False, exc

    tasks = [dask.delayed(guarded)(a, b) for a, b in ranges]
    log.info("%s: %d tasks on %s with %d worker(s)", label, len(tasks), scheduler, workers)
    target = progress if isinstance(progress, _progress.Bar) else None
    show = target is None and bool(progress)
    if scheduler == LOCAL_CLUSTER or is_address(scheduler):
        return _unwrap(_distributed(tasks, scheduler, max(1, int(workers)), label, show, target))
    if scheduler not in LOCAL_SCHEDULERS:
        raise ValueError(f"scheduler must be one of {', '.join(LOCAL_SCHEDULERS)}, {LOCAL_CLUSTER} or a "
                         f"tcp:// or tls:// address, got {scheduler!r}")
    callbacks = _progress.DaskProgress(label, "chunks", target).callbacks if show or target is not None else []
    return _unwrap(dask.compute(*tasks, scheduler=scheduler, num_workers=max(1, int(workers)), callbacks=callbacks))


def is_address(scheduler: str) -> bool:
    """Whether ``scheduler`` is the address of a dask.distributed scheduler."""
    return scheduler.startswith(("tcp://", "tls://"))


def _distributed(tasks, scheduler: str, workers: int, label: str, show: bool = False, target=None) -> list:
    """Compute ``tasks`` on a distributed scheduler (an address, or this process's LocalCluster); a bar
    of the chunks done when ``show``, or ``target`` advanced (see :func:`map_ranges`)."""
    from distributed import Client
    from distributed.scheduler import KilledWorker

    settings = _SETTINGS.get() or {}
    timeout = float(settings.get("connect_timeout_s", DEFAULT_CONNECT_TIMEOUT_S))
    address = local_cluster(workers, settings.get("memory_per_worker", DEFAULT_MEMORY_PER_WORKER)).scheduler_address \
        if scheduler == LOCAL_CLUSTER else scheduler
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise ValueError(f"scheduler {address} did not answer within the connect timeout of {timeout:g} s "
                         f"({type(exc).__name__}: {exc}); start a dask scheduler there, check the address and "
                         "that this machine can reach it, or raise the timeout") from None
    with client:
        try:
            futures = client.compute(tasks)
            if show or target is not None:
                _progress.track_futures(futures, label, "chunks", target)
            return client.gather(futures)
        except KilledWorker as exc:
            raise WorkflowFailed(f"{label}: a chunk was lost with the dask worker(s) running it on {address} "
                                 f"({exc}); nothing of this stage was kept: run again to complete it") from exc


def local_cluster(workers: int, memory_per_worker: str = DEFAULT_MEMORY_PER_WORKER):
    """This process's dask.distributed LocalCluster of ``workers`` worker processes (one thread each),
    started on first use and reused while it lives (see :func:`close_local_clusters`).

    Parameters
    ----------
    workers : int
        Worker processes.
    memory_per_worker : str
        Memory limit of each worker (``"4GB"``, ``"auto"``); dask pauses, then restarts, a
        worker over it.
    """
    from distributed import LocalCluster

    key = (int(workers), str(memory_per_worker))
    with _CLUSTERS_LOCK:
        cluster = _CLUSTERS.get(key)
        if cluster is None or cluster.status.name in ("closing", "closed", "failed"):
            log.info("starting a dask LocalCluster of %d worker process(es), memory limit %s each", *key)
            cluster = LocalCluster(n_workers=key[0], threads_per_worker=1, processes=True,
                                   memory_limit=key[1], dashboard_address=None)
            _CLUSTERS[key] = cluster
        return cluster


def close_local_clusters() -> int:
    """Close the LocalClusters this process started (their worker processes end); returns how many."""
    with _CLUSTERS_LOCK:
        clusters = list(_CLUSTERS.values())
        _CLUSTERS.clear()
    for cluster in clusters:
        try:
            cluster.close()
        except Exception as exc:  # closing at exit: report, never raise
            log.warning("closing a dask LocalCluster: %s", exc)
    return len(clusters)


atexit.register(close_local_clusters)


def _unwrap(results):
    """Values of the guarded tasks, or the first failure raised once every task has ended."""
    for ok, value in results:
        if not ok:
            raise value
    return [value for _, value in results]
