"""The ``movieproc`` command.

    movieproc run       run the workflow on a config (default: the demo)
    movieproc process   process given run files with generic settings (config/process.yaml)
    movieproc synth     write a synthetic run of the demo scenario
    movieproc summary   summarize run files or a movie
    movieproc check     list every problem of run files and a config, before a run
    movieproc sign-check  which sign of the timing correction sharpens the onset
    movieproc calibrate detector geometry from a calibrant powder image
    movieproc export    a movie as a netCDF-4 file
    movieproc render    re-draw the figures and report.html of an existing movie (runs nothing)
    movieproc init      write a starter config to fill in

Every config value can be overridden with ``--set dotted.key=value`` (several after
one --set, and --set may be repeated; values are parsed as YAML), e.g.
``--set binning.mode=width binning.width_ps=0.1``. Paths and names given as
options (--out, --name, run files, --config) are taken as they are, never parsed.
A key of another binning mode than binning.mode is refused, not ignored.

Long work shows its progress on stderr: a bar on a terminal, a plain line per 10 %
in a log; --quiet shows neither, nor info messages (warnings and errors still).
"""

from __future__ import annotations

import argparse
import logging
import sys
import traceback
from pathlib import Path

from . import __version__
from . import config as mpconfig
from . import progress
from . import resources
from .safety import SAFETY
from .errors import MovieprocError
from .stages.common import setup_logging

#: Generic settings of ``movieproc process`` (and of check / sign-check with run files).
PROCESS_CONFIG = resources.process_config()
#: How --help names the default config of the other commands.
DEFAULT_CONFIG_TEXT = f"{resources.default_config()}, the demo"


#: Suffixes of files (run files, configs) that a --set list may swallow when they follow its pairs.
FILE_SUFFIXES = (".h5", ".hdf5", ".nxs", ".yaml", ".yml")


class _Extend(argparse.Action):
    """``--set A=1 B=2 --set C=3`` collects [A=1, B=2, C=3]."""

    def __call__(self, parser, namespace, values, option_string=None):
        for value in values:
            if "=" not in value and (Path(value).suffix.lower() in FILE_SUFFIXES or Path(value).exists()):
                # a run file after the pairs, taken by --set (other values without '=' are config errors)
                parser.error(f"{option_string}: {value!r} is not KEY=VALUE; put run files before {option_string}, "
                             f"or end its pairs with -- (movieproc process {option_string} a.b=1 -- RUN.h5)")
        setattr(namespace, self.dest, list(getattr(namespace, self.dest) or []) + list(values))


def add_set(p):
    """The ``--set KEY=VALUE ...`` option (several pairs after one --set; repeatable)."""
    p.add_argument("--set", dest="overrides", action=_Extend, nargs="+", default=[], metavar="KEY=VALUE",
                   help="override config values, several pairs after one --set (values parsed as YAML), e.g. "
                   "--set timing.sign=-1 differences.references=6; repeatable")


def _add_config_args(p, default_config=DEFAULT_CONFIG_TEXT):
    p.add_argument("--config", "-c", help=f"config YAML (default: {default_config})")
    add_set(p)
    p.add_argument("--cores", type=int, help="cores for the workflow (default 2; with --profile: the profile's, "
                   "else jobs times compute.workers for a cluster executor)")
    p.add_argument("--dry-run", action="store_true", help="show which stages would run, run nothing")
    p.add_argument("--force", nargs="+", default=[], metavar="STAGE",
                   help="re-run these stages even if up to date (e.g. ingest)")


def _add_executor_args(p):
    p.add_argument("--profile", metavar="DIR", help="Snakemake profile (a folder with config.yaml, or the file) "
                   "naming the executor and per-rule resources, e.g. workflow/profiles/cluster; "
                   "--set values and config.effective.yaml work as without it")
    p.add_argument("--jobs", "-j", type=int, metavar="N", help="jobs at once (cluster jobs with a cluster "
                   "executor; overrides the profile's jobs)")


def _run(config, args):
    from .workflow import WorkflowFailed, output_folder, run_workflow, stale_note

    out = Path(config["output_dir"])
    try:
        updated = run_workflow(config, cores=args.cores, forcerun=args.force, dryrun=args.dry_run,
                               profile=args.profile, jobs=args.jobs)
    except WorkflowFailed:
        note = stale_note(output_folder(config))
        if note:
            print(note, file=sys.stderr)
        raise
    if args.dry_run:
        return
    movie = out / "movie.zarr"
    print(f"\nfigures: {out / 'figures'}")
    print(f"report:  {out / 'figures' / 'report.html'}")
    print(f"updated: {len(updated)} output(s)" + ("" if updated else " (everything was up to date)"))
    if movie.exists():
        from .summary import summarize_movie

        print()
        print(summarize_movie(movie))  # starts with "movie: PATH"
    else:
        print(f"movie:   {movie} (not written)")
    print("\nNote: " + SAFETY)


def build_config(path=None, overrides=(), layers=()) -> tuple[dict, dict]:
    """The raw and the validated config of a command (:func:`movieproc.config.build`, then validated),
    with the binning keys the mode would ignore refused (:func:`movieproc.checks.check_binning_keys`)
    and, where they came from a layer (a mode switched on the command line), reset to their defaults
    (:func:`movieproc.checks.reset_other_binning_modes`): the config written out runs again as it is."""
    from .checks import check_binning_keys, reset_other_binning_modes

    raw = mpconfig.build(path, overrides, layers)
    config = mpconfig.validate(raw)
    check_binning_keys(raw, overrides)
    return raw, reset_other_binning_modes(config)


def load_config(path=None, overrides=(), layers=()) -> dict:
    """The validated config of a command (see :func:`build_config`)."""
    return build_config(path, overrides, layers)[1]


def cmd_run(args):
    _run(load_config(args.config, args.overrides), args)


def read_geometry(path) -> dict:
    """The ``detector:`` section of a YAML file, as a config layer ``{"detector": {...}}``."""
    from .errors import InputError

    raw = mpconfig.read_file(path)
    detector = raw.get("detector")
    if not isinstance(detector, dict):
        raise InputError(path, "no detector section" if detector is None else f"detector: {detector!r}",
                          "a 'detector:' mapping with the geometry (distance_mm, pixel_size_mm, beam_center_px...)")
    return {"detector": detector}


def process_layers(files, out=None, name=None, geometry=None) -> list:
    """Config layers of ``movieproc process``, every path and name as data (never parsed as YAML):
    the geometry file's detector section, then run files, output folder and run name."""
    first = Path(files[0])
    layers = [read_geometry(geometry)] if geometry else []
    layers.append({"run": {"files": [str(f) for f in files], "generate": None,
                           "name": name if name is not None else first.stem},
                   "output_dir": out if out is not None else str(Path("results") / first.stem)})
    if geometry:
        layers[-1]["provenance"] = {"geometry_file": str(geometry)}
    return layers


def process_config(args) -> dict:
    """The validated config of ``movieproc process`` (see :func:`process_layers`); frames need an
    explicit geometry."""
    raw, config = build_config(args.config or PROCESS_CONFIG, args.overrides,
                               process_layers(args.files, args.out, args.name, args.geometry))
    _require_geometry(raw, config)
    return config


def _require_geometry(raw: dict, config: dict):
    from .checks import missing_geometry
    from .errors import ConfigError, InputError
    from .io.runfile import inspect_run

    missing = missing_geometry(raw)
    if not missing:
        return
    try:
        mode = inspect_run(config["run"]["files"]).mode
    except InputError:
        return  # the pre-flight reports the file's problem
    if mode == "frames":
        raise ConfigError(", ".join(missing), "no value for frames-mode run files",
                          "the detector geometry of the set-up that recorded them: --geometry FILE.yaml "
                          "(a detector: section) or --set " + " ".join(f"{k}=..." for k in missing))


def cmd_process(args):
    _run(process_config(args), args)


def cmd_check(args):
    """Report every problem of run files and a config; exit 1 when one is fatal."""
    from .checks import Problem, check
    from .errors import ConfigError

    if args.files:
        layers = process_layers(args.files, args.out, None, args.geometry)
        path = args.config or PROCESS_CONFIG
    else:
        layers, path = [], args.config
    problems = []
    try:
        raw, config = build_config(path, args.overrides, layers)
    except ConfigError as exc:
        problems.append(Problem.of(exc))
        config = None
    if config is not None:
        files = [str(f) for f in config["run"]["files"]]
        problems += check(files, config)
        try:
            _require_geometry(raw, config)
        except ConfigError as exc:
            problems.append(Problem.of(exc))
    fatal = sum(p.fatal for p in problems)
    for p in problems:
        print(p.line())
    print(f"{fatal} error(s), {len(problems) - fatal} warning(s)" + ("" if problems else ": ready to run"))
    return 1 if fatal else 0


def cmd_synth(args):
    from .synth import synthesize_run

    out = Path(args.out)
    files = [out / f"run_{i:03d}.h5" for i in range(args.files)]
    synthesize_run(args.scenario, args.shots, args.seed, files, out / "truth.zarr", args.mode)
    print(f"wrote {len(files)} run file(s) in {out} and the ground truth in {out / 'truth.zarr'}")
    print(f"process them with: movieproc process {' '.join(str(f) for f in files)}")


def cmd_summary(args):
    from .summary import summarize_movie, summarize_run

    from .workflow import stale_note

    paths = [Path(p) for p in args.paths]
    if len(paths) == 1 and paths[0].is_dir():
        note = stale_note(paths[0].parent)
        if note:
            print(note)
        print(summarize_movie(paths[0]))
    else:
        timing = mpconfig.load(args.config, args.overrides)["timing"] if (args.config or args.overrides) else None
        print(summarize_run(paths, timing))


def build_parser():
    parser = argparse.ArgumentParser(prog="movieproc", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"movieproc {__version__}")
    loud = parser.add_mutually_exclusive_group()
    loud.add_argument("-v", "--verbose", action="store_true", help="debug logging, and tracebacks of errors")
    loud.add_argument("-q", "--quiet", action="store_true", help="no progress bars or info messages (of movieproc "
                      "and Snakemake); warnings and errors are still shown")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("run", help="run the workflow on a config (default: the demo config)")
    _add_config_args(p)
    _add_executor_args(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("process", help=f"process run files with generic settings ({PROCESS_CONFIG}) plus overrides")
    p.add_argument("files", nargs="+", help="HDF5 run files (shots concatenated in file-name order)")
    p.add_argument("--out", "-o", help="output folder (default results/<first file name>)")
    p.add_argument("--name", help="run label for figures")
    p.add_argument("--geometry", metavar="FILE", help="YAML file whose detector: section gives the detector "
                   "geometry (needed for frames; --set values override it)")
    _add_config_args(p, default_config=f"{PROCESS_CONFIG}, generic settings")
    _add_executor_args(p)
    p.set_defaults(func=cmd_process)

    p = sub.add_parser("check", help="list every problem of run files and a config at once (exit 1 if any is fatal)")
    p.add_argument("files", nargs="*", help="HDF5 run files (default: run.files of the config)")
    p.add_argument("--config", "-c", help=f"config YAML (default: {PROCESS_CONFIG} with files given, "
                   f"else {DEFAULT_CONFIG_TEXT})")
    p.add_argument("--out", "-o", help="output folder the run would use")
    p.add_argument("--geometry", metavar="FILE", help="YAML file with a detector: section")
    add_set(p)
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("synth", help="write a synthetic run of the demo scenario with its ground truth")
    p.add_argument("out", help="output folder")
    p.add_argument("--scenario", default=str(resources.demo_file("scenario.yaml")),
                   help="scenario YAML: structures, kinetics, timing and noise of the run (default: %(default)s)")
    p.add_argument("--shots", type=int, default=24000, help="shots in all files together (default %(default)s)")
    p.add_argument("--seed", type=int, default=2026, help="seed of the random draws (default %(default)s)")
    p.add_argument("--files", type=int, default=2, help="run files to split the shots into (default %(default)s)")
    p.add_argument("--mode", choices=["curves", "frames"], default="curves",
                   help="write integrated curves or detector frames (default %(default)s)")
    p.set_defaults(func=cmd_synth)

    from . import sign_check_command

    sign_check_command.add_parser(sub)

    p = sub.add_parser("summary", help="summarize run files, or a movie store")
    p.add_argument("paths", nargs="+", help="run files (HDF5) or one movie.zarr")
    p.add_argument("--config", "-c", help="config whose timing calibration converts edges to fs")
    add_set(p)
    p.set_defaults(func=cmd_summary)

    from . import calibrate_command, export_command, init_command, render_command

    calibrate_command.add_parser(sub)
    export_command.add_parser(sub)
    render_command.add_parser(sub)
    init_command.add_parser(sub)
    return parser


def _report_fatal_signals():
    """Print every thread's Python stack on a fatal signal (``faulthandler``): a bus error (SIGBUS)
    from a run file cut short while its frames are mapped (``compute.map_frames``) then says where."""
    import faulthandler
    import os

    os.environ.setdefault("PYTHONFAULTHANDLER", "1")  # in the worker processes this run starts, too
    if not faulthandler.is_enabled():
        try:
            faulthandler.enable()
        except (AttributeError, ValueError, RuntimeError, OSError):  # a stderr without a file descriptor
            pass


def main(argv=None):
    args = build_parser().parse_args(argv)
    was_quiet = progress.quiet()
    if args.quiet:
        progress.set_quiet(True)  # also for the Snakemake jobs this run starts
    setup_logging(logging.DEBUG if args.verbose else logging.INFO)
    _report_fatal_signals()
    try:
        return int(args.func(args) or 0)
    except MovieprocError as exc:
        if args.verbose:
            traceback.print_exc()
        print(f"movieproc: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # a file system refusal the checks could not foresee (disk full, a lost mount)
        if args.verbose:
            traceback.print_exc()
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"movieproc: error: {where}{exc.strerror or exc} (rerun with -v for the traceback)", file=sys.stderr)
        return 2
    finally:
        progress.set_quiet(was_quiet)


if __name__ == "__main__":
    sys.exit(main())
