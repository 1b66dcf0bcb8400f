"""``movieproc init``: write a starter config for a recorded run.

    movieproc init DIR [--force]

writes ``DIR/config.yaml``: the generic processing settings (the shipped ``process`` config),
each section explained in a comment, and ``run.files`` as a placeholder that ``movieproc check``
and ``movieproc run`` refuse until it names the run files. An existing file is kept unless
``--force`` is given.
"""

from __future__ import annotations

from pathlib import Path

import yaml

from . import config as mpconfig
from . import resources
from .errors import InputError

#: Name of the file written in the folder.
CONFIG_NAME = "config.yaml"
#: What ``run.files`` holds until the user names the run files (refused by :func:`movieproc.config.validate`).
RUN_FILES_PLACEHOLDER = f"{mpconfig.PLACEHOLDER}: path/to/run_001.h5"

#: One comment per section of the starter (the sections of the shipped ``process`` config).
SECTION_NOTES = {
    "run": "The run: a label for figures and the HDF5 run files (shots are concatenated in file-name order).\n"
           "Replace the placeholder with your files; relative paths are relative to the folder you run\n"
           "movieproc in. movieproc check and movieproc run refuse the placeholder.",
    "output_dir": "Where every output goes: the stores, movie.zarr and figures/ (relative to the folder you run in).",
    "compute": "How to compute, never what comes out: dask workers per stage, the scheduler (threads, processes,\n"
               "local-cluster or tcp://host:port of a dask.distributed scheduler) and shots per chunk.",
    "selection": "Which shots are kept: pulse energy (fraction of the run's median), timing-tool edge found and\n"
                 "inside its calibrated range, and the outlier test (robust z-score against a running median).",
    "timing": "Pump-probe delays: nominal stage delay minus time_zero_ps, corrected by the timing tool once it is\n"
              "calibrated (calibration_fs: fs as a polynomial in the edge position, lowest order first; then\n"
              "edge_at_time_zero_px and sign, and use_timing_tool: true). movieproc sign-check measures the sign.",
    "binning": "Delay bins: equal shot counts per bin (population), fixed width, or explicit edges_ps; bins with\n"
               "fewer than min_shots shots are left out.",
    "differences": "Laser-on minus laser-off differences: per-shot normalization (total, or window with norm_q_range\n"
                   "in 1/Å where the difference is near zero) and the number of nearest pump-off reference shots.",
    "fit": "Kinetic and structural fits: none until a structural model and solvent terms are set.",
}
#: Sections left to their defaults in the starter, named in its closing comment.
OTHER_SECTIONS = ("detector", "model", "scaling", "solvent", "svd", "realspace", "render")


def starter_text() -> str:
    """The starter config as commented YAML (values: the shipped ``process`` config)."""
    source = resources.process_config()
    values = mpconfig.read_file(source)
    values["run"] = dict(values.get("run") or {}, files=[RUN_FILES_PLACEHOLDER])
    lines = ["# movieproc config: a starting point for a recorded run (written by movieproc init).",
             "# Edit it, then: movieproc check --config THIS_FILE, and movieproc run --config THIS_FILE.",
             "# Any key can also be set on the command line: --set binning.count=20 timing.sign=-1",
             f"# Every key with its default, unit and meaning: {resources.schema('config')}",
             f"# (and {resources.schema('analysis').name}, {resources.schema('detector').name} beside it).", ""]
    for section, value in values.items():
        if section not in SECTION_NOTES:
            raise KeyError(f"section '{section}' of {source} has no note in movieproc.init_command.SECTION_NOTES")
        lines += [f"# {line}" for line in SECTION_NOTES[section].splitlines()]
        lines += [*_block(section, value), ""]
    lines += [f"# Not set here, so at their defaults: {', '.join(OTHER_SECTIONS)}.",
              "# Frames-mode runs need the detector geometry (a detector: section; movieproc calibrate",
              "# measures it from a calibrant image). The demo config shows a structural model, solvent",
              f"# terms and fits in use: {resources.default_config()}"]
    return "\n".join(lines) + "\n"


def _dump(key: str, value) -> str:
    """``key: value`` as YAML, short lists and mappings on one line."""
    flow = None if isinstance(value, (dict, list)) else False  # None: innermost collections in flow style
    return yaml.safe_dump({key: value}, sort_keys=False, default_flow_style=flow, allow_unicode=True,
                          width=100).rstrip()


def _block(section: str, value) -> list[str]:
    """The lines of one top-level section: its keys one per line, two spaces in."""
    if not isinstance(value, dict):
        return [_dump(section, value)]
    lines = [f"{section}:"]
    for key, item in value.items():
        lines += ["  " + line for line in _dump(key, item).splitlines()]
    return lines


def write_starter(folder, force: bool = False) -> Path:
    """Write the starter config in ``folder`` (created if needed) and return its path.

    Raises
    ------
    InputError
        When the file exists and ``force`` is false, or ``folder`` is an existing file.
    """
    from .io.store import atomic_path

    folder = Path(folder)
    path = folder / CONFIG_NAME
    if folder.exists() and not folder.is_dir():
        raise InputError(folder, "an existing file, not a folder", "a folder for the starter config")
    if path.exists() and not force:
        raise InputError(path, "an existing file", "a folder without config.yaml (or --force to replace it)")
    with atomic_path(path) as tmp:
        tmp.write_text(starter_text(), encoding="utf-8")
    return path


def cmd_init(args) -> int:
    path = write_starter(args.folder, args.force)
    print(f"wrote {path}")
    print("next:")
    print(f"  1. edit {path}: set run.files to your HDF5 run files, and the timing calibration, binning... you need")
    print(f"  2. movieproc check --config {path}")
    print(f"  3. movieproc run --config {path}")
    return 0


def add_parser(sub):
    """Register ``movieproc init`` on the CLI's sub-command parsers."""
    p = sub.add_parser("init", help="write a starter config (generic settings, explained) to fill in")
    p.add_argument("folder", nargs="?", default=".", help="folder for config.yaml (default: the current one)")
    p.add_argument("--force", action="store_true", help="replace an existing config.yaml")
    p.set_defaults(func=cmd_init)
