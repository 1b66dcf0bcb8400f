"""Package layout for setuptools (everything else is in pyproject.toml).

The workflow, the configs with their schemas and the demo scenario stay at the top of the
repository (``workflow/``, ``config/``, ``demo_data/``); a built package carries them as package
data under ``movieproc/_data/<folder>``, where :mod:`movieproc.resources` finds them. A source
checkout (an editable install, or ``PYTHONPATH``) reads the same folders in place.
"""

from setuptools import find_packages, setup

#: package name in the wheel -> (folder in the repository, the files it ships)
DATA = {
    "movieproc._data.workflow": ("workflow", ["Snakefile", "rules/*.smk", "profiles/*/*.yaml"]),
    "movieproc._data.config": ("config", ["*.yaml", "schemas/*.yaml"]),
    "movieproc._data.demo_data": ("demo_data", ["*.yaml", "*.xyz", "*.csv"]),
}

setup(
    packages=find_packages(include=["movieproc", "movieproc.*"]) + list(DATA),
    package_dir={name: folder for name, (folder, _) in DATA.items()},
    package_data={name: files for name, (_, files) in DATA.items()},
)
