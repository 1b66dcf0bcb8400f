"""Shared test set-up: a writable cache for Snakemake, small run files, and one demo run.

The demo run (``movieproc run --cores 2`` in a temporary working directory) is made
once per session and shared by the end-to-end tests and the ground-truth recovery
tests; tests only read it.
"""

import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import settings

# Property tests draw the same examples on every run (reproducible CI); no per-example deadline
# on a loaded 2-core machine.
settings.register_profile("movieproc", derandomize=True, deadline=None)
settings.load_profile("movieproc")

# Snakemake 9 needs a writable cache folder; set it before anything imports snakemake.
_CACHE = tempfile.mkdtemp(prefix="movieproc-xdg-cache-")
os.environ["XDG_CACHE_HOME"] = _CACHE


def pytest_unconfigure(config):
    shutil.rmtree(_CACHE, ignore_errors=True)


def pytest_collection_modifyitems(config, items):
    """Slow tests first (stable order otherwise), so that with ``-n`` the long ones start early and the
    workers finish together; with ``--dist loadgroup`` xdist then sends the groups first, larger first."""
    items.sort(key=lambda item: item.get_closest_marker("slow") is None)


from movieproc.config import ROOT  # noqa: E402

SCENARIO = ROOT / "demo_data" / "scenario.yaml"


# ------------------------------------------------------------------ small run files

def run_datasets(n=240, nq=40, seed=0, off_every=3):
    """Datasets of a small, valid curves-mode run file (input contract, docs/DESIGN.md section 4).

    Positive curves near 100 with 1 % noise, every ``off_every``-th shot pump-off, timing
    edges near 480 px, a few stage positions between -0.5 and 1 ps.
    """
    rng = np.random.default_rng(seed)
    q = np.linspace(0.5, 5.0, nq)
    return {
        "shots/pulse_id": (1000 + np.arange(n)).astype(np.int64),
        "shots/stage_delay": np.repeat(np.linspace(-0.5, 1.0, 6), -(-n // 6))[:n].astype(np.float64),
        "shots/pump_on": (np.arange(n) % off_every) != off_every - 1,
        "shots/pulse_energy": rng.uniform(0.9, 1.1, n),
        "shots/timing_edge": rng.normal(480.0, 20.0, n),
        "shots/timing_amplitude": rng.uniform(0.05, 0.1, n),
        "q": q,
        "curves": (100.0 * (1 + 0.01 * rng.standard_normal((n, nq)))).astype(np.float32),
    }


def write_h5(path, datasets):
    """Write ``{name: array}`` into a new HDF5 file."""
    import h5py

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with h5py.File(path, "w") as h5:
        for name, values in datasets.items():
            h5.create_dataset(name, data=values)
    return path


@pytest.fixture
def make_run(tmp_path):
    """Factory: ``make_run(name, **kw)`` writes a small valid run file; ``edit(datasets)``
    may change, add (value) or delete (value None) datasets before writing."""

    def make(name="run.h5", edit=None, **kw):
        data = run_datasets(**kw)
        if edit is not None:
            edit(data)
        return write_h5(tmp_path / "in" / name, {k: v for k, v in data.items() if v is not None})

    return make


def leftovers(folder):
    """Names in ``folder`` (recursively) that look like temporary or partial stores."""
    folder = Path(folder)
    if not folder.exists():
        return []
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if ".tmp-" in p.name or ".old-" in p.name)


# ------------------------------------------------------------------ the demo run

@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """The README's demo command, ``movieproc run --cores 2``, in a temporary working directory.

    Only ``demo_data/`` is copied (the config and the Snakefile are read from the
    package); the run files are synthesized by the workflow itself.
    """
    work = tmp_path_factory.mktemp("demo")
    shutil.copytree(ROOT / "demo_data", work / "demo_data")
    exe = shutil.which("movieproc")
    cmd = [exe] if exe else [sys.executable, "-m", "movieproc.cli"]
    proc = subprocess.run(cmd + ["run", "--cores", "2"], cwd=work, capture_output=True, text=True,
                          timeout=900)
    out = work / "results" / "demo"
    return SimpleNamespace(work=work, proc=proc, out=out, movie=out / "movie.zarr",
                           truth=work / "resources" / "demo" / "truth.zarr",
                           files=[work / "resources" / "demo" / f"run_00{i}.h5" for i in range(2)])
