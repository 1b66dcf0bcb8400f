"""What every stage shares: logging set-up, warnings that reach the outputs, provenance."""

from __future__ import annotations

import datetime as _dt
import logging
import sys
import platform


log = logging.getLogger("movieproc")


class _StderrHandler(logging.StreamHandler):
    """Writes to whatever ``sys.stderr`` is when a record is emitted (not the one at set-up), so a
    caller that redirects stderr later (a notebook, a test capture, a wrapper script) gets the lines."""

    @property  # type: ignore[override]
    def stream(self):
        return sys.stderr

    @stream.setter
    def stream(self, value):
        pass


def setup_logging(level=logging.INFO):
    """Log to stderr once, in a plain one-line format; in quiet mode (``movieproc --quiet``,
    :func:`movieproc.progress.quiet`) warnings and errors only, whatever ``level`` asks."""
    from ..progress import quiet

    root = logging.getLogger("movieproc")
    if not root.handlers:
        handler = _StderrHandler()
        handler.setFormatter(logging.Formatter("%(asctime)s movieproc %(levelname)s: %(message)s", "%H:%M:%S"))
        root.addHandler(handler)
    root.setLevel(max(level, logging.WARNING) if quiet() else level)
    return root


class Warnings(list):
    """Warnings a stage raises: logged now and stored in its output's attrs."""

    def __init__(self, stage: str, logger=None):
        super().__init__()
        self.stage = stage
        self.logger = logger or log

    def add(self, message: str):
        text = f"[{self.stage}] {message}"
        self.logger.warning(text)
        self.append(text)


def versions() -> dict:
    """Versions of the software that made an output."""
    import dask
    import numpy
    import scipy
    import zarr

    from .. import __version__

    out = {"movieproc": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
           "scipy": scipy.__version__, "zarr": zarr.__version__, "dask": dask.__version__}
    try:
        import snakemake

        out["snakemake"] = snakemake.__version__
    except Exception:  # pragma: no cover - snakemake is a dependency, but stages run without it
        pass
    return out


def now() -> str:
    """Current UTC time, ISO 8601."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


