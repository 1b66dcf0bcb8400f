"""Progress of long work, shown the same way everywhere (tqdm on stderr).

- On a terminal (stderr is a TTY): a tqdm bar, redrawn in place, shown only for work
  that runs longer than :data:`DELAY_S`.
- Otherwise (a log file, a batch job's output): one plain line per :data:`STEP_PERCENT` %
  of the work, no carriage returns, e.g.
  ``12:03:07 movieproc progress: integrate 30 % (3/10 chunks, 00:04 elapsed, about 00:09 left)``.

Nothing is shown with ``movieproc --quiet`` (the :data:`QUIET_ENV` environment variable, which
Snakemake jobs started from the command inherit) or ``compute.progress: false`` (set per stage
by :func:`movieproc.parallel.compute_settings`).

Entry points:

- :func:`iterate` wraps an iterable (a loop over replicates, frames, figures);
- :func:`bar` opens a bar to update by hand (``with bar(total, "scatter") as b: ... b.update(k)``);
- :class:`DaskProgress` is a dask callback for dask's local schedulers (threads, processes,
  synchronous): pass it to ``dask.compute(..., callbacks=DaskProgress("label").callbacks)``, or use it
  as a context manager around code that calls ``dask.compute`` itself;
- :func:`track_futures` drives a bar from dask.distributed futures as they complete.
"""

from __future__ import annotations

import os
import sys
import threading
import time
from contextlib import contextmanager
from contextvars import ContextVar
from typing import Iterable, Iterator, TypeVar

from dask.callbacks import Callback
from tqdm import tqdm

__all__ = ["Bar", "QUIET_ENV", "quiet", "set_quiet", "enabled", "enabled_in", "bar", "iterate", "DaskProgress",
           "track_futures"]

#: Environment variable that turns progress (and info logging) off; ``movieproc --quiet`` sets it, so
#: Snakemake jobs run in other processes stay quiet too.
QUIET_ENV = "MOVIEPROC_QUIET"
#: Seconds of work before a bar appears: shorter work would only flicker past.
DELAY_S = 1.0
#: Percent of the work between two plain lines when stderr is not a terminal (about 10 lines a bar).
STEP_PERCENT = 10

T = TypeVar("T")
#: The type of the bars made here (tqdm's, or its plain-line subclass off a terminal).
Bar = tqdm

_ENABLED: ContextVar[bool] = ContextVar("movieproc_progress", default=True)


def quiet() -> bool:
    """Whether ``--quiet`` is in force (the :data:`QUIET_ENV` environment variable is set, not ``0``)."""
    return os.environ.get(QUIET_ENV, "") not in ("", "0")


def set_quiet(flag: bool) -> None:
    """Turn quiet mode on or off for this process and the processes it starts."""
    if flag:
        os.environ[QUIET_ENV] = "1"
    else:
        os.environ.pop(QUIET_ENV, None)


def enabled() -> bool:
    """Whether progress is shown here: not quiet, and not switched off by :func:`enabled_in`."""
    return _ENABLED.get() and not quiet()


@contextmanager
def enabled_in(flag: bool):
    """Show progress (or not) in this block, in this thread or task (e.g. ``compute.progress`` of a stage)."""
    token = _ENABLED.set(bool(flag))
    try:
        yield
    finally:
        _ENABLED.reset(token)


def _is_tty(stream) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # no isatty, or a closed stream
        return False


class _Lines(tqdm):
    """A tqdm bar that writes a plain line per :data:`STEP_PERCENT` % instead of redrawing in place."""

    def __init__(self, *args, **kwargs):
        self._step = 0  # steps of STEP_PERCENT already written
        # every update is looked at (the step test is cheap); nothing is left to erase at the end
        kwargs.update(mininterval=0, miniters=1, leave=False)
        super().__init__(*args, **kwargs)

    def _line(self, text: str) -> None:
        self.fp.write(f"{time.strftime('%H:%M:%S')} movieproc progress: {self.desc or 'work'} {text}\n")
        self.fp.flush()

    def display(self, msg=None, pos=None):
        if msg is not None or not self.total:  # tqdm clears its line with msg='' on close: nothing to clear
            return False
        step = min(100, int(100 * self.n // self.total)) // STEP_PERCENT
        if step > self._step:
            self._step = step
            elapsed = self.format_interval(self._time() - self.start_t)
            rate = self.n / max(self._time() - self.start_t, 1e-9)
            left = "" if self.n >= self.total else \
                f", about {self.format_interval((self.total - self.n) / rate)} left"
            self._line(f"{step * STEP_PERCENT} % ({self.n}/{self.total} {self.unit}, {elapsed} elapsed{left})")
        return True

    def close(self):
        if not self.disable and not self.total and self.n and self._time() >= self.start_t + self.delay:
            self._line(f"done ({self.n} {self.unit}, {self.format_interval(self._time() - self.start_t)})")
        super().close()


def bar(total: int | None = None, desc: str = "", unit: str = "it", show: bool | None = None) -> tqdm:
    """A progress bar on stderr (a tqdm instance: ``update(n)``, ``close()``, a context manager).

    Parameters
    ----------
    total : int, optional
        Units of work; None when unknown (a line at the end only, off a terminal).
    desc : str
        What is being done (a stage or step name).
    unit : str
        Name of one unit ("chunks", "replicates", "frames", "figures").
    show : bool, optional
        Force the bar on or off; default :func:`enabled`.
    """
    return _make(None, total, desc, unit, enabled() if show is None else bool(show and not quiet()))


def _make(iterable, total, desc, unit, on: bool) -> tqdm:
    stream = sys.stderr  # looked up now: a caller may have redirected it
    cls = tqdm if _is_tty(stream) else _Lines
    return cls(iterable, total=total, desc=desc, unit=unit, file=stream, delay=DELAY_S, disable=not on,
               dynamic_ncols=True)


def iterate(iterable: Iterable[T], desc: str, total: int | None = None, unit: str = "it") -> Iterator[T]:
    """Iterate over ``iterable`` with a progress bar (``total`` default ``len(iterable)`` when it has one).

    Renderers, fits and other loops call this: ``for fig in iterate(figures, "render", unit="figures")``.
    """
    if total is None:
        try:
            total = len(iterable)  # type: ignore[arg-type]
        except TypeError:
            total = None
    b = _make(iterable, total, desc, unit, enabled())
    try:
        yield from b
    finally:
        b.close()


class DaskProgress(Callback):
    """A dask callback (local schedulers) that shows the progress of each ``dask.compute`` as a bar.

    Only computations started in the thread that made the callback are shown: dask's active
    callbacks are global, and other stages may compute at the same time in other threads.

    Parameters
    ----------
    desc : str
        Name of the bars.
    unit : str
        Name of one task.
    target : tqdm, optional
        A bar to advance instead of one per computation (e.g. one bar over several batches of
        chunks); it is neither created nor closed here, and its total is the caller's.
    """

    def __init__(self, desc: str, unit: str = "tasks", target: tqdm | None = None):
        super().__init__()
        self.desc, self.unit, self.target = desc, unit, target
        self.thread = threading.get_ident()
        self.pbar: tqdm | None = None

    @property
    def callbacks(self) -> list:
        """The ``callbacks`` argument of ``dask.compute`` that uses this callback (and only it)."""
        return [self._callback]

    def _mine(self) -> bool:
        return threading.get_ident() == self.thread

    def _start_state(self, dsk, state):
        if self._mine() and self.target is None:
            self.pbar = bar(sum(len(state[k]) for k in ("ready", "waiting", "running", "finished")),
                            self.desc, self.unit)

    def _posttask(self, key, result, dsk, state, worker_id):
        b = self.target if self.target is not None else self.pbar
        if self._mine() and b is not None and (b.total is None or b.n < b.total):
            b.update(1)

    def _finish(self, dsk, state, errored):
        if self._mine() and self.pbar is not None:
            self.pbar.close()
            self.pbar = None

    def __exit__(self, *args):
        # dask swaps its set of active callbacks while a computation without explicit callbacks runs;
        # from another thread that may have dropped this one already
        Callback.active.discard(self._callback)


def track_futures(futures, desc: str, unit: str = "tasks", target: tqdm | None = None) -> None:
    """Advance a bar as dask.distributed ``futures`` complete (finished, failed or cancelled); returns
    when all have.

    Parameters
    ----------
    futures : list of distributed.Future
    desc, unit : str
        Name of the bar and of one future.
    target : tqdm, optional
        A bar to advance instead of a new one (see :class:`DaskProgress`).
    """
    from distributed import as_completed

    b = target if target is not None else bar(len(futures), desc, unit)
    try:
        # the futures' own client's loop: their client need not be the default one
        for _ in as_completed(futures, loop=futures[0].client.loop if futures else None):
            b.update(1)
    finally:
        if target is None:
            b.close()
