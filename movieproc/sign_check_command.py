"""``movieproc sign-check``: which sign of the timing correction sharpens the onset.

Given run files (``movieproc sign-check FILE.h5 ...``, with the generic settings of
``movieproc process``) or a config (``--config``, default the demo), the shots and the selection
are brought up to date in the output folder (the workflow's ``ingest``/``integrate`` and
``select`` stages; nothing is redone when they already are), then the onset width is measured
with nominal delays and with both signs of the correction
(:func:`movieproc.stages.delays.check_sign`).
"""

from __future__ import annotations

import argparse

#: A correction that narrows the onset by less than this fraction of the nominal width "sharpens
#: little": with the right sign and calibration it narrows it to the timing-tool's own noise.
SIGN_CHECK_MIN_GAIN = 0.8
#: The workflow rule whose output (with the shots store before it) the check reads.
SELECT_RULE = "select"


def add_parser(sub) -> argparse.ArgumentParser:
    """Register ``sign-check`` on the sub-command parsers of ``movieproc``."""
    from . import cli

    p = sub.add_parser("sign-check", help="measure which sign of the timing correction sharpens the onset",
                       description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("files", nargs="*", help="HDF5 run files (default: run.files of the config); with files the "
                   "settings are those of movieproc process")
    p.add_argument("--config", "-c", help=f"config YAML (default: {cli.PROCESS_CONFIG} with files given, "
                   f"else {cli.DEFAULT_CONFIG_TEXT})")
    p.add_argument("--out", "-o", help="output folder of the shots and selection stores (with files; default "
                   "results/<first file name>, as movieproc process)")
    p.add_argument("--geometry", metavar="FILE", help="YAML file whose detector: section gives the detector "
                   "geometry (frames-mode run files)")
    cli.add_set(p)
    p.add_argument("--cores", type=int, help="cores for ingesting and selecting shots not yet processed (default 2)")
    p.add_argument("--window", type=float, default=1.0, help="ps around time zero to use (default 1)")
    p.set_defaults(func=cmd_sign_check, name=None)  # name: the run label of movieproc process, unused here
    return p


def sign_check_config(args) -> dict:
    """The validated config of a sign check: that of ``movieproc process`` with files, else the config's."""
    from . import cli

    if args.files:
        return cli.process_config(args)
    return cli.load_config(args.config, args.overrides)


def cmd_sign_check(args) -> int:
    """Bring shots and selection up to date, measure the onset width with each sign, print the verdict."""
    from .stages.delays import check_sign
    from .workflow import output_folder, run_workflow

    config = sign_check_config(args)
    run_workflow(config, cores=args.cores, targets=(SELECT_RULE,))
    out = output_folder(config)
    r = check_sign(out / "shots.zarr", out / "selection.zarr", config, args.window)
    for line in report(r, config["timing"]["sign"], args.window):
        print(line)
    return 0


def report(r: dict, configured: int, window: float) -> list[str]:
    """Lines of the verdict from :func:`movieproc.stages.delays.check_sign`'s result ``r`` (widths in ps)."""
    best = r["best"]
    lines = [f"onset 10-90 % width from {r['shots']} pump-on shots within {window} ps of time zero:",
             f"  nominal delays:         {1000 * r['nominal']:7.1f} fs",
             f"  correction sign +1:     {1000 * r['plus']:7.1f} fs",
             f"  correction sign -1:     {1000 * r['minus']:7.1f} fs",
             f"the onset is sharpest with timing.sign = {best:+d} (config has {configured:+d})"
             + ("" if best == configured else f": set --set timing.sign={best}")]
    if min(r["plus"], r["minus"]) > SIGN_CHECK_MIN_GAIN * r["nominal"]:
        lines.append("warning: neither sign sharpens the onset much: check timing.calibration_fs and the edge units")
    return lines

