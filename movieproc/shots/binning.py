"""Delay bins and streamed per-bin sums.

Bins follow numpy's histogram convention: ``[e_k, e_{k+1})`` for all but the last
bin, which also holds its right edge. Shots with a NaN delay or a delay outside
the edges get index -1 and are counted, never silently lost.

:func:`accumulate` is the streaming core: it adds one chunk of per-shot values
into per-bin count, sum and sum of squares in float64, so a run of any length is
reduced chunk by chunk without holding all shots in memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from ..errors import DataError

#: The ways :func:`make_edges` knows to place bin edges.
MODES = ("width", "population", "edges")
#: Rounding allowance when counting whole bins in a range (a fraction of a bin).
BIN_ROUNDING = 1e-9


def fixed_width_edges(delay, width, start=None, stop=None):
    """Edges of fixed-width bins, ps.

    Parameters
    ----------
    delay : array_like (N,)
        Delays used for the default range (NaNs ignored).
    width : float
        Bin width, ps (> 0).
    start, stop : float, optional
        First and last edge; default the finite delay range, with ``stop``
        extended to a whole number of bins.

    Raises
    ------
    ValueError
        Naming ``width`` or ``stop`` when they are unusable.
    """
    if width is None or not width > 0:
        raise ValueError(f"width must be a positive bin width in ps, got {width!r}")
    finite = np.asarray(delay, float)
    finite = finite[np.isfinite(finite)]
    if start is None or stop is None:
        if finite.size == 0:
            raise DataError("no shot has a finite corrected delay: cannot choose a bin range")
        start = float(finite.min()) if start is None else start
        stop = float(finite.max()) if stop is None else stop
    if not stop > start:
        raise ValueError(f"stop must lie above start = {start} ps, got {stop}")
    n = int(np.ceil((stop - start) / width - BIN_ROUNDING))
    return start + width * np.arange(max(n, 1) + 1)


def population_edges(delay, count):
    """Edges of ``count`` bins holding equal numbers of shots (within one).

    The sorted finite delays are split into ``count`` runs of as equal length
    as possible; each inner edge lies half-way between the last delay of one
    run and the first of the next, so no delay sits on an edge. The outer edges
    are the extreme delays, so every finite delay falls in a bin. Tied delays
    at a split make the neighbouring bins unequal; bins that ties leave empty
    are merged into a neighbour, so fewer than ``count`` bins can result.
    """
    d = np.asarray(delay, float)
    d = np.sort(d[np.isfinite(d)])
    if d.size < count:
        raise DataError(f"{d.size} shots with finite delay cannot fill {count} equal-population bins")
    split = np.round(np.arange(1, count) * d.size / count).astype(int)
    inner = 0.5 * (d[split - 1] + d[split])
    edges = np.unique(np.concatenate([[d[0]], inner, [d[-1]]]))
    if edges.size < 2:
        raise DataError("all delays are equal: equal-population bins need a spread of delays")
    # Tied delays (e.g. nominal stage positions) can leave bins empty: merge each empty
    # bin into its neighbour by dropping its inner edge.
    while edges.size > 2:
        counts = np.histogram(d, edges)[0]
        empty = np.flatnonzero(counts == 0)
        if empty.size == 0:
            break
        b = int(empty[0])
        edges = np.delete(edges, b + 1 if b + 1 < edges.size - 1 else b)
    return edges


def make_edges(delay, mode="width", *, width=None, start=None, stop=None, count=None, edges=None):
    """Bin edges, ps.

    Parameters
    ----------
    delay : ndarray (N,)
        Corrected delays of the shots to be binned, ps.
    mode : {"width", "population", "edges"}
        Fixed-width bins (:func:`fixed_width_edges` with ``width``, ``start``,
        ``stop``), ``count`` equal-population bins (:func:`population_edges`),
        or the given ``edges``.
    width, start, stop : float, optional
        Bin width and range, ps (mode "width").
    count : int, optional
        Number of bins (mode "population").
    edges : sequence of float, optional
        Strictly increasing edges, ps (mode "edges").

    Raises
    ------
    ValueError
        Naming the parameter that is unusable.
    """
    if mode == "width":
        return fixed_width_edges(delay, width, start, stop)
    if mode == "population":
        if count is None or int(count) < 1:
            raise ValueError(f"count must be a positive number of bins, got {count!r}")
        return population_edges(delay, int(count))
    if mode == "edges":
        given = np.asarray(edges if edges is not None else [], float)
        if given.ndim != 1 or given.size < 2 or np.any(np.diff(given) <= 0):
            raise ValueError(f"edges must be at least two strictly increasing values in ps, got {edges!r}")
        return given
    raise ValueError(f"mode must be one of {', '.join(MODES)}, got {mode!r}")


def assign_bins(delay, edges):
    """Bin index of each delay, -1 for NaN or outside the edges.

    Parameters
    ----------
    delay : array_like (N,)
        Delays, ps.
    edges : array_like (nbins + 1,)
        Increasing edges, ps.

    Returns
    -------
    ndarray (N,) int32
        Compact: a bin count never approaches 2^31.
    """
    delay = np.asarray(delay, float)
    edges = np.asarray(edges, float)
    idx = np.searchsorted(edges, delay, side="right") - 1
    idx[delay == edges[-1]] = edges.size - 2  # last bin is closed on the right
    bad = ~np.isfinite(delay) | (idx < 0) | (idx > edges.size - 2)
    idx[bad] = -1
    return idx.astype(np.int32)


@dataclass
class DelayBins:
    """Per-bin delay statistics.

    Attributes
    ----------
    edges : ndarray (nbins + 1,), ps
    index : ndarray (N,) int32, bin of each shot (-1: not binned)
    count : ndarray (nbins,) int64
    mean : ndarray (nbins,) float64, mean delay of the shots in each bin, ps (NaN if empty)
    std : ndarray (nbins,) float64, spread (standard deviation) of the delays, ps
    n_nan : int, shots dropped for a NaN delay
    n_outside : int, shots dropped for a delay outside the edges
    """

    edges: np.ndarray
    index: np.ndarray
    count: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    n_nan: int
    n_outside: int


def bin_delays(delay, edges) -> DelayBins:
    """Assign delays to bins and compute per-bin count, mean and spread."""
    delay = np.asarray(delay, float)
    edges = np.asarray(edges, float)
    index = assign_bins(delay, edges)
    nb = edges.size - 1
    ok = index >= 0
    count = np.bincount(index[ok], minlength=nb).astype(np.int64)
    s1 = np.bincount(index[ok], weights=delay[ok], minlength=nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, s1 / np.maximum(count, 1), np.nan)
        dev = delay[ok] - mean[index[ok]]
        var = np.bincount(index[ok], weights=dev * dev, minlength=nb) / np.maximum(count, 1)
    std = np.where(count > 0, np.sqrt(var), np.nan)
    n_nan = int(np.sum(~np.isfinite(delay)))
    return DelayBins(edges=edges, index=index, count=count, mean=mean, std=std,
                     n_nan=n_nan, n_outside=int(np.sum(~ok)) - n_nan)


@numba.njit(nogil=True, cache=True)
def _accumulate(index, values, counts, sums, sumsq):
    n, m = values.shape
    for i in range(n):
        b = index[i]
        if b < 0:
            continue
        counts[b] += 1
        srow = sums[b]
        qrow = sumsq[b]
        for j in range(m):
            v = np.float64(values[i, j])
            srow[j] += v
            qrow[j] += v * v


@dataclass
class BinSums:
    """Per-bin count, sum and sum of squares of per-shot values (float64).

    Attributes
    ----------
    count : ndarray (nbins,) int64
    sum : ndarray (nbins, m) float64
    sumsq : ndarray (nbins, m) float64
    """

    count: np.ndarray
    sum: np.ndarray
    sumsq: np.ndarray

    @classmethod
    def zeros(cls, nbins, m):
        return cls(np.zeros(nbins, np.int64), np.zeros((nbins, m)), np.zeros((nbins, m)))

    def __add__(self, other):
        return BinSums(self.count + other.count, self.sum + other.sum, self.sumsq + other.sumsq)

    def mean(self):
        """Per-bin mean (nbins, m); NaN for empty bins."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count[:, None] > 0, self.sum / self.count[:, None], np.nan)

    def variance(self):
        """Per-bin sample variance (ddof=1) (nbins, m); NaN below two shots."""
        n = self.count[:, None].astype(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            var = (self.sumsq - self.sum * self.sum / n) / (n - 1)
        var = np.where(n > 1, np.maximum(var, 0.0), np.nan)
        return var

    def sem(self):
        """Per-bin standard error of the mean (nbins, m), assuming independent shots."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.sqrt(self.variance() / self.count[:, None])


def accumulate(index, values, nbins, into=None) -> BinSums:
    """Add per-shot values into per-bin sums (the streaming binning core).

    Parameters
    ----------
    index : array_like (n,) int
        Bin of each shot; negative entries are skipped.
    values : array_like (n, m)
        Per-shot values (float32 or float64), e.g. difference curves.
    nbins : int
        Number of bins.
    into : BinSums, optional
        Sums to add to (modified in place and returned); default new zeros.

    Returns
    -------
    BinSums
        Float64 sums, whatever the input dtype.
    """
    values = np.ascontiguousarray(values)
    if values.ndim != 2:
        raise ValueError("values must be (n, m)")
    index = np.ascontiguousarray(index, dtype=np.int64)
    if index.shape[0] != values.shape[0]:
        raise ValueError("index and values differ in length")
    if np.any(index >= nbins):
        raise ValueError("bin index beyond nbins")
    out = into if into is not None else BinSums.zeros(nbins, values.shape[1])
    _accumulate(index, values, out.count, out.sum, out.sumsq)
    return out


@numba.njit(nogil=True, cache=True)
def _accumulate_weighted(index, weights, values, wsum, sums):
    n, m = values.shape
    for i in range(n):
        b = index[i]
        w = weights[i]
        if b < 0 or w == 0:
            continue
        wsum[b] += w
        srow = sums[b]
        for j in range(m):
            srow[j] += w * np.float64(values[i, j])


def accumulate_weighted(index, weights, values, nbins, into=None):
    """Add weighted per-shot values into per-bin sums (for resampling with weights).

    Parameters
    ----------
    index : array_like (n,) int
        Bin of each shot; negative entries are skipped.
    weights : array_like (n,)
        Weight of each shot (e.g. Poisson(1) counts of a bootstrap replicate).
    values : array_like (n, m)
    nbins : int
    into : (ndarray (nbins,), ndarray (nbins, m)), optional
        Sum of weights and weighted sums to add to (modified in place).

    Returns
    -------
    wsum : ndarray (nbins,) float64
    sums : ndarray (nbins, m) float64
    """
    values = np.ascontiguousarray(values)
    index = np.ascontiguousarray(index, dtype=np.int64)
    weights = np.ascontiguousarray(weights, dtype=np.float64)
    if into is None:
        into = (np.zeros(nbins), np.zeros((nbins, values.shape[1])))
    _accumulate_weighted(index, weights, values, into[0], into[1])
    return into
