"""The built package: a wheel holds the workflow, configs, schemas and demo scenario, and, installed
into a fresh virtual environment, runs the demo from an empty folder.

How the test makes sure it runs the wheel and not this checkout: the wheel is built from a copy
of the source tree, installed with ``pip install --no-deps --no-index`` into a venv made with
``--system-site-packages`` (numpy, snakemake... come from the system), and every command runs
from a temporary folder with ``PYTHONPATH`` unset. The system site-packages may hold an editable
install of a checkout (its import finder sits after the normal path search, so the venv's own
site-packages win); the first test checks that ``movieproc`` and its data are imported from the
venv, and every later test depends on that fixture.
"""

import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path
from types import SimpleNamespace

import pytest
import zarr

from movieproc.io import movie as movie_attrs

pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("package")]

REPO = Path(__file__).resolve().parents[1]
#: Not copied into the build folder: version control, caches and outputs of earlier runs and builds.
IGNORED = shutil.ignore_patterns(".git", "build", "dist", "*.egg-info", "__pycache__", ".snakemake", "results",
                                 "resources", ".pytest_cache", ".hypothesis", ".mypy_cache", ".ruff_cache", "*.tmp-*")
#: Overrides that shrink the demo to a run of seconds: 2400 shots (the demo has 24000), ten bins of equal
#: shot counts, no structural fit and no movie.gif.
SMALL_DEMO = ["run.generate.shots=2400", "binning.mode=population", "binning.count=10", "fit.mode=none",
              "render.animation=false", "compute.progress=false"]


def _run(cmd, cwd, env, timeout=300):
    return subprocess.run([str(c) for c in cmd], cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    """A wheel built by pip from a copy of the source tree (so no earlier build/ folder leaks in)."""
    base = tmp_path_factory.mktemp("package")
    src = base / "src"
    shutil.copytree(REPO, src, ignore=IGNORED)
    proc = _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--wheel-dir", base / "dist", src], base,
                dict(os.environ), timeout=600)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    (path,) = (base / "dist").glob("movieproc-*.whl")
    return path


@pytest.fixture(scope="module")
def venv(wheel, tmp_path_factory):
    """A venv with the wheel installed, and the environment to run its ``movieproc`` in."""
    root = tmp_path_factory.mktemp("venv")
    env_dir = root / "env"
    proc = _run([sys.executable, "-m", "venv", "--system-site-packages", env_dir], root, dict(os.environ))
    assert proc.returncode == 0, proc.stderr[-3000:]
    bindir = env_dir / ("Scripts" if os.name == "nt" else "bin")
    python = bindir / ("python.exe" if os.name == "nt" else "python")
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env.update(PATH=str(bindir) + os.pathsep + env.get("PATH", ""), MPLBACKEND="Agg", VIRTUAL_ENV=str(env_dir),
               XDG_CACHE_HOME=str(root / "cache"))
    proc = _run([python, "-m", "pip", "install", "--no-deps", "--no-index", wheel], root, env)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    site = _run([python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"], root, env).stdout.strip()
    exe = bindir / "movieproc"
    return SimpleNamespace(python=python, exe=exe, env=env, site=Path(site).resolve(), root=root)


def test_wheel_holds_the_code_workflow_configs_schemas_and_demo(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    # every module of the package, as the source tree has them
    modules = {p.relative_to(REPO).as_posix() for p in (REPO / "movieproc").rglob("*.py")}
    assert modules and modules <= names, sorted(modules - names)
    # the data folders at the top of the repository, under movieproc/_data/
    data = [REPO / "workflow" / "Snakefile", *(REPO / "workflow" / "rules").glob("*.smk"),
            *(REPO / "workflow" / "profiles").glob("*/config.yaml"), *(REPO / "config").glob("*.yaml"),
            *(REPO / "config" / "schemas").glob("*.yaml"), *(REPO / "demo_data").iterdir()]
    expected = {"movieproc/_data/" + p.relative_to(REPO).as_posix() for p in data if p.is_file()}
    assert len(expected) >= 15 and expected <= names, sorted(expected - names)
    with zipfile.ZipFile(wheel) as z:  # the same bytes as the source
        for name in expected:
            assert z.read(name) == (REPO / name.removeprefix("movieproc/_data/")).read_bytes(), name


def test_venv_imports_the_wheel_not_the_checkout(venv, tmp_path):
    code = "import movieproc, movieproc.resources as r; print(movieproc.__file__); print(r.data_root())"
    proc = _run([venv.python, "-c", code], tmp_path, venv.env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    module, data = map(Path, proc.stdout.split())
    assert module.resolve() == venv.site / "movieproc" / "__init__.py"
    assert data == venv.site / "movieproc" / "_data"
    assert venv.exe.is_file()


def test_installed_command_help(venv, tmp_path):
    proc = _run([venv.exe, "--help"], tmp_path, venv.env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    for command in ("run", "process", "check", "init", "calibrate"):
        assert command in proc.stdout
    proc = _run([venv.exe, "run", "--help"], tmp_path, venv.env)
    assert proc.returncode == 0 and "--config" in proc.stdout, proc.stderr[-3000:]


def test_installed_init_writes_a_starter_that_check_refuses(venv, tmp_path):
    proc = _run([venv.exe, "init", "start"], tmp_path, venv.env)
    assert proc.returncode == 0, proc.stderr[-3000:]
    config = tmp_path / "start" / "config.yaml"
    assert config.is_file() and f"movieproc run --config {Path('start') / 'config.yaml'}" in proc.stdout
    proc = _run([venv.exe, "check", "--config", config], tmp_path, venv.env)
    assert proc.returncode == 1 and "run.files[0]" in proc.stdout and "placeholder" in proc.stdout, proc.stdout
    proc = _run([venv.exe, "init", "start"], tmp_path, venv.env)
    assert proc.returncode == 2 and "--force" in proc.stderr


def test_installed_demo_runs_in_an_empty_folder(venv, tmp_path):
    work = tmp_path / "empty"
    work.mkdir()
    proc = _run([venv.exe, "run", "--cores", "2", "--set", *SMALL_DEMO], work, venv.env, timeout=600)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    movie = work / "results" / "demo" / "movie.zarr"
    assert (movie / "zarr.json").is_file() and (work / ".snakemake").is_dir()
    assert (work / "resources" / "demo" / "run_000.h5").is_file()  # the synthesized run, in the folder
    g = zarr.open_group(str(movie), mode="r")
    assert g["delay"].shape == (10,)  # binning.count=10 reached the run
    # the demo's structures and solvent curves came from the installed package's data
    config = movie_attrs.config(g)
    assert config, "the movie records its config"
    demo = venv.site / "movieproc" / "_data" / "demo_data"
    assert Path(config["model"]["ground"]) == demo / "ground.xyz"
    assert Path(config["run"]["generate"]["scenario"]) == demo / "scenario.yaml"
