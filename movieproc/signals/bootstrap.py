"""Poisson bootstrap of per-bin mean differences over shots.

Replicate r weights every shot of the run, pump-on and reference alike, by a
Poisson(1) count (the Poisson bootstrap: for many shots the same as drawing the
shots with replacement; Hanley & MacGibbon 2006, Comput. Methods Programs
Biomed. 83, 57). The weights are drawn once for the whole run, so a reference
shared by shots of different chunks keeps one weight per replicate. In a
replicate a pump-on shot's reference is the weighted mean of its k references
(their plain mean when all k weigh zero), and the bin's mean difference is the
weighted mean of its pump-on shots' differences.

The sums are streamed like :func:`movieproc.shots.binning.accumulate`: a chunk of
shots gives per-replicate, per-bin sums that add up over chunks.
"""

from __future__ import annotations

import numpy as np

from ..shots.binning import accumulate_weighted


def poisson_weights(replicates: int, shots: int, seed: int) -> np.ndarray:
    """Poisson(1) weight of every shot in every replicate.

    Parameters
    ----------
    replicates : int
        Number of bootstrap replicates R (>= 0).
    shots : int
        Shots in the run N.
    seed : int
        Seed of the numpy Generator.

    Returns
    -------
    ndarray (R, N) uint8
    """
    if int(replicates) < 0:
        raise ValueError(f"replicates must be zero or positive, got {replicates}")
    return np.random.default_rng(seed).poisson(1.0, (int(replicates), int(shots))).astype(np.uint8)


def replicate_sums(bin_index, on_weights, reference_weights, on_curves, reference_curves, nbins):
    """Per-replicate, per-bin weighted sums of the differences of a chunk of pump-on shots.

    Parameters
    ----------
    bin_index : ndarray (n,) int
        Bin of each pump-on shot (-1: not binned).
    on_weights : ndarray (R, n)
        Replicate weights of the pump-on shots.
    reference_weights : ndarray (R, n, k)
        Replicate weights of each shot's k references.
    on_curves : ndarray (n, nq)
        Normalized pump-on curves.
    reference_curves : ndarray (n, k, nq)
        Normalized curves of each shot's references.
    nbins : int

    Returns
    -------
    weight_sums : ndarray (R, nbins) float64
        Sum of the pump-on shots' weights per bin.
    sums : ndarray (R, nbins, nq) float64
        Weighted sums of the differences per bin.
    """
    reference_weights = np.asarray(reference_weights, dtype=np.float64)
    replicates, n, k = reference_weights.shape
    nq = np.shape(on_curves)[1]
    weight_sums, sums = np.zeros((replicates, nbins)), np.zeros((replicates, nbins, nq))
    for r in range(replicates):
        w_ref = reference_weights[r]
        total = w_ref.sum(axis=1)
        w_ref = np.where(total[:, None] > 0, w_ref / np.maximum(total, 1)[:, None], 1.0 / k)
        reference = np.einsum("nk,nkq->nq", w_ref, reference_curves, dtype=np.float64)
        accumulate_weighted(bin_index, on_weights[r], on_curves - reference, nbins, into=(weight_sums[r], sums[r]))
    return weight_sums, sums


def replicate_means(weight_sums, sums):
    """Per-replicate bin means (R, nbins, nq); NaN where a replicate leaves a bin empty."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(sums) / np.asarray(weight_sums)[:, :, None]
