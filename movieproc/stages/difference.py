"""Stage ``difference``: per-bin pump-on minus pump-off differences with honest errors.

Streams the shots store chunk by chunk: normalizes each curve, references each
binned pump-on shot to the mean of its k nearest kept pump-off shots, and
accumulates per-bin float64 sums. Never holds all shots' curves in memory.
"""

from __future__ import annotations

import logging

import numpy as np

from ..io import shotstore, store
from ..parallel import map_ranges
from ..shots.binning import BinSums, accumulate, accumulate_weighted
from ..signals.differences import bin_errors, nearest_references, shared_reference_factor
from ..signals.normalize import normalize
from .common import Warnings, now

log = logging.getLogger("movieproc.difference")


def run(shots_path, selection_path, bins_path, out, config: dict):
    """Write ``binned.zarr``: diff, diff_err, on_mean, off_mean per (delay, q)."""
    dcfg, compute, binning = config["differences"], config["compute"], config["binning"]
    warnings = Warnings("difference", log)
    shots = shotstore.open_shots(shots_path)
    keep = store.read(store.open_group(selection_path, "selection"), "keep", selection_path)
    bg = store.open_group(bins_path, "bins")
    index = store.read(bg, "index", bins_path)
    edges = store.read(bg, "edges", bins_path)
    nb, nq = edges.size - 1, shots.q.size
    on = index >= 0
    off = keep & ~shots.table["pump_on"]
    k = dcfg["references"]
    refs, gap = nearest_references(shots.table["pulse_id"], on, off, k)
    on_idx = np.flatnonzero(on)
    on_bin = index[on_idx]
    if dcfg["max_reference_gap"] is not None:
        far = int(np.sum(gap > dcfg["max_reference_gap"]))
        if far:
            warnings.add(f"{far} pump-on shots have a reference more than {dcfg['max_reference_gap']} pulse ids away")
    shared = shared_reference_factor(on_bin, refs, nb)
    mode, qr = dcfg["normalization"], dcfg["norm_q_range"]
    chunk = compute["chunk_shots"]
    ranges = [(a, min(a + chunk, on_idx.size)) for a in range(0, on_idx.size, chunk)]
    n_boot = dcfg["bootstrap"]
    # Poisson bootstrap over shots: replicate r weights every shot (pump-on and reference
    # alike) by a Poisson(1) count, drawn once for the whole run so a reference shared by
    # shots of different chunks keeps one weight per replicate.
    boot_w = (np.random.default_rng(dcfg["seed"]).poisson(1.0, (n_boot, shots.n_shots)).astype(np.uint8)
              if n_boot else None)

    def work(a, b):
        idx, r = on_idx[a:b], refs[a:b]
        rows = np.unique(np.concatenate([idx, r.ravel()]))
        block = shots.rows(rows)
        norm = normalize(block, shots.q, mode, qr)
        pos_on = np.searchsorted(rows, idx)
        pos_ref = np.searchsorted(rows, r)
        c_on = norm[pos_on]
        c_ref = norm[pos_ref].mean(axis=1, dtype=np.float64)
        d = c_on - c_ref
        boot = []
        for rep in range(n_boot):
            w_ref = boot_w[rep][r].astype(np.float64)            # (n, k)
            w_tot = w_ref.sum(axis=1)
            w_ref = np.where(w_tot[:, None] > 0, w_ref / np.maximum(w_tot, 1)[:, None], 1.0 / k)
            ref_rep = np.einsum("nk,nkq->nq", w_ref, norm[pos_ref], dtype=np.float64)
            boot.append(accumulate_weighted(on_bin[a:b], boot_w[rep][idx], c_on - ref_rep, nb))
        return (accumulate(on_bin[a:b], d, nb), accumulate(on_bin[a:b], c_on, nb),
                accumulate(on_bin[a:b], c_ref, nb), boot)

    parts = map_ranges(work, ranges, compute["workers"], compute["scheduler"], compute["progress"], "difference")
    total = [BinSums.zeros(nb, nq) for _ in range(3)]
    boot_w_sum = np.zeros((n_boot, nb))
    boot_sum = np.zeros((n_boot, nb, nq))
    for p in parts:
        total = [t + x for t, x in zip(total, p[:3])]
        for rep, (ws, sm) in enumerate(p[3]):
            boot_w_sum[rep] += ws
            boot_sum[rep] += sm
    dsum, onsum, refsum = total
    count = dsum.count
    diff = dsum.mean()
    err = bin_errors(dsum.variance(), count, k, shared)
    low = count < binning["min_shots"]
    log.info("differences in %d bins from %d pump-on shots with %d references each; median relative error %.2e",
             nb, int(count.sum()), k, float(np.nanmedian(err)) if np.isfinite(err).any() else float("nan"))
    bins_attrs = dict(bg.attrs)
    units = {"window": "fraction of the normalization-window mean", "total": "fraction of the mean over q",
             "none": "detector units"}[mode]
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"differences": dcfg, "binning": bins_attrs.get("binning"), "written": now(),
                                  "warnings": list(bins_attrs.get("warnings", [])) + list(warnings),
                                  "references_per_shot": k})
        store.write_array(g, "q", shots.q, ["q"], units="1/Å")
        store.write_array(g, "delay", store.read(bg, "delay_mean"), ["delay"], units="ps",
                          attrs={"meaning": "mean corrected delay of the bin's pump-on shots (bin centre if empty)"})
        store.write_array(g, "delay_edges", edges, ["edge"], units="ps")
        store.write_array(g, "delay_spread", store.read(bg, "delay_spread"), ["delay"], units="ps")
        store.write_array(g, "n_shots", count, ["delay"], attrs={"meaning": "pump-on shots in the bin"})
        store.write_array(g, "low_count", low, ["delay"],
                          attrs={"meaning": f"fewer than binning.min_shots = {binning['min_shots']} shots"})
        store.write_array(g, "reference_sharing", shared, ["delay"],
                          attrs={"meaning": "n * sum of squared reference weights; 1/k when no reference is shared"})
        store.write_array(g, "diff", diff.astype(np.float32), ["delay", "q"], units=units)
        store.write_array(g, "diff_err", err.astype(np.float32), ["delay", "q"], units=units,
                          attrs={"meaning": "standard error of diff, accounting for references shared within the bin"})
        store.write_array(g, "on_mean", onsum.mean().astype(np.float32), ["delay", "q"], units=units)
        if n_boot:
            with np.errstate(invalid="ignore", divide="ignore"):
                boot_mean = boot_sum / boot_w_sum[:, :, None]
            store.write_array(g, "diff_boot", boot_mean.astype(np.float32), ["replicate", "delay", "q"], units=units,
                              attrs={"meaning": "diff of Poisson-bootstrap replicates over shots (pump-on and "
                                                "reference shots reweighted together)", "seed": dcfg["seed"]})
        store.write_array(g, "off_mean", refsum.mean().astype(np.float32), ["delay", "q"], units=units)
