"""Running per-chunk work in parallel with dask, the same way in every stage.

A stage splits its shots (or trajectory frames) into contiguous ranges and calls
:func:`map_ranges`; the scheduler is chosen by the config's ``compute`` section:
``threads`` (default), ``processes``, ``synchronous`` (debugging) or the address
of a running dask.distributed scheduler (``tcp://host:port``) for a cluster.
"""

from __future__ import annotations

import logging
from contextlib import nullcontext

import dask
import numpy as np

log = logging.getLogger(__name__)


def chunk_ranges(n: int, chunk: int):
    """Contiguous [start, stop) ranges of at most ``chunk`` items covering range(n)."""
    if chunk <= 0:
        raise ValueError("chunk must be positive")
    starts = np.arange(0, n, chunk)
    return [(int(s), int(min(s + chunk, n))) for s in starts]


def map_ranges(fn, ranges, workers: int = 1, scheduler: str = "threads", progress: bool = True,
               label: str = "chunks"):
    """Call ``fn(start, stop)`` for every range in parallel; return results in order.

    Parameters
    ----------
    fn : callable
        Function of (start, stop) returning any value (small: per-chunk sums,
        or None when it writes its own output).
    ranges : list of (int, int)
        From :func:`chunk_ranges`.
    workers : int
        Number of threads or processes.
    scheduler : str
        ``threads``, ``processes``, ``synchronous``, or a dask.distributed
        scheduler address.
    progress : bool
        Show dask's progress bar on stderr.
    label : str
        Name used in the log line.
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
    if scheduler.startswith("tcp://") or scheduler.startswith("tls://"):
        from dask.distributed import Client

        with Client(scheduler) as client:
            futures = client.compute(tasks)
            return _unwrap(client.gather(futures))
    if scheduler not in ("threads", "processes", "synchronous"):
        raise ValueError(f"unknown scheduler {scheduler!r}")
    if progress:
        from dask.diagnostics import ProgressBar

        bar = ProgressBar(minimum=2.0)
    else:
        bar = nullcontext()
    with bar:
        return _unwrap(dask.compute(*tasks, scheduler=scheduler, num_workers=max(1, int(workers))))


def _unwrap(results):
    """Values of the guarded tasks, or the first failure raised once every task has ended."""
    for ok, value in results:
        if not ok:
            raise value
    return [value for _, value in results]
