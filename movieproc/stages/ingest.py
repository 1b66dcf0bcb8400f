"""Stage ``ingest``: run files -> shots store (per-shot curves and shot table).

Curves-mode runs are validated and copied chunk by chunk; frames-mode runs are
integrated by the ``integrate`` stage, which writes the same store.
"""

from __future__ import annotations

import logging
from functools import partial
from pathlib import Path

import numpy as np

from ..io import runfile, shotstore, store
from ..parallel import chunk_ranges, map_ranges
from .keys import config_keys
from .common import Warnings, now, versions

log = logging.getLogger("movieproc.ingest")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"chunk": "compute.chunk_shots", "scheduler": "compute.scheduler"}


def _copy_range(start, stop, info, target):
    """Validate and copy the curves of shots [start, stop)."""
    target[start:stop] = runfile.read_curves(info, start, stop)


def run(inputs: dict, out: Path, config: dict) -> None:
    """Read and validate run files and write the shots store ``out``.

    Parameters
    ----------
    inputs : dict
        ``files``: the run files (HDF5, input contract of docs/DESIGN.md section 4).
    out : Path
        Shots store to write (zarr).
    config : dict
        Sections ``compute`` and, for frames-mode runs, ``detector``.
    """
    info = runfile.inspect_run(inputs["files"])
    if info.mode == "frames":
        from . import integrate

        integrate.run({"files": list(info.files)}, out, config)
        return
    compute = config["compute"]
    warnings = Warnings("ingest", log)
    table = runfile.read_table(info)
    log.info("run of %d shots in %d file(s), %d q points (%.3g-%.3g 1/Å)", info.n_shots, len(info.files),
             info.curve_q.size, info.curve_q[0], info.curve_q[-1])
    if "photon_energy" in table:
        if not np.all(np.isfinite(table["photon_energy"])):
            warnings.add("shots/photon_energy has non-finite values")
        log.info("curves mode: shots/photon_energy is kept in the shot table but not used (pre-integrated curves are "
                 "taken as already on their common q axis); solvent.energy_term can absorb a residual mismatch")
    attrs = {
        "mode": "curves", "files": [str(f) for f in info.files],
        "checksums": {str(f): shotstore.file_checksum(f) for f in info.files},
        "counts": info.counts, "written": now(), "versions": versions(), "warnings": warnings,
    }
    with store.atomic_path(out) as tmp, config_keys(CONFIG_KEYS, config):
        group = shotstore.create(tmp, info.q, table, compute["chunk_shots"], attrs=attrs)
        work = partial(_copy_range, info=info, target=group["curves"])
        map_ranges(work, chunk_ranges(info.n_shots, compute["chunk_shots"]), compute["workers"],
                   compute["scheduler"], compute["progress"], "ingest")
        store.update_attrs(group, {"warnings": list(warnings)})
    log.info("wrote %s", out)
