"""Stage ``assemble``: the delay-indexed movie (zarr v3, xarray-readable).

Collects the binned differences, the selection counts, any analysis results
(solvent terms, fits, structures) and the provenance into one store that
``xarray.open_zarr(path, consolidated=False)`` opens with named dimensions.
"""

from __future__ import annotations

import logging
from pathlib import Path

from ..io import store
from ..safety import SAFETY
from ..warning_groups import summary_lines
from .common import now, versions

log = logging.getLogger("movieproc.assemble")


CONVENTIONS = {
    "delay": "ps; positive = probe after pump; corrected delay = stage_delay - time_zero + sign * timing correction",
    "q": "1/Å, q = 4 pi sin(theta) / lambda, 2 theta the scattering angle",
    "difference": "pump-on minus the mean of the k nearest pump-off shots, each curve normalized first",
    "scales": "diff, diff_err, on_mean and off_mean are in normalized units (see their units attr); solute, model, "
              "residual and solvent terms are in analysis_units (attrs): diff times absolute_scale_factor (attrs), "
              "so compare diff * absolute_scale_factor with model",
}


def _copy_group(src, dst, skip=()):
    """Copy every array of a zarr group (with dims and attrs) into another group."""
    for name, arr in src.arrays():
        if name in skip or name in dst:
            continue
        dims = arr.metadata.dimension_names
        store.write_array(dst, name, arr[...], dims, attrs=dict(arr.attrs))


def run(inputs: dict, out: Path, config: dict) -> None:
    """Write the movie store ``out``.

    Parameters
    ----------
    inputs : dict
        ``binned``, ``selection``, ``shots``: stores of the ``difference``, ``select``
        and ``ingest`` stages; ``analysis`` (optional, store or list of stores): analysis
        results whose arrays are added as they are.
    out : path
        Movie store to write.
    config : dict
        The config sections the movie records in its attrs (every section that shapes
        its contents; ``compute`` is left out: it says how to run, not what comes out).
    """
    binned = store.open_group(inputs["binned"], "binned store")
    sel = store.open_group(inputs["selection"], "selection")
    shots = store.open_group(inputs["shots"], "shots store")
    extra = inputs.get("analysis") or []
    extras = [store.open_group(p, "analysis store") for p in (extra if isinstance(extra, (list, tuple)) else [extra])]
    warnings = [w for g in (shots, sel, binned, *extras) for w in g.attrs.get("warnings", [])]
    attrs = {
        "title": f"movie of run '{config['run']['name']}'",
        "config": {k: v for k, v in config.items() if k != "compute"},
        "input_files": shots.attrs.get("files", []),
        "input_checksums": shots.attrs.get("checksums", {}),
        "input_mode": shots.attrs.get("mode"),
        "selection_counts": dict(sel.attrs.get("counts", {})),
        "references_per_shot": binned.attrs.get("references_per_shot"),
        "versions": versions(),
        "written": now(),
        "conventions": CONVENTIONS,
        "warnings": warnings,
        "safety": SAFETY,
    }
    for g in extras:
        attrs.update({k: v for k, v in g.attrs.items() if k not in ("warnings", "written")})
    with store.atomic_path(out) as tmp:
        movie = store.new_group(tmp, attrs)
        _copy_group(binned, movie)
        for g in extras:
            _copy_group(g, movie)
    log.info("movie written to %s", out)
    for line in summary_lines(warnings):
        log.info("%s", line)
