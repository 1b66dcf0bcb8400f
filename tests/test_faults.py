"""Bad input and faults: paths and names taken as data, inputs tracked by content, checks before
any work (``movieproc check``), nothing half-written or stale, one-line errors naming the cause,
picklable errors, and the command-line details (--help, --set with several pairs, --geometry).

Values checked here are properties of the inputs the tests write themselves (counts of shots they
damaged, paths they chose), not numbers from the tool.
"""

import os
import pickle
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml
import zarr

from conftest import leftovers, run_datasets, write_h5
from movieproc import checks, cli
from movieproc import config as C
from movieproc import errors as E
from movieproc import workflow as W
from movieproc.io import runfile

NASTY = ["run #2", "a: b", "yes", "2026", "back\\slash", "{braces}", "ünï cødé", " lead space", "x=1,y"]
STORES = ["shots.zarr", "selection.zarr", "delays.zarr", "bins.zarr", "binned.zarr", "movie.zarr"]
QUIET = ["--set", "compute.progress=false", "selection.outliers.window=60"]


def _args(files, out=None, name=None, geometry=None, overrides=(), config=None):
    return cli.build_parser().parse_args(
        ["process", *map(str, files)] + (["--out", str(out)] if out is not None else [])
        + (["--name", name] if name is not None else []) + (["--geometry", str(geometry)] if geometry else [])
        + (["--config", str(config)] if config else []) + (["--set", *overrides] if overrides else []))


# ------------------------------------------------------------------ 1. paths and names are data

@pytest.mark.parametrize("text", NASTY)
def test_process_takes_paths_and_names_as_they_are(text, tmp_path):
    f = write_h5(tmp_path / f"in {text}" / f"{text}.h5", run_datasets(n=30))
    cfg = cli.process_config(_args([f], out=f"results/{text}", name=text))
    assert cfg["output_dir"] == f"results/{text}"
    assert cfg["run"]["name"] == text and isinstance(cfg["run"]["name"], str)
    assert cfg["run"]["files"] == [str(f)]
    # the default output folder and name follow the first file's stem, also as data
    cfg = cli.process_config(_args([f]))
    assert cfg["output_dir"] == str(Path("results") / text) and cfg["run"]["name"] == text


@pytest.mark.parametrize("value, needle", [
    ("''", "config key 'output_dir': found ''"),
    ("'   '", "config key 'output_dir': found '   '"),
    ("/", "config key 'output_dir': found '/'; expected a folder below the filesystem root"),
])
def test_empty_or_root_output_dir_is_refused(value, needle, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["run", "--set", f"output_dir={value}"]) == 2
    assert needle in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_output_folder_that_is_a_file(tmp_path, monkeypatch, capsys):
    f = write_h5(tmp_path / "run.h5", run_datasets(n=30))
    (tmp_path / "taken").write_text("not a folder")
    monkeypatch.chdir(tmp_path)
    assert cli.main(["process", str(f), "--out", "taken"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert f"{tmp_path / 'taken'}: found an existing file, not a folder" in err
    assert (tmp_path / "taken").read_text() == "not a folder"


def test_output_folder_that_cannot_be_written(tmp_path, monkeypatch, capsys):
    f = write_h5(tmp_path / "run.h5", run_datasets(n=30))
    monkeypatch.chdir(tmp_path)

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(W.tempfile, "TemporaryFile", refuse)  # as a read-only folder answers
    assert cli.main(["process", str(f), "--out", "ro/out"]) == 2
    err = capsys.readouterr().err
    assert "found a folder that cannot be written (Permission denied" in err and "Traceback" not in err
    assert not (tmp_path / "ro").exists()


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_output_folder_for_real(tmp_path, capsys):
    f = write_h5(tmp_path / "run.h5", run_datasets(n=30))
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        assert cli.main(["process", str(f), "--out", str(ro)]) == 2
        assert "cannot be written" in capsys.readouterr().err
    finally:
        ro.chmod(0o755)


# ------------------------------------------------------------------ 3. checks before any work

def _bad_runs(tmp_path):
    """Run files with one content problem each, and what the error must name."""
    def dup(d):
        pid = d["shots/pulse_id"]
        pid[[10, 50, 80]] = pid[[9, 49, 79]]  # 3 repeats
        pid[100] = pid[98]  # and one that goes back

    def nan_curve(d):
        d["curves"][[3, 7], 5] = np.nan  # 2 shots

    def no_off(d):
        d["shots/pump_on"][:] = True

    def zero(d):
        for k in list(d):
            d[k] = d[k] if k == "q" else d[k][:0]

    def zero_energy(d):
        d["shots/pulse_energy"][:] = 0.0

    def nan_edges(d):
        d["shots/timing_edge"][:] = np.nan

    cases = {
        "dup": (dup, [], "shots/pulse_id: found 3 repeated and 1 decreasing pulse id(s), first in dup.h5 at shot 10"),
        "nancurve": (nan_curve, [], "curves: found non-finite intensities in 2 of 120 shot(s), first at shot 3"),
        "nooff": (no_off, [], "shots/pump_on: found no pump-off shot among 120"),
        "zero": (zero, [], "shots/pulse_id: found 0 shots; expected a run with at least one shot"),
        "zeroenergy": (zero_energy, [], "config key 'selection.pulse_energy.min_fraction_of_median': found 0.3 "
                       "while the median of shots/pulse_energy is 0 (120 of 120 shots are 0): the cut cannot work"),
        "nanedges": (nan_edges, ["timing.use_timing_tool=true"], "config key 'timing.use_timing_tool': found true, "
                     "but shots/timing_edge is missing (NaN) on all 120 shots"),
    }
    out = {}
    for name, (edit, sets, needle) in cases.items():
        data = run_datasets(n=120)
        edit(data)
        out[name] = (write_h5(tmp_path / "in" / f"{name}.h5", data), sets, needle)
    return out


@pytest.mark.parametrize("case", ["dup", "nancurve", "nooff", "zero", "zeroenergy", "nanedges"])
def test_content_errors_stop_the_run_before_any_store(case, tmp_path, monkeypatch, capsys):
    f, sets, needle = _bad_runs(tmp_path)[case]
    monkeypatch.chdir(tmp_path)
    rc = cli.main(["process", str(f), "--out", "out", *QUIET, *sets])
    err = capsys.readouterr().err
    assert rc == 2, err
    assert needle in err and err.count("\n") == 1 and "Traceback" not in err
    assert "every one of" not in err  # a 0-shot run is not reported as a selection that cut everything
    assert not (tmp_path / "out").exists()  # nothing written: no store, no effective config


def test_zero_pulse_energies_run_without_the_cut_when_asked(tmp_path):
    f, _, _ = _bad_runs(tmp_path)["zeroenergy"]
    cfg = cli.process_config(_args([f], out=tmp_path / "o",
                                   overrides=["selection.pulse_energy.min_fraction_of_median=null"]))
    assert [p for p in checks.check([str(f)], cfg) if p.fatal] == []


@pytest.mark.parametrize("value", [".nan", ".inf", "-.inf"])
def test_non_finite_config_numbers_are_refused(value, capsys, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    for key in ("timing.time_zero_ps", "binning.width_ps", "selection.pulse_energy.max", "timing.calibration_fs"):
        v = f"[0.0, {value}]" if key == "timing.calibration_fs" else value
        assert cli.main(["run", "--set", f"{key}={v}"]) == 2
        err = capsys.readouterr().err
        assert f"config key '{key}" in err and "a finite number" in err, err
    assert list(tmp_path.iterdir()) == []


def test_check_command_lists_every_problem_with_counts(tmp_path, capsys):
    good = write_h5(tmp_path / "in" / "good.h5", run_datasets(n=60))
    assert cli.main(["check", str(good)]) == 0
    assert capsys.readouterr().out.strip().endswith("0 error(s), 0 warning(s): ready to run")
    # two files that each break the contract: both named
    broken = run_datasets(n=60)
    broken.pop("shots/timing_edge")
    b1 = write_h5(tmp_path / "in" / "b1.h5", broken)
    b2 = tmp_path / "in" / "b2.h5"
    b2.write_bytes(b"not hdf5")
    assert cli.main(["check", str(b1), str(b2)]) == 1
    out = capsys.readouterr().out
    assert f"error: {b1}:shots/timing_edge: found no such dataset" in out
    assert f"error: {b2}: found a file HDF5 cannot open" in out and "2 error(s)" in out
    # one file with several content problems and a config problem at once
    data = run_datasets(n=120)
    data["shots/pulse_id"][[20, 40]] = data["shots/pulse_id"][[19, 39]]
    data["shots/stage_delay"][[1, 2, 3]] = np.inf
    data["shots/pump_on"][:] = True
    data["shots/timing_edge"][:] = np.nan
    f = write_h5(tmp_path / "in" / "many.h5", data)
    assert cli.main(["check", str(f), "--set", "timing.use_timing_tool=true", "binning.count=.nan"]) == 1
    out = capsys.readouterr().out
    assert "config key" not in out and "error: binning.count: found nan" in out  # the config is checked first
    assert cli.main(["check", str(f), "--set", "timing.use_timing_tool=true"]) == 1
    out = capsys.readouterr().out
    assert "2 repeated and 0 decreasing pulse id(s)" in out
    assert "shots/stage_delay: found 3 non-finite value(s), first in many.h5 at shot 1" in out
    assert "found no pump-off shot among 120" in out
    assert "timing.use_timing_tool: found true, but shots/timing_edge is missing (NaN) on all 120 shots" in out
    assert "4 error(s), 0 warning(s)" in out


def test_frames_need_an_explicit_geometry(tmp_path, capsys):
    data = run_datasets(n=20)
    data.pop("curves")
    data.pop("q")
    data["frames"] = np.ones((20, 8, 8), dtype=np.uint16)
    f = write_h5(tmp_path / "frames.h5", data)
    with pytest.raises(E.ConfigError, match="detector.distance_mm, detector.pixel_size_mm, detector.beam_center_px"):
        cli.process_config(_args([f], out=tmp_path / "o"))
    # --set gives some, a --geometry file the rest; --set wins over the file
    geo = tmp_path / "geo.yaml"
    geo.write_text(yaml.safe_dump({"detector": {"distance_mm": 80.0, "pixel_size_mm": 0.1,
                                                "beam_center_px": [3.5, 4.0]}, "binning": {"count": 3}}))
    with pytest.raises(E.ConfigError, match="'detector.beam_center_px'"):
        cli.process_config(_args([f], out=tmp_path / "o", overrides=["detector.distance_mm=70",
                                                                       "detector.pixel_size_mm=0.2"]))
    cfg = cli.process_config(_args([f], out=tmp_path / "o", geometry=geo, overrides=["detector.distance_mm=70"]))
    assert cfg["detector"]["distance_mm"] == 70 and cfg["detector"]["pixel_size_mm"] == 0.1
    assert cfg["detector"]["beam_center_px"] == [3.5, 4.0]
    assert cfg["binning"]["count"] == 30  # only the detector section of the geometry file is taken
    assert cfg["provenance"]["geometry_file"] == str(geo)
    # curves need no geometry
    curves = write_h5(tmp_path / "curves.h5", run_datasets(n=20))
    assert cli.process_config(_args([curves], out=tmp_path / "o"))["detector"]["beam_center_px"] is None
    (tmp_path / "nodet.yaml").write_text("binning: {count: 3}\n")
    assert cli.main(["process", str(f), "--geometry", str(tmp_path / "nodet.yaml")]) == 2
    assert f"{tmp_path / 'nodet.yaml'}: found no detector section" in capsys.readouterr().err


# ------------------------------------------------------------------ 5. errors name the cause

def test_summary_of_a_zero_shot_file(tmp_path, capsys):
    data = {k: (v if k == "q" else v[:0]) for k, v in run_datasets(n=10).items()}
    f = write_h5(tmp_path / "empty.h5", data)
    assert cli.main(["summary", str(f)]) == 2
    err = capsys.readouterr().err
    assert f"{f}:shots/pulse_id: found 0 shots" in err and "Traceback" not in err


def test_verbose_shows_the_traceback(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert cli.main(["-v", "run", "--set", "timing.time_zero_ps=.nan"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" in err and "config key 'timing.time_zero_ps'" in err


# ------------------------------------------------------------------ 2 and 4. content tracking, leftovers

def test_checksums_are_computed_once_and_redone_on_a_content_change(tmp_path, monkeypatch):
    from movieproc.io import shotstore

    f = write_h5(tmp_path / "run.h5", run_datasets(n=30))
    out = tmp_path / "out"
    out.mkdir()
    calls = []
    real = shotstore.file_checksum
    monkeypatch.setattr(shotstore, "file_checksum", lambda p, *a: calls.append(p) or real(p, *a))
    first = W.input_checksums([str(f)], out, save=True)
    assert first == {str(f): real(f)} and len(calls) == 1
    assert W.input_checksums([str(f)], out) == first and len(calls) == 1  # from the cache
    # new content, same size, the old modification time put back (as cp -p or rsync -t leave it)
    st = f.stat()
    other = write_h5(tmp_path / "other.h5", run_datasets(n=30, seed=9))
    assert other.stat().st_size == st.st_size
    shutil.copyfile(other, f)
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert f.stat().st_mtime_ns == st.st_mtime_ns
    again = W.input_checksums([str(f)], out)
    assert len(calls) == 2 and again[str(f)] == real(other) != first[str(f)]


def test_leftovers_of_killed_stages_are_removed(tmp_path):
    out = tmp_path / "out"
    (out / ".shots.zarr.tmp-1a2b3c4d" / "curves").mkdir(parents=True)
    (out / ".movie.zarr.old-5e6f7a8b").mkdir()
    (out / "figures").mkdir()
    (out / "figures" / ".map.png.tmp-00ff00ff").write_bytes(b"x")
    (out / ".config.effective.yaml.tmp-12345678").write_text("x")
    keep = [out / "shots.zarr", out / "figures" / "map.png", out / "notes.tmp.txt"]
    keep[0].mkdir()
    keep[1].write_bytes(b"png")
    keep[2].write_text("mine")
    removed = W.remove_leftovers(out)
    assert len(removed) == 4 and leftovers(out) == []
    assert all(p.exists() for p in keep)


def test_dry_run_writes_nothing(tmp_path, monkeypatch):
    f = write_h5(tmp_path / "in" / "run.h5", run_datasets(n=120))
    monkeypatch.chdir(tmp_path)
    assert cli.main(["process", str(f), "--out", "out {x}", "--dry-run", *QUIET]) == 0
    assert not (tmp_path / "out {x}").exists()


@pytest.mark.slow
def test_end_to_end_with_nasty_paths_content_tracking_leftovers_and_stale_marker(tmp_path, capsys, monkeypatch):
    """One run through the command with braces, '#', ':', a backslash and unicode in every path;
    then: up to date; an input replaced with older modification time is re-ingested; a killed stage's
    temporary is removed; a failing config leaves a STALE marker that summary and the run report."""
    monkeypatch.chdir(tmp_path)
    src = tmp_path / "in {a} #1"
    f = write_h5(src / "rün: 1\\x.h5", run_datasets(n=600))
    out = tmp_path / "res" / "run #2 {x}: ü\\b"
    base = ["process", str(f), "--out", str(out), "--name", "yes", "--set", "compute.progress=false",
            "selection.outliers.window=60", "binning.count=5", "render.animation=false"]  # figures/.done, no gif
    assert cli.main(base) == 0, capsys.readouterr().err[-2000:]
    for name in STORES:
        assert (out / name / "zarr.json").is_file(), name
    assert (out / "figures" / ".done").is_file()
    assert yaml.safe_load((out / "config.effective.yaml").read_text())["run"]["name"] == "yes"
    movie = zarr.open_group(str(out / "movie.zarr"), mode="r")
    from movieproc.io import movie as movie_attrs
    from movieproc.io.shotstore import file_checksum

    assert list(movie_attrs.input_files(movie).values()) == [file_checksum(f)]
    assert "everything was up to date" not in capsys.readouterr().out

    assert cli.main(base) == 0
    assert "updated: 0 output(s) (everything was up to date)" in capsys.readouterr().out

    # new content with the old modification time, and a killed ingest's temporary
    st = f.stat()
    write_h5(f, run_datasets(n=600, seed=7))
    os.utime(f, ns=(st.st_atime_ns, st.st_mtime_ns - 10**9))
    (out / ".shots.zarr.tmp-deadbeef").mkdir()
    assert cli.main(base) == 0
    assert "everything was up to date" not in capsys.readouterr().out
    assert leftovers(out) == []
    movie = zarr.open_group(str(out / "movie.zarr"), mode="r")
    assert list(movie_attrs.input_files(movie).values()) == [file_checksum(f)]

    # a config the bin stage refuses: the earlier movie stays, marked stale
    # (binning.count belongs to the other modes: it is left out, or the config check refuses it first)
    bad = [a for a in base if a != "binning.count=5"] + ["binning.mode=edges", "binning.edges_ps=[100.0, 200.0]"]
    assert cli.main(bad) == 2
    err = capsys.readouterr().err
    assert "no kept pump-on shot falls inside the bins" in err and "STALE: the movie and figures" in err
    assert (out / W.STALE_FILE).is_file() and leftovers(out) == []
    assert cli.main(["summary", str(out / "movie.zarr")]) == 0
    assert capsys.readouterr().out.startswith("STALE: ")
    assert cli.main(base) == 0
    assert not (out / W.STALE_FILE).exists()


# ------------------------------------------------------------------ 7. picklable errors

@pytest.mark.parametrize("exc, fields", [
    (E.MovieprocError("plain message"), {}),
    (E.InputError(Path("/d/run.h5"), "no such dataset", "a dataset"),
     {"source": "/d/run.h5", "found": "no such dataset", "expected": "a dataset"}),
    (E.ConfigError("binning.count", "0", "a value with minimum 1"),
     {"key": "binning.count", "found": "0", "expected": "a value with minimum 1"}),
    (E.DataError("no pump-off shot survived the selection"), {}),
    (E.WorkflowFailed("the workflow stopped: x"), {}),
    (E.ParameterError("p0.sigma", "-0.1", "a positive width in ps"),
     {"parameter": "p0.sigma", "found": "-0.1", "expected": "a positive width in ps"}),
], ids=lambda v: type(v).__name__ if isinstance(v, Exception) else "")
def test_every_error_survives_pickling(exc, fields):
    back = pickle.loads(pickle.dumps(exc))
    assert type(back) is type(exc) and str(back) == str(exc) and back.args == exc.args
    for name, value in fields.items():
        assert getattr(back, name) == value


def test_every_error_class_is_covered_by_the_pickling_test():
    classes = {c.__name__ for c in vars(E).values() if isinstance(c, type) and issubclass(c, E.MovieprocError)}
    assert classes == {"MovieprocError", "InputError", "ConfigError", "DataError", "WorkflowFailed",
                       "ParameterError"}


# ------------------------------------------------------------------ 8. the command line

def test_process_help_names_its_default_config():
    text = subprocess.run([sys.executable, "-m", "movieproc.cli", "process", "--help"], capture_output=True,
                          text=True, env={**os.environ, "COLUMNS": "200"}).stdout
    assert "config/process.yaml" in text and "config/config.yaml" not in text


def test_set_takes_several_pairs_and_repeats():
    args = cli.build_parser().parse_args(["run", "--set", "binning.count=7", "timing.sign=-1",
                                          "--set", "compute.workers=3", "--cores", "1"])
    assert args.overrides == ["binning.count=7", "timing.sign=-1", "compute.workers=3"]
    cfg = C.load(overrides=args.overrides)
    assert (cfg["binning"]["count"], cfg["timing"]["sign"], cfg["compute"]["workers"]) == (7, -1, 3)


def test_inspect_reports_a_group_where_a_dataset_belongs(tmp_path):
    import h5py

    data = run_datasets(n=20)
    f = write_h5(tmp_path / "g.h5", {k: v for k, v in data.items() if k != "curves"})
    with h5py.File(f, "a") as h5:
        h5.create_group("curves")
    with pytest.raises(E.InputError, match="g.h5:curves: found a Group; expected a dataset 'curves'"):
        runfile.inspect_run([f])


def test_stale_marker_while_running_and_after_an_interruption(tmp_path, monkeypatch, capsys):
    """A run killed outright cannot write anything: the marker is written when the run starts."""
    f = write_h5(tmp_path / "run.h5", run_datasets(n=120))
    out = tmp_path / "out"
    (out / "movie.zarr").mkdir(parents=True)  # a movie of an earlier run
    cfg = cli.process_config(_args([f], out=out, overrides=["compute.progress=false"]))
    seen = []

    def interrupted(*args, **kwargs):
        seen.append((out / W.STALE_FILE).read_text())
        raise KeyboardInterrupt

    monkeypatch.setattr(W, "_snakemake", interrupted)
    with pytest.raises(KeyboardInterrupt):
        W.run_workflow(cfg)
    assert "has not finished (if this file stays, it was interrupted or killed)" in seen[0]
    text = (out / W.STALE_FILE).read_text()
    assert "failed: KeyboardInterrupt" in text and "movie.zarr in this folder come from an earlier run" in text
    assert W.stale_note(out).startswith(f"STALE: the movie and figures in {out} come from an earlier run")
    monkeypatch.setattr(W, "_snakemake", lambda *a, **k: [])
    W.run_workflow(cfg)
    assert not (out / W.STALE_FILE).exists()
