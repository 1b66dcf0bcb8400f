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
from .. import progress
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
#: What a number of the differences means, per normalization mode (their units are "1").
NORMALIZED_UNITS = {
    "window": ("normalized units: each shot's curve divided by its mean over the normalization q window "
               "(differences.norm_q_range), so 1 is that mean"),
    "total": "normalized units: each shot's curve divided by its mean over all q, so 1 is that mean",
    "none": "detector units (arbitrary): curves not normalized",
}
#: Short labels of those units for figures.
DISPLAY_UNITS = {"window": "normalized units", "total": "normalized units", "none": "detector units"}


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
    total, ranges = None, chunk_ranges(n_on, compute["chunk_shots"])
    with progress.bar(len(ranges), "difference", "chunks", compute["progress"]) as bar:  # one bar, all batches
        for batch in shotstore.batches(ranges, compute["workers"]):
            for sums, part in map_ranges(work, batch, compute["workers"], compute["scheduler"], bar, "difference"):
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
    """Write ``binned.zarr``: difference, difference_error, pump_on_mean, pump_off_mean per (delay, q), and more.

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
        weights = covariance.ReplicateWeights(differences["seed"], n_boot, shots.n_shots) if n_boot else None
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
        g = store.new_group(tmp, {"config_yaml": store.yaml_text({"differences": differences,
                                                                  "binning": config["binning"]}),
                                  "written": now(), "references_per_shot": k,
                                  "warnings": store.lines_text(store.text_list(bins.attrs, "warnings")
                                                               + list(warnings))})
        _write(g, shots.q, bins, edges, shared, sums, difference_error, config["binning"]["min_shots"], differences)
        _write_covariance(g, correlation, boot, differences)


def _write(g, q, bins, edges, shared, sums, difference_error, min_shots, differences):
    """The arrays of the binned store."""
    count = sums.difference.count
    delay = store.read(bins, "delay_mean")
    store.write_array(g, "q", q, ["q"], units=store.INVERSE_ANGSTROM,
                      long_name="momentum transfer q = 4 pi sin(theta) / lambda")
    store.write_array(g, "delay", delay, ["delay"], units=store.PS,
                      long_name="pump-probe delay: mean corrected delay of the bin's pump-on shots",
                      attrs={"bounds": "delay_bounds", "description": "positive: probe after pump; the bin centre "
                             "where the bin is empty"})
    store.write_array(g, "bound", np.array(["lower", "upper"]), ["bound"], long_name="side of a bin")
    # a CF boundary variable takes its units from delay (CF conventions 7.1): none of its own
    store.write_array(g, "delay_bounds", np.stack([edges[:-1], edges[1:]], axis=1), ["delay", "bound"],
                      long_name="edges of the delay bin (lower, upper), in the units of delay")
    store.write_array(g, "delay_other", delay, ["delay_other"], units=store.PS,
                      long_name="pump-probe delay of the other bin (second axis of delay_correlation)")
    store.write_array(g, "delay_spread", store.read(bins, "delay_spread"), ["delay"], units=store.PS,
                      long_name="standard deviation of the corrected delays of the bin's pump-on shots")
    store.write_array(g, "shot_count", count, ["delay"], units=store.DIMENSIONLESS,
                      long_name="pump-on shots in the bin")
    store.write_array(g, "too_few_shots", count < min_shots, ["delay"], units=store.DIMENSIONLESS,
                      long_name=f"flag: fewer than binning.min_shots = {min_shots} shots in the bin")
    store.write_array(g, "reference_sharing", shared, ["delay"], units=store.DIMENSIONLESS,
                      long_name="n times the sum of squared reference weights; 1/k when no reference is shared")
    labels = _units_attrs(differences)
    for name, values, long_name in (
            ("difference", sums.difference.mean(), "pump-on minus pump-off difference, bin mean"),
            ("difference_error", difference_error, "standard error of difference, accounting for pump-off "
                                                   "references shared within the bin"),
            ("pump_on_mean", sums.on.mean(), "mean pump-on curve of the bin"),
            ("pump_off_mean", sums.reference.mean(), "mean pump-off reference curve of the bin")):
        store.write_array(g, name, values.astype(np.float32), ["delay", "q"], units=store.DIMENSIONLESS,
                          long_name=long_name, attrs=labels)


def _units_attrs(differences):
    """description and display_units of arrays in the differences' (normalized) units."""
    mode = differences["normalization"]
    return {"description": NORMALIZED_UNITS[mode], "display_units": DISPLAY_UNITS[mode]}


def _write_covariance(g, correlation, boot, differences):
    """The between-bin correlation and, when asked, the bootstrap replicates."""
    store.write_array(g, "delay_correlation", correlation, ["delay", "delay_other"], units=store.DIMENSIONLESS,
                      long_name="correlation between bins' differences caused by shared pump-off references",
                      attrs={"description": "Cov(D_b(q), D_c(q)) = difference_error_b(q) difference_error_c(q) R_bc"})
    if boot is not None:
        replicates = covariance.bootstrap_replicates(boot)
        store.write_array(g, "replicate", np.arange(replicates.shape[0]), ["replicate"], units=store.DIMENSIONLESS,
                          long_name="number of the bootstrap replicate")
        store.write_array(g, "difference_replicates", replicates.astype(np.float32), ["replicate", "delay", "q"],
                          units=store.DIMENSIONLESS,
                          long_name="difference of Poisson-bootstrap replicates over shots (pump-on and pump-off "
                                    "shots reweighted; ratio estimator per bin)",
                          attrs={**_units_attrs(differences), "seed": differences["seed"]})
