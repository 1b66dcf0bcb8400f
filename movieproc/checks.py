"""Checks of run files and a config before any work starts (``movieproc check`` and the
pre-flight of ``movieproc run``/``process``).

Every check that can be made from the inputs alone is made here, once, before a store is
written: the config (types, ranges, finite numbers), each run file against the input
contract, and the content that would stop a stage later (pulse-id order, non-finite values,
0 shots, no pump-off shots, timing edges all missing while the correction is on, pulse
energies that make the pulse-energy cut meaningless, more references or bootstrap replicates than shots, a
solvent differentials table that cannot be read). The stages keep their own checks;
these only move the failure before any work.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import ConfigError, DataError, InputError, MovieprocError
from .io import runfile
from .io.tables import read_curve_table

log = logging.getLogger("movieproc.check")

#: Shots per block when scanning curves for non-finite values (bounded memory: 4 bytes x nq x this).
SCAN_SHOTS = 4096

#: Keys of ``detector`` that frames cannot be integrated without (there is no safe default geometry).
GEOMETRY_KEYS = ("distance_mm", "pixel_size_mm", "beam_center_px")


@dataclass
class Problem:
    """One problem found in the inputs.

    Attributes
    ----------
    where : str
        File and dataset (``path:shots/pulse_id``) or dotted config key.
    found : str
        What was found, with counts.
    expected : str
        What is expected and what to change.
    fatal : bool
        True when a run cannot give a meaningful result; False for a warning.
    kind : str
        ``"input"``, ``"data"`` or ``"config"``: which error a fatal problem raises.
    """

    where: str
    found: str
    expected: str
    fatal: bool = True
    kind: str = "input"

    def line(self) -> str:
        """The problem as one line."""
        return f"{'error' if self.fatal else 'warning'}: {self.where}: found {self.found}; expected {self.expected}"

    def error(self) -> MovieprocError:
        """The problem as the project's error of its kind."""
        if self.kind == "config":
            return ConfigError(self.where, self.found, self.expected)
        if self.kind == "data":
            return DataError(f"{self.where}: found {self.found}; expected {self.expected}")
        return InputError(self.where, self.found, self.expected)

    @classmethod
    def of(cls, exc: MovieprocError) -> "Problem":
        """A fatal problem from a project error."""
        if isinstance(exc, ConfigError):
            return cls(exc.key, exc.found, exc.expected, kind="config")
        if isinstance(exc, InputError):
            return cls(exc.source, exc.found, exc.expected)
        return cls("run", str(exc), "data that can give a result", kind="data")


def check_files(files) -> tuple[runfile.RunInfo | None, list[Problem]]:
    """Check every run file against the input contract; report every file's problem, not the first.

    Returns
    -------
    info : RunInfo or None
        The run, when the files together meet the contract.
    problems : list of Problem
    """
    problems = []
    for f in files:
        try:
            runfile.inspect_run([f])
        except InputError as exc:
            if exc.found != "0 shots":  # an empty file is allowed beside others; the run is checked below
                problems.append(Problem.of(exc))
    if problems:
        return None, problems
    try:
        return runfile.inspect_run(files), []
    except InputError as exc:
        return None, [Problem.of(exc)]


def _first(info, mask: np.ndarray) -> str:
    """File and local index of the first True shot of ``mask`` (N,)."""
    index = int(np.argmax(mask))
    path, local = runfile.shot_file(info, index)
    return f"first in {Path(path).name} at shot {local}"


def _table_problems(info, table: dict) -> list[Problem]:
    files = f"{info.files[0]}" + (f" (+{len(info.files) - 1} file(s))" if len(info.files) > 1 else "")
    problems = []
    pid = table["pulse_id"]
    step = np.diff(pid)
    if np.any(step <= 0):
        dup, back = int(np.sum(step == 0)), int(np.sum(step < 0))
        where = _first(info, np.r_[False, step <= 0])
        problems.append(Problem(f"{files}:shots/pulse_id", f"{dup} repeated and {back} decreasing pulse id(s), {where}",
                                "strictly increasing pulse ids across the run (files in name order)"))
    for name in ("stage_delay", "pulse_energy"):
        bad = ~np.isfinite(table[name])
        if bad.any():
            problems.append(Problem(f"{files}:shots/{name}",
                                    f"{int(bad.sum())} non-finite value(s), {_first(info, bad)}",
                                    "finite values for every shot"))
    on = table["pump_on"]
    for label, mask, other in (("pump-off", ~on, "pump_on false"), ("pump-on", on, "pump_on true")):
        if not mask.any():
            problems.append(Problem(f"{files}:shots/pump_on", f"no {label} shot among {on.size}",
                                    f"some shots with {other}: differences need both", kind="data"))
    return problems


def _config_problems(info, table: dict, config: dict) -> list[Problem]:
    problems = []
    files = f"{info.files[0]}" + (f" (+{len(info.files) - 1} file(s))" if len(info.files) > 1 else "")
    edge_ok = np.isfinite(table["timing_edge"])
    if config["timing"]["use_timing_tool"] and not edge_ok.any():
        problems.append(Problem("timing.use_timing_tool",
                                f"true, but shots/timing_edge is missing (NaN) on all {edge_ok.size} shots of {files}",
                                "false for this run (nominal delays), or a run in which the timing tool found edges",
                                kind="config"))
    pe = table["pulse_energy"]
    fraction = config["selection"]["pulse_energy"]["min_fraction_of_median"]
    finite = pe[np.isfinite(pe)]
    if fraction and finite.size and np.median(finite) <= 0:
        problems.append(Problem("selection.pulse_energy.min_fraction_of_median",
                                f"{fraction} while the median of shots/pulse_energy is {np.median(finite):.3g} "
                                f"({int(np.sum(finite == 0))} of {pe.size} shots are 0): the cut cannot work",
                                "null (no pulse-energy cut) for a run without a pulse-energy reading, "
                                "or a run with positive pulse energies", kind="config"))
    return problems


def _difference_problems(table: dict, config: dict) -> list[Problem]:
    """References and bootstrap replicates the run's shots cannot provide."""
    problems = []
    differences = config.get("differences", {})
    n_off, n = int(np.count_nonzero(~table["pump_on"])), int(table["pump_on"].size)
    k = differences.get("references", 1)
    if 0 < n_off < k:
        problems.append(Problem("differences.references", f"{k}, but the run has only {n_off} pump-off shot(s)",
                                f"at most {n_off} references per pump-on shot (the bin covariance and errors need "
                                "k distinct reference shots)", kind="config"))
    replicates = differences.get("bootstrap", 0)
    if replicates and n < replicates:
        problems.append(Problem("differences.bootstrap", f"{replicates} replicates for a run of {n} shot(s)",
                                f"fewer replicates than shots (at most {n}), or 0 (no bootstrap)", kind="config"))
    return problems


def _differentials_path(config: dict, base) -> Path | None:
    solvent = config.get("solvent", {})
    name = solvent.get("differentials")
    if not name or not solvent.get("enabled", True):
        return None
    path = Path(name)
    return path if path.is_absolute() else Path(base or Path.cwd()) / path


def analysis_file_problems(config: dict, q=None, base=None) -> list[Problem]:
    """Problems of the analysis' tabular inputs (``solvent.differentials``), found before any stage runs.

    Parameters
    ----------
    config : dict
        The validated config.
    q : ndarray, optional
        The run's q grid (1/Å), when known: the table must cover it.
    base : path, optional
        Folder of relative paths (default: the working directory).
    """
    path = _differentials_path(config, base)
    if path is None:
        return []
    terms = config["solvent"].get("terms", ["dT"])
    try:
        table = read_curve_table(path, min_columns=2, max_columns=3,
                                 what="columns q (1/Å), dS/dT[, dS/drho], comma- or whitespace-separated")
    except InputError as exc:
        return [Problem("solvent.differentials", f"{exc.source}: {exc.found}", exc.expected, kind="config")]
    problems = []
    if "drho" in terms and table.shape[1] < 3:
        problems.append(Problem("solvent.terms", f"{terms}, but {path} has no dS/drho column",
                                "terms the differentials file has (dT only), or a third column dS/drho",
                                kind="config"))
    if q is not None and len(q) and (q[0] < table[0, 0] - 1e-9 or q[-1] > table[-1, 0] + 1e-9):
        problems.append(Problem("solvent.differentials",
                                f"{path} covering q {table[0, 0]:.3g}-{table[-1, 0]:.3g} 1/Å",
                                f"a table covering the run's q range {q[0]:.3g}-{q[-1]:.3g} 1/Å", kind="config"))
    return problems


def _curve_problems(info) -> list[Problem]:
    """Shots whose curves hold NaN or infinite values, counted per file."""
    problems = []
    for path, n in zip(info.files, info.counts, strict=True):
        bad, first = 0, None
        for lo in range(0, n, SCAN_SHOTS):
            sub = runfile.RunInfo([path], [n], "curves", info.q, None, info.data_dtype)
            block = runfile.read_curves_raw(sub, lo, min(n, lo + SCAN_SHOTS))
            rows = ~np.isfinite(block).all(axis=1)
            if rows.any() and first is None:
                first = lo + int(np.argmax(rows))
            bad += int(rows.sum())
        if bad:
            problems.append(Problem(f"{path}:curves",
                                    f"non-finite intensities in {bad} of {n} shot(s), first at shot {first}",
                                    "finite intensities (mask bad points before writing curves)"))
    return problems


def check_content(info, config: dict) -> list[Problem]:
    """Content problems of a run that meets the contract, judged with the (validated) config."""
    table = runfile.read_table(info, check=False)
    problems = _table_problems(info, table) + _config_problems(info, table, config)
    problems += _difference_problems(table, config)
    empty = [f.name for f, n in zip(info.files, info.counts, strict=True) if n == 0]
    if empty:
        problems.append(Problem(f"{info.files[0].parent}", f"{len(empty)} file(s) with 0 shots ({', '.join(empty)})",
                                "shots in every file (the others are used)", fatal=False))
    if info.mode == "curves":
        problems += _curve_problems(info)
    return problems


def missing_geometry(raw: dict) -> list[str]:
    """Geometry keys (``detector.*``) not given explicitly in a raw, unvalidated config."""
    detector = raw.get("detector")
    if not isinstance(detector, dict):
        detector = {}
    return [f"detector.{k}" for k in GEOMETRY_KEYS if detector.get(k) is None]


#: The ``binning`` keys each ``binning.mode`` uses; the other modes' keys are ignored in that mode.
BINNING_MODE_KEYS = {"width": ("width_ps", "start_ps", "stop_ps"), "population": ("count",), "edges": ("edges_ps",)}


def reset_other_binning_modes(config: dict) -> dict:
    """The validated ``config`` with the binning keys of modes other than ``binning.mode`` at their
    schema defaults (in place; returned).

    Those keys do nothing; left at a value a layer gave them (``config/process.yaml``'s
    ``count: 30`` after ``--set binning.mode=width``), the written-out ``config.effective.yaml``
    would be refused by :func:`check_binning_keys` when run again.
    """
    from .config import load_schema

    binning = config.get("binning")
    if not isinstance(binning, dict) or binning.get("mode") not in BINNING_MODE_KEYS:
        return config
    defaults = {k: v.get("default") for k, v in load_schema()["properties"]["binning"]["properties"].items()}
    for other, keys in BINNING_MODE_KEYS.items():
        if other != binning["mode"]:
            for key in keys:
                if key not in BINNING_MODE_KEYS[binning["mode"]] and key in binning:
                    binning[key] = defaults.get(key)
    return config


def check_binning_keys(raw: dict, overrides=()) -> None:
    """Refuse a binning key that the chosen ``binning.mode`` would silently ignore.

    A key of another mode is refused when it is given by an override (``--set``), or when the
    config file (or a layer) gives it with a value other than the schema's default while the mode
    is not switched by an override: a config written for one mode and switched to another on the
    command line keeps its old mode's keys without complaint, and a written-out effective config
    (every default filled in) passes.

    Parameters
    ----------
    raw : dict
        The raw config (:func:`movieproc.config.build`), overrides applied.
    overrides : sequence of str
        The ``dotted.key=value`` overrides applied to it.

    Raises
    ------
    ConfigError
        Naming the ignored key and ``binning.mode``, and what to set instead.
    """
    from .config import load_schema, parse_override

    binning = raw.get("binning")
    if not isinstance(binning, dict):
        return
    defaults = {k: v.get("default") for k, v in load_schema()["properties"]["binning"]["properties"].items()}
    mode = binning.get("mode", defaults["mode"])
    if mode not in BINNING_MODE_KEYS:
        return  # validation names the bad mode
    given = {".".join(parse_override(text)[0]) for text in overrides or ()}
    mode_switched = "binning.mode" in given or "binning" in given
    for other, keys in BINNING_MODE_KEYS.items():
        for key in keys:
            if other == mode or key not in binning or binning[key] is None:
                continue
            by_override = f"binning.{key}" in given
            if by_override or (not mode_switched and binning[key] != defaults.get(key)):
                how = "--set" if by_override else "the config"
                raise ConfigError(f"binning.{key}", f"{binning[key]!r} (from {how}) while binning.mode is {mode!r}, "
                                  "which ignores it", f"binning.mode={other} to use binning.{key} (e.g. --set "
                                  f"binning.mode={other} binning.{key}={binning[key]}), or no binning.{key}")


def check(files, config: dict, base=None) -> list[Problem]:
    """Every problem of ``files`` and the config's input tables under a validated ``config``.

    ``base`` is the folder of relative paths in the config (default: the working directory).
    """
    missing = [f for f in files if not Path(f).exists()]
    problems = [Problem(str(f), "no such file", "an existing HDF5 run file") for f in missing]
    present = [f for f in files if f not in missing]
    info = None
    if present:
        info, contract = check_files(present)
        problems += contract
        if info is not None and not missing:
            problems += check_content(info, config)
    problems += analysis_file_problems(config, None if info is None else info.q, base)
    return problems


def preflight(files, config: dict, base=None) -> runfile.RunInfo:
    """Check the run before any store is written; raise the first fatal problem, log warnings.

    Raises
    ------
    MovieprocError
        The first fatal problem (the message says how many more ``movieproc check`` lists).
    """
    problems = check(files, config, base)
    fatal = [p for p in problems if p.fatal]
    for p in problems:
        if not p.fatal:
            log.warning("%s: %s", p.where, p.found)
    if fatal:
        first = fatal[0]
        if len(fatal) > 1:
            first = Problem(first.where, first.found, f"{first.expected} ({len(fatal) - 1} more problem(s): "
                            "`movieproc check` lists them all)", kind=first.kind)
        raise first.error()
    return runfile.inspect_run(files)
