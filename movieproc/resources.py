"""Where movieproc finds the files it ships: the workflow, the configs and schemas, the demo scenario.

They live at the top of the repository (``workflow/``, ``config/``, ``demo_data/``). A built
package (wheel, ``pip install .``) carries them as package data under ``movieproc/_data/``
with the same sub-folders (see ``setup.py``), found here through :mod:`importlib.resources`.
A source checkout (an editable install, or the repository on ``PYTHONPATH``) has no
``movieproc/_data``: the files are read in place, from the checkout beside the package.
Every other module asks this one; none builds such a path itself.

The shipped configs name the demo files as ``demo_data/NAME``; :func:`resolve_demo_paths` turns
those into the shipped files, so the demo runs from any folder. Paths a user gives (in their own
config, with ``--set`` or on the command line) stay relative to the user's working folder.
"""

from __future__ import annotations

import functools
import importlib.resources
from pathlib import Path

from .errors import InputError

#: Folder of the package data inside the installed package.
PACKAGE_DATA = "_data"
#: How the shipped configs name a demo file: this prefix, then the file's name.
DEMO_PREFIX = "demo_data/"
#: A file every complete data folder holds (how a folder is recognised as one).
MARKER = Path("workflow") / "Snakefile"


@functools.cache
def data_root() -> Path:
    """The folder holding ``workflow/``, ``config/`` and ``demo_data/``.

    The installed package's ``movieproc/_data`` when it exists, else the source checkout the
    package was imported from.

    Raises
    ------
    InputError
        When neither holds the workflow (an installation without its package data).
    """
    package = importlib.resources.files("movieproc")
    packaged = package / PACKAGE_DATA
    candidates = []
    if isinstance(packaged, Path):  # an unpacked installation (not a zip archive)
        candidates.append(packaged)
    if isinstance(package, Path):
        candidates.append(package.parent)  # a source checkout: the repository's top folder
    for root in candidates:
        if (root / MARKER).is_file():
            return root.resolve()
    raise InputError(str(packaged), "no workflow/Snakefile in the installed package or beside it",
                     "movieproc installed with its package data (python3 -m pip install . from a checkout, "
                     "or the wheel); an installation from a zip archive is not supported")


def workflow_file() -> Path:
    """The Snakefile of the workflow."""
    return data_root() / MARKER


def profile(name: str) -> Path:
    """The folder of a shipped Snakemake profile (``local``, ``cluster``)."""
    return data_root() / "workflow" / "profiles" / name


def config_file(name: str) -> Path:
    """A shipped config: ``config`` (the demo), ``demo_frames`` or ``process`` (generic settings)."""
    return data_root() / "config" / f"{name}.yaml"


def default_config() -> Path:
    """The demo config, used when no ``--config`` is given."""
    return config_file("config")


def process_config() -> Path:
    """The generic processing settings of ``movieproc process``."""
    return config_file("process")


def schema(name: str) -> Path:
    """A part of the config schema: ``config``, ``detector`` or ``analysis``."""
    return data_root() / "config" / "schemas" / f"{name}.schema.yaml"


def demo_file(name: str) -> Path:
    """A file of the demo scenario (``scenario.yaml``, ``ground.xyz``...)."""
    return data_root() / "demo_data" / name


def is_shipped_config(path) -> bool:
    """Whether ``path`` is one of the configs shipped with movieproc (not a user's own file)."""
    try:
        return Path(path).resolve().parent == (data_root() / "config").resolve()
    except OSError:
        return False


def resolve_demo_paths(value):
    """``value`` (a config read from a shipped file, or a part of it) with every string
    ``demo_data/NAME`` replaced by the absolute path of the shipped demo file NAME.

    Other values are returned unchanged; containers are copied, never changed in place.
    """
    if isinstance(value, dict):
        return {key: resolve_demo_paths(item) for key, item in value.items()}
    if isinstance(value, list):
        return [resolve_demo_paths(item) for item in value]
    if isinstance(value, str) and value.startswith(DEMO_PREFIX):
        return str(demo_file(value[len(DEMO_PREFIX):]))
    return value
