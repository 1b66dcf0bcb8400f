"""End-to-end tests of the workflow and the ``movieproc`` command: the demo, re-running only
what a config change touches, summaries, the synthesizer, and bad input through the CLI."""

import copy
import importlib
import shutil
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
import yaml
import zarr

from conftest import SCENARIO, leftovers, run_datasets, write_h5
from movieproc import cli
from movieproc import config as C
from movieproc.io import movie, runfile
from movieproc.workflow import run_workflow

#: The tests of the session's demo run (conftest `demo_run`) run on one xdist worker (--dist loadgroup): it is made once.
ON_THE_DEMO_WORKER = pytest.mark.xdist_group("demo-run")
STAGE_OUTPUTS = ["shots.zarr", "selection.zarr", "delays.zarr", "bins.zarr", "binned.zarr", "movie.zarr"]


# ------------------------------------------------------------------ the demo command

@pytest.mark.slow
@ON_THE_DEMO_WORKER
def test_demo_command_writes_movie_and_figures(demo_run):
    p = demo_run.proc
    assert p.returncode == 0, p.stderr[-3000:]
    assert "movie:" in p.stdout and "movie.zarr" in p.stdout
    for name in ("difference_map.png", "difference_curves.png"):
        png = demo_run.out / "figures" / name
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
    for name in STAGE_OUTPUTS:
        assert (demo_run.out / name).is_dir()
    assert leftovers(demo_run.work) == []
    cfg = C.load()  # the demo config the command ran with
    assert runfile.inspect_run(demo_run.files).n_shots == cfg["run"]["generate"]["shots"]


@pytest.mark.slow
@ON_THE_DEMO_WORKER
def test_movie_opens_with_xarray_named_dims_and_units(demo_run):
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-3000:]
    ds = xr.open_zarr(demo_run.movie)
    assert ds["difference"].dims == ("delay", "q") and ds["difference_error"].dims == ("delay", "q")
    assert ds["shot_count"].dims == ("delay",)
    assert "delay" in ds.coords and "q" in ds.coords
    assert ds["delay"].attrs["units"] == "ps" and ds["q"].attrs["units"] == "1/angstrom"
    for name in ("difference", "difference_error"):
        assert ds[name].attrs["units"]
    assert np.all(np.diff(ds["delay"].values) > 0)
    edges = C.load()["binning"]["edges_ps"]
    assert ds.sizes["delay"] == len(edges) - 1 and ds.sizes["q"] == ds["q"].size
    # delays lie inside their bins (bin means of corrected delays)
    assert np.all((ds["delay"].values >= edges[:-1]) & (ds["delay"].values <= edges[1:]))
    assert np.all(np.isfinite(ds["difference"].values)) and np.all(ds["difference_error"].values > 0)
    g = zarr.open_group(str(demo_run.movie), mode="r")
    assert movie.config(g)["timing"]["sign"] == -1 and isinstance(ds.attrs["warnings"], str)
    assert {"numpy", "zarr", "movieproc"} <= set(yaml.safe_load(ds.attrs["software_versions"]))
    assert ds.sizes["input_file"] == 2 and all(ds["input_checksum"].values)


@pytest.mark.slow
@ON_THE_DEMO_WORKER
def test_summary_of_the_movie(demo_run, capsys):
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-3000:]
    assert cli.main(["summary", str(demo_run.movie)]) == 0
    out = capsys.readouterr().out
    g = zarr.open_group(str(demo_run.movie), mode="r")
    delay = g["delay"][...]
    assert f"delays: {delay.size} bins from {delay.min():.4g} to {delay.max():.4g} ps" in out
    assert f"warnings: {len(movie.warnings(g))}" in out


# ------------------------------------------------------------------ re-running after a config change

@pytest.mark.slow
def test_rebinning_recalibration_and_bootstrap_rerun_only_what_follows(tmp_path):
    base = [f"output_dir={tmp_path / 'out'}",
            f"run.files=['{tmp_path / 'in' / 'run_000.h5'}', '{tmp_path / 'in' / 'run_001.h5'}']",
            f"run.generate.truth={tmp_path / 'in' / 'truth.zarr'}",
            f"run.generate.scenario={tmp_path / 'demo_data' / SCENARIO.name}", "run.generate.shots=2400",
            "compute.progress=false",
            # what re-runs is checked, not the fit or the figures: no structural fit, no movie.gif
            "fit.mode=none", "render.animation=false"]
    out = tmp_path / "out"
    # the demo inputs (scenario, structures) the config names relative to the working directory
    shutil.copytree(SCENARIO.parent, tmp_path / "demo_data")

    def remade(updated):
        """Stage stores among the files Snakemake remade (a store may be tracked as <store>/zarr.json)."""
        names = set()
        for p in map(Path, updated):
            names.add(p.name)
            names.update(part for part in p.parts if part.endswith(".zarr"))
        return {n for n in STAGE_OUTPUTS if n in names}, names

    # up to the movie (rule assemble) until the last two steps: the figures are not what is checked here
    movie_only = ("assemble",)
    first = run_workflow(C.load(overrides=base), cores=2, workdir=tmp_path, targets=movie_only)
    made, _ = remade(first)
    assert made == set(STAGE_OUTPUTS)
    assert run_workflow(C.load(overrides=base), cores=2, workdir=tmp_path, targets=movie_only) == []  # no change

    rebin = base + ["binning.mode=width", "binning.width_ps=0.1", "binning.start_ps=-1", "binning.stop_ps=2"]
    made, names = remade(run_workflow(C.load(overrides=rebin), cores=2, workdir=tmp_path, targets=movie_only))
    assert made == {"bins.zarr", "binned.zarr", "movie.zarr"}
    assert "run_000.h5" not in names and "truth.zarr" not in names
    edges = zarr.open_group(str(out / "bins.zarr"), mode="r")["edges"][...]
    np.testing.assert_allclose(edges, np.linspace(-1, 2, 31), atol=1e-9)  # 30 bins of 0.1 ps
    assert xr.open_zarr(out / "movie.zarr").sizes["delay"] == 30

    cal = [-1375.0, 2.8, 0.0005]
    recal = rebin + [f"timing.calibration_fs={cal}"]
    made, names = remade(run_workflow(C.load(overrides=recal), cores=2, workdir=tmp_path, targets=movie_only))
    assert made == {"delays.zarr", "bins.zarr", "binned.zarr", "movie.zarr"}
    # the new delays follow the documented formula: stage - t0 + sign * (P(edge) - P(edge0)) / 1000
    with h5py.File(tmp_path / "in" / "run_000.h5") as h5:
        stage, edge = h5["shots/stage_delay"][...], h5["shots/timing_edge"][...]
    tim = C.load(overrides=recal)["timing"]
    poly = np.polynomial.polynomial.polyval
    expect = stage - tim["time_zero_ps"] + tim["sign"] * (poly(edge, cal) - poly(tim["edge_at_time_zero_px"], cal)) / 1000
    got = zarr.open_group(str(out / "delays.zarr"), mode="r")["delay"][: stage.size]
    np.testing.assert_allclose(got, expect, rtol=1e-12, atol=1e-12)

    # the bootstrap changes the differences' replicates only: select, time and bin keep their stores
    boot = recal + ["differences.bootstrap=3"]
    made, names = remade(run_workflow(C.load(overrides=boot), cores=2, workdir=tmp_path))
    assert made == {"binned.zarr", "movie.zarr"}
    assert "selection.zarr" not in names and "bins.zarr" not in names
    assert zarr.open_group(str(out / "binned.zarr"), mode="r")["difference_replicates"].shape[0] == 3

    # a render option re-draws the figures only: the movie is not re-assembled
    redraw = boot + ["render.dpi=90"]
    made, names = remade(run_workflow(C.load(overrides=redraw), cores=2, workdir=tmp_path))
    assert made == set() and ".done" in names
    assert leftovers(tmp_path) == []


# ------------------------------------------------------------------ the command line

def test_summary_of_run_files(tmp_path, capsys):
    a = run_datasets(n=90, seed=1)
    a["shots/timing_edge"][[4, 5, 60]] = np.nan
    b = run_datasets(n=60, seed=2, off_every=4)
    b["shots/pulse_id"] = b["shots/pulse_id"] + 200
    b["shots/timing_edge"][[0]] = np.nan
    fa, fb = write_h5(tmp_path / "a.h5", a), write_h5(tmp_path / "b.h5", b)
    assert cli.main(["summary", str(fa), str(fb)]) == 0
    out = capsys.readouterr().out
    on = int(a["shots/pump_on"].sum() + b["shots/pump_on"].sum())  # 60 + 45 (every 3rd, every 4th off)
    assert "shots: 150 (90 in a.h5, 60 in b.h5)" in out
    assert f"pump on: {on}, pump off: {150 - on}" in out
    assert "missing on 4 (2.7 %)" in out  # 4 NaN edges of 150 shots
    # with a config, the timing spread in fs
    assert cli.main(["summary", str(fa), "--set", "timing.calibration_fs=[0.0, 2.0]"]) == 0
    out = capsys.readouterr().out
    edge = a["shots/timing_edge"]
    assert f"{np.std(2.0 * edge[np.isfinite(edge)]):.1f} fs rms" in out  # 2 fs/px times the edge spread


def test_synth_command_writes_run_files_and_truth(tmp_path, capsys):
    out = tmp_path / "synth"
    assert cli.main(["synth", str(out), "--shots", "300", "--files", "2", "--seed", "5"]) == 0
    files = [out / "run_000.h5", out / "run_001.h5"]
    info = runfile.inspect_run(files)
    assert info.n_shots == 300 and info.counts == [150, 150] and info.mode == "curves"
    truth = xr.open_zarr(out / "truth.zarr", consolidated=False)
    assert truth["diff_true"].dims == ("time", "q") and truth.sizes["shot"] == 300
    assert "movieproc process" in capsys.readouterr().out
    # same seed, same shots
    again = tmp_path / "again"
    assert cli.main(["synth", str(again), "--shots", "300", "--files", "2", "--seed", "5"]) == 0
    with h5py.File(files[1]) as h1, h5py.File(again / "run_001.h5") as h2:
        np.testing.assert_array_equal(h1["curves"][...], h2["curves"][...])
        np.testing.assert_array_equal(h1["shots/timing_edge"][...], h2["shots/timing_edge"][...])


@pytest.mark.parametrize("edit, needle", [
    (lambda d: d.pop("shots/timing_edge"), "shots/timing_edge: found no such dataset"),
    (lambda d: d.update({"shots/pump_on": d["shots/pump_on"][:-1]}), "shots/pump_on: found length 239; expected length 240"),
], ids=["missing-dataset", "unequal-lengths"])
def test_process_rejects_a_bad_run_file_before_running(tmp_path, monkeypatch, capsys, edit, needle):
    data = run_datasets()
    edit(data)
    f = write_h5(tmp_path / "bad.h5", data)
    monkeypatch.chdir(tmp_path)
    assert cli.main(["process", str(f), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("movieproc: error: ") and f"{f}:{needle}" in err
    assert not (tmp_path / "out").exists()


def test_bins_outside_every_delay_are_a_data_error(tmp_path):
    from movieproc.errors import DataError
    from movieproc.stages import bins, delays, ingest, select

    f = write_h5(tmp_path / "in" / "run.h5", run_datasets())
    out = tmp_path / "out"
    cfg = C.load(overrides=["compute.progress=false", "compute.workers=1", "selection.outliers.window=60",
                            "binning.mode=edges", "binning.edges_ps=[100.0, 200.0]"])
    ingest.run({"files": [str(f)]}, out / "shots.zarr", cfg)
    select.run({"shots": out / "shots.zarr"}, out / "selection.zarr", cfg)
    delays.run({"shots": out / "shots.zarr"}, out / "delays.zarr", cfg)
    with pytest.raises(DataError, match="no kept pump-on shot falls inside the bins 100..200 ps"):
        bins.run({"shots": out / "shots.zarr", "selection": out / "selection.zarr", "delays": out / "delays.zarr"},
                 out / "bins.zarr", cfg)
    assert not (out / "bins.zarr").exists() and leftovers(out) == []


def test_process_run_without_pump_off_shots_fails_before_any_store(tmp_path, monkeypatch, capfd):
    data = run_datasets(n=300)
    data["shots/pump_on"][:] = True
    f = write_h5(tmp_path / "nooff.h5", data)
    monkeypatch.chdir(tmp_path)
    rc = cli.main(["process", str(f), "--out", str(tmp_path / "out"), "--set", "compute.progress=false"])
    assert rc == 2
    err = capfd.readouterr().err
    assert "movieproc: error: " in err
    assert f"{f}:shots/pump_on: found no pump-off shot among 300" in err  # the pre-flight check names the file
    assert not (tmp_path / "out").exists()  # refused before any store is written


# ------------------------------------------------------------------ config keys in stage errors

REDUCTION_STAGES = ["ingest", "integrate", "select", "delays", "bins", "difference"]


def _in_schema(schema, key):
    node = schema
    for part in key.split("."):
        node = node.get("properties", {}).get(part)
        if node is None:
            return False
    return True


@pytest.mark.parametrize("name", REDUCTION_STAGES)
def test_every_config_key_a_stage_maps_core_errors_to_exists_in_the_schema(name):
    keys = importlib.import_module(f"movieproc.stages.{name}").CONFIG_KEYS
    assert keys
    schema = C.load_schema()
    assert [key for key in keys.values() if not _in_schema(schema, key)] == []
    assert not _in_schema(schema, "binning.no_such_key")  # the walk can fail


@pytest.fixture(scope="module")
def reduced_run(tmp_path_factory):
    from movieproc.stages import delays, ingest, select

    d = tmp_path_factory.mktemp("keys")
    f = write_h5(d / "run.h5", run_datasets())
    cfg = C.load(overrides=["compute.progress=false", "compute.workers=1", "selection.outliers.window=60"])
    ingest.run({"files": [str(f)]}, d / "shots.zarr", cfg)
    select.run({"shots": d / "shots.zarr"}, d / "selection.zarr", cfg)
    delays.run({"shots": d / "shots.zarr"}, d / "delays.zarr", cfg)
    return d, cfg


def _set(config, key, value):
    section, *rest = key.split(".")
    node = config[section]
    for part in rest[:-1]:
        node = node[part]
    node[rest[-1]] = value


@pytest.mark.parametrize("stage, key, value", [
    ("delays", "timing.sign", 2),
    ("select", "differences.norm_q_range", [50.0, 60.0]),
    ("select", "selection.outliers.threshold", 0.0),
    ("select", "selection.outliers.window", 0),
    ("bins", "binning.width_ps", 0.0),
    ("bins", "binning.stop_ps", -5.0),
    ("bins", "binning.count", 0),
    ("bins", "binning.mode", "log"),
    ("bins", "binning.edges_ps", [1.0, 1.0]),
    ("difference", "differences.normalization", "median"),
    ("difference", "differences.bootstrap", -1),
])
def test_a_core_error_from_a_config_value_names_the_config_key(reduced_run, tmp_path, stage, key, value):
    # values the schema would refuse reach the stage directly: the core's own check names its
    # parameter, and the stage's CONFIG_KEYS turn that into the key (which exists in the schema)
    from movieproc.errors import ConfigError
    from movieproc.stages import bins

    d, cfg = reduced_run
    if stage == "difference":
        bins.run({"shots": d / "shots.zarr", "selection": d / "selection.zarr", "delays": d / "delays.zarr"},
                 tmp_path / "bins.zarr", cfg)
    bad = copy.deepcopy(cfg)
    if key in ("binning.width_ps", "binning.stop_ps"):
        _set(bad, "binning.mode", "width")
        _set(bad, "binning.start_ps", 0.0)
    if key == "binning.count":
        _set(bad, "binning.mode", "population")
    _set(bad, key, value)
    inputs = {"shots": d / "shots.zarr", "selection": d / "selection.zarr", "delays": d / "delays.zarr",
              "bins": tmp_path / "bins.zarr"}
    with pytest.raises(ConfigError) as err:
        importlib.import_module(f"movieproc.stages.{stage}").run(inputs, tmp_path / "out.zarr", bad)
    assert err.value.key == key and _in_schema(C.load_schema(), key)
    assert not (tmp_path / "out.zarr").exists()
