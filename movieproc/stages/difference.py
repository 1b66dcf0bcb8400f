"""Stage ``difference``: per-bin pump-on minus pump-off differences with honest errors.

Streams the shots store chunk by chunk: normalizes each curve, references each
binned pump-on shot to the mean of its k nearest kept pump-off shots, and
accumulates per-bin float64 sums (:func:`movieproc.signals.differences.difference_sums`),
with Poisson-bootstrap sums when asked (:func:`movieproc.signals.covariance.bootstrap_chunk`).
Chunks are reduced a few at a time (:func:`movieproc.io.shotstore.batches`), so
memory is bounded by the chunk size, not by the run: what grows with the run is
the reference indices (int32, k per pump-on shot) and the shot table fields used.
Also writes the between-bin correlation of the differences caused by shared
pump-off references (:func:`movieproc.signals.covariance.bin_correlation`).
"""

from __future__ import annotations

import logging
from functools import partial
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..parallel import chunk_ranges, map_ranges
from ..signals import covariance
from ..signals.differences import bin_errors, difference_sums, nearest_references, shared_factor_from_gram
from ..signals.normalize import normalize
from .keys import config_keys
from .common import Warnings, now

log = logging.getLogger("movieproc.difference")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"k": "differences.references", "mode": "differences.normalization",
               "q_range": "differences.norm_q_range", "n_boot": "differences.bootstrap",
               "chunk": "compute.chunk_shots", "scheduler": "compute.scheduler"}
#: Units of the differences per normalization mode.
UNITS = {"window": "fraction of the normalization-window mean", "total": "fraction of the mean over q",
         "none": "detector units"}


def _chunk_sums(start, stop, shots, on_idx, refs, on_bin, nbins, differences, weights):
    """Sums of pump-on shots on_idx[start:stop] (and their bootstrap sums): curves read once."""
    idx, ref = on_idx[start:stop], refs[start:stop]
    rows = np.unique(np.concatenate([idx, ref.ravel()]))
    curves = normalize(shots.rows(rows), shots.q, differences["normalization"], differences["norm_q_range"])
    sums = difference_sums(on_bin[start:stop], curves[np.searchsorted(rows, idx)],
                           curves[np.searchsorted(rows, ref)], nbins)
    boot = None if weights is None else covariance.bootstrap_chunk(weights, idx, on_bin[start:stop], ref, rows,
                                                                   curves)
    return sums, boot


def _reduce(work, n_on, compute, boot):
    """Map ``work`` over chunks of the pump-on shots, a batch at a time; bootstrap sums added into ``boot``."""
    total = None
    for batch in shotstore.batches(chunk_ranges(n_on, compute["chunk_shots"]), compute["workers"]):
        for sums, part in map_ranges(work, batch, compute["workers"], compute["scheduler"], compute["progress"],
                                     "difference"):
            total = sums if total is None else total + sums
            if part is not None:
                boot.add(part)
    return total


def _references(shots, keep, index, differences, warnings):
    """Run indices of the binned pump-on shots and their k nearest kept pump-off shots."""
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
    return np.flatnonzero(on).astype(refs.dtype), refs


def run(inputs: dict, out: Path, config: dict) -> None:
    """Write ``binned.zarr``: difference, difference_error, on_mean, off_mean per (delay, q), delay_correlation.

    Parameters
    ----------
    inputs : dict
        ``shots``, ``selection``, ``bins``: the stores of those stages.
    out : Path
        Store to write (zarr).
    config : dict
        Sections ``differences``, ``binning`` (its ``min_shots``) and ``compute``.
    """
    differences, compute, n_boot = config["differences"], config["compute"], config["differences"]["bootstrap"]
    warnings = Warnings("difference", log)
    shots = shotstore.open_shots(inputs["shots"])
    keep = store.read(store.open_group(inputs["selection"], "selection"), "keep", inputs["selection"])
    bins = store.open_group(inputs["bins"], "bins")
    index, edges = store.read(bins, "index", inputs["bins"]), store.read(bins, "edges", inputs["bins"])
    nbins, k = edges.size - 1, differences["references"]
    with config_keys(CONFIG_KEYS, config):
        on_idx, refs = _references(shots, keep, index, differences, warnings)
        on_bin = index[on_idx]
        del keep, index
        for name in ("pulse_id", "pump_on"):  # the largest fields, not needed beyond the references
            shots.table.drop(name)
        weights = covariance.bootstrap_weights(np.random.default_rng(differences["seed"]), n_boot,
                                               shots.n_shots) if n_boot else None
        boot = covariance.BootstrapSums.zeros(n_boot, nbins, shots.q.size) if n_boot else None
        work = partial(_chunk_sums, shots=shots, on_idx=on_idx, refs=refs, on_bin=on_bin, nbins=nbins,
                       differences=differences, weights=weights)
        sums = _reduce(work, on_idx.size, compute, boot)
    gram, n = covariance.reference_gram(on_bin, refs, nbins)
    shared = shared_factor_from_gram(gram, n, k)
    correlation = covariance.bin_correlation(covariance.overlap_from_gram(gram, n, k))
    count = sums.difference.count
    difference_error = bin_errors(sums.difference.variance(), count, k, shared)
    log.info("differences in %d bins from %d pump-on shots with %d references each; median relative error %.2e",
             nbins, int(count.sum()), k,
             float(np.nanmedian(difference_error)) if np.isfinite(difference_error).any() else float("nan"))
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"differences": differences, "binning": bins.attrs.get("binning"), "written": now(),
                                  "warnings": list(bins.attrs.get("warnings", [])) + list(warnings),
                                  "references_per_shot": k})
        _write(g, shots.q, bins, edges, shared, sums, difference_error, config["binning"]["min_shots"], differences)
        _write_covariance(g, correlation, boot, differences)


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
    store.write_array(g, "difference", sums.difference.mean().astype(np.float32), ["delay", "q"], units=units)
    store.write_array(g, "difference_error", difference_error.astype(np.float32), ["delay", "q"], units=units,
                      attrs={"meaning": "standard error of difference, accounting for references shared within the bin"})
    store.write_array(g, "on_mean", sums.on.mean().astype(np.float32), ["delay", "q"], units=units)
    store.write_array(g, "off_mean", sums.reference.mean().astype(np.float32), ["delay", "q"], units=units)


def _write_covariance(g, correlation, boot, differences):
    """The between-bin correlation and, when asked, the bootstrap replicates."""
    store.write_array(g, "delay_correlation", correlation, ["delay", "delay_other"], units="1",
                      attrs={"meaning": "correlation between bins' differences caused by shared pump-off "
                                        "references; Cov(D_b(q), D_c(q)) = difference_error_b(q) difference_error_c(q) R_bc"})
    if boot is not None:
        replicates = covariance.bootstrap_replicates(boot)
        store.write_array(g, "difference_replicates", replicates.astype(np.float32), ["replicate", "delay", "q"],
                          units=UNITS[differences["normalization"]],
                          attrs={"meaning": "difference of Poisson-bootstrap replicates over shots (pump-on and "
                                            "pump-off shots reweighted; ratio estimator per bin)",
                                 "seed": differences["seed"]})
