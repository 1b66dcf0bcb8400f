"""Covariance between delay bins of the binned differences, and a fast bootstrap over shots.

The mean difference of bin b (see :mod:`movieproc.signals.differences`) is a
linear combination of independent shots,

    D_b(q) = (1/n_b) sum_{i in b} on_i(q) - sum_j w_bj off_j(q),   w_bj = u_bj / (k n_b),

with u_bj the number of the bin's pump-on shots that use pump-off shot j among
their k references. Pump-on shots taken at one stage position spread over
several delay bins when the timing jitter exceeds the bin width, and they share
pump-off references, so the differences of neighbouring bins are correlated.
With a per-shot noise variance s(q)^2 common to the shots involved,

    Cov(D_b(q), D_c(q)) = s(q)^2 M_bc,   M_bc = sum_s a_bs a_cs,

with a_bs the coefficient of shot s in D_b: :func:`bin_coefficient_overlap`
gives M, :func:`bin_correlation` the correlation R, and the covariance used by
the fits is the separable model ``err_b(q) err_c(q) R_bc`` with the per-bin
errors of :func:`movieproc.signals.differences.bin_errors` (docs/METHODS.md, section 6c).
:func:`whiten` decorrelates residuals along the delay axis with R.

:func:`bootstrap_chunk` and :func:`bootstrap_replicates` are a Poisson bootstrap
over shots that puts the replicate weights on per-bin weighted sums (matrix
products) instead of re-running the reduction once per replicate.
"""

from __future__ import annotations

import functools

from dataclasses import dataclass

import numpy as np
from scipy import linalg, sparse

__all__ = ["reference_use_counts", "reference_gram", "bin_coefficient_overlap", "overlap_from_gram",
           "bin_correlation", "check_correlation",
           "cholesky_correlation", "whiten", "decorrelate",
           "ReplicateWeights", "BootstrapChunk", "BootstrapSums", "bootstrap_chunk", "bootstrap_replicates",
           "replicate_correlation"]

#: Smallest accepted ratio of the smallest to the largest squared Cholesky pivot of R:
#: below it the whitened residual amplifies rounding errors by more than 1e5.
MIN_PIVOT_RATIO = 1e-10

#: Tolerance on R's symmetry and unit diagonal (R is computed in float64 from counts).
CORRELATION_TOLERANCE = 1e-8

#: Shots per block of replicate weights: each block is drawn from its own generator, seeded with
#: (seed, block), so any shot's weights can be drawn again in any chunk or worker without holding
#: the whole (replicate, shot) table: 200 replicates of a 10-million-shot run would be 2 GB.
WEIGHT_BLOCK_SHOTS = 1 << 14

#: Weight blocks a process keeps once drawn (chunks are read in run order, so a chunk's shots and
#: references fall into a few neighbouring blocks): at most this many times n_boot * 16 kB.
WEIGHT_BLOCKS_KEPT = 16

#: Pump-on shots whose reference uses are counted at once by :func:`reference_gram`
#: (bounds its temporaries to some tens of MB whatever the run length).
GRAM_BLOCK = 1 << 16


# ----------------------------------------------------------------------------- analytic covariance

def _check_bins_refs(bin_index, refs, nbins):
    bin_index = np.asarray(bin_index)
    refs = np.asarray(refs)
    if bin_index.ndim != 1 or not np.issubdtype(bin_index.dtype, np.integer):
        raise ValueError(f"bin_index must be a 1-D integer array, got shape {bin_index.shape} {bin_index.dtype}")
    if refs.ndim != 2 or refs.shape[0] != bin_index.size or not np.issubdtype(refs.dtype, np.integer):
        raise ValueError(f"refs must be an integer array (n_on, k) with n_on = {bin_index.size} "
                         f"(one row per pump-on shot), got shape {refs.shape} {refs.dtype}")
    if refs.shape[1] < 1:
        raise ValueError("refs must hold at least one reference per pump-on shot (k >= 1)")
    if int(nbins) < 1 or (bin_index.size and int(bin_index.max()) >= int(nbins)):
        raise ValueError(f"nbins = {nbins} must be positive and above every bin_index "
                         f"(largest {int(bin_index.max()) if bin_index.size else None})")
    if refs.size and int(refs.min()) < 0:
        raise ValueError("refs must be shot indices (>= 0)")
    return bin_index, refs, int(nbins)


def reference_use_counts(bin_index, refs, nbins):
    """Sparse matrix of reference uses: U[b, j] = u_bj, pump-on shots of bin b using off shot j.

    Parameters
    ----------
    bin_index : array_like (n_on,) int
        Bin of each pump-on shot (-1: not binned, ignored).
    refs : array_like (n_on, k) int
        Run indices of each pump-on shot's references
        (:func:`movieproc.signals.differences.nearest_references`).
    nbins : int
        Number of delay bins.

    Returns
    -------
    U : scipy.sparse.csr_matrix (nbins, n_ref) float64
        Use counts; column c belongs to reference shot ``ref_shots[c]``.
    ref_shots : ndarray (n_ref,) int64
        The distinct reference shots used by binned pump-on shots, increasing.
    """
    bin_index, refs, nbins = _check_bins_refs(bin_index, refs, nbins)
    k = refs.shape[1]
    ok = bin_index >= 0
    b = np.repeat(bin_index[ok].astype(np.int64), k)
    ref_shots, col = np.unique(refs[ok].ravel(), return_inverse=True)
    U = sparse.csr_matrix((np.ones(b.size), (b, col.ravel())), shape=(nbins, ref_shots.size))
    U.sum_duplicates()
    return U, ref_shots


def _block_cuts(bin_index, refs, block):
    """For each block of pump-on shots, the smallest reference used by binned shots of any later block."""
    big = np.iinfo(np.int64).max
    lows = []
    for a in range(0, bin_index.size, block):
        r = refs[a:a + block][bin_index[a:a + block] >= 0]
        lows.append(int(r.min()) if r.size else big)
    later = np.minimum.accumulate(np.array(lows[::-1] + [big], np.int64))[::-1]
    return later[1:]


def _add_gram(gram, keys, counts, nbins):
    """gram += U U^T for the (reference, bin) use counts given as keys ref * nbins + bin."""
    if keys.size == 0:
        return
    ref, col = np.unique(keys // nbins, return_inverse=True)
    use = sparse.csr_matrix((counts.astype(float), (keys % nbins, np.ravel(col))), shape=(nbins, ref.size))
    gram += (use @ use.T).toarray()


def reference_gram(bin_index, refs, nbins, block=GRAM_BLOCK):
    """G = U U^T of the reference use counts (:func:`reference_use_counts`) and the bin counts, streamed.

    ``G_bc = sum_j u_bj u_cj`` over pump-off shots j. The pump-on shots are
    taken ``block`` at a time; a reference's uses are added to G once no
    later block uses it (references are the nearest off shots in pulse id, so
    only a few uses wait for the next block). Memory is bounded by the block,
    not by the run.

    Parameters
    ----------
    bin_index : array_like (n_on,) int
        Bin of each pump-on shot (-1: not binned, ignored).
    refs : array_like (n_on, k) int
        Run indices of each pump-on shot's references.
    nbins : int
        Number of delay bins.
    block : int
        Pump-on shots per block (> 0).

    Returns
    -------
    gram : ndarray (nbins, nbins) float64
        Integer-valued, symmetric.
    n : ndarray (nbins,) float64
        Pump-on shots per bin.
    """
    bin_index, refs, nbins = _check_bins_refs(bin_index, refs, nbins)
    if int(block) < 1:
        raise ValueError(f"block must be a positive number of shots, got {block}")
    k = refs.shape[1]
    gram = np.zeros((nbins, nbins))
    n = np.zeros(nbins)
    carry_keys, carry_counts = np.zeros(0, np.int64), np.zeros(0, np.int64)
    for c, cut in enumerate(_block_cuts(bin_index, refs, int(block))):
        sl = slice(c * int(block), (c + 1) * int(block))
        ok = bin_index[sl] >= 0
        b = bin_index[sl][ok].astype(np.int64)
        n += np.bincount(b, minlength=nbins)
        keys = refs[sl][ok].astype(np.int64) * nbins + np.repeat(b, k).reshape(-1, k)
        keys, inverse = np.unique(np.concatenate([carry_keys, keys.ravel()]), return_inverse=True)
        counts = np.bincount(np.ravel(inverse), np.concatenate([carry_counts, np.ones(b.size * k, np.int64)]),
                             keys.size).astype(np.int64)
        done = keys // nbins < cut
        _add_gram(gram, keys[done], counts[done], nbins)
        carry_keys, carry_counts = keys[~done], counts[~done]
    _add_gram(gram, carry_keys, carry_counts, nbins)
    return gram, n


def bin_coefficient_overlap(bin_index, refs, nbins):
    """Overlap M_bc = sum_s a_bs a_cs of the shot coefficients of the bin mean differences.

    D_b = sum_s a_bs x_s over all shots s, with ``a_bs = 1/n_b`` for the n_b
    pump-on shots of bin b (0 in every other bin) and ``a_bj = -u_bj / (k n_b)``
    for pump-off shot j used u_bj times as a reference by the bin's pump-on
    shots. If every shot has the same noise variance s^2 and shots are
    independent, ``Cov(D_b, D_c) = s^2 M_bc`` exactly. Here

        M_bc = delta_bc / n_b + sum_j u_bj u_cj / (k^2 n_b n_c),

    so ``M_bb = (1 + shared_b) / n_b`` with ``shared_b`` from
    :func:`movieproc.signals.differences.shared_reference_factor`; the
    off-diagonal terms come only from references shared between bins. Pump-on
    and pump-off shots are distinct shots (a pump-on shot is never a reference).

    Parameters
    ----------
    bin_index : array_like (n_on,) int
        Bin of each pump-on shot (-1: not binned, ignored).
    refs : array_like (n_on, k) int
        Run indices of each pump-on shot's k references.
    nbins : int
        Number of delay bins.

    Returns
    -------
    ndarray (nbins, nbins) float64
        Symmetric, positive semi-definite; rows and columns of empty bins are 0
        (an empty bin has no mean). Units: 1/shots (variance of a bin mean per
        unit per-shot variance).

    Notes
    -----
    ``M = diag(1/n) + D U U^T D / k^2`` with ``D = diag(1/n)`` and U the
    (bin, reference) use counts; U U^T is streamed (:func:`reference_gram`),
    so memory is bounded whatever the number of shots.
    """
    gram, n = reference_gram(bin_index, refs, nbins)
    return overlap_from_gram(gram, n, np.shape(refs)[1])


def overlap_from_gram(gram, n, k):
    """:func:`bin_coefficient_overlap` from ``(gram, n)`` of :func:`reference_gram` and k references per shot.

    Returns
    -------
    ndarray (nbins, nbins) float64, 1/shots.
    """
    n = np.asarray(n, float)
    inv_n = np.where(n > 0, 1.0 / np.maximum(n, 1.0), 0.0)
    return np.diag(inv_n) + np.asarray(gram, float) * np.outer(inv_n, inv_n) / (k * k)


def bin_correlation(M):
    """Correlation R_bc = M_bc / sqrt(M_bb M_cc) of the bin differences.

    Parameters
    ----------
    M : array_like (nbins, nbins)
        From :func:`bin_coefficient_overlap`.

    Returns
    -------
    ndarray (nbins, nbins) float64
        Unit diagonal. An empty bin (``M_bb == 0``) gets an identity row and
        column: it carries no data, and with a unit diagonal R stays positive
        definite so it can be whitened with the empty bin masked or not.
    """
    M = np.asarray(M, float)
    if M.ndim != 2 or M.shape[0] != M.shape[1]:
        raise ValueError(f"M must be square (nbins, nbins), got shape {M.shape}")
    d = np.diag(M).copy()
    empty = ~(d > 0)
    d[empty] = 1.0
    s = np.sqrt(d)
    R = M / np.outer(s, s)
    R[empty, :] = 0.0
    R[:, empty] = 0.0
    R[np.diag_indices_from(R)] = 1.0
    return R


# ----------------------------------------------------------------------------- whitening

def check_correlation(R, nbins):
    """R as float64 after checking it is a finite, symmetric (nbins, nbins) matrix with unit diagonal.

    Raises
    ------
    ValueError
        Naming ``R`` and what is wrong with it.
    """
    R = np.asarray(R, float)
    if R.shape != (nbins, nbins):
        raise ValueError(f"R must be the ({nbins}, {nbins}) correlation of the delay bins, got shape {R.shape}")
    if not np.all(np.isfinite(R)):
        raise ValueError("R (bin correlation) has non-finite entries")
    if not np.allclose(R, R.T, rtol=0.0, atol=CORRELATION_TOLERANCE):
        raise ValueError("R (bin correlation) is not symmetric")
    if not np.allclose(np.diag(R), 1.0, rtol=0.0, atol=CORRELATION_TOLERANCE):
        raise ValueError("R must be a correlation matrix with unit diagonal (use bin_correlation)")
    return R


def cholesky_correlation(R):
    """Lower Cholesky factor L of R = L L^T, refusing singular or indefinite R.

    Parameters
    ----------
    R : array_like (m, m)
        Correlation matrix (unit diagonal).

    Returns
    -------
    ndarray (m, m) float64, lower triangular.

    Raises
    ------
    ValueError
        If R is not positive definite, or so near singular that the smallest
        squared pivot is below ``MIN_PIVOT_RATIO`` (bins whose differences are
        nearly the same combination of shots, e.g. bins of one or two shots that
        share all their references: too few references).
    """
    R = np.asarray(R, float)
    try:
        L = np.linalg.cholesky(R)
    except np.linalg.LinAlgError:
        raise ValueError("R (bin correlation) is not positive definite: some bins' differences are linear "
                         "combinations of others' (bins sharing all their references; too few references "
                         "or too few shots per bin)") from None
    piv = np.diag(L) ** 2
    if piv.size and piv.min() < MIN_PIVOT_RATIO * piv.max():
        worst = int(np.argmin(piv))
        raise ValueError(f"R (bin correlation) is nearly singular (squared pivot {piv[worst]:.2e} at bin row "
                         f"{worst}): bins share nearly all their references; use more references per shot "
                         "or wider bins")
    return L


def decorrelate(z, valid, R):
    """Apply L^-1 along the delay axis (R = L L^T) to standardized values, skipping masked ones.

    Parameters
    ----------
    z : array_like (nbins, m)
        Values already divided by their standard errors (residuals, or Jacobian
        columns laid side by side as ``m = nq * p``).
    valid : array_like (nbins, m) bool
        Entries that take part; each column is whitened with R restricted to its
        valid bins (columns sharing a pattern share one Cholesky factor).
    R : array_like (nbins, nbins)
        Correlation along the delay axis (unit diagonal).

    Returns
    -------
    ndarray (nbins, m) float64
        Whitened values at the valid entries, 0 elsewhere. Within a column the
        k-th whitened value sits at the k-th valid bin.

    Raises
    ------
    ValueError
        If R (restricted to the valid bins of a column) is singular or not
        positive definite, see :func:`cholesky_correlation`.
    """
    z = np.asarray(z, float)
    valid = np.asarray(valid, bool)
    if z.ndim != 2 or valid.shape != z.shape:
        raise ValueError(f"z and valid must share a 2-D shape (nbins, m), got {z.shape} and {valid.shape}")
    R = check_correlation(R, z.shape[0])
    out = np.zeros(z.shape)
    if z.size == 0:
        return out
    patterns, which = np.unique(valid.T, axis=0, return_inverse=True)
    which = np.asarray(which).ravel()
    for i, rows in enumerate(patterns):
        if not rows.any():
            continue
        cols = np.flatnonzero(which == i)
        L = cholesky_correlation(R[np.ix_(rows, rows)])
        out[np.ix_(rows, cols)] = linalg.solve_triangular(L, z[np.ix_(rows, cols)], lower=True, check_finite=False)
    return out


def whiten(residual, error, R):
    """Whitened residuals L^-1 (residual / error) along the delay axis, R = L L^T.

    Under the separable model Cov(D_b(q), D_c(q)) = err_b(q) err_c(q) R_bc the
    whitened values of each q point are independent with unit variance, so
    their sum of squares is the generalized chi2 (and a least-squares fit of
    them a generalized least-squares fit).

    Parameters
    ----------
    residual : array_like (nbins, nq)
        Data minus model (data units).
    error : array_like (nbins, nq)
        Standard errors of the data (same units); entries with a non-finite or
        non-positive error, or a non-finite residual (empty or masked bins) are
        left out.
    R : array_like (nbins, nbins)
        Bin correlation, :func:`bin_correlation`.

    Returns
    -------
    ndarray (nbins, nq) float64
        Whitened residuals, dimensionless; 0 at the left-out entries.

    Raises
    ------
    ValueError
        If R is singular or not positive definite (e.g. too few references).
    """
    residual = np.asarray(residual, float)
    error = np.asarray(error, float)
    if residual.ndim != 2 or error.shape != residual.shape:
        raise ValueError(f"residual and error must share a shape (nbins, nq), got {residual.shape} "
                         f"and {error.shape}")
    valid = np.isfinite(residual) & np.isfinite(error) & (error > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(valid, residual / np.where(valid, error, 1.0), 0.0)
    return decorrelate(z, valid, R)


# ----------------------------------------------------------------------------- bootstrap

@functools.lru_cache(maxsize=WEIGHT_BLOCKS_KEPT)
def _weight_block(seed: int, n_boot: int, block: int, size: int) -> np.ndarray:
    rng = np.random.default_rng([seed, block])
    # Poisson(1) above 255 has probability ~1e-507: the clip never acts.
    out = np.minimum(rng.poisson(1.0, (n_boot, size)), 255).astype(np.uint8)
    out.setflags(write=False)
    return out


@dataclass(frozen=True)
class ReplicateWeights:
    """Poisson(1) weight of every shot in every replicate, drawn block by block on demand.

    The weights of shots ``[i * B, (i + 1) * B)`` (B = :data:`WEIGHT_BLOCK_SHOTS`) come from
    ``numpy.random.default_rng([seed, i])``: the same shot has the same weights in every chunk,
    thread and worker process (a reference shared by pump-on shots of two chunks keeps one weight),
    and memory is a few blocks, not the run.

    Parameters
    ----------
    seed : int
        Seed (>= 0).
    n_boot : int
        Number of replicates (>= 0).
    n_shots : int
        Shots in the run; weights are indexed by run index.
    """

    seed: int
    n_boot: int
    n_shots: int

    def __post_init__(self):
        for name in ("seed", "n_boot", "n_shots"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
                raise ValueError(f"{name} must be an integer >= 0, got {value!r}")

    @property
    def shape(self) -> tuple[int, int]:
        """(n_boot, n_shots), as the whole table would have."""
        return int(self.n_boot), int(self.n_shots)

    def take(self, shots) -> np.ndarray:
        """Weights of the given run indices, ndarray (n_boot, len(shots)) uint8."""
        shots = np.asarray(shots, np.int64).ravel()
        if shots.size and (shots.min() < 0 or shots.max() >= self.n_shots):
            raise ValueError(f"shots must be run indices in [0, {self.n_shots}), got {shots.min()}..{shots.max()}")
        out = np.empty((self.n_boot, shots.size), np.uint8)
        block = shots // WEIGHT_BLOCK_SHOTS
        for b in np.unique(block):
            sel = block == b
            start = int(b) * WEIGHT_BLOCK_SHOTS
            size = min(WEIGHT_BLOCK_SHOTS, self.n_shots - start)
            out[:, sel] = _weight_block(int(self.seed), int(self.n_boot), int(b), size)[:, shots[sel] - start]
        return out

    def array(self) -> np.ndarray:
        """All weights, ndarray (n_boot, n_shots) uint8 (for tests and small runs)."""
        return self.take(np.arange(self.n_shots))


@dataclass
class BootstrapChunk:
    """One chunk's contribution to the bootstrap sums, for the bins the chunk touches.

    Attributes
    ----------
    bins : ndarray (m,) int64
        Bins touched by the chunk (distinct).
    on_sum : ndarray (m, n_boot, nq) float64
        sum_i w_i^r on_i(q) over the chunk's pump-on shots of each bin
        (bin-major, so one bin's block is contiguous).
    on_weight : ndarray (m, n_boot) float64
        sum_i w_i^r.
    off_sum : ndarray (m, n_boot, nq) float64
        sum_j w_j^r u_bj off_j(q), u_bj counting the chunk's uses only.
    off_weight : ndarray (m, n_boot) float64
        sum_j w_j^r u_bj.
    """

    bins: np.ndarray
    on_sum: np.ndarray
    on_weight: np.ndarray
    off_sum: np.ndarray
    off_weight: np.ndarray


@dataclass
class BootstrapSums:
    """Running bootstrap sums over the whole run (float64); see :class:`BootstrapChunk`.

    Attributes
    ----------
    on_sum, off_sum : ndarray (nbins, n_boot, nq) float64
    on_weight, off_weight : ndarray (nbins, n_boot) float64
    """

    on_sum: np.ndarray
    on_weight: np.ndarray
    off_sum: np.ndarray
    off_weight: np.ndarray

    @classmethod
    def zeros(cls, n_boot, nbins, nq):
        """Empty sums for ``n_boot`` replicates, ``nbins`` bins, ``nq`` q points."""
        return cls(np.zeros((nbins, n_boot, nq)), np.zeros((nbins, n_boot)),
                   np.zeros((nbins, n_boot, nq)), np.zeros((nbins, n_boot)))

    def add(self, part: BootstrapChunk):
        """Add one chunk's contribution in place (one contiguous block per bin); returns self."""
        for t, b in enumerate(part.bins):
            self.on_sum[b] += part.on_sum[t]
            self.on_weight[b] += part.on_weight[t]
            self.off_sum[b] += part.off_sum[t]
            self.off_weight[b] += part.off_weight[t]
        return self


def _weighted_sums(W, X, out, out_weight):
    """out = W @ X and out_weight = W.sum(1) in float64, the product in X's precision on centred rows.

    The rows of X (a scratch copy, modified) are centred on their mean c before
    the product and (sum W) c is added back in float64, so float32 rounding
    applies to the deviations only (shot-to-shot noise), not to the curves.
    """
    dt = np.float64 if X.dtype == np.float64 else np.float32
    X = X.astype(dt, copy=False)
    c = X.mean(axis=0, dtype=np.float64).astype(dt)
    X -= c
    out_weight[:] = W.sum(axis=1, dtype=np.float64)
    out[:] = W.astype(dt) @ X
    out += out_weight[:, None] * c.astype(np.float64)[None, :]


def _check_chunk(weights, on_shot, on_bin, refs, rows, curves):
    if not isinstance(weights, ReplicateWeights):
        weights = np.asarray(weights)
    on_shot = np.asarray(on_shot, np.int64)
    on_bin = np.asarray(on_bin, np.int64)
    refs = np.asarray(refs, np.int64)
    rows = np.asarray(rows, np.int64)
    curves = np.asarray(curves)
    if not isinstance(weights, ReplicateWeights) and weights.ndim != 2:
        raise ValueError(f"weights must be (n_boot, n_shots), got shape {weights.shape}")
    if on_bin.shape != on_shot.shape or on_shot.ndim != 1:
        raise ValueError(f"on_shot and on_bin must be 1-D of one length, got {on_shot.shape} and {on_bin.shape}")
    if refs.ndim != 2 or refs.shape[0] != on_shot.size:
        raise ValueError(f"refs must be (n_on, k) with n_on = {on_shot.size}, got shape {refs.shape}")
    if curves.ndim != 2 or curves.shape[0] != rows.size:
        raise ValueError(f"curves must be (len(rows), nq) = ({rows.size}, nq), got shape {curves.shape}")
    if rows.size > 1 and np.any(np.diff(rows) <= 0):
        raise ValueError("rows must be strictly increasing run indices")
    return weights, on_shot, on_bin, refs, rows, curves


def _positions(rows, shots):
    pos = np.searchsorted(rows, shots)
    if np.any(pos >= rows.size) or np.any(rows[np.minimum(pos, rows.size - 1)] != shots):
        raise ValueError("rows (the run indices of curves) lack some pump-on or reference shots of the chunk")
    return pos


def bootstrap_chunk(weights, on_shot, on_bin, refs, rows, curves) -> BootstrapChunk:
    """Bootstrap sums of one chunk of pump-on shots, by grouped matrix products.

    For every bin b touched by the chunk and every replicate r (all replicates
    at once, by BLAS): ``W[:, on shots of b] @ X[on shots of b]`` and
    ``(W[:, refs of b] * u_b) @ X[refs of b]``, with u_b the number of uses of
    each distinct reference by the chunk's pump-on shots of bin b. The sums are
    additive over chunks (a reference used by shots of two chunks contributes
    its uses in each), so splitting the run into chunks changes nothing.

    Parameters
    ----------
    weights : ReplicateWeights or ndarray (n_boot, n_shots) uint8
        Poisson weights of every shot, indexed by run index.
    on_shot : array_like (n,) int
        Run indices of the chunk's pump-on shots.
    on_bin : array_like (n,) int
        Their bins (-1: not binned, skipped).
    refs : array_like (n, k) int
        Run indices of their references.
    rows : array_like (m,) int
        Increasing run indices of the rows of ``curves``; must include every
        ``on_shot`` and ``refs`` entry of binned shots.
    curves : array_like (m, nq) float32 or float64
        Normalized curves of those shots.

    Returns
    -------
    BootstrapChunk
    """
    weights, on_shot, on_bin, refs, rows, curves = _check_chunk(weights, on_shot, on_bin, refs, rows, curves)
    take = weights.take if isinstance(weights, ReplicateWeights) else (lambda idx: weights[:, idx])
    n_boot, nq = weights.shape[0], curves.shape[1]
    ok = on_bin >= 0
    order = np.argsort(on_bin[ok], kind="stable")
    bin_s, shot_s, refs_s = on_bin[ok][order], on_shot[ok][order], refs[ok][order]
    bins, starts = np.unique(bin_s, return_index=True)
    stops = np.append(starts[1:], bin_s.size)
    pos_on = _positions(rows, shot_s)
    part = BootstrapChunk(bins.astype(np.int64), np.empty((bins.size, n_boot, nq)), np.empty((bins.size, n_boot)),
                          np.empty((bins.size, n_boot, nq)), np.empty((bins.size, n_boot)))
    for t, (a, b) in enumerate(zip(starts, stops, strict=True)):
        _weighted_sums(take(shot_s[a:b]), curves[pos_on[a:b]], part.on_sum[t], part.on_weight[t])
        ref, uses = np.unique(refs_s[a:b], return_counts=True)
        w_ref = take(ref).astype(np.float32) * uses.astype(np.float32)
        _weighted_sums(w_ref, curves[_positions(rows, ref)], part.off_sum[t], part.off_weight[t])
    return part


def bootstrap_replicates(sums: BootstrapSums):
    """Bin differences of every bootstrap replicate (ratio estimator).

    ``D_b^r = sum_i w_i^r on_i / sum_i w_i^r - sum_j w_j^r u_bj off_j / sum_j w_j^r u_bj``
    with Poisson(1) weights w^r per shot (pump-on and pump-off alike, one
    weight per shot for the whole run). At unit weights it is exactly the bin
    difference of the reduction. Linearized in the weight fluctuations, its
    covariance over replicates is ``sum_s a_bs a_cs (x_s - m_bs)(x_s - m_cs)``
    (m_bs: the mean of the bin's pump-on curves, or of its reference curves
    weighted by u_bj, whichever group s belongs to), the empirical
    counterpart of ``s^2 M_bc`` (:func:`bin_coefficient_overlap`), the
    between-bin covariance from shared references included.

    It differs from re-averaging each pump-on shot's reference with the
    replicate weights (``on_i - sum_j w_j off_j / sum_j w_j`` over its k
    references, then a w_i-weighted mean): there an off shot's weight in a
    bin depends on the weights of the pump-on shots using it and on its
    co-references', and a shot whose k references all drew 0 needs a fallback.
    Here the pump-on and pump-off sums of a bin are normalized separately, the
    use counts u_bj stay fixed, and no fallback is needed; the two agree to
    first order in the weight fluctuations.

    Parameters
    ----------
    sums : BootstrapSums
        All chunks added.

    Returns
    -------
    ndarray (n_boot, nbins, nq) float64
        NaN for a bin whose pump-on (or reference) weights are all 0 in a
        replicate (empty bins; rare in bins of a few shots).
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        on_w = np.where(sums.on_weight > 0, sums.on_weight, np.nan)[..., None]
        off_w = np.where(sums.off_weight > 0, sums.off_weight, np.nan)[..., None]
        diff = sums.on_sum / on_w - sums.off_sum / off_w  # (nbins, n_boot, nq)
    return np.ascontiguousarray(diff.transpose(1, 0, 2))


def replicate_correlation(replicates):
    """Between-bin correlation of bootstrap replicates, averaged over q points.

    Parameters
    ----------
    replicates : array_like (n_boot, nbins, nq)
        From :func:`bootstrap_replicates`.

    Returns
    -------
    ndarray (nbins, nbins) float64
        Mean over q of the per-q correlation matrix of the replicates (a
        replicate that is NaN in a bin is left out of that bin's sums); NaN
        where a bin has fewer than two finite replicates. For comparison with
        :func:`bin_correlation`.
    """
    x = np.asarray(replicates, float)
    if x.ndim != 3 or x.shape[2] < 1:
        raise ValueError(f"replicates must be (n_boot, nbins, nq) with nq >= 1, got shape {x.shape}")
    ok = np.isfinite(x)
    n = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, x, 0.0).sum(axis=0) / n
        dev = np.where(ok, x - mean, 0.0)
        pairs = np.einsum("rbq,rcq->qbc", ok.astype(float), ok.astype(float))
        cov = np.einsum("rbq,rcq->qbc", dev, dev) / np.where(pairs > 1, pairs - 1.0, np.nan)
        sd = np.sqrt(np.einsum("qbb->qb", cov))
        corr = cov / (sd[:, :, None] * sd[:, None, :])
        finite = np.isfinite(corr)
        return np.where(finite, corr, 0.0).sum(axis=0) / np.where(finite.any(axis=0), finite.sum(axis=0), np.nan)
