"""Singular value decomposition of a (delay, q) difference map and component counting.

D = U S V^T with U (delay, r) the temporal vectors and V^T (r, q) the q-space
vectors. With per-point weights (typically 1 / diff_err) the decomposition is of the
weighted map W * D, in which the noise is close to unit variance everywhere; the
vectors are then those of the weighted map (divide by the weights to return to data
units in a reconstruction, :func:`reconstruct`).

Counting components (:func:`count_components`) uses two criteria, both required, on
one weighted map (data, noise maps and threshold share the weights):

1. magnitude: the singular value exceeds the largest singular value of a noise-only
   map of the same shape and weighting (the noise alone cannot produce it; for a
   rank-r signal plus noise N, s_{r+1}(D) <= s_1(N), Weyl's inequality);
2. structure: the lag-1 autocorrelation sum_j x_j x_{j+1} / sum_j x_j^2 of both the
   temporal and the q-space vector exceeds ``smooth_z / sqrt(n)`` for a vector of
   length n; white noise has autocorrelation ~ N(0, 1/n) (Bartlett 1946), while a
   smooth curve is near 1 and a vibration sampled at p points per period near
   cos(2 pi / p). A component only just above the noise edge has noisy vectors
   (noise ~1/s per entry) and may fail it.

The default weights are separable, 1 / (e_t e_q) (:func:`separable_weights`): they
even out the noise without giving a rank-1 signal components of its own, which
point-by-point weights 1 / err(t, q) do where the errors scatter from point to point.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from movieproc.errors import DataError, InputError

__all__ = ["svd", "reconstruct", "lag1_autocorrelation", "separable_weights", "ComponentCount", "count_components",
           "noise_rows"]

#: Fewest noise-only rows whose spread gives a per-q noise level (a standard deviation needs two).
MIN_NOISE_ROWS = 2


def _as_map(D, name="diff"):
    D = np.asarray(D, dtype=float)
    if D.ndim != 2 or min(D.shape) < 2:
        raise InputError(f"argument '{name}'", f"shape {D.shape}", "a (delay, q) map with at least 2 x 2 points")
    if not np.all(np.isfinite(D)):
        raise DataError(f"'{name}' holds {np.count_nonzero(~np.isfinite(D))} non-finite values; "
                        "fill or drop those delays / q points before the SVD")
    return D


def _weights(weights, shape):
    if weights is None:
        return None
    w = np.broadcast_to(np.asarray(weights, dtype=float), shape)
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise InputError("argument 'weights'", "negative or non-finite weights",
                         "finite weights >= 0 (e.g. 1/diff_err)")
    return w


def svd(D, weights=None):
    """Thin SVD of a (delay, q) map, optionally weighted point by point.

    Parameters
    ----------
    D : array_like, shape (n_delay, n_q)
        Difference map (any unit), finite.
    weights : array_like, optional
        Per-point weights broadcastable to ``D`` (e.g. 1 / diff_err); the SVD is of
        ``weights * D``.

    Returns
    -------
    u : ndarray, shape (n_delay, r)
        Temporal singular vectors (orthonormal columns), r = min(n_delay, n_q).
    s : ndarray, shape (r,)
        Singular values, descending, in the units of ``weights * D``.
    vt : ndarray, shape (r, n_q)
        q-space singular vectors (orthonormal rows).

    Notes
    -----
    The sign of each vector pair is fixed so that the largest-magnitude entry of
    each q-space vector is positive (deterministic output).
    """
    D = _as_map(D)
    w = _weights(weights, D.shape)
    M = D if w is None else D * w
    u, s, vt = np.linalg.svd(M, full_matrices=False)
    idx = np.argmax(np.abs(vt), axis=1)
    sign = np.sign(vt[np.arange(vt.shape[0]), idx])
    sign[sign == 0] = 1.0
    return u * sign, s, vt * sign[:, None]


def reconstruct(u, s, vt, n, weights=None):
    """Map rebuilt from the first ``n`` components, in data units.

    Parameters
    ----------
    u, s, vt : ndarray
        Output of :func:`svd`.
    n : int
        Number of components kept (0 <= n <= len(s)).
    weights : array_like, optional
        The weights given to :func:`svd`; the weighted reconstruction is divided by
        them (points with zero weight come back as NaN).

    Returns
    -------
    ndarray, shape (n_delay, n_q)
    """
    n = int(n)
    if not 0 <= n <= len(s):
        raise InputError("argument 'n'", str(n), f"0 <= n <= {len(s)}")
    M = (u[:, :n] * s[:n]) @ vt[:n]
    if weights is None:
        return M
    w = np.broadcast_to(np.asarray(weights, dtype=float), M.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(w > 0, M / np.where(w > 0, w, 1.0), np.nan)


def lag1_autocorrelation(vectors, axis=0):
    """Lag-1 autocorrelation sum_j x_j x_{j+1} / sum_j x_j^2 along ``axis``.

    Parameters
    ----------
    vectors : array_like
        E.g. ``u`` (n_delay, r) with axis=0, or ``vt`` (r, n_q) with axis=1.
    axis : int
        Axis along which each vector runs.

    Returns
    -------
    ndarray
        One value per vector, in [-1, 1]; near 1 for smooth vectors, near 0 for noise.
    """
    x = np.moveaxis(np.asarray(vectors, dtype=float), axis, 0)
    num = np.sum(x[1:] * x[:-1], axis=0)
    den = np.sum(x * x, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)


def separable_weights(err):
    """Weights 1 / (e_t(delay) e_q(q)): the separable (rank-1) approximation of 1 / err.

    Weighting point by point with 1 / err multiplies the map by a matrix that is
    not of rank 1 when the errors are estimated per point (their own scatter, a few
    % for bins of some hundred shots): a noise-free rank-1 signal then acquires
    spurious components of size (error scatter) x (signal), which a strong signal
    lifts above the noise. A separable weight keeps the rank of the signal and still
    evens out the noise levels of the delays (shots per bin) and of the q points
    (detector coverage). log err(t, q) is fitted by a_t + b_q in least squares
    (row and column means of log err).

    Parameters
    ----------
    err : array_like, shape (n_delay, n_q)
        Standard errors, > 0.

    Returns
    -------
    ndarray, shape (n_delay, n_q)
    """
    log_err = np.log(np.asarray(err, dtype=float))
    rows = log_err.mean(axis=1, keepdims=True)
    cols = log_err.mean(axis=0, keepdims=True) - log_err.mean()
    return np.exp(-(rows + cols))


@dataclass
class ComponentCount:
    """Evidence for the number of significant components in a (delay, q) map.

    Every number here refers to the same weighted map ``weights * D``: the singular
    values, the noise reference and the threshold can be drawn on one axis.

    Attributes
    ----------
    n : int
        Number of components that pass both criteria.
    s : ndarray, shape (r,)
        Singular values of the weighted map.
    u : ndarray, shape (n_delay, r)
        Temporal singular vectors of the weighted map.
    vt : ndarray, shape (r, n_q)
        q-space singular vectors of the weighted map.
    weights : ndarray, shape (n_delay, n_q), or None
        The weights of the map, of the noise maps and of ``s``.
    s_noise : ndarray, shape (r,)
        Singular values of the noise-only maps (mean over realizations).
    threshold : float
        Magnitude threshold: the largest noise singular value (largest over
        realizations); a component counts only above it.
    autocorr_u, autocorr_v : ndarray, shape (r,)
        Lag-1 autocorrelation of the temporal and q-space vectors.
    autocorr_min_u, autocorr_min_v : float
        Their thresholds: ``smooth_z`` / sqrt(length), the autocorrelation white
        noise exceeds with probability ~ 1 - Phi(smooth_z).
    significant : ndarray of bool, shape (r,)
        s > threshold.
    smooth : ndarray of bool, shape (r,)
        Both autocorrelations above their thresholds.
    noise_source : str
        How the noise reference was obtained.
    decision : str
        In words: which test decided the count, and why any component above the
        noise threshold was not counted.
    warnings : list of str
    """

    n: int
    s: np.ndarray
    u: np.ndarray
    vt: np.ndarray
    weights: np.ndarray | None
    s_noise: np.ndarray
    threshold: float
    autocorr_u: np.ndarray
    autocorr_v: np.ndarray
    autocorr_min_u: float
    autocorr_min_v: float
    significant: np.ndarray
    smooth: np.ndarray
    noise_source: str
    decision: str = ""
    warnings: list = field(default_factory=list)


#: A singular vector counts as structured when its lag-1 autocorrelation exceeds SMOOTH_Z / sqrt(length):
#: white noise has autocorrelation ~ N(0, 1/length) (Bartlett 1946), so 3 leaves noise 0.13 % of the time.
SMOOTH_Z = 3.0


#: Rejected components named one by one in the decision text (the rest are counted).
DECISION_LISTED = 4


def _need_rng(rng):
    if not isinstance(rng, np.random.Generator):
        raise InputError("argument 'rng'", f"{type(rng).__name__}",
                         "a seeded numpy.random.Generator to synthesise noise maps")


def _maps_from_rows(N, shape, err_arr, wm, rng, n_noise, noise_err):
    """Gaussian noise maps of ``shape`` with the per-q spread of the noise rows ``N`` (weighted)."""
    _need_rng(rng)
    if noise_err is not None and err_arr is not None:
        ne = np.asarray(noise_err, dtype=float)
        if ne.shape != N.shape or not np.all(np.isfinite(ne)) or np.any(ne <= 0):
            raise InputError("argument 'noise_err'", f"shape {ne.shape}", f"positive errors of shape {N.shape}")
        sd_z = (N / ne).std(axis=0, ddof=1)  # noise per q in units of the rows' own errors
        maps = [rng.standard_normal(shape) * sd_z * err_arr * wm for _ in range(int(n_noise))]
        return maps, (f"{n_noise} Gaussian maps with the per-q spread, in units of each row's error, "
                      f"of a {N.shape[0]}-row noise map")
    sd = N.std(axis=0, ddof=1)
    maps = [rng.standard_normal(shape) * sd * wm for _ in range(int(n_noise))]
    return maps, f"{n_noise} Gaussian maps with the per-q spread of a {N.shape[0]}-row noise map"


def _noise_maps(shape, noise, err_arr, wm, rng, n_noise, noise_err):
    """Weighted noise-only maps of ``shape`` and a sentence on where they come from."""
    if noise is not None:
        N = np.asarray(noise, dtype=float)
        if N.ndim != 2 or N.shape[1] != shape[1] or not np.all(np.isfinite(N)):
            raise InputError("argument 'noise'", f"shape {N.shape}", f"a finite (m, {shape[1]}) noise-only map")
        if N.shape[0] == shape[0]:
            return [N * wm], "noise map of the same shape"
        if N.shape[0] < 2:
            raise InputError("argument 'noise'", "1 row", "at least 2 rows to estimate the noise level per q")
        return _maps_from_rows(N, shape, err_arr, wm, rng, n_noise, noise_err)
    if err_arr is not None:
        _need_rng(rng)
        return [rng.standard_normal(shape) * err_arr * wm for _ in range(int(n_noise))], \
            f"{n_noise} Gaussian maps from the per-point errors"
    raise InputError("arguments 'noise' / 'err'", "neither given", "a noise-only map or per-point errors")


def _errors(err, shape):
    if err is None:
        return None
    err_arr = np.broadcast_to(np.asarray(err, dtype=float), shape)
    if not np.all(np.isfinite(err_arr)) or np.any(err_arr <= 0):
        raise InputError("argument 'err'", "non-positive or non-finite errors", "standard errors > 0")
    return err_arr


def _decision(n, significant, smooth, threshold, ac_u, ac_v, min_u, min_v):
    """Which test decided the count, and why each component above the noise threshold was not counted."""
    above = np.flatnonzero(significant)
    text = (f"{n} component(s) counted: singular value above the noise threshold {threshold:.3g} (largest "
            f"singular value of the noise maps, same weighting) and both vectors structured (lag-1 "
            f"autocorrelation above {min_u:.2f} in delay, {min_v:.2f} in q). ")
    rejected = [k for k in above if not smooth[k]]
    if not rejected:
        return text + f"The magnitude test decided: {above.size} component(s) above the threshold."
    parts = [f"component {k + 1} (autocorrelation {ac_u[k]:.2f} in delay, {ac_v[k]:.2f} in q)"
             for k in rejected[:DECISION_LISTED]]
    more = f"; and {len(rejected) - DECISION_LISTED} more" if len(rejected) > DECISION_LISTED else ""
    return text + ("The smoothness test decided: above the threshold but with vectors like noise, not counted: "
                   + "; ".join(parts) + more + ".")


def _warnings(passed, significant, smooth):
    n = int(np.count_nonzero(passed))
    warnings = []
    if n and not np.all(passed[:n]):
        warnings.append("components passing both criteria are not the leading ones "
                        f"(components {(np.nonzero(passed)[0] + 1).tolist()}, counting from 1); inspect the vectors")
    both_fail = significant & ~smooth
    if np.any(both_fail):
        warnings.append(f"SVD component(s) {(np.nonzero(both_fail)[0] + 1).tolist()} (counting from 1) exceed the "
                        "noise but their vectors are not smooth (lag-1 autocorrelation within noise): "
                        "not counted; fast changes, outliers or coarse sampling?")
    return warnings


def count_components(D, noise=None, *, err=None, weights=None, rng=None, n_noise=5, smooth_z=SMOOTH_Z,
                     noise_err=None):
    """Count the components of a (delay, q) map that rise above noise and are structured.

    Parameters
    ----------
    D : array_like, shape (n_delay, n_q)
        Difference map, finite.
    noise : array_like, shape (m, n_q), optional
        A noise-only map with the same noise as ``D``: e.g. differences at negative
        delays, or off-minus-off differences. If ``m == n_delay`` its SVD is the
        reference directly. Otherwise the per-q noise level is taken as its sample
        standard deviation over rows (m >= 2) and ``n_noise`` Gaussian maps of D's
        shape are synthesised with ``rng``.
    err : array_like, shape (n_delay, n_q), optional
        Per-point standard errors of ``D``; used when ``noise`` is not given: Gaussian
        noise maps with these errors are synthesised with ``rng``. Also sets the
        default weights, :func:`separable_weights` of ``err``.
    weights : array_like, optional
        Per-point weights broadcastable to ``D``; the same weights are applied to the
        noise maps. Default: separable weights from ``err`` if given, else none.
    rng : numpy.random.Generator, optional
        Required whenever noise maps are synthesised.
    n_noise : int
        Number of synthesised noise maps.
    smooth_z : float
        A vector of length n is structured when its lag-1 autocorrelation exceeds
        ``smooth_z / sqrt(n)`` (white noise: mean 0, standard deviation 1/sqrt(n)).
        Unlike a fixed level, this passes a vibration sampled at 6 or more points per
        period (autocorrelation cos(2 pi / 6) = 0.5).
    noise_err : array_like, shape (m, n_q), optional
        Standard errors of the ``noise`` rows. With it (and ``err``) the noise level is
        measured in units of each row's own error, (noise / noise_err) per q, and the
        synthesised maps are drawn in those units times ``err``, so rows with more shots
        (smaller errors) are not given noise they do not have.

    Returns
    -------
    ComponentCount

    Raises
    ------
    InputError
        Neither ``noise`` nor ``err`` given, a shape mismatch, or no ``rng`` where
        noise has to be synthesised.
    """
    D = _as_map(D)
    err_arr = _errors(err, D.shape)
    if weights is None and err_arr is not None:
        weights = separable_weights(err_arr)
    w = _weights(weights, D.shape)
    u, s, vt = svd(D, w)
    maps, source = _noise_maps(D.shape, noise, err_arr, 1.0 if w is None else w, rng, n_noise, noise_err)
    sn = np.array([np.linalg.svd(M, compute_uv=False) for M in maps])
    threshold = float(sn[:, 0].max())
    ac_u, ac_v = lag1_autocorrelation(u, axis=0), lag1_autocorrelation(vt, axis=1)
    min_u, min_v = smooth_z / np.sqrt(D.shape[0]), smooth_z / np.sqrt(D.shape[1])
    significant = s > threshold
    smooth = (ac_u > min_u) & (ac_v > min_v)
    passed = significant & smooth
    n = int(np.count_nonzero(passed))
    return ComponentCount(n=n, s=s, u=u, vt=vt, weights=None if w is None else np.array(w), s_noise=sn.mean(axis=0),
                          threshold=threshold, autocorr_u=ac_u, autocorr_v=ac_v, autocorr_min_u=float(min_u),
                          autocorr_min_v=float(min_v), significant=significant, smooth=smooth, noise_source=source,
                          decision=_decision(n, significant, smooth, threshold, ac_u, ac_v, min_u, min_v),
                          warnings=_warnings(passed, significant, smooth))


def noise_rows(delay, usable, window):
    """Rows of a (delay, q) map that serve as the noise-only reference of :func:`count_components`.

    Parameters
    ----------
    delay : array_like, shape (n_delay,)
        Delays, ps.
    usable : array_like of bool, shape (n_delay,)
        Rows with data good enough to use.
    window : (float, float) or None
        Inclusive delay range, ps, holding no signal (e.g. before time zero).

    Returns
    -------
    rows : ndarray of bool, shape (n_delay,), or None
        The usable rows in ``window``; None without a window or with fewer than
        :data:`MIN_NOISE_ROWS` of them (then noise is drawn from the errors).
    warnings : list of str
    """
    if not window:
        return None, []
    lo, hi = window
    delay = np.asarray(delay, float)
    rows = np.asarray(usable, bool) & (delay >= lo) & (delay <= hi)
    if rows.sum() < MIN_NOISE_ROWS:
        return None, [f"the noise window [{lo}, {hi}] ps holds {int(rows.sum())} usable bins; "
                      "noise drawn from the errors"]
    return rows, []
