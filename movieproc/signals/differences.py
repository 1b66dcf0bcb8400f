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


#: Pump-on shots whose candidate references are ranked at once: bounds the (block, 2k)
#: temporaries of :func:`nearest_references` to a few tens of MB whatever the run length.
REFERENCE_BLOCK = 1 << 16


def index_dtype(n):
    """Smallest of int32/int64 that holds run indices below ``n`` (int32 for runs under 2^31 shots)."""
    return np.int32 if int(n) < np.iinfo(np.int32).max else np.int64


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
    refs : ndarray (n_on, k) int32 (int64 for runs of 2^31 shots or more)
        Shot indices (into the run) of each on shot's references, ordered by
        distance; on shots are in run order.
    gap : ndarray (n_on,) int64
        Largest pulse-id distance among each on shot's references.

    Raises
    ------
    DataError
        If there are fewer than ``k`` usable pump-off shots.

    Notes
    -----
    The on shots are ranked in blocks of ``REFERENCE_BLOCK``, so the memory
    beyond the result is bounded whatever the run length.
    """
    pid = np.asarray(pulse_id, np.int64)
    on_idx = np.flatnonzero(on)
    off_idx = np.flatnonzero(off)
    if off_idx.size < k:
        raise DataError(f"{off_idx.size} usable pump-off shots; each pump-on shot needs {k} references "
                        "(check shots/pump_on and the selection cuts, or ask for fewer references)")
    off_pid = pid[off_idx]
    dtype = index_dtype(pid.size)
    refs = np.empty((on_idx.size, k), dtype)
    gap = np.empty(on_idx.size, np.int64)
    for a in range(0, on_idx.size, REFERENCE_BLOCK):
        on_pid = pid[on_idx[a:a + REFERENCE_BLOCK]]
        pos = np.searchsorted(off_pid, on_pid)
        cand = pos[:, None] + np.arange(-k, k)[None, :]
        valid = (cand >= 0) & (cand < off_idx.size)
        np.clip(cand, 0, off_idx.size - 1, out=cand)
        dist = np.abs(off_pid[cand] - on_pid[:, None]).astype(float)
        dist[~valid] = np.inf
        order = np.argsort(dist, axis=1, kind="stable")[:, :k]
        refs[a:a + REFERENCE_BLOCK] = off_idx[np.take_along_axis(cand, order, axis=1)]
        gap[a:a + REFERENCE_BLOCK] = np.take_along_axis(dist, order, axis=1).max(axis=1)
    return refs, gap


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
    from .covariance import reference_gram

    gram, n = reference_gram(bin_index, refs, nbins)
    return shared_factor_from_gram(gram, n, np.shape(refs)[1])


def shared_factor_from_gram(gram, n, k):
    """:func:`shared_reference_factor` from ``(gram, n)`` of :func:`movieproc.signals.covariance.reference_gram`.

    Parameters
    ----------
    gram : ndarray (nbins, nbins)
        Reference use-count products U U^T.
    n : ndarray (nbins,)
        Pump-on shots per bin.
    k : int
        References per pump-on shot.

    Returns
    -------
    ndarray (nbins,) float64 (NaN for empty bins)
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, np.diag(gram) / (k * k * n), np.nan)


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
    """

    difference: BinSums
    on: BinSums
    reference: BinSums

    def __add__(self, other: "DifferenceSums") -> "DifferenceSums":
        return DifferenceSums(self.difference + other.difference, self.on + other.on,
                              self.reference + other.reference)


def difference_sums(bin_index, on_curves, reference_curves, nbins) -> DifferenceSums:
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

    Returns
    -------
    DifferenceSums
    """
    reference = np.asarray(reference_curves).mean(axis=1, dtype=np.float64)
    difference = on_curves - reference
    return DifferenceSums(accumulate(bin_index, difference, nbins), accumulate(bin_index, on_curves, nbins),
                          accumulate(bin_index, reference, nbins))
