"""From a core's parameter names to the config keys a user sets.

Numeric cores name their own parameters, never config keys: preferably with
:class:`movieproc.errors.ParameterError` (``p0.sigma``, ``transitions``), or with a
plain ``ValueError``/``TypeError`` whose message starts with the parameter's name
(``"sign must be +1 or -1"``). Each stage keeps ONE dict from those names to its
config keys (its ``CONFIG_KEYS``) and runs its cores inside :func:`config_keys`, so an
error a user sees always names a key of the config schema (tests walk every dict
against the schema).
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

from ..errors import ConfigError, ParameterError

__all__ = ["config_key", "config_keys", "config_value"]

#: The parameter name a plain ValueError/TypeError message of a core starts with.
_LEADING_NAME = re.compile(r"\s*([A-Za-z_][A-Za-z0-9_.]*)")


def config_value(config: Mapping[str, Any] | None, key: str):
    """The value of a dotted config key (``timing.sign``) in ``config``; None where it is absent."""
    value: Any = config
    for part in key.split("."):
        if not isinstance(value, Mapping) or part not in value:
            return None
        value = value[part]
    return value


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
def config_keys(keys: Mapping[str, str], config: Mapping[str, Any] | None = None) -> Iterator[None]:
    """Re-raise a core's error about one of its parameters as a ConfigError naming the config key.

    Parameters
    ----------
    keys : mapping
        Core parameter name -> config key (``"section.key"``); an entry ending in
        ``*`` matches every parameter with that prefix.
    config : mapping, optional
        The stage's config, to quote the value found when a plain ValueError or
        TypeError (which carries no value) is mapped.

    A ParameterError (or an error caused by one) is mapped by its ``parameter``; a
    plain ValueError/TypeError by the name its message starts with. An error about a
    parameter missing from ``keys`` is not something a config sets (a bug of the
    calling stage): it passes unchanged.
    """
    try:
        yield
    except Exception as exc:
        perr = _parameter_error(exc)
        if perr is not None:
            key = config_key(perr.parameter, keys)
            if key is None:
                raise
            raise ConfigError(key, perr.found, perr.expected) from exc
        if not isinstance(exc, (ValueError, TypeError)):
            raise
        match = _LEADING_NAME.match(str(exc))
        key = config_key(match.group(1), keys) if match else None
        if key is None:
            raise
        raise ConfigError(key, repr(config_value(config, key)), f"a usable value ({exc})") from exc
