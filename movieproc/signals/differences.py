"""Pump-on minus pump-off differences with references near in time.

Each pump-on shot is referenced to the mean of the ``k`` pump-off shots nearest
to it in pulse id: slow drifts of jet, pointing and detector gain cancel. The
per-bin mean difference is then a linear combination of independent shots in
which an off shot may serve several on shots of the same bin; :func:`bin_errors`
turns the per-bin scatter of the per-shot differences into a standard error
that accounts for that sharing (the naive ``std / sqrt(n)`` is too small when
references are shared).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import DataError
from ..shots.binning import BinSums, accumulate
from .bootstrap import replicate_sums


def nearest_references(pulse_id, on, off, k):
    """The ``k`` usable pump-off shots nearest in pulse id to each pump-on shot.

    Parameters
    ----------
    pulse_id : array_like (N,) int
        Increasing shot counter.
    on : array_like (N,) bool
        Pump-on shots that need a reference.
    off : array_like (N,) bool
        Pump-off shots usable as references.
    k : int
        References per shot.

    Returns
    -------
    refs : ndarray (n_on, k) int64
        Shot indices (into the run) of each on shot's references, ordered by
        distance; on shots are in run order.
    gap : ndarray (n_on,) int64
        Largest pulse-id distance among each on shot's references.

    Raises
    ------
    DataError
        If there are fewer than ``k`` usable pump-off shots.
    """
    pid = np.asarray(pulse_id, np.int64)
    on_idx = np.flatnonzero(on)
    off_idx = np.flatnonzero(off)
    if off_idx.size < k:
        raise DataError(f"{off_idx.size} usable pump-off shots; each pump-on shot needs {k} references "
                        "(check shots/pump_on and the selection cuts, or ask for fewer references)")
    off_pid = pid[off_idx]
    pos = np.searchsorted(off_pid, pid[on_idx])
    cand = pos[:, None] + np.arange(-k, k)[None, :]
    valid = (cand >= 0) & (cand < off_idx.size)
    cand_c = np.clip(cand, 0, off_idx.size - 1)
    dist = np.abs(off_pid[cand_c] - pid[on_idx][:, None]).astype(float)
    dist[~valid] = np.inf
    order = np.argsort(dist, axis=1, kind="stable")[:, :k]
    pick = np.take_along_axis(cand_c, order, axis=1)
    refs = off_idx[pick]
    gap = np.take_along_axis(dist, order, axis=1).max(axis=1).astype(np.int64)
    return refs.astype(np.int64), gap


def shared_reference_factor(bin_index, refs, nbins):
    """Sum over off shots of the squared weight they carry in each bin's mean.

    The mean difference of bin b is ``(1/n) sum_i on_i - sum_j w_j off_j`` with
    ``w_j = u_j / (k n)`` and ``u_j`` the number of the bin's on shots using off
    shot j. This returns ``n * sum_j w_j^2`` per bin: ``1/k`` when no reference
    is shared within the bin, up to 1 when all on shots share the same k.

    Parameters
    ----------
    bin_index : array_like (n_on,) int
        Bin of each on shot (-1: not binned).
    refs : array_like (n_on, k) int
        Reference shot indices of each on shot.
    nbins : int

    Returns
    -------
    ndarray (nbins,) float64 (NaN for empty bins)
    """
    bin_index = np.asarray(bin_index, np.int64)
    refs = np.asarray(refs, np.int64)
    k = refs.shape[1]
    ok = bin_index >= 0
    b = np.repeat(bin_index[ok], k)
    j = refs[ok].ravel()
    pairs = np.unique(np.stack([b, j]), axis=1, return_counts=True)
    (bb, _), u = pairs
    n = np.bincount(bin_index[ok], minlength=nbins).astype(float)
    s = np.bincount(bb, weights=u.astype(float) ** 2, minlength=nbins)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, s / (k * k * n), np.nan)


def bin_errors(variance, count, k, shared):
    """Standard error of each bin's mean difference, accounting for shared references.

    With per-shot noise variance s^2 on every shot (on and off alike), a
    per-shot difference has variance ``s^2 (1 + 1/k)``, and the bin mean
    ``s^2 (1 + shared) / n``. The per-shot difference variance estimated from
    the data is therefore scaled by ``(1 + shared) / (1 + 1/k)``.

    Parameters
    ----------
    variance : array_like (nbins, nq)
        Sample variance of the per-shot differences in each bin.
    count : array_like (nbins,)
        On shots per bin.
    k : int
        References per on shot.
    shared : array_like (nbins,)
        From :func:`shared_reference_factor`.

    Returns
    -------
    ndarray (nbins, nq) float64
    """
    count = np.asarray(count, float)[:, None]
    scale = (1.0 + np.asarray(shared, float)[:, None]) / (1.0 + 1.0 / k)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(np.asarray(variance) * scale / count)


@dataclass
class DifferenceSums:
    """Per-bin sums of per-shot differences, pump-on and reference curves, streamed over chunks.

    Attributes
    ----------
    difference, on, reference : BinSums
        Of the per-shot differences, the pump-on curves and the reference
        means, (nbins, nq).
    replicate_weights : ndarray (R, nbins) float64
        Bootstrap replicates' pump-on weight per bin (R = 0 without bootstrap).
    replicate_sums : ndarray (R, nbins, nq) float64
        Bootstrap replicates' weighted sums of the differences.
    """

    difference: BinSums
    on: BinSums
    reference: BinSums
    replicate_weights: np.ndarray
    replicate_sums: np.ndarray

    def __add__(self, other: "DifferenceSums") -> "DifferenceSums":
        return DifferenceSums(self.difference + other.difference, self.on + other.on,
                              self.reference + other.reference, self.replicate_weights + other.replicate_weights,
                              self.replicate_sums + other.replicate_sums)


def difference_sums(bin_index, on_curves, reference_curves, nbins, on_weights=None,
                    reference_weights=None) -> DifferenceSums:
    """Per-bin sums for a chunk of pump-on shots, each referenced to the mean of its k references.

    Parameters
    ----------
    bin_index : array_like (n,) int
        Bin of each pump-on shot (-1: not binned).
    on_curves : ndarray (n, nq)
        Normalized pump-on curves.
    reference_curves : ndarray (n, k, nq)
        Normalized curves of each shot's references (:func:`nearest_references`).
    nbins : int
    on_weights, reference_weights : ndarray (R, n) and (R, n, k), optional
        Bootstrap weights (:func:`movieproc.signals.bootstrap.poisson_weights`
        of these shots); default no replicates.

    Returns
    -------
    DifferenceSums
    """
    reference = np.asarray(reference_curves).mean(axis=1, dtype=np.float64)
    difference = on_curves - reference
    nq = reference.shape[1]
    if on_weights is None or len(on_weights) == 0:
        weights, sums = np.zeros((0, nbins)), np.zeros((0, nbins, nq))
    else:
        weights, sums = replicate_sums(bin_index, on_weights, reference_weights, on_curves, reference_curves, nbins)
    return DifferenceSums(accumulate(bin_index, difference, nbins), accumulate(bin_index, on_curves, nbins),
                          accumulate(bin_index, reference, nbins), weights, sums)
