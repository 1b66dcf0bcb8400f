"""One exception hierarchy for everything the tool reports to a user.

Every message names where the problem is (file, dataset or config key), what was
found and what was expected, so a user can fix the input without reading code.
"""

from __future__ import annotations

import os


class MovieprocError(Exception):
    """Base class of all errors raised by movieproc on bad input or state.

    Every subclass pickles to itself with the same message and fields (errors
    cross process boundaries when stages run on dask workers).
    """


class InputError(MovieprocError):
    """A run file, structure file or other input does not meet its contract.

    Parameters
    ----------
    source : str or path
        File (and, where known, dataset or frame) where the problem is.
    found : str
        What was found.
    expected : str
        What the contract expects.
    """

    def __init__(self, source: str | os.PathLike, found: str, expected: str):
        self.source, self.found, self.expected = str(source), found, expected
        super().__init__(f"{source}: found {found}; expected {expected}")

    def __reduce__(self):
        # rebuilt from the fields (a dask worker or another process gets the same error back)
        return type(self), (self.source, self.found, self.expected)


class ConfigError(MovieprocError):
    """A configuration value is missing, of the wrong type or inconsistent.

    Parameters
    ----------
    key : str
        Dotted config key, e.g. ``binning.width``.
    found : str
        What was found.
    expected : str
        What is expected.
    """

    def __init__(self, key: str, found: str, expected: str):
        self.key, self.found, self.expected = key, found, expected
        super().__init__(f"config key '{key}': found {found}; expected {expected}")

    def __reduce__(self):
        return type(self), (self.key, self.found, self.expected)


class DataError(MovieprocError):
    """The data, though well-formed, cannot give a meaningful result
    (no pump-off shots, every shot cut, too few delays for a fit...)."""


class WorkflowFailed(MovieprocError):
    """A stage of the workflow failed (its error is in the log above)."""


class ParameterError(MovieprocError, ValueError):
    """A numeric core's argument is outside what the core accepts.

    Cores name their OWN parameter (``lifetimes``, ``p0.t0``, ``transitions``),
    never a config key; the stage that called the core maps the parameter to the
    config key a user sets (see ``movieproc.stages.keys``).

    Parameters
    ----------
    parameter : str
        The core's parameter name (dotted for an entry, e.g. ``p0.sigma``).
    found : str
        What was found.
    expected : str
        What is expected.
    """

    def __init__(self, parameter: str, found: str, expected: str):
        self.parameter, self.found, self.expected = parameter, found, expected
        super().__init__(f"parameter '{parameter}': found {found}; expected {expected}")

    def __reduce__(self):
        return type(self), (self.parameter, self.found, self.expected)
