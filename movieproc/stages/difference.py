"""Stage ``difference``: per-bin pump-on minus pump-off differences with honest errors.

Streams the shots store chunk by chunk: normalizes each curve, references each
binned pump-on shot to the mean of its k nearest kept pump-off shots, and
accumulates per-bin float64 sums (:func:`movieproc.signals.differences.difference_sums`),
with Poisson-bootstrap replicates when asked (:mod:`movieproc.signals.bootstrap`).
Never holds all shots' curves in memory.
"""

from __future__ import annotations

import logging
from functools import partial, reduce
from operator import add
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..parallel import chunk_ranges, map_ranges
from ..signals import bootstrap
from ..signals.differences import bin_errors, difference_sums, nearest_references, shared_reference_factor
from ..signals.normalize import normalize
from .common import Warnings, config_errors, now

log = logging.getLogger("movieproc.difference")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"k": "differences.references", "mode": "differences.normalization",
               "q_range": "differences.norm_q_range", "replicates": "differences.bootstrap",
               "chunk": "compute.chunk_shots", "scheduler": "compute.scheduler"}
#: Units of the differences per normalization mode.
UNITS = {"window": "fraction of the normalization-window mean", "total": "fraction of the mean over q",
         "none": "detector units"}


def _chunk_sums(start, stop, shots, on_idx, refs, on_bin, nbins, differences, weights):
    """Sums of pump-on shots on_idx[start:stop]: their curves and their references' read once."""
    idx, ref = on_idx[start:stop], refs[start:stop]
    rows = np.unique(np.concatenate([idx, ref.ravel()]))
    curves = normalize(shots.rows(rows), shots.q, differences["normalization"], differences["norm_q_range"])
    return difference_sums(on_bin[start:stop], curves[np.searchsorted(rows, idx)],
                           curves[np.searchsorted(rows, ref)], nbins, weights[:, idx], weights[:, ref])


def _references(shots, keep, index, differences, warnings):
    """Each binned pump-on shot's k nearest kept pump-off shots."""
    on = index >= 0
    off = keep & ~shots.table["pump_on"]
    k = differences["references"]
    if off.sum() < k:
        raise DataError(f"{int(off.sum())} kept pump-off shots, fewer than differences.references = {k} "
                        "(check shots/pump_on and the selection cuts, or lower differences.references)")
    refs, gap = nearest_references(shots.table["pulse_id"], on, off, k)
    if differences["max_reference_gap"] is not None:
        far = int(np.sum(gap > differences["max_reference_gap"]))
        if far:
            warnings.add(f"{far} pump-on shots have a reference more than {differences['max_reference_gap']} "
                         "pulse ids away")
    return np.flatnonzero(on), refs


def run(inputs: dict, out: Path, config: dict) -> None:
    """Write ``binned.zarr``: diff, diff_err, on_mean, off_mean per (delay, q).

    Parameters
    ----------
    inputs : dict
        ``shots``, ``selection``, ``bins``: the stores of those stages.
    out : Path
        Store to write (zarr).
    config : dict
        Sections ``differences``, ``binning`` (its ``min_shots``) and ``compute``.
    """
    differences, compute, min_shots = config["differences"], config["compute"], config["binning"]["min_shots"]
    warnings = Warnings("difference", log)
    shots = shotstore.open_shots(inputs["shots"])
    keep = store.read(store.open_group(inputs["selection"], "selection"), "keep", inputs["selection"])
    bins = store.open_group(inputs["bins"], "bins")
    index, edges = store.read(bins, "index", inputs["bins"]), store.read(bins, "edges", inputs["bins"])
    nbins = edges.size - 1
    with config_errors(CONFIG_KEYS, config):
        on_idx, refs = _references(shots, keep, index, differences, warnings)
        weights = bootstrap.poisson_weights(differences["bootstrap"], shots.n_shots, differences["seed"])
        work = partial(_chunk_sums, shots=shots, on_idx=on_idx, refs=refs, on_bin=index[on_idx], nbins=nbins,
                       differences=differences, weights=weights)
        sums = reduce(add, map_ranges(work, chunk_ranges(on_idx.size, compute["chunk_shots"]), compute["workers"],
                                      compute["scheduler"], compute["progress"], "difference"))
    shared = shared_reference_factor(index[on_idx], refs, nbins)
    count = sums.difference.count
    difference_error = bin_errors(sums.difference.variance(), count, differences["references"], shared)
    log.info("differences in %d bins from %d pump-on shots with %d references each; median relative error %.2e",
             nbins, int(count.sum()), differences["references"],
             float(np.nanmedian(difference_error)) if np.isfinite(difference_error).any() else float("nan"))
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"differences": differences, "binning": bins.attrs.get("binning"), "written": now(),
                                  "warnings": list(bins.attrs.get("warnings", [])) + list(warnings),
                                  "references_per_shot": differences["references"]})
        _write(g, shots.q, bins, edges, shared, sums, difference_error, min_shots, differences)


def _write(g, q, bins, edges, shared, sums, difference_error, min_shots, differences):
    """The arrays of the binned store."""
    units = UNITS[differences["normalization"]]
    count = sums.difference.count
    store.write_array(g, "q", q, ["q"], units="1/Å")
    store.write_array(g, "delay", store.read(bins, "delay_mean"), ["delay"], units="ps",
                      attrs={"meaning": "mean corrected delay of the bin's pump-on shots (bin centre if empty)"})
    store.write_array(g, "delay_edges", edges, ["edge"], units="ps")
    store.write_array(g, "delay_spread", store.read(bins, "delay_spread"), ["delay"], units="ps")
    store.write_array(g, "n_shots", count, ["delay"], attrs={"meaning": "pump-on shots in the bin"})
    store.write_array(g, "low_count", count < min_shots, ["delay"],
                      attrs={"meaning": f"fewer than binning.min_shots = {min_shots} shots"})
    store.write_array(g, "reference_sharing", shared, ["delay"],
                      attrs={"meaning": "n * sum of squared reference weights; 1/k when no reference is shared"})
    store.write_array(g, "diff", sums.difference.mean().astype(np.float32), ["delay", "q"], units=units)
    store.write_array(g, "diff_err", difference_error.astype(np.float32), ["delay", "q"], units=units,
                      attrs={"meaning": "standard error of diff, accounting for references shared within the bin"})
    store.write_array(g, "on_mean", sums.on.mean().astype(np.float32), ["delay", "q"], units=units)
    if differences["bootstrap"]:
        replicates = bootstrap.replicate_means(sums.replicate_weights, sums.replicate_sums)
        store.write_array(g, "diff_boot", replicates.astype(np.float32), ["replicate", "delay", "q"], units=units,
                          attrs={"meaning": "diff of Poisson-bootstrap replicates over shots (pump-on and "
                                            "reference shots reweighted together)", "seed": differences["seed"]})
    store.write_array(g, "off_mean", sums.reference.mean().astype(np.float32), ["delay", "q"], units=units)
