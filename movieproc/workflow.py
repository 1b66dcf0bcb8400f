"""Running the Snakemake workflow from Python (what ``movieproc run`` does).

Wraps Snakemake's Python API: the workflow in ``workflow/Snakefile`` runs in the
current directory with a config that movieproc has already loaded, overridden
and validated, so a bad config never starts a job.
"""

from __future__ import annotations

import logging
from pathlib import Path

from .config import ROOT
from .errors import ConfigError, MovieprocError

log = logging.getLogger("movieproc")

SNAKEFILE = ROOT / "workflow" / "Snakefile"


class WorkflowFailed(MovieprocError):
    """A stage of the workflow failed (its error is in the log above)."""


def check_inputs(config: dict):
    """Fail early on run files that are missing (and will not be generated)."""
    if config["run"].get("generate"):
        return
    for i, f in enumerate(config["run"]["files"]):
        if not Path(f).exists():
            raise ConfigError(f"run.files[{i}]", f"'{f}', which does not exist (working directory {Path.cwd()})",
                              "an existing HDF5 run file")
    from .io.runfile import inspect_run

    inspect_run(config["run"]["files"])


def write_effective_config(config: dict, workdir=None) -> Path:
    """Write the validated config the workflow runs with to ``<output_dir>/config.effective.yaml``.

    Snakemake hands this file to every job (values passed on its command line
    would lose their types), and it records what made the results.
    """
    import yaml

    from .io.store import atomic_path

    path = Path(workdir or Path.cwd()) / config["output_dir"] / "config.effective.yaml"
    with atomic_path(path) as tmp:
        tmp.write_text("# written by movieproc: the validated config of the last run (defaults filled in)\n"
                       + yaml.safe_dump(config, sort_keys=False))
    return path.resolve()


def run_workflow(config: dict, cores: int = 2, targets=(), forcerun=(), dryrun=False, workdir=None,
                 quiet=False) -> list:
    """Run the workflow on a validated config.

    Parameters
    ----------
    config : dict
        Validated config (:func:`movieproc.config.load`).
    cores : int
        Cores Snakemake may use (stages use ``compute.workers`` threads each).
    targets : sequence of str
        Files to build (default: the rule ``all``).
    forcerun : sequence of str
        Rules to re-run even if their outputs are up to date.
    dryrun : bool
        Only show what would run.
    workdir : path, optional
        Working directory (default: the current one); relative paths in the
        config are relative to it.

    Returns
    -------
    list of str
        The files that Snakemake (re)made in this run.
    """
    from snakemake.api import SnakemakeApi
    from snakemake.settings.types import (ConfigSettings, DAGSettings, ExecutionSettings, OutputSettings,
                                          ResourceSettings)

    if not dryrun:
        check_inputs(config)
    updated: list = []
    out = OutputSettings(dryrun=dryrun, quiet=None)
    config_file = write_effective_config(config, workdir)
    error_file = Path(workdir or Path.cwd()) / config["output_dir"] / "last_error.txt"
    error_file.unlink(missing_ok=True)
    try:
        with SnakemakeApi(out) as api:
            wf = api.workflow(
                resource_settings=ResourceSettings(cores=int(cores)),
                config_settings=ConfigSettings(configfiles=[config_file], replace_workflow_config=True),
                snakefile=SNAKEFILE,
                workdir=Path(workdir) if workdir else Path.cwd(),
            )
            dag = wf.dag(DAGSettings(targets=frozenset(targets), forcerun=frozenset(forcerun)))
            dag.execute_workflow(executor="local", pseudo_executor="dryrun" if dryrun else None,
                                 execution_settings=ExecutionSettings(lock=False), updated_files=updated)
    except MovieprocError:
        raise
    except Exception as exc:  # snakemake raises its own types, after logging the failing job
        cause = error_file.read_text().strip() if error_file.exists() else str(exc)
        raise WorkflowFailed(f"the workflow stopped: {cause} (details in the log above)") from exc
    return updated
