"""First-order kinetic networks: populations, with and without the Gaussian IRF.

A network of n species evolves as dc/dt = K c for t >= t0, with c(t0) = c0 and
c = 0 before excitation (t < t0). ``K[i, j]`` (i != j) is the rate (1/ps) of the
step j -> i, so off-diagonal entries are >= 0 and every column sums to zero
(population is conserved; a decay back to the ground state is a step into an
explicit "ground"/"product" species).

Populations are c(t) = expm(K (t - t0)) c0 (scipy.linalg.expm). With the IRF,
K = V diag(lambda) V^-1 is diagonalized, c(x) = sum_j V[:, j] a_j exp(lambda_j x)
with a = V^-1 c0, and each exponential is convolved with the Gaussian in closed
form (:func:`movieproc.fitting.irf.exp_gauss`); this needs distinct eigenvalues.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from movieproc.errors import ParameterError
from movieproc.fitting import irf

__all__ = [
    "RATES_KEY",
    "validate_rate_matrix",
    "sequential_rate_matrix",
    "parallel_rate_matrix",
    "populations",
    "populations_irf",
    "sequential",
    "parallel",
]

#: Parameter named in errors about rate matrices and rate values (the caller maps it to its own input).
RATES_KEY = "rates"


def _rates(k):
    k = np.atleast_1d(np.asarray(k, dtype=float))
    if k.ndim != 1 or k.size == 0 or not np.all(np.isfinite(k)) or np.any(k < 0):
        raise ParameterError(RATES_KEY, f"{np.asarray(k).tolist()!r}",
                          "a non-empty list of finite rates >= 0 (1/ps)")
    return k


def validate_rate_matrix(K, rtol=1e-10):
    """Check that ``K`` is a conservative first-order rate matrix; return it as float.

    Parameters
    ----------
    K : array_like, shape (n, n)
        Rate matrix, 1/ps; ``K[i, j]`` is the rate of j -> i.
    rtol : float
        Tolerance of the column sums, relative to max|K|.

    Returns
    -------
    ndarray, shape (n, n)
        A float copy of ``K``.

    Raises
    ------
    ParameterError
        Naming ``rates``: not square, not finite, a negative
        off-diagonal rate, or a column that does not sum to zero.
    """
    K = np.array(K, dtype=float)
    if K.ndim != 2 or K.shape[0] != K.shape[1] or K.shape[0] == 0:
        raise ParameterError(RATES_KEY, f"a matrix of shape {K.shape}", "a square rate matrix (n, n)")
    if not np.all(np.isfinite(K)):
        raise ParameterError(RATES_KEY, "non-finite entries", "finite rates (1/ps)")
    off = K - np.diag(np.diag(K))
    if np.any(off < 0):
        i, j = np.argwhere(off < 0)[0]
        raise ParameterError(RATES_KEY, f"negative rate K[{i},{j}] = {K[i, j]:g} 1/ps",
                          "off-diagonal rates >= 0 (K[i, j] is the rate of j -> i)")
    scale = max(np.abs(K).max(), np.finfo(float).tiny)
    colsum = K.sum(axis=0)
    bad = np.abs(colsum) > rtol * scale
    if np.any(bad):
        j = int(np.argmax(bad))
        raise ParameterError(RATES_KEY, f"column {j} sums to {colsum[j]:g} 1/ps",
                          "columns summing to 0 (K[j, j] = -sum of rates out of species j)")
    return K


def sequential_rate_matrix(k):
    """Rate matrix of A1 -> A2 -> ... -> Am -> P (m + 1 species, P stable).

    Parameters
    ----------
    k : array_like, shape (m,)
        Rates of the m steps, 1/ps, >= 0.

    Returns
    -------
    ndarray, shape (m + 1, m + 1)
    """
    k = _rates(k)
    m = k.size
    K = np.zeros((m + 1, m + 1))
    K[np.arange(m), np.arange(m)] = -k
    K[np.arange(1, m + 1), np.arange(m)] = k
    return K


def parallel_rate_matrix(k):
    """Rate matrix of m independently decaying species A_i -> P (common product P).

    Parameters
    ----------
    k : array_like, shape (m,)
        Decay rates, 1/ps, >= 0.

    Returns
    -------
    ndarray, shape (m + 1, m + 1)
        Species A_1..A_m, then P.
    """
    k = _rates(k)
    m = k.size
    K = np.zeros((m + 1, m + 1))
    K[np.arange(m), np.arange(m)] = -k
    K[m, :m] = k
    return K


def _c0(c0, n):
    c0 = np.asarray(c0, dtype=float)
    if c0.shape != (n,) or not np.all(np.isfinite(c0)):
        raise ParameterError("c0", f"initial populations of shape {c0.shape}",
                          f"{n} finite values, one per species")
    return c0


def populations(K, c0, t, t0=0.0):
    """Populations of a first-order network without IRF: expm(K (t - t0)) c0.

    Parameters
    ----------
    K : array_like, shape (n, n)
        Rate matrix, 1/ps (validated by :func:`validate_rate_matrix`).
    c0 : array_like, shape (n,)
        Populations right after excitation (at t0).
    t : array_like, shape (n_t,)
        Delays, ps.
    t0 : float
        Time zero, ps; populations are zero for t < t0.

    Returns
    -------
    ndarray, shape (n_t, n)
        Populations, in the units of ``c0``.
    """
    K = validate_rate_matrix(K)
    c0 = _c0(c0, K.shape[0])
    x = np.atleast_1d(np.asarray(t, dtype=float)) - float(t0)
    out = np.zeros((x.size, K.shape[0]))
    after = x >= 0
    if np.any(after):
        P = linalg.expm(K[None, :, :] * x[after, None, None])  # (n_after, n, n)
        out[after] = P @ c0
    return out


def _eigen(K):
    """Eigen-decomposition used by the IRF-convolved populations; checks conditioning."""
    lam, V = linalg.eig(K)
    cond = np.linalg.cond(V)
    if not np.isfinite(cond) or cond > 1e10:
        raise ParameterError(RATES_KEY, f"a rate matrix with (nearly) repeated eigenvalues {np.round(lam, 12)}",
                          "distinct decay rates (e.g. no two equal steps in a sequential scheme) "
                          "for the closed-form IRF convolution")
    return lam, V


def populations_irf(K, c0, t, t0, sigma):
    """Populations of a first-order network convolved with the Gaussian IRF.

    Parameters
    ----------
    K : array_like, shape (n, n)
        Rate matrix, 1/ps; must have distinct eigenvalues.
    c0 : array_like, shape (n,)
        Populations right after excitation.
    t : array_like, shape (n_t,)
        Delays, ps.
    t0 : float
        Time zero, ps.
    sigma : float
        IRF standard deviation, ps (>= 0; 0 gives :func:`populations` with
        half-populations at t = t0).

    Returns
    -------
    ndarray, shape (n_t, n)
        Convolved populations.

    Raises
    ------
    ParameterError
        Naming ``rates`` for an invalid matrix or (nearly) repeated
        eigenvalues (eigenvector matrix condition number > 1e10, where the
        closed form would lose more than ~1e-6 to rounding).

    Notes
    -----
    c(x) = sum_j V[:, j] a_j exp(lambda_j x), a = V^-1 c0, and exp(lambda x) H(x)
    convolved is ``irf.exp_gauss(t, -lambda, t0, sigma)``. Eigenvalues of a
    conservative rate matrix are real for the usual networks; complex pairs are
    handled through complex rates and the real part of the sum is returned.
    """
    K = validate_rate_matrix(K)
    c0 = _c0(c0, K.shape[0])
    t = np.atleast_1d(np.asarray(t, dtype=float))
    lam, V = _eigen(K)
    a = np.linalg.solve(V, c0.astype(complex))
    rates = -lam
    if np.allclose(rates.imag, 0.0, atol=1e-12 * max(1.0, np.abs(rates).max())):
        # Tiny positive eigenvalues from rounding are clipped to a flat step.
        E = irf.exp_gauss(t[:, None], np.maximum(rates.real, 0.0)[None, :], t0, sigma)
        out = (E * a[None, :]) @ V.T
    else:
        E = irf.exp_gauss(t[:, None], rates[None, :], t0, sigma)
        out = (E * a[None, :]) @ V.T
    return np.real(out)


def sequential(k, t, t0=0.0, sigma=None):
    """Populations of A1 -> A2 -> ... -> Am -> P started in A1 (population 1).

    Parameters
    ----------
    k : array_like, shape (m,)
        Step rates, 1/ps.
    t : array_like, shape (n_t,)
        Delays, ps.
    t0 : float
        Time zero, ps.
    sigma : float or None
        IRF standard deviation, ps; ``None`` for no IRF.

    Returns
    -------
    ndarray, shape (n_t, m + 1)
        Populations of A1..Am, P.
    """
    K = sequential_rate_matrix(k)
    c0 = np.zeros(K.shape[0])
    c0[0] = 1.0
    if sigma is None:
        return populations(K, c0, t, t0)
    return populations_irf(K, c0, t, t0, sigma)


def parallel(k, t, c0=None, t0=0.0, sigma=None):
    """Populations of independently decaying species A_i -> P.

    Parameters
    ----------
    k : array_like, shape (m,)
        Decay rates, 1/ps.
    t : array_like, shape (n_t,)
        Delays, ps.
    c0 : array_like, shape (m,), optional
        Initial populations of A_1..A_m (default: 1/m each); P starts empty.
    t0 : float
        Time zero, ps.
    sigma : float or None
        IRF standard deviation, ps; ``None`` for no IRF.

    Returns
    -------
    ndarray, shape (n_t, m + 1)
        Populations of A_1..A_m, P.
    """
    K = parallel_rate_matrix(k)
    m = K.shape[0] - 1
    init = np.full(m, 1.0 / m) if c0 is None else np.asarray(c0, dtype=float)
    if init.shape != (m,):
        raise ParameterError("c0", f"{init.size} initial populations",
                          f"{m}, one per decaying species")
    full = np.append(init, 0.0)
    if sigma is None:
        return populations(K, full, t, t0)
    return populations_irf(K, full, t, t0, sigma)
