"""Running the Snakemake workflow from Python (what ``movieproc run`` does).

Wraps Snakemake's Python API: the workflow in ``workflow/Snakefile`` (shipped with the
package, :func:`movieproc.resources.workflow_file`) runs in the current directory
with a config that movieproc has already loaded, overridden and validated, so a
bad config never starts a job. Before Snakemake starts:

- the output folder is checked (not a file, writable) and the temporary siblings
  of stages killed in an earlier run are removed;
- the run files are checked (contract and content, :mod:`movieproc.checks`) when
  the shots store will be (re)made;
- the run files are tracked by content: when a file's checksum differs from the one
  recorded in the shots store, ingest and everything after it run again, whatever
  the modification times say.

After a failed run, a ``STALE.txt`` in the output folder says that the movie and
figures there come from an earlier run; a successful run removes it.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import logging
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

from . import resources
from .errors import InputError, MovieprocError, WorkflowFailed

log = logging.getLogger("movieproc")

#: Marker left in the output folder after a failed run while an earlier movie or figures remain.
STALE_FILE = "STALE.txt"
#: Checksums of the run files, cached by path, size, modification and change time and inode.
CHECKSUM_CACHE = ".movieproc-checksums.json"
#: Name patterns of temporary siblings that ``store.atomic_path`` leaves when a stage is killed.
LEFTOVER_PATTERNS = (".*.tmp-*", ".*.old-*")

__all__ = ["WorkflowFailed", "run_workflow", "check_output_folder", "remove_leftovers", "input_checksums"]


def _base(workdir) -> Path:
    return Path(workdir) if workdir else Path.cwd()


def output_folder(config: dict, workdir=None) -> Path:
    """The absolute output folder of a config (``output_dir`` relative to the working directory)."""
    return Path(os.path.abspath(_base(workdir) / config["output_dir"]))


def check_output_folder(out: Path):
    """Refuse an output folder that is a file or cannot be written, before any work starts.

    Raises
    ------
    InputError
        Naming the folder, what it is, and what to change.
    """
    fix = "a writable folder for the outputs (choose another --out or output_dir)"
    if out.exists() and not out.is_dir():
        raise InputError(out, "an existing file, not a folder", fix)
    probe = out
    while not probe.exists():
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(out, f"a path through the file {probe}", fix)
    try:
        with tempfile.TemporaryFile(dir=probe, prefix=".movieproc-write-check-"):
            pass
    except OSError as exc:
        raise InputError(out, f"a folder that cannot be written ({exc.strerror or exc} in {probe})", fix) from None


def remove_leftovers(out: Path) -> list[Path]:
    """Remove temporary siblings (``.NAME.tmp-*``, ``.NAME.old-*``) that killed stages left in ``out``
    and its sub-folders (one level, e.g. ``figures/``). Returns what was removed."""
    removed = []
    for pattern in LEFTOVER_PATTERNS:
        for path in list(out.glob(pattern)) + list(out.glob(f"*/{pattern}")):
            if path.is_dir() and not path.is_symlink():
                shutil.rmtree(path, ignore_errors=True)
            else:
                path.unlink(missing_ok=True)
            removed.append(path)
    if removed:
        log.info("removed %d temporary file(s) of an interrupted earlier run in %s", len(removed), out)
    return removed


def _stat_key(path: Path) -> list:
    st = path.stat()
    return [st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino]


def input_checksums(files, out: Path | None = None, workdir=None, save: bool = False,
                    algorithm: str | None = None) -> dict:
    """Checksums of the run files as the shots store records them (``{str(Path(f)): 'xxh3_128:...'}``).

    Each file is hashed once: the result is cached in ``<out>/.movieproc-checksums.json``
    under the file's absolute path with its size, modification time, change time and inode,
    and hashed again only when one of these differs. The change time cannot be set back by
    ``cp -p`` or ``rsync -t``, so a file replaced with an older modification time is hashed again.
    ``algorithm`` (default: the shots store's, :data:`movieproc.io.shotstore.CHECKSUM_ALGORITHM`)
    lets a store written with another hash be compared without re-ingesting it.
    """
    from .io.shotstore import CHECKSUM_ALGORITHM, checksum_algorithm, file_checksum

    algorithm = algorithm or CHECKSUM_ALGORITHM

    cache_path = out / CHECKSUM_CACHE if out is not None else None
    try:
        cache = json.loads(cache_path.read_text()) if cache_path and cache_path.is_file() else {}
    except (OSError, ValueError):
        cache = {}
    sums, fresh = {}, {}
    for f in files:
        path = Path(os.path.abspath(_base(workdir) / f))
        key = _stat_key(path)
        entry = cache.get(str(path))
        if (isinstance(entry, dict) and entry.get("stat") == key
                and checksum_algorithm(entry.get("checksum", "")) == algorithm):
            digest = entry["checksum"]
        else:
            digest = file_checksum(path, algorithm)
        sums[str(Path(f))] = digest
        fresh[str(path)] = {"stat": key, "checksum": digest}
    if save and out is not None:
        _write_cache(out, fresh)
    return sums


def _write_cache(out: Path, entries: dict):
    from .io.store import atomic_path

    with atomic_path(out / CHECKSUM_CACHE) as tmp:
        tmp.write_text(json.dumps(entries, indent=1))


def recorded_checksums(shots: Path) -> dict | None:
    """The run-file checksums recorded in a shots store, or None without a readable store."""
    if not (shots / "zarr.json").is_file():
        return None
    try:
        import zarr

        sums = zarr.open_group(str(shots), mode="r").attrs.get("checksums")
    except Exception:  # an unreadable store is remade by ingest anyway
        return None
    return dict(sums) if isinstance(sums, dict) else None


def _ingest_reason(config: dict, out: Path, workdir, forcerun) -> str | None:
    """Why the shots store must be (re)made, or None when it matches the run files."""
    if "ingest" in forcerun:
        return "forced"
    recorded = recorded_checksums(out / "shots.zarr")
    if recorded is None:
        return "no shots store yet"
    files = config["run"]["files"]
    if any(not (_base(workdir) / f).exists() for f in files):
        return None  # generated demo files: the synthesize rule makes them
    from .io.shotstore import checksum_algorithm

    current = input_checksums(files, out, workdir, algorithm=checksum_algorithm(next(iter(recorded.values()), "")))
    now_order, then_order = _in_name_order(current), _in_name_order(recorded)
    if [d for _, d in now_order] != [d for _, d in then_order]:
        then = dict(then_order)
        changed = [f for f, d in now_order if then.get(Path(f).name.replace("{", "(").replace("}", ")"),
                                                         then.get(Path(f).name)) != d] or [f for f, _ in now_order]
        return f"the content of {', '.join(changed)} differs from the shots store's record"
    return None


def _in_name_order(sums: dict) -> list:
    """``(file name, checksum)`` pairs in the order the run concatenates files (by file name)."""
    return sorted(((Path(k).name, v) for k, v in sums.items()), key=lambda item: item[0])


def check_inputs(config: dict, workdir=None, content: bool = True):
    """Fail early on run files that are missing (and will not be generated), break the contract
    or hold content that would stop a stage (see :func:`movieproc.checks.preflight`)."""
    if config["run"].get("generate"):
        return
    from .checks import preflight
    from .errors import ConfigError
    from .io.runfile import inspect_run

    files = [str(_base(workdir) / f) for f in config["run"]["files"]]
    for i, f in enumerate(files):
        if not Path(f).exists():
            raise ConfigError(f"run.files[{i}]", f"'{config['run']['files'][i]}', which does not exist "
                              f"(working directory {_base(workdir)})", "an existing HDF5 run file")
    if content:
        preflight(files, config)
    else:
        inspect_run(files)


def write_effective_config(config: dict, workdir=None, path=None) -> Path:
    """Write the validated config the workflow runs with to ``<output_dir>/config.effective.yaml``.

    Snakemake hands this file to every job (values passed on its command line
    would lose their types), and it records what made the results.
    """
    import yaml

    from .io.store import atomic_path

    path = Path(path) if path else output_folder(config, workdir) / "config.effective.yaml"
    with atomic_path(path) as tmp:
        tmp.write_text("# written by movieproc: the validated config of the last run (defaults filled in)\n"
                       + yaml.safe_dump(config, sort_keys=False, allow_unicode=True), encoding="utf-8")
    return path.resolve()


# ------------------------------------------------------------------ paths with braces

def _has_braces(text) -> bool:
    return isinstance(text, str) and ("{" in text or "}" in text)


def _alias(target: Path) -> Path:
    """A stable brace-free symbolic link to ``target`` (Snakemake reads ``{...}`` in paths as wildcards).

    The link lives in a per-user folder of the system's temporary directory, named by a hash
    of the target, and keeps the target's name with braces turned into parentheses.
    """
    root = Path(tempfile.gettempdir()) / f"movieproc-paths-{os.getuid() if hasattr(os, 'getuid') else 'user'}"
    name = target.name.replace("{", "(").replace("}", ")")
    link = root / hashlib.sha256(str(target).encode("utf-8", "surrogateescape")).hexdigest()[:16] / name
    if not (link.is_symlink() and os.readlink(link) == str(target)):
        link.parent.mkdir(parents=True, exist_ok=True)
        link.unlink(missing_ok=True)
        link.symlink_to(target)
    return link


def snakemake_view(config: dict, workdir=None, create: bool = True) -> dict:
    """The config as Snakemake gets it: paths that name rule inputs or outputs and hold braces
    are replaced by brace-free links to the same files (see :func:`_alias`). Other values, and
    the paths without braces, are unchanged."""
    import copy

    view = copy.deepcopy(config)
    base = _base(workdir)
    if _has_braces(view["output_dir"]):
        out = output_folder(config, workdir)
        if create:
            out.mkdir(parents=True, exist_ok=True)
        view["output_dir"] = str(_alias(out))
    run = view["run"]
    if any(_has_braces(f) for f in run["files"]):
        names = [Path(f).name for f in run["files"]]
        aliased = [str(_alias(Path(os.path.abspath(base / f)))) if _has_braces(f) else f for f in run["files"]]
        new_names = [Path(f).name for f in aliased]
        if sorted(range(len(names)), key=names.__getitem__) != sorted(range(len(names)), key=new_names.__getitem__):
            raise InputError(run["files"][0], "file names with braces whose order changes without them",
                             "run files named so that their order does not depend on '{' or '}'")
        run["files"] = aliased
    generate = run.get("generate") or {}
    for key in ("scenario", "truth"):
        if _has_braces(generate.get(key)):
            raise InputError(f"run.generate.{key}", f"'{generate[key]}' with braces", "a path without '{' or '}'")
    return view


# ------------------------------------------------------------------ stale outputs

def mark_stale(out: Path, headline: str) -> Path | None:
    """Say in ``<out>/STALE.txt`` that the movie and figures there may come from an earlier run.

    Written when a run starts (so a run killed outright leaves it) and rewritten with the cause
    when a run fails; a successful run removes it. Nothing is written without a movie or figures.
    """
    earlier = [name for name in ("movie.zarr", "figures") if (out / name).exists()]
    if not earlier:
        return None
    path = out / STALE_FILE
    try:
        path.write_text(f"{headline}\n{' and '.join(earlier)} in this folder come from an earlier run and may not "
                        "reflect the current config (config.effective.yaml is the config of the last run started). "
                        "Fix the cause and run again; a successful run removes this file.\n", encoding="utf-8")
    except OSError:
        return None
    return path


def stale_note(folder: Path) -> str | None:
    """The first line of a STALE marker in ``folder`` (a movie's folder), or None."""
    path = Path(folder) / STALE_FILE
    if not path.is_file():
        return None
    first = path.read_text(encoding="utf-8", errors="replace").splitlines()[:1] or [""]
    return f"STALE: the movie and figures in {folder} come from an earlier run ({first[0]} See {path}.)"


# ------------------------------------------------------------------ running

def _prepare(config: dict, forcerun, dryrun: bool, workdir) -> tuple[Path, set]:
    """Checks and clean-up before Snakemake starts; returns the output folder and the rules to force."""
    out = output_folder(config, workdir)
    check_output_folder(out)
    forcerun = set(forcerun)
    reason = _ingest_reason(config, out, workdir, forcerun)
    if reason and reason not in ("forced", "no shots store yet"):
        log.info("run files changed: %s; ingest and every stage after it run again", reason)
        forcerun.add("ingest")
    check_inputs(config, workdir, content=reason is not None)
    if not dryrun:
        remove_leftovers(out)
    return out, forcerun


def run_workflow(config: dict, cores: int | None = None, targets=(), forcerun=(), dryrun=False, workdir=None,
                 quiet: bool | None = None, profile=None, jobs: int | None = None) -> list:
    """Run the workflow on a validated config.

    Parameters
    ----------
    config : dict
        Validated config (:func:`movieproc.config.load`).
    cores : int, optional
        Cores Snakemake may use (stages use ``compute.workers`` threads each). None: the
        profile's ``cores``, else 2 with the local executor and ``jobs * compute.workers``
        with a cluster executor.
    targets : sequence of str
        Files to build (default: the rule ``all``).
    forcerun : sequence of str
        Rules to re-run even if their outputs are up to date.
    dryrun : bool
        Only show what would run; nothing is written in the output folder.
    workdir : path, optional
        Working directory (default: the current one); relative paths in the
        config are relative to it.
    profile : path, optional
        A Snakemake profile (folder with ``config.yaml``, or the YAML file): its executor,
        jobs, resources and the executor plugin's settings (see :func:`load_profile`).
    jobs : int, optional
        Jobs at once (cluster jobs with a cluster executor); overrides the profile's ``jobs``.
    quiet : bool, optional
        Snakemake's own output limited to its warnings and errors (a failing job's error stays
        visible; a dry run still lists the jobs). None: quiet when ``movieproc --quiet`` is
        in force (:func:`movieproc.progress.quiet`).

    Returns
    -------
    list of str
        The files that Snakemake (re)made in this run.
    """
    options = load_profile(profile) if profile else None
    out, forcerun = _prepare(config, forcerun, dryrun, workdir)
    stats = _stats(config, workdir)
    with tempfile.TemporaryDirectory(prefix="movieproc-config-") as scratch:
        view = snakemake_view(config, workdir, create=not dryrun)
        config_file = Path(scratch) / "config.yaml"
        if options is not None and view != config and (options.executor or "local") not in BUILTIN_EXECUTORS:
            log.warning("paths with '{' or '}' reach Snakemake as links in %s on this machine: jobs on other "
                        "nodes see them only if that folder is shared; rename the files or folders to be sure",
                        tempfile.gettempdir())
        if not dryrun:
            from .stages.common import now

            mark_stale(out, f"A run started at {now()} and has not finished (if this file stays, it was "
                            "interrupted or killed).")
            effective = write_effective_config(config, workdir)
            if view == config:  # the provenance is the file every job reads (jobs on other nodes included)
                config_file = effective
        if not config_file.exists():
            write_effective_config(view, workdir, config_file)
        try:
            request = _Run(cores, tuple(targets), frozenset(forcerun), dryrun, jobs, options, config,
                           _quiet() if quiet is None else bool(quiet))
            updated = _snakemake(config_file, request, workdir, out)
        except BaseException as exc:  # a stage's failure, or Ctrl-C
            if not dryrun:
                from .stages.common import now

                mark_stale(out, f"The run of {now()} failed: {str(exc) or type(exc).__name__}")
            raise
        finally:
            from .parallel import close_local_clusters

            close_local_clusters()
    if not dryrun:
        (out / STALE_FILE).unlink(missing_ok=True)
        _remember_checksums(config["run"]["files"], out, workdir, stats)
    return updated


def _stats(config: dict, workdir) -> dict:
    """Stat keys of the run files that exist now (absolute path -> key)."""
    keys = {}
    for f in config["run"]["files"]:
        path = Path(os.path.abspath(_base(workdir) / f))
        if path.exists():
            keys[str(path)] = _stat_key(path)
    return keys


def _remember_checksums(files, out: Path, workdir, before: dict):
    """Cache the run files' checksums after a successful run, taking those the shots store recorded
    for files unchanged since the run started (so a freshly ingested run is not hashed twice)."""
    recorded = dict(_in_name_order(recorded_checksums(out / "shots.zarr") or {}))
    cache = {}
    for f in files:
        path = Path(os.path.abspath(_base(workdir) / f))
        if not path.exists():
            return
        key = _stat_key(path)
        digest = recorded.get(path.name.replace("{", "(").replace("}", ")"), recorded.get(path.name))
        if digest is not None and before.get(str(path)) == key:
            cache[str(path)] = {"stat": key, "checksum": digest}
    _write_cache(out, cache)
    input_checksums(files, out, workdir, save=True)  # hashes only what the store did not give


@dataclass(frozen=True)
class _Run:
    """What :func:`run_workflow` asks of Snakemake (see its parameters)."""

    cores: int | None
    targets: tuple
    forcerun: frozenset
    dryrun: bool
    jobs: int | None
    profile: argparse.Namespace | None
    config: dict
    quiet: bool = False


def _quiet() -> bool:
    from .progress import quiet

    return quiet()


def _output_settings(run: _Run):
    """Snakemake's output settings; quiet: its warnings and errors only (not for a dry run, whose
    listing of jobs is the point)."""
    from snakemake.settings.enums import Quietness
    from snakemake.settings.types import OutputSettings

    quiet = run.quiet and not run.dryrun
    return OutputSettings(dryrun=run.dryrun, printshellcmds=bool(getattr(run.profile, "printshellcmds", False)),
                          # RULES would also hide a failing job's error: job and progress lines go by level
                          quiet={Quietness.PROGRESS, Quietness.HOST, Quietness.REASON} if quiet else None,
                          log_level_override=logging.WARNING if quiet else None)


def _snakemake(config_file: Path, run: _Run, workdir, out: Path) -> list:
    from snakemake.api import SnakemakeApi
    from snakemake.settings.types import ConfigSettings, DAGSettings

    updated: list = []
    error_file = out / "last_error.txt"
    if not run.dryrun:
        error_file.unlink(missing_ok=True)
    executor, settings = _executor_settings(run)
    try:
        with SnakemakeApi(_output_settings(run)) as api:
            wf = api.workflow(
                resource_settings=settings.pop("resources"),
                config_settings=ConfigSettings(configfiles=[config_file], replace_workflow_config=True),
                snakefile=resources.workflow_file(),
                workdir=_base(workdir).absolute(),
            )
            dag = wf.dag(DAGSettings(targets=frozenset(run.targets), forcerun=frozenset(run.forcerun),
                                     force_incomplete=bool(getattr(run.profile, "rerun_incomplete", False))))
            dag.execute_workflow(executor=executor, pseudo_executor="dryrun" if run.dryrun else None,
                                 updated_files=updated, **settings)
    except MovieprocError:
        raise
    except Exception as exc:  # snakemake raises its own types, after logging the failing job
        cause = error_file.read_text().strip() if error_file.exists() else " ".join(str(exc).split())
        raise WorkflowFailed(f"the workflow stopped: {cause} (details in the log above)") from exc
    return updated


# ------------------------------------------------------------------ Snakemake profiles

#: Executors built into Snakemake (no plugin to install).
BUILTIN_EXECUTORS = ("local", "dryrun", "touch")
#: Rules whose stages run ``compute.workers`` dask workers (or numba threads): with a profile, their
#: jobs ask for that many threads unless the profile's ``set-threads`` names them.
PARALLEL_RULES = ("ingest", "select", "difference", "scatter", "analyze")


def profile_file(profile) -> Path:
    """The YAML file of a Snakemake profile: the path itself, or ``config.yaml`` (``profile.yaml``) in it.

    A path that does not exist and ends in the name of a profile shipped with movieproc (``cluster``,
    ``workflow/profiles/cluster``) means that profile, so the README's commands work from any folder."""
    path = Path(profile)
    shipped = resources.profile(path.name)
    if not path.exists() and path.name and shipped.is_dir():
        path = shipped
    if path.is_file():
        return path
    for name in ("config.yaml", "profile.yaml"):
        if (path / name).is_file():
            return path / name
    raise InputError(path, "no such file" if not path.exists() else "a folder without config.yaml or profile.yaml",
                     "a Snakemake profile: a folder with config.yaml (e.g. workflow/profiles/cluster) or the YAML file")


def load_profile(profile) -> argparse.Namespace:
    """Read a Snakemake profile the way the ``snakemake`` command does (its own parser), after
    checking that its executor's plugin is installed.

    Returns
    -------
    argparse.Namespace
        Snakemake's options with the profile's values (``executor``, ``jobs``, ``set_threads``,
        ``default_resources``, the executor plugin's own settings...).

    Raises
    ------
    InputError
        Naming the profile file: unreadable, an executor whose plugin is not installed (with the
        package to install), or a key Snakemake does not know.
    """
    import contextlib
    import io

    import yaml
    from snakemake.cli import get_argument_parser
    from snakemake_interface_executor_plugins.registry import ExecutorPluginRegistry

    path = profile_file(profile)
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8")) or {}
    except (OSError, yaml.YAMLError) as exc:
        raise InputError(path, f"an unreadable profile ({exc})", "a YAML mapping of Snakemake options") from None
    if not isinstance(raw, dict):
        raise InputError(path, f"{type(raw).__name__} at the top level", "a YAML mapping of Snakemake options")
    executor = str(raw.get("executor", "local"))
    if executor not in BUILTIN_EXECUTORS and not ExecutorPluginRegistry().is_installed(executor):
        raise InputError(path, f"executor: {executor}, whose Snakemake plugin is not installed",
                         f"the plugin installed (python3 -m pip install snakemake-executor-plugin-{executor}), or "
                         "another executor")
    messages = io.StringIO()
    try:
        with contextlib.redirect_stderr(messages):
            return get_argument_parser(profiles=[str(path)]).parse_args([])
    except SystemExit:
        lines = [line for line in messages.getvalue().splitlines() if "error" in line] or ["an unusable profile"]
        raise InputError(path, lines[-1].split("error:", 1)[-1].strip(), "options of the snakemake command "
                         "(see snakemake --help), in long form without dashes") from None


def _executor_settings(run: _Run) -> tuple[str, dict]:
    """The executor's name and the settings objects of ``execute_workflow`` (plus ``resources``)."""
    from snakemake.settings.types import ExecutionSettings, RemoteExecutionSettings, ResourceSettings

    args = run.profile
    if args is None:
        return "local", {"resources": ResourceSettings(cores=int(run.cores or run.jobs or 2)),
                         # jobs run as threads of this process: no new Python (about 2 s of imports)
                         # per job; stages release the GIL in their numeric kernels
                         "execution_settings": ExecutionSettings(lock=False, use_threads=True)}
    from snakemake_interface_executor_plugins.registry import ExecutorPluginRegistry

    executor = args.executor or "local"
    plugin = ExecutorPluginRegistry().get_plugin(executor)
    local = plugin.common_settings.local_exec
    jobs = run.jobs if run.jobs is not None else args.jobs
    workers = int(run.config["compute"]["workers"])
    cores = run.cores or args.cores or ((jobs or 2) if local else max(1, int(jobs or 1)) * workers)
    threads = {rule: min(workers, int(cores)) for rule in PARALLEL_RULES}
    threads.update(args.set_threads or {})
    resources = ResourceSettings(cores=int(cores), nodes=None if local else jobs, max_threads=args.max_threads,
                                 resources=args.resources or {}, overwrite_threads=threads,
                                 overwrite_resources=args.set_resources or {},
                                 default_resources=args.default_resources)
    log.info("Snakemake executor %s: %s core(s)%s, parallel stages with %d thread(s) each", executor, cores,
             "" if local else f", {jobs} job(s) at once", workers)
    return executor, {
        "resources": resources,
        "executor_settings": plugin.get_settings(args),
        "execution_settings": ExecutionSettings(lock=False, keep_going=bool(args.keep_going),
                                                latency_wait=int(args.latency_wait), retries=int(args.retries or 0)),
        "remote_execution_settings": RemoteExecutionSettings(
            jobname=args.jobname, jobscript=args.jobscript, envvars=args.envvars or (),
            max_status_checks_per_second=args.max_status_checks_per_second,
            seconds_between_status_checks=args.seconds_between_status_checks, precommand=args.precommand),
    }
