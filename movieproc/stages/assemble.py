"""Stage ``assemble``: the delay-indexed movie (zarr v3, xarray-readable).

Collects the binned differences, the selection counts, any analysis results
(solvent terms, fits, structures) and the provenance into one store that a
plain ``xarray.open_zarr(path)`` opens with named dimensions, every dimension
with a coordinate, every variable with ``long_name`` and pint-parseable
``units``, and attributes that netCDF takes (strings and numbers; the config as
YAML text in ``config_yaml``). :mod:`movieproc.io.movie` reads them back.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..io import store
from ..safety import SAFETY
from ..warning_groups import summary_lines
from .common import now, versions

log = logging.getLogger("movieproc.assemble")


#: Conventions the movie states in its attrs (``<name>_convention``).
CONVENTIONS = {
    "delay": "ps; positive = probe after pump; corrected delay = stage_delay - time_zero + sign * timing correction",
    "q": "1/angstrom, q = 4 pi sin(theta) / lambda, 2 theta the scattering angle",
    "difference": "pump-on minus the mean of the k nearest pump-off shots, each curve normalized first",
    "scale": "difference, difference_error, pump_on_mean and pump_off_mean are in normalized units (their "
             "description); solute, model, residual and solvent terms are in analysis_units (attrs): difference "
             "times absolute_scale_factor (attrs), so compare difference * absolute_scale_factor with model",
}


def _copy_group(src, dst, skip=()):
    """Copy every array of a zarr group (with dims and attrs) into another group."""
    for name, arr in src.arrays():
        if name in skip or name in dst:
            continue
        dims = arr.metadata.dimension_names
        store.write_array(dst, name, arr[...], dims, attrs=dict(arr.attrs))


def _provenance(movie, shots, sel):
    """Input files with their checksums, and the shots kept or dropped per reason, as variables."""
    files = [str(f) for f in shots.attrs.get("files", [])]
    sums = shots.attrs.get("checksums", {}) or {}
    store.write_array(movie, "input_file", np.array(files, dtype=str), ["input_file"],
                      long_name="run file read (in this order)")
    store.write_array(movie, "input_checksum", np.array([str(sums.get(f, "")) for f in files], dtype=str),
                      ["input_file"], long_name="checksum of the run file's content (algorithm:hex digest)")
    counts = dict(store.yaml_value(sel.attrs, "counts", {}) or {})
    store.write_array(movie, "selection_reason", np.array(list(counts), dtype=str), ["selection_reason"],
                      long_name="reason a shot was dropped, or a total of the selection",
                      attrs={"description": "a reason (pulse_energy, timing_missing, ...) counts the shots it "
                                            "dropped (a shot may have several); total, kept, dropped, kept_pump_on, "
                                            "kept_pump_off, outlier_pump_on, outlier_pump_off are totals"})
    store.write_array(movie, "selection_count", np.array([int(v) for v in counts.values()], dtype=np.int64),
                      ["selection_reason"], units=store.DIMENSIONLESS, long_name="shots per selection reason")


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
    warnings = [w for g in (shots, sel, binned, *extras) for w in store.text_list(g.attrs, "warnings")]
    attrs = {
        "title": f"movie of run '{config['run']['name']}'",
        "config_yaml": store.yaml_text({k: v for k, v in config.items() if k != "compute"}),
        "input_mode": shots.attrs.get("mode"),
        "references_per_shot": binned.attrs.get("references_per_shot"),
        "software_versions": store.yaml_text(versions()),
        "written": now(),
        **{f"{k}_convention": v for k, v in CONVENTIONS.items()},
        "warnings": store.lines_text(warnings),
        "safety": SAFETY,
    }
    for g in extras:
        attrs.update({k: v for k, v in g.attrs.items() if k not in ("warnings", "written")})
    with store.atomic_path(out) as tmp:
        movie = store.new_group(tmp, {k: v for k, v in attrs.items() if v is not None})
        _copy_group(binned, movie)
        for g in extras:
            _copy_group(g, movie)
        _provenance(movie, shots, sel)
    log.info("movie written to %s", out)
    for line in summary_lines(warnings):
        log.info("%s", line)
