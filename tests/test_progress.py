"""Progress display (movieproc.progress): plain lines off a terminal, a bar on one, nothing when quiet."""

import io
import logging
import threading

import dask
import pytest

from movieproc import parallel, progress
from movieproc.stages.common import setup_logging


class FakeTTY(io.StringIO):
    """A stream that says it is a terminal."""

    def isatty(self):
        return True


class _Captured:
    """What was written to sys.stderr (pytest's capture: not a terminal)."""

    def __init__(self, capsys):
        self.capsys, self.text = capsys, ""

    def getvalue(self):
        self.text += self.capsys.readouterr().err
        return self.text

    def lines(self):
        """The progress lines (log lines of other code, set up by other tests, left out)."""
        return [line for line in self.getvalue().splitlines() if "movieproc progress:" in line]


@pytest.fixture
def stderr(monkeypatch, capsys):
    """sys.stderr as pytest captures it (not a terminal); bars shown at once (no delay); not quiet."""
    monkeypatch.setattr(progress, "DELAY_S", 0.0)
    monkeypatch.delenv(progress.QUIET_ENV, raising=False)
    assert not __import__("sys").stderr.isatty()
    return _Captured(capsys)


def _square(a, b):
    return a * a


def test_plain_lines_off_a_terminal(stderr):
    items = list(progress.iterate(range(50), "test loop", unit="items"))
    assert items == list(range(50))
    text = stderr.getvalue()
    lines = stderr.lines()
    assert "\r" not in text  # nothing redrawn in place in a log file
    # one line per 10 % (STEP_PERCENT): 10, 20, ... 100 %
    assert len(lines) == 100 // progress.STEP_PERCENT
    assert all("movieproc progress: test loop" in line for line in lines)
    assert "10 % (5/50 items" in lines[0] and "100 % (50/50 items" in lines[-1]


def test_few_items_give_at_most_one_line_each(stderr):
    list(progress.iterate(range(3), "three"))
    lines = stderr.lines()
    assert [line.split("three ")[1].split(" %")[0] for line in lines] == ["30", "60", "100"]


def test_a_bar_redrawn_in_place_on_a_terminal(monkeypatch):
    tty = FakeTTY()
    monkeypatch.setattr("sys.stderr", tty)
    monkeypatch.setattr(progress, "DELAY_S", 0.0)
    monkeypatch.delenv(progress.QUIET_ENV, raising=False)
    list(progress.iterate(range(20), "tty loop"))
    text = tty.getvalue()
    assert "\r" in text and "tty loop" in text and "20/20" in text
    assert "movieproc progress:" not in text  # not the log-line form


def test_short_work_shows_nothing(monkeypatch, capsys):
    monkeypatch.delenv(progress.QUIET_ENV, raising=False)
    list(progress.iterate(range(100), "quick"))  # far below DELAY_S = 1 s
    assert capsys.readouterr().err == ""


def test_quiet_and_switched_off_show_nothing(stderr, monkeypatch):
    monkeypatch.setenv(progress.QUIET_ENV, "1")
    list(progress.iterate(range(20), "quiet"))
    parallel.map_ranges(_square, parallel.chunk_ranges(20, 2), workers=2)
    monkeypatch.delenv(progress.QUIET_ENV)
    with progress.enabled_in(False):
        list(progress.iterate(range(20), "off"))
    with parallel.compute_settings({"progress": False}):
        parallel.map_ranges(_square, parallel.chunk_ranges(20, 2), workers=2)
    parallel.map_ranges(_square, parallel.chunk_ranges(20, 2), workers=2, progress=False)
    text = stderr.getvalue()  # (log lines of map_ranges may be there: other tests set up logging)
    assert "movieproc progress" not in text and "\r" not in text


def test_quiet_keeps_warnings_in_the_log(monkeypatch):
    logger = logging.getLogger("movieproc")
    monkeypatch.setattr(logger, "handlers", [])  # this test's handler (on pytest's stderr) is dropped after it
    monkeypatch.setattr(logger, "level", logger.level)
    monkeypatch.setenv(progress.QUIET_ENV, "1")
    assert setup_logging(logging.INFO).level == logging.WARNING
    assert setup_logging(logging.ERROR).level == logging.ERROR
    monkeypatch.delenv(progress.QUIET_ENV)
    assert setup_logging(logging.INFO).level == logging.INFO


@pytest.mark.parametrize("scheduler", ["threads", "synchronous"])
def test_map_ranges_shows_its_chunks(stderr, scheduler):
    out = parallel.map_ranges(_square, parallel.chunk_ranges(20, 2), workers=2, scheduler=scheduler,
                              label="integrate")
    assert out == [a * a for a in range(0, 20, 2)]
    lines = stderr.lines()
    assert len(lines) == 10 and "integrate 100 % (10/10 chunks" in lines[-1]
    assert "\r" not in stderr.getvalue()


def test_one_bar_over_several_calls(stderr):
    ranges = parallel.chunk_ranges(40, 2)
    with progress.bar(len(ranges), "difference", "chunks") as b:
        for batch in (ranges[:8], ranges[8:16], ranges[16:]):
            parallel.map_ranges(_square, batch, workers=2, progress=b, label="difference")
    lines = stderr.lines()
    assert len(lines) == 10 and "100 % (20/20 chunks" in lines[-1]


def test_dask_callback_ignores_other_threads(stderr):
    tasks = [dask.delayed(_square)(i, 0) for i in range(10)]
    with progress.DaskProgress("mine"):
        worker = threading.Thread(target=lambda: dask.compute(*tasks, scheduler="threads"))
        worker.start()
        worker.join()
        assert stderr.lines() == []  # another stage's computation is not ours
        dask.compute(*tasks, scheduler="threads")
    assert "mine 100 % (10/10 tasks" in stderr.getvalue()
    assert dask.callbacks.Callback.active == set()


def test_distributed_futures_drive_the_same_bar(stderr):
    from distributed import LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=2, processes=False, protocol="tcp",
                      dashboard_address=None) as cluster:
        out = parallel.map_ranges(_square, parallel.chunk_ranges(20, 2), workers=1,
                                  scheduler=cluster.scheduler_address, label="scatter")
    assert out == [a * a for a in range(0, 20, 2)]
    lines = stderr.lines()
    assert len(lines) == 10 and "scatter 100 % (10/10 chunks" in lines[-1]
