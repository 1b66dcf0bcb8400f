"""Cluster runs: dask.distributed workers in another working directory, a LocalCluster for the run,
lost workers, a scheduler that does not answer, and Snakemake executors chosen by a profile.

The reference of every comparison is the same small demo run with dask's threads (the default),
made here: a cluster must give a movie with bit-identical arrays (attributes record times and may
differ).
"""

import os
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import zarr

from movieproc import config as C
from movieproc import parallel
from movieproc.config import ROOT
from movieproc.errors import ConfigError, InputError, WorkflowFailed
from movieproc.workflow import load_profile, run_workflow

from conftest import run_datasets, write_h5

pytestmark = pytest.mark.slow
#: The tests of the threaded reference (`work`) run on one xdist worker (--dist loadgroup): it is made once.
ON_THE_REFERENCE_WORKER = pytest.mark.xdist_group("cluster-reference")
#: The Snakemake-executor tests build their own reference on the worker they run on (the module's
#: fixture is made once per worker), so the two groups can run at the same time.
ON_THE_EXECUTOR_WORKER = pytest.mark.xdist_group("cluster-executors")

SHOTS = 2400  # small demo run: a few seconds per stage
SUBMIT = Path(__file__).with_name("cluster_submit.sh")

# A LocalCluster in its own process and working directory; prints its address, stops when stdin closes.
CLUSTER_SCRIPT = """
import sys
from distributed import LocalCluster
cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
print(cluster.scheduler_address, flush=True)
sys.stdin.read()
cluster.close()
"""


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    """A working folder with the demo inputs and the threaded reference run in ``results/threads``;
    the config's paths stay relative to this folder."""
    d = tmp_path_factory.mktemp("cluster")
    shutil.copytree(ROOT / "demo_data", d / "demo_data")
    run_workflow(C.load(overrides=demo_overrides("results/threads")), cores=2, workdir=d)
    return d


def demo_overrides(out, *extra):
    # no movie.gif: the comparisons read the movie store, and the animation is the slowest figure
    return [f"output_dir={out}", f"run.generate.shots={SHOTS}", "compute.progress=false", "render.animation=false",
            *extra]


def movie_arrays(store) -> dict:
    """Every array of a movie store (walking sub-groups) by path, as numpy arrays."""
    arrays = {}

    def walk(group, prefix):
        for name, item in group.members():
            if isinstance(item, zarr.Group):
                walk(item, f"{prefix}{name}/")
            else:
                arrays[prefix + name] = item[...]
    walk(zarr.open_group(str(store), mode="r"), "")
    return arrays


def assert_same_movie(a, b):
    first, second = movie_arrays(a), movie_arrays(b)
    assert sorted(first) == sorted(second)
    assert len(first) > 10  # the demo movie: coordinates, differences, fits, structures
    for name, values in first.items():
        other = second[name]
        assert values.dtype == other.dtype and values.shape == other.shape, name
        assert values.tobytes() == other.tobytes(), f"{name} differs"  # bit-identical, NaN included


@pytest.fixture
def outside_cluster(tmp_path):
    """A dask LocalCluster started by another process in another working directory: (address, folder)."""
    folder = tmp_path / "elsewhere"
    folder.mkdir()
    proc = subprocess.Popen([sys.executable, "-c", CLUSTER_SCRIPT], cwd=folder, stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env=dict(os.environ))
    try:
        address = proc.stdout.readline().strip()
        assert address.startswith("tcp://"), address
        yield address, folder
    finally:
        proc.stdin.close()
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            proc.kill()


def free_port() -> int:
    """A local TCP port that nothing listens on (bound, then released)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# ------------------------------------------------------------------ dask.distributed

@ON_THE_REFERENCE_WORKER
def test_workers_in_another_folder_give_the_threaded_movie(work, outside_cluster):
    from distributed import Client

    address, folder = outside_cluster
    with Client(address) as client:  # the workers really run elsewhere
        assert set(client.run(os.getcwd).values()) == {str(folder)}
    assert not (folder / "results").exists() and Path.cwd() != work
    run_workflow(C.load(overrides=demo_overrides("results/tcp", f"compute.scheduler={address}")), workdir=work)
    assert_same_movie(work / "results/threads/movie.zarr", work / "results/tcp/movie.zarr")
    assert not (folder / "results").exists()  # nothing written relative to the workers' folder


@ON_THE_REFERENCE_WORKER
def test_local_cluster_gives_the_threaded_movie_and_is_closed(work):
    config = C.load(overrides=demo_overrides("results/local-cluster", "compute.scheduler=local-cluster",
                                             "compute.workers=2", "compute.memory_per_worker=1GB"))
    run_workflow(config, workdir=work)
    assert_same_movie(work / "results/threads/movie.zarr", work / "results/local-cluster/movie.zarr")
    assert parallel._CLUSTERS == {}  # closed when the workflow ended


def test_a_scheduler_that_does_not_answer_is_refused_within_the_timeout(tmp_path):
    from movieproc.stages import ingest

    address = f"tcp://127.0.0.1:{free_port()}"
    run = write_h5(tmp_path / "run.h5", run_datasets())
    config = C.load(overrides=["compute.progress=false", f"compute.scheduler={address}",
                               "compute.connect_timeout_s=1.5"])
    start = time.monotonic()
    with parallel.compute_settings(config["compute"]), pytest.raises(ConfigError) as err:
        ingest.run({"files": [run]}, tmp_path / "shots.zarr", config)
    elapsed = time.monotonic() - start
    assert err.value.key == "compute.scheduler"
    assert address in str(err.value) and "1.5 s" in str(err.value)
    assert elapsed < 1.5 + 5.0  # the timeout plus start-up, never dask's own 30 s default
    assert not (tmp_path / "shots.zarr").exists()


def test_the_same_through_movieproc_run(tmp_path, monkeypatch, capsys):
    from movieproc.cli import main

    address = f"tcp://127.0.0.1:{free_port()}"
    write_h5(tmp_path / "run.h5", run_datasets())
    monkeypatch.chdir(tmp_path)
    status = main(["process", "run.h5", "--out", "out", "--set", "compute.progress=false",
                   f"compute.scheduler={address}", "compute.connect_timeout_s=1"])
    err = capsys.readouterr().err
    assert status == 2
    assert "compute.scheduler" in err and address in err and "1 s" in err


def _kill_a_busy_worker(address, done, delay=0.2):
    """Kill (SIGKILL) the process of a worker while it runs a task (``delay`` s after seeing it busy);
    return its pid."""
    from distributed import Client

    with Client(address) as client:
        pids = client.run(os.getpid)
        while not done.is_set():
            busy = [w for w, keys in client.processing().items() if keys]
            if busy:
                time.sleep(delay)  # inside the task
                os.kill(pids[busy[0]], signal.SIGKILL)
                return pids[busy[0]]
            time.sleep(0.01)
    return None


def _slow_sum():
    """A chunk function of 1 s each, pickled by value (the workers need not import this test module)."""
    def slow(a, b):
        time.sleep(1.0)
        return sum(range(a, b))
    return slow


def _map_while_killing(address):
    done, killed = threading.Event(), []
    killer = threading.Thread(target=lambda: killed.append(_kill_a_busy_worker(address, done)))
    killer.start()
    try:
        return parallel.map_ranges(_slow_sum(), parallel.chunk_ranges(40, 10), 2, address), killed
    finally:
        done.set()
        killer.join()


def test_a_worker_killed_mid_stage_has_its_chunk_computed_again(outside_cluster):
    address, _ = outside_cluster
    result, killed = _map_while_killing(address)
    assert killed and killed[0] is not None
    assert result == [sum(range(a, b)) for a, b in parallel.chunk_ranges(40, 10)]


def test_a_chunk_lost_beyond_the_retries_fails_clearly_and_a_rerun_completes(tmp_path, monkeypatch):
    # dask's own setting: no second try for a task whose worker died
    monkeypatch.setenv("DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES", "0")
    proc = subprocess.Popen([sys.executable, "-c", CLUSTER_SCRIPT], cwd=tmp_path, stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env=dict(os.environ))
    try:
        address = proc.stdout.readline().strip()
        with pytest.raises(WorkflowFailed, match="lost with the dask worker.*run again"):
            _map_while_killing(address)
        ranges = parallel.chunk_ranges(40, 10)
        assert parallel.map_ranges(_slow_sum(), ranges, 2, address) == [sum(range(a, b)) for a, b in ranges]
    finally:
        proc.stdin.close()
        proc.wait(timeout=30)


@ON_THE_REFERENCE_WORKER
def test_a_worker_killed_during_a_workflow_run_fails_it_clearly_and_a_rerun_gives_the_same_movie(
        work, tmp_path, monkeypatch, capsys):
    # dask's own setting: no second try for a task whose worker died, so the stage must fail
    monkeypatch.setenv("DASK_DISTRIBUTED__SCHEDULER__ALLOWED_FAILURES", "0")
    proc = subprocess.Popen([sys.executable, "-c", CLUSTER_SCRIPT], cwd=tmp_path, stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True, env=dict(os.environ))
    out = work / "results/killed"
    try:
        address = proc.stdout.readline().strip()
        config = C.load(overrides=demo_overrides("results/killed", f"compute.scheduler={address}"))
        done, killed = threading.Event(), []
        killer = threading.Thread(target=lambda: killed.append(_kill_a_busy_worker(address, done, delay=0.0)))
        killer.start()
        try:
            with pytest.raises(WorkflowFailed):
                run_workflow(config, workdir=work)
        finally:
            done.set()
            killer.join()
        assert killed and killed[0] is not None
        log = capsys.readouterr()
        assert "lost with the dask worker" in log.out + log.err and "run again" in log.out + log.err
        # nothing of the failed stage was kept (no half-written store) and there is no movie yet
        assert not (out / "movie.zarr").exists()
        assert not [p.name for p in out.iterdir() if ".tmp-" in p.name]
        # the cluster's nanny has started a new worker: the same command completes the run
        run_workflow(config, workdir=work)
        assert not (out / "STALE.txt").exists()
        assert_same_movie(work / "results/threads/movie.zarr", out / "movie.zarr")
    finally:
        proc.stdin.close()
        proc.wait(timeout=30)


# ------------------------------------------------------------------ Snakemake executors

@ON_THE_EXECUTOR_WORKER
def test_generic_cluster_executor_runs_jobs_as_separate_processes(work, tmp_path, monkeypatch):
    pytest.importorskip("snakemake_executor_plugin_cluster_generic",
                        reason="install the test extra: pip install -e '.[test]'")
    submitted = tmp_path / "submitted.txt"
    monkeypatch.setenv("MOVIEPROC_TEST_SUBMITTED", str(submitted))
    profile = tmp_path / "profile"
    profile.mkdir()
    (profile / "config.yaml").write_text(f"executor: cluster-generic\ncluster-generic-submit-cmd: {SUBMIT}\n"
                                         "jobs: 2\nlatency-wait: 10\nseconds-between-status-checks: 1\n")
    config = C.load(overrides=demo_overrides("results/generic"))
    updated = run_workflow(config, workdir=work, profile=profile)
    assert_same_movie(work / "results/threads/movie.zarr", work / "results/generic/movie.zarr")
    assert (work / "results/generic/figures/.done").is_file()
    assert any("movie.zarr" in f for f in updated)
    jobs = submitted.read_text().split("\n")[:-1]
    # every stage of the run but the demo's synthesis (its run files exist) was a submitted job
    assert len(jobs) >= 8 and all(int(line.split()[0]) != os.getpid() for line in jobs)
    effective = C.read_file(work / "results/generic/config.effective.yaml")
    assert effective["output_dir"] == "results/generic" and effective["run"]["generate"]["shots"] == SHOTS


@ON_THE_EXECUTOR_WORKER
def test_slurm_profile_dry_run(work, caplog):
    from snakemake_interface_executor_plugins.registry import ExecutorPluginRegistry

    if not ExecutorPluginRegistry().is_installed("slurm"):
        pytest.skip("the SLURM executor plugin is not installed (pip install -e '.[slurm]')")
    config = C.load(overrides=demo_overrides("results/slurm", "compute.workers=3"))
    with caplog.at_level("INFO"):
        run_workflow(config, workdir=work, profile=ROOT / "workflow/profiles/cluster", dryrun=True)
    jobs = {r.rule_name: r for r in caplog.records if hasattr(r, "rule_name") and hasattr(r, "resources")}
    assert jobs["ingest"].threads == 3 and jobs["difference"].threads == 3  # compute.workers
    assert jobs["ingest"].resources["mem_mb"] == 4000  # the profile's set-resources
    assert jobs["bin"].threads == 1 and jobs["bin"].resources["mem_mb"] == 1000  # a small rule stays small
    assert not (work / "results/slurm").exists()  # a dry run writes nothing


def test_a_profile_naming_a_missing_executor_plugin_names_the_package(tmp_path):
    (tmp_path / "config.yaml").write_text("executor: imaginary-batch\njobs: 4\n")
    with pytest.raises(InputError) as err:
        load_profile(tmp_path)
    assert "snakemake-executor-plugin-imaginary-batch" in str(err.value)
    assert str(tmp_path / "config.yaml") in str(err.value)


def test_a_profile_with_an_unknown_option_is_refused(tmp_path):
    (tmp_path / "config.yaml").write_text("executor: local\ncores-per-moon: 4\n")
    with pytest.raises(InputError, match="cores-per-moon"):
        load_profile(tmp_path)
