"""The command line: options each command uses (with help), --set, --quiet, the binning-mode check,
sign-check on run files."""

import argparse
import shutil

import pytest
import yaml

from movieproc import checks, cli, progress
from movieproc import config as C
from movieproc.errors import ConfigError

from conftest import run_datasets, write_h5


def _subparsers():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return sub.choices


def test_every_option_of_every_command_has_help():
    for name, p in _subparsers().items():
        for action in p._actions:
            if isinstance(action, argparse._HelpAction):
                continue
            assert action.help, f"{name}: {action.dest} has no help text"


def test_process_help_names_its_real_default_config(capsys):
    with pytest.raises(SystemExit):
        cli.main(["process", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert str(cli.PROCESS_CONFIG) in text and cli.PROCESS_CONFIG.is_file()
    # and it is the file process reads: population bins, as config/process.yaml says
    assert yaml.safe_load(cli.PROCESS_CONFIG.read_text())["binning"]["mode"] == "population"


def test_set_takes_several_pairs_and_repeats():
    args = cli.build_parser().parse_args(["run", "--set", "timing.sign=-1", "differences.references=6",
                                          "--set", "compute.workers=1"])
    assert args.overrides == ["timing.sign=-1", "differences.references=6", "compute.workers=1"]
    config = cli.load_config(None, args.overrides)
    assert (config["timing"]["sign"], config["differences"]["references"], config["compute"]["workers"]) == (-1, 6, 1)


def test_readme_frames_example_sets_every_pair(tmp_path):
    # README: --set detector.distance_mm=... detector.pixel_size_mm=... detector.beam_center_px='[row, col]'
    f = write_h5(tmp_path / "run.h5", run_datasets())
    args = cli.build_parser().parse_args(["process", str(f), "--out", str(tmp_path / "o"), "--set",
                                          "detector.distance_mm=70", "detector.pixel_size_mm=0.1",
                                          "detector.beam_center_px=[10, 12]"])
    det = cli.process_config(args)["detector"]
    assert (det["distance_mm"], det["pixel_size_mm"], det["beam_center_px"]) == (70, 0.1, [10, 12])


def test_set_swallowing_a_file_is_refused_with_the_fix(capsys):
    with pytest.raises(SystemExit) as exit_:
        cli.build_parser().parse_args(["process", "--set", "timing.sign=-1", "run.h5"])
    assert exit_.value.code == 2
    err = capsys.readouterr().err
    assert "'run.h5' is not KEY=VALUE" in err and "--" in err


def test_sign_check_has_only_the_options_it_uses():
    p = _subparsers()["sign-check"]
    dests = {a.dest for a in p._actions} - {"help"}
    assert dests == {"files", "config", "out", "geometry", "overrides", "cores", "window"}
    args = cli.build_parser().parse_args(["sign-check", "a.h5", "b.h5", "--window", "0.5"])
    assert args.files == ["a.h5", "b.h5"] and args.window == 0.5
    for unused in (["--dry-run"], ["--force", "ingest"], ["--profile", "x"]):
        with pytest.raises(SystemExit):
            cli.build_parser().parse_args(["sign-check", *unused])


# ------------------------------------------------------------------ binning keys of another mode

def test_width_on_the_demo_says_why_it_does_not_apply(capsys):
    # the demo config bins by edges (config/config.yaml): a width alone would be ignored
    assert cli.main(["run", "--set", "binning.width_ps=0.1", "--dry-run"]) == 2
    err = capsys.readouterr().err
    assert "binning.width_ps" in err and "binning.mode is 'edges'" in err
    assert "--set binning.mode=width binning.width_ps=0.1" in err


def test_width_on_the_demo_works_with_its_mode():
    config = cli.load_config(None, ["binning.mode=width", "binning.width_ps=0.1"])
    assert config["binning"]["mode"] == "width" and config["binning"]["width_ps"] == 0.1


@pytest.mark.parametrize("overrides, key", [
    (["binning.count=12"], "binning.count"),                                   # demo: edges mode
    (["binning.mode=population", "binning.edges_ps=[0, 1, 2]"], "binning.edges_ps"),
    (["binning.mode=edges", "binning.edges_ps=[0, 1]", "binning.start_ps=-1"], "binning.start_ps"),
])
def test_keys_of_another_mode_are_refused(overrides, key):
    with pytest.raises(ConfigError) as err:
        cli.load_config(None, overrides)
    assert err.value.key == key and "binning.mode" in err.value.found
    schema = C.load_schema()["properties"]["binning"]["properties"]
    assert key.split(".")[1] in schema  # the key named exists in the schema


def test_a_config_file_contradicting_itself_is_refused_but_an_effective_config_passes(tmp_path):
    own = tmp_path / "own.yaml"
    own.write_text("run: {files: [run.h5]}\nbinning:\n  mode: edges\n  edges_ps: [0, 1, 2]\n  width_ps: 0.2\n")
    with pytest.raises(ConfigError, match="binning.width_ps"):
        cli.load_config(own)
    # switching the mode on the command line leaves the file's other keys alone
    assert cli.load_config(own, ["binning.mode=width"])["binning"]["width_ps"] == 0.2
    # a written-out validated config holds every mode's defaults: it loads again
    effective = tmp_path / "effective.yaml"
    effective.write_text(yaml.safe_dump(cli.load_config()))
    assert cli.load_config(effective)["binning"]["mode"] == "edges"


def test_an_effective_config_after_a_mode_switched_on_the_command_line_runs_again(tmp_path):
    # config/process.yaml bins by population (count: 30); switched to width on the command line,
    # its count is reset to the default, so the config written out loads again as it is
    switched = cli.load_config(cli.PROCESS_CONFIG, ["run.files=[run.h5]", "binning.mode=width",
                                                    "binning.width_ps=0.15"])
    count_default = C.load_schema()["properties"]["binning"]["properties"]["count"]["default"]
    assert switched["binning"]["width_ps"] == 0.15 and switched["binning"]["count"] == count_default
    effective = tmp_path / "config.effective.yaml"
    effective.write_text(yaml.safe_dump(switched))
    again = cli.load_config(effective)
    assert again["binning"] == switched["binning"]


def test_check_lists_the_binning_conflict(capsys):
    assert cli.main(["check", "--set", "binning.width_ps=0.1"]) == 1
    out = capsys.readouterr().out
    assert "error: binning.width_ps" in out


def test_check_binning_keys_knows_every_mode():
    schema = C.load_schema()["properties"]["binning"]["properties"]
    assert set(checks.BINNING_MODE_KEYS) == set(schema["mode"]["enum"])
    for keys in checks.BINNING_MODE_KEYS.values():
        assert set(keys) <= set(schema)


# ------------------------------------------------------------------ --quiet

def test_quiet_is_restored_after_the_command(monkeypatch, tmp_path, capsys):
    monkeypatch.delenv(progress.QUIET_ENV, raising=False)
    f = write_h5(tmp_path / "run.h5", run_datasets())
    assert cli.main(["--quiet", "summary", str(f)]) == 0
    assert not progress.quiet()
    with pytest.raises(SystemExit):
        cli.build_parser().parse_args(["--quiet", "--verbose", "summary", "x"])


@pytest.mark.slow
def test_quiet_run_shows_no_progress_or_info_but_errors(tmp_path, monkeypatch, capfd):
    data = run_datasets(n=600)
    f = write_h5(tmp_path / "run.h5", data)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(progress, "DELAY_S", 0.0)
    monkeypatch.delenv(progress.QUIET_ENV, raising=False)
    assert cli.main(["--quiet", "process", str(f), "--out", "o", "--set", "compute.chunk_shots=100"]) == 0
    captured = capfd.readouterr()
    assert "movieproc progress" not in captured.err and " INFO: " not in captured.err
    assert "Building DAG" not in captured.err and "steps" not in captured.err  # Snakemake's own lines
    assert "movie:" in captured.out
    # the same run, not quiet, shows chunks progressing (ingest: 6 chunks of 100 shots) and info lines
    assert cli.main(["process", str(f), "--out", "o2", "--set", "compute.chunk_shots=100"]) == 0
    err = capfd.readouterr().err
    assert "movieproc progress: ingest 100 % (6/6 chunks" in err and " INFO: " in err and "\r" not in err
    # a stage that fails in quiet mode still says why
    bad = write_h5(tmp_path / "bad.h5", {**data, "shots/stage_delay": data["shots/stage_delay"] + 1000.0})
    assert cli.main(["--quiet", "process", str(bad), "--out", "o3", "--set", "binning.mode=edges",
                     "binning.edges_ps=[0, 1]"]) == 2
    err = capfd.readouterr().err
    assert "movieproc: error:" in err and "no kept pump-on shot falls inside the bins" in err
    assert "Error in rule bin" in err  # Snakemake's own error report is kept


# ------------------------------------------------------------------ sign-check

@pytest.mark.slow
def test_sign_check_on_run_files_and_on_the_processed_demo(demo_run, tmp_path, monkeypatch, capsys):
    """``sign-check FILE.h5 ...`` ingests and selects them, then gives the same verdict as on the run."""
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-2000:]
    monkeypatch.chdir(demo_run.work)
    assert cli.main(["--quiet", "sign-check"]) == 0  # the demo's own output folder, already processed
    on_run = capsys.readouterr().out
    work = tmp_path / "w"
    shutil.copytree(demo_run.work / "demo_data", work / "demo_data")
    monkeypatch.chdir(work)
    files = [str(f) for f in demo_run.files]
    assert cli.main(["--quiet", "sign-check", *files, "--config", str(C.DEFAULT_CONFIG), "--out", "sc"]) == 0
    on_files = capsys.readouterr().out
    assert (work / "sc" / "shots.zarr").is_dir() and (work / "sc" / "selection.zarr").is_dir()
    assert not (work / "sc" / "movie.zarr").exists()  # only what the check reads
    # demo_data/scenario.yaml: timing sign -1 (the config has it too)
    for text in (on_run, on_files):
        assert "the onset is sharpest with timing.sign = -1 (config has -1)" in text
    assert on_run.splitlines()[:4] == on_files.splitlines()[:4]  # same shots, same widths
