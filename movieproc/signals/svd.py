"""Singular value decomposition of a (delay, q) difference map and component counting.

D = U S V^T with U (delay, r) the temporal vectors and V^T (r, q) the q-space
vectors. With per-point weights (typically 1 / diff_err) the decomposition is of the
weighted map W * D, in which the noise is close to unit variance everywhere; the
vectors are then those of the weighted map (divide by the weights to return to data
units in a reconstruction, :func:`reconstruct`).

Counting components (:func:`count_components`) uses two criteria, both required:

1. magnitude: the singular value exceeds the largest singular value of a noise-only
   map of the same shape and weighting (the noise alone cannot produce it; for a
   rank-r signal plus noise N, s_{r+1}(D) <= s_1(N), Weyl's inequality);
2. smoothness: the lag-1 autocorrelation sum_j x_j x_{j+1} / sum_j x_j^2 of both the
   temporal and the q-space vector exceeds ``autocorr_min`` (default 0.8); noise
   vectors have autocorrelation near 0. This needs delays and q sampled finely
   enough for a real component to vary little between neighbours, and a component
   well above the noise: a singular vector carries noise ~1/s per entry, so a
   component only just above the noise edge has rough vectors and is not counted
   (for ~150 q points, s of about 3 times the noise edge is needed).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from movieproc.errors import DataError, InputError

__all__ = ["svd", "reconstruct", "lag1_autocorrelation", "ComponentCount", "count_components", "noise_rows"]

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


@dataclass
class ComponentCount:
    """Evidence for the number of significant components in a (delay, q) map.

    Attributes
    ----------
    n : int
        Number of components that pass both criteria.
    s : ndarray, shape (r,)
        Singular values of the (weighted) map.
    s_noise : ndarray, shape (r,)
        Singular values of the noise-only map (mean over the synthesised
        realizations where the noise was synthesised).
    threshold : float
        Magnitude threshold: the largest noise singular value (largest over
        realizations).
    autocorr_u, autocorr_v : ndarray, shape (r,)
        Lag-1 autocorrelation of the temporal and q-space vectors.
    significant : ndarray of bool, shape (r,)
        s > threshold.
    smooth : ndarray of bool, shape (r,)
        Both autocorrelations > autocorr_min.
    noise_source : str
        How the noise reference was obtained.
    warnings : list of str
    """

    n: int
    s: np.ndarray
    s_noise: np.ndarray
    threshold: float
    autocorr_u: np.ndarray
    autocorr_v: np.ndarray
    significant: np.ndarray
    smooth: np.ndarray
    noise_source: str
    warnings: list = field(default_factory=list)


def count_components(D, noise=None, *, err=None, weights=None, rng=None, n_noise=5, autocorr_min=0.8,
                     noise_err=None):
    """Count the components of a (delay, q) map that rise above noise and are smooth.

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
        default weights 1/err.
    weights : array_like, optional
        Per-point weights broadcastable to ``D``; the same weights are applied to the
        noise maps. Default: 1/err if ``err`` is given, else none.
    rng : numpy.random.Generator, optional
        Required whenever noise maps are synthesised.
    n_noise : int
        Number of synthesised noise maps.
    autocorr_min : float
        Minimum lag-1 autocorrelation of both singular vectors.
    noise_err : array_like, shape (m, n_q), optional
        Standard errors of the ``noise`` rows. With it (and weights 1/err) the
        noise level is measured in units of each row's own error, (noise /
        noise_err) per q, and the synthesised maps are drawn in those weighted
        units, so rows with more shots (smaller errors) are not given noise they
        do not have.

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
    nd, nq = D.shape
    err_arr = None
    if err is not None:
        err_arr = np.broadcast_to(np.asarray(err, dtype=float), D.shape)
        if not np.all(np.isfinite(err_arr)) or np.any(err_arr <= 0):
            raise InputError("argument 'err'", "non-positive or non-finite errors", "standard errors > 0")
        if weights is None:
            weights = 1.0 / err_arr
    w = _weights(weights, D.shape)
    u, s, vt = svd(D, w)

    def need_rng():
        if not isinstance(rng, np.random.Generator):
            raise InputError("argument 'rng'", f"{type(rng).__name__}",
                             "a seeded numpy.random.Generator to synthesise noise maps")

    wm = 1.0 if w is None else w
    if noise is not None:
        N = np.asarray(noise, dtype=float)
        if N.ndim != 2 or N.shape[1] != nq or not np.all(np.isfinite(N)):
            raise InputError("argument 'noise'", f"shape {N.shape}", f"a finite (m, {nq}) noise-only map")
        if N.shape[0] == nd:
            maps = [N * wm]
            source = "noise map of the same shape"
        else:
            if N.shape[0] < 2:
                raise InputError("argument 'noise'", "1 row", "at least 2 rows to estimate the noise level per q")
            need_rng()
            if noise_err is not None and err_arr is not None:
                ne = np.asarray(noise_err, dtype=float)
                if ne.shape != N.shape or not np.all(np.isfinite(ne)) or np.any(ne <= 0):
                    raise InputError("argument 'noise_err'", f"shape {ne.shape}", f"positive errors of shape {N.shape}")
                sd_z = (N / ne).std(axis=0, ddof=1)  # noise per q in units of the rows' own errors
                maps = [rng.standard_normal(D.shape) * sd_z * err_arr * wm for _ in range(int(n_noise))]
                source = (f"{n_noise} Gaussian maps with the per-q spread, in units of each row's error, "
                          f"of a {N.shape[0]}-row noise map")
            else:
                sd = N.std(axis=0, ddof=1)
                maps = [rng.standard_normal(D.shape) * sd * wm for _ in range(int(n_noise))]
                source = f"{n_noise} Gaussian maps with the per-q spread of a {N.shape[0]}-row noise map"
    elif err_arr is not None:
        need_rng()
        maps = [rng.standard_normal(D.shape) * err_arr * wm for _ in range(int(n_noise))]
        source = f"{n_noise} Gaussian maps from the per-point errors"
    else:
        raise InputError("arguments 'noise' / 'err'", "neither given", "a noise-only map or per-point errors")

    sn = np.array([np.linalg.svd(M, compute_uv=False) for M in maps])
    s_noise = sn.mean(axis=0)
    threshold = float(sn[:, 0].max())
    ac_u = lag1_autocorrelation(u, axis=0)
    ac_v = lag1_autocorrelation(vt, axis=1)
    significant = s > threshold
    smooth = (ac_u > autocorr_min) & (ac_v > autocorr_min)
    passed = significant & smooth
    n = int(np.count_nonzero(passed))
    warnings = []
    if n and not np.all(passed[:n]):
        warnings.append("components passing both criteria are not the leading ones "
                        f"(components {(np.nonzero(passed)[0] + 1).tolist()}, counting from 1); inspect the vectors")
    both_fail = significant & ~smooth
    if np.any(both_fail):
        warnings.append(f"SVD component(s) {(np.nonzero(both_fail)[0] + 1).tolist()} (counting from 1) exceed the "
                        "noise but their vectors are not smooth (lag-1 autocorrelation below "
                        f"{autocorr_min}): not counted; fast changes, outliers or coarse sampling?")
    return ComponentCount(n=n, s=s, s_noise=s_noise, threshold=threshold, autocorr_u=ac_u, autocorr_v=ac_v,
                          significant=significant, smooth=smooth, noise_source=source, warnings=warnings)


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
