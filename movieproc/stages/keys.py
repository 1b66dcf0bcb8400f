"""From a core's parameter names to the config keys a user sets.

Numeric cores raise :class:`movieproc.errors.ParameterError` naming their own
parameters (``p0.sigma``, ``transitions``); each stage keeps ONE dict from those
names to its config keys and runs its cores inside :func:`config_keys`, so an
error a user sees always names a key of the config schema.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager

from ..errors import ConfigError, ParameterError

__all__ = ["config_key", "config_keys"]


def config_key(parameter: str, keys: Mapping[str, str]) -> str | None:
    """The config key of a core parameter, or None when ``keys`` has none.

    A mapping entry ending in ``*`` matches every parameter with that prefix
    (``"p0.lifetime_*"`` matches ``p0.lifetime_2``).
    """
    if parameter in keys:
        return keys[parameter]
    for pattern, key in keys.items():
        if pattern.endswith("*") and parameter.startswith(pattern[:-1]):
            return key
    return None


def _parameter_error(exc: BaseException) -> ParameterError | None:
    """The ParameterError behind ``exc`` (itself or its chain of causes)."""
    seen = 0
    cause: BaseException | None = exc
    while cause is not None and seen < 10:
        if isinstance(cause, ParameterError):
            return cause
        cause, seen = cause.__cause__, seen + 1
    return None


@contextmanager
def config_keys(keys: Mapping[str, str]) -> Iterator[None]:
    """Re-raise a core's ParameterError (or an error caused by one) as a ConfigError.

    Parameters
    ----------
    keys : mapping
        Core parameter name -> config key (``"section.key"``).

    A parameter missing from ``keys`` is not something a config sets (a bug of the
    calling stage): the error passes unchanged.
    """
    try:
        yield
    except Exception as exc:
        perr = _parameter_error(exc)
        key = config_key(perr.parameter, keys) if perr is not None else None
        if perr is None or key is None:
            raise
        raise ConfigError(key, perr.found, perr.expected) from exc
