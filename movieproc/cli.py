"""The ``movieproc`` command.

    movieproc run       run the workflow on a config (default: the demo)
    movieproc process   process given run files with the default config
    movieproc synth     write a synthetic run of the demo scenario
    movieproc summary   summarize run files or a movie
    movieproc sign-check  which sign of the timing correction sharpens the onset

Every config value can be overridden with ``--set dotted.key=value`` (repeat for
several; values are parsed as YAML), e.g. ``--set binning.width_ps=0.1``.
"""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

from . import __version__
from . import config as mpconfig
from .errors import MovieprocError
from .stages.common import setup_logging

SAFETY = ("Note: movieproc analyses data. It does not set beam, laser or safety parameters; "
          "local rules and the facility's safety staff decide those.")


def _add_config_args(p):
    p.add_argument("--config", "-c", help="config YAML (default: config/config.yaml, the demo)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override one config value, e.g. --set timing.sign=-1 (repeatable)")
    p.add_argument("--cores", type=int, default=2, help="cores for the workflow (default 2)")
    p.add_argument("--dry-run", action="store_true", help="show which stages would run, run nothing")
    p.add_argument("--force", nargs="+", default=[], metavar="STAGE",
                   help="re-run these stages even if up to date (e.g. ingest)")


def _run(config, args):
    from .workflow import run_workflow

    updated = run_workflow(config, cores=args.cores, forcerun=args.force, dryrun=args.dry_run)
    if args.dry_run:
        return
    out = Path(config["output_dir"])
    print(f"\nmovie:   {out / 'movie.zarr'}")
    print(f"figures: {out / 'figures'}")
    print(f"updated: {len(updated)} output(s)" + ("" if updated else " (everything was up to date)"))
    movie = out / "movie.zarr"
    if movie.exists():
        from .summary import summarize_movie

        print()
        print(summarize_movie(movie))
    print("\n" + SAFETY)


def cmd_run(args):
    config = mpconfig.load(args.config, args.overrides)
    _run(config, args)


def cmd_process(args):
    overrides = [f"run.files={[str(Path(f)) for f in args.files]!r}", "run.generate=null"]
    out = args.out or f"results/{Path(args.files[0]).stem}"
    overrides += [f"output_dir={out}", f"run.name={args.name or Path(args.files[0]).stem}"]
    config = mpconfig.load(args.config or mpconfig.ROOT / "config" / "process.yaml", overrides + args.overrides)
    _run(config, args)


def cmd_synth(args):
    from .synth import synthesize_run

    out = Path(args.out)
    files = [out / f"run_{i:03d}.h5" for i in range(args.files)]
    synthesize_run(args.scenario, args.shots, args.seed, files, out / "truth.zarr", args.mode)
    print(f"wrote {len(files)} run file(s) in {out} and the ground truth in {out / 'truth.zarr'}")
    print(f"process them with: movieproc process {' '.join(str(f) for f in files)}")


def cmd_sign_check(args):
    from .stages.delays import check_sign

    config = mpconfig.load(args.config, args.overrides)
    out = Path(config["output_dir"])
    shots, sel = out / "shots.zarr", out / "selection.zarr"
    if not (shots.exists() and sel.exists()):
        from .errors import InputError

        raise InputError(out, "no shots.zarr and selection.zarr", "a run processed up to the select stage "
                         "(movieproc run with the same --config)")
    r = check_sign(shots, sel, config, args.window)
    print(f"onset 10-90 % width from {r['shots']} pump-on shots within {args.window} ps of time zero:")
    print(f"  nominal delays:         {1000 * r['nominal']:7.1f} fs")
    print(f"  correction sign +1:     {1000 * r['plus']:7.1f} fs")
    print(f"  correction sign -1:     {1000 * r['minus']:7.1f} fs")
    best = r["best"]
    print(f"the onset is sharpest with timing.sign = {best:+d} (config has {config['timing']['sign']:+d})"
          + ("" if best == config["timing"]["sign"] else ": set --set timing.sign=%d" % best))
    if min(r["plus"], r["minus"]) > 0.8 * r["nominal"]:
        print("warning: neither sign sharpens the onset much: check timing.calibration_fs and the edge units")


def cmd_summary(args):
    from .summary import summarize_movie, summarize_run

    paths = [Path(p) for p in args.paths]
    if len(paths) == 1 and paths[0].is_dir():
        print(summarize_movie(paths[0]))
    else:
        timing = mpconfig.load(args.config, args.overrides)["timing"] if (args.config or args.overrides) else None
        print(summarize_run(paths, timing))


def build_parser():
    parser = argparse.ArgumentParser(prog="movieproc", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"movieproc {__version__}")
    parser.add_argument("-v", "--verbose", action="store_true", help="debug logging")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("run", help="run the workflow on a config (default: the demo config)")
    _add_config_args(p)
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("process", help="process run files with generic settings (config/process.yaml) plus overrides")
    p.add_argument("files", nargs="+", help="HDF5 run files (shots concatenated in file-name order)")
    p.add_argument("--out", "-o", help="output folder (default results/<first file name>)")
    p.add_argument("--name", help="run label for figures")
    _add_config_args(p)
    p.set_defaults(func=cmd_process)

    p = sub.add_parser("synth", help="write a synthetic run of the demo scenario with its ground truth")
    p.add_argument("out", help="output folder")
    p.add_argument("--scenario", default=str(mpconfig.ROOT / "demo_data" / "scenario.yaml"))
    p.add_argument("--shots", type=int, default=24000)
    p.add_argument("--seed", type=int, default=2026)
    p.add_argument("--files", type=int, default=2)
    p.add_argument("--mode", choices=["curves", "frames"], default="curves")
    p.set_defaults(func=cmd_synth)

    p = sub.add_parser("sign-check", help="measure which sign of the timing correction sharpens the onset")
    _add_config_args(p)
    p.add_argument("--window", type=float, default=1.0, help="ps around time zero to use (default 1)")
    p.set_defaults(func=cmd_sign_check)

    p = sub.add_parser("summary", help="summarize run files, or a movie store")
    p.add_argument("paths", nargs="+", help="run files (HDF5) or one movie.zarr")
    p.add_argument("--config", "-c", help="config whose timing calibration converts edges to fs")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE")
    p.set_defaults(func=cmd_summary)
    return parser


def main(argv=None):
    args = build_parser().parse_args(argv)
    setup_logging(logging.DEBUG if args.verbose else logging.INFO)
    try:
        args.func(args)
    except MovieprocError as exc:
        print(f"movieproc: error: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
