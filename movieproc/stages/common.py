"""What every stage shares: logging set-up, warnings that reach the outputs, provenance."""

from __future__ import annotations

import contextlib
import datetime as _dt
import logging
import platform
import re

from ..errors import ConfigError

log = logging.getLogger("movieproc")


def setup_logging(level=logging.INFO):
    """Log to stderr once, in a plain one-line format."""
    root = logging.getLogger("movieproc")
    if not root.handlers:
        handler = logging.StreamHandler()
        handler.setFormatter(logging.Formatter("%(asctime)s movieproc %(levelname)s: %(message)s", "%H:%M:%S"))
        root.addHandler(handler)
    root.setLevel(level)
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


def config_value(config: dict, key: str):
    """The value of a dotted config key (``timing.sign``) in ``config``; None where it is absent."""
    value = config
    for part in key.split("."):
        if not isinstance(value, dict) or part not in value:
            return None
        value = value[part]
    return value


@contextlib.contextmanager
def config_errors(keys: dict, config: dict):
    """Re-raise a core's ValueError or TypeError about one of its parameters as a ConfigError.

    Cores name their own parameters: their messages start with the parameter's
    name (``"sign must be +1 or -1"``). ``keys`` maps those names to the
    config keys that set them (one dict per stage, its ``CONFIG_KEYS``); an
    error about a parameter not in ``keys`` passes unchanged.

    Parameters
    ----------
    keys : dict of str to str
        Core parameter name -> dotted config key.
    config : dict
        The stage's config, for the value found.
    """
    try:
        yield
    except (ValueError, TypeError) as exc:
        match = re.match(r"\s*([A-Za-z_][A-Za-z0-9_]*)", str(exc))
        key = keys.get(match.group(1)) if match else None
        if key is None:
            raise
        raise ConfigError(key, repr(config_value(config, key)), f"a usable value ({exc})") from exc
