"""Parameter covariance of fits whose residuals are correlated along the delay axis.

The binned differences of neighbouring delay bins share pump-off references, so
their errors are correlated (:mod:`movieproc.signals.covariance`). Under the
separable model ``Cov(D_b(q), D_c(q)) = err_b(q) err_c(q) R_bc`` (no correlation
between q points), the error-weighted residual ``r = (D - model) / err``,
flattened delay-major (row ``b * nq + q``, the order of ``array.ravel()`` on a
(delay, q) map), has correlation

    C = R kron I_nq,   C[(b, q), (c, q')] = R_bc delta_qq'.

C is never formed: it is applied along the delay axis of each q point.

Which covariance
----------------
* The fit minimized the ordinary weighted chi2 ``sum r^2`` (diagonal weights,
  as :func:`movieproc.fitting.varpro.fit` does): the estimate stays unbiased,
  but ``(J^T J)^-1`` is wrong (too small when the Jacobian columns vary
  smoothly along delay and R has positive neighbours, which is the case for
  time zero and the IRF width). Use :func:`sandwich_covariance`,
  ``(J^T J)^-1 J^T C J (J^T J)^-1``.
* The fit minimized the generalized chi2 ``sum (L^-1 r)^2`` (residuals passed
  through :func:`movieproc.signals.covariance.whiten` inside the fit;
  generalized least squares, the efficient estimate under the model): use
  :func:`gls_covariance`, ``(J_w^T J_w)^-1`` with the whitened Jacobian
  ``J_w = (L^-1 kron I) J``.

Using the GLS formula for an ordinary fit understates the errors; the sandwich
for a GLS fit is valid but not needed (it reduces to the GLS formula there).

Reduced-chi2 scaling
--------------------
``varpro.fit`` multiplies its Gauss-Newton covariance by the reduced chi2
``chi2 / dof`` (chi2 = sum of squared weighted residuals, dof = points minus
parameters), so errors include a misfit when chi2/dof > 1. The same option is
offered here (``red_chi2=``) with :func:`reduced_chi2`. For a GLS fit, the
whitened chi2 over dof (expectation exactly 1 for a correct linear model). For
an ordinary fit, the plain chi2 has expectation ``n - tr((J^T J)^-1 J^T C J)``
(:func:`correlated_dof`) rather than ``n - p``: each parameter fitted to
smooth, positively correlated noise absorbs more than one unit of chi2, so
dividing by ``n - p`` understates the misfit scale (by 6 % for 2 parameters,
120 points and neighbour correlation 0.7); divide by :func:`correlated_dof`.

All Jacobians are error-weighted: column = d(model)/d(parameter) / err.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse

from ..signals.covariance import check_correlation, decorrelate

__all__ = ["correlated_meat", "sandwich_covariance", "gls_covariance", "reduced_chi2", "correlated_dof",
           "inverse_psd"]

#: Smallest accepted eigenvalue of the Jacobi-scaled normal matrix, relative to its largest
#: (the same cut-off as the fit's own Gauss-Newton inverse): below it a parameter is undetermined.
SINGULAR_RATIO = 1e-13


def inverse_psd(N):
    """Inverse of a symmetric positive semi-definite matrix, marking undetermined directions.

    Parameters
    ----------
    N : array_like (p, p)
        Normal matrix, e.g. ``J^T J``.

    Returns
    -------
    ndarray (p, p) float64
        The inverse; where N is singular (an eigenvalue of the Jacobi-scaled
        matrix at or below ``SINGULAR_RATIO`` times the largest, or a zero
        diagonal) a matrix of NaN with +inf on the diagonal, as
        :func:`movieproc.fitting.varpro.fit` reports undetermined parameters.
    """
    N = np.asarray(N, float)
    if N.size == 0:
        return N.copy()
    d = np.sqrt(np.diag(N))
    if np.any(~(d > 0)):
        out = np.full(N.shape, np.nan)
        np.fill_diagonal(out, np.inf)
        return out
    Ns = N / np.outer(d, d)
    lam, V = np.linalg.eigh(Ns)
    if lam.min() <= SINGULAR_RATIO * lam.max():
        out = np.full(N.shape, np.nan)
        np.fill_diagonal(out, np.inf)
        return out
    return (V / lam) @ V.T / np.outer(d, d)


def _full_rows(jacobian, nbins, valid):
    """The Jacobian with one row per (delay, q) point, zero rows for left-out points."""
    is_sparse = sparse.issparse(jacobian)
    J = sparse.csr_matrix(jacobian, dtype=float) if is_sparse else np.asarray(jacobian, float)
    if J.ndim != 2:
        raise ValueError(f"jacobian must be 2-D (rows, parameters), got shape {J.shape}")
    if valid is None:
        if J.shape[0] % nbins:
            raise ValueError(f"jacobian has {J.shape[0]} rows: expected nbins * nq with nbins = {nbins} "
                             "(R's size), or pass valid")
        return J, J.shape[0] // nbins
    valid = np.asarray(valid, bool)
    if valid.ndim != 2 or valid.shape[0] != nbins:
        raise ValueError(f"valid must be (nbins, nq) with nbins = {nbins}, got shape {valid.shape}")
    rows = np.flatnonzero(valid.ravel())
    if J.shape[0] != rows.size:
        raise ValueError(f"jacobian has {J.shape[0]} rows but valid marks {rows.size} points")
    if is_sparse:
        scatter = sparse.csr_matrix((np.ones(rows.size), (rows, np.arange(rows.size))), shape=(valid.size, rows.size))
        return scatter @ J, valid.shape[1]
    full = np.zeros((valid.size, J.shape[1]))
    full[rows] = J
    return full, valid.shape[1]


def _bread_inverse(jacobian, bread_inverse, shape):
    """``(J^T J)^-1`` by :func:`inverse_psd`, or the caller's own inverse normal matrix (checked)."""
    if bread_inverse is None:
        J = jacobian
        N = (J.T @ J).toarray() if sparse.issparse(J) else np.asarray(J, float).T @ np.asarray(J, float)
        return inverse_psd(N)
    Binv = np.asarray(bread_inverse, float)
    if Binv.shape != shape:
        raise ValueError(f"bread_inverse must be {shape}, got {Binv.shape}")
    return Binv


def correlated_meat(jacobian, R, valid=None):
    """``J^T C J`` with C = R kron I_nq, applied along the delay axis per q point.

    Parameters
    ----------
    jacobian : ndarray or scipy.sparse matrix (nbins * nq, p), or (n_valid, p) with ``valid``
        Error-weighted Jacobian, rows delay-major (row ``b * nq + q``). Rows of
        points left out of the fit must be zero, or leave them out and pass
        ``valid``. Sparse input (e.g. the Jacobian of per-q free curves and
        per-delay coefficients) is kept sparse.
    R : array_like (nbins, nbins)
        Correlation of the bin differences along delay (unit diagonal).
    valid : array_like (nbins, nq) bool, optional
        Points in the fit, when ``jacobian`` holds their rows only (in
        ``valid.ravel()`` order, as ``varpro`` keeps them).

    Returns
    -------
    ndarray (p, p) float64
    """
    R = np.asarray(R, float)
    nbins = R.shape[0] if R.ndim == 2 else -1
    R = check_correlation(R, nbins)
    J, nq = _full_rows(jacobian, nbins, valid)
    p = J.shape[1]
    if sparse.issparse(J):
        CJ = sparse.kron(sparse.csr_matrix(R), sparse.identity(nq), format="csr") @ J
        return np.asarray((J.T @ CJ).todense(), dtype=float)
    CJ = (R @ J.reshape(nbins, nq * p)).reshape(nbins * nq, p)
    return J.T @ CJ


def sandwich_covariance(jacobian, R, valid=None, *, bread_inverse=None, red_chi2=None):
    """Covariance of an ordinary weighted least-squares fit with residuals correlated along delay.

    ``cov = B^-1 (J^T C J) B^-1``, B = J^T J (the fit's own normal matrix).

    Parameters
    ----------
    jacobian : ndarray or scipy.sparse matrix
        Error-weighted Jacobian at the solution, see :func:`correlated_meat`.
    R : array_like (nbins, nbins)
        Bin correlation (:func:`movieproc.signals.covariance.bin_correlation`).
    valid : array_like (nbins, nq) bool, optional
        See :func:`correlated_meat`.
    bread_inverse : array_like (p, p), optional
        The fit's own inverse normal matrix when it is not ``(J^T J)^-1``
        (e.g. ``varpro``'s constrained ``M^-1`` with ``M = N + L^T L``);
        default :func:`inverse_psd` of ``J^T J``.
    red_chi2 : float, optional
        Multiply by this reduced chi2, as ``varpro.fit`` does: for an ordinary
        fit ``reduced_chi2(r, correlated_dof(...))``; default no scaling
        (errors taken as given).

    Returns
    -------
    ndarray (p, p) float64
        Undetermined parameters (singular J^T J) get +inf variance.
    """
    meat = correlated_meat(jacobian, R, valid)
    Binv = _bread_inverse(jacobian, bread_inverse, meat.shape)
    if not np.all(np.isfinite(Binv)):
        return Binv
    cov = Binv @ meat @ Binv
    cov = 0.5 * (cov + cov.T)
    return cov * float(red_chi2) if red_chi2 is not None else cov


def gls_covariance(jacobian, R, valid=None, *, red_chi2=None):
    """Covariance of a generalized least-squares fit (residuals whitened along delay).

    ``cov = (J_w^T J_w)^-1`` with ``J_w = (L^-1 kron I_nq) J``, R = L L^T,
    whitened per q point with R restricted to that q point's valid bins (as
    :func:`movieproc.signals.covariance.whiten` does for the residuals).

    Parameters
    ----------
    jacobian : ndarray (nbins * nq, p), or (n_valid, p) with ``valid``
        Error-weighted (not whitened) Jacobian, rows delay-major. Dense only.
    R : array_like (nbins, nbins)
        Bin correlation.
    valid : array_like (nbins, nq) bool, optional
        Points in the fit; default every row of a full Jacobian.
    red_chi2 : float, optional
        Multiply by this reduced chi2 (:func:`reduced_chi2` with R: the
        whitened chi2 over dof).

    Returns
    -------
    ndarray (p, p) float64

    Raises
    ------
    ValueError
        If R is singular or not positive definite (too few references).
    """
    R = np.asarray(R, float)
    nbins = R.shape[0] if R.ndim == 2 else -1
    R = check_correlation(R, nbins)
    if sparse.issparse(jacobian):
        raise ValueError("jacobian must be dense for gls_covariance (whitening makes it dense along delay)")
    J, nq = _full_rows(jacobian, nbins, valid)
    p = J.shape[1]
    mask = np.ones((nbins, nq), bool) if valid is None else np.asarray(valid, bool)
    Jw = decorrelate(J.reshape(nbins, nq * p), np.repeat(mask, p, axis=1), R).reshape(nbins * nq, p)
    cov = inverse_psd(Jw.T @ Jw)
    return cov * float(red_chi2) if red_chi2 is not None and np.all(np.isfinite(cov)) else cov


def reduced_chi2(weighted_residual, dof, R=None):
    """Reduced chi2 of a fit, plain or whitened.

    Parameters
    ----------
    weighted_residual : array_like (nbins, nq)
        ``(data - model) / err``; NaN at points left out of the fit.
    dof : int
        Points in the fit minus fitted parameters (linear ones included), as
        ``varpro.fit`` counts them.
    R : array_like (nbins, nbins), optional
        Bin correlation. Without it: ``sum r^2 / dof`` (what ``varpro.fit``
        uses today; the choice for an ordinary fit). With it: the whitened
        ``sum (L^-1 r)^2 / dof`` (the choice for a GLS fit, and the honest
        goodness of fit under correlated errors).

    Returns
    -------
    float
    """
    r = np.asarray(weighted_residual, float)
    if r.ndim != 2:
        raise ValueError(f"weighted_residual must be (nbins, nq), got shape {r.shape}")
    if not int(dof) > 0:
        raise ValueError(f"dof must be positive, got {dof}")
    valid = np.isfinite(r)
    z = decorrelate(np.where(valid, r, 0.0), valid, R) if R is not None else np.where(valid, r, 0.0)
    return float(np.sum(z * z) / int(dof))


def correlated_dof(jacobian, R, valid=None, *, bread_inverse=None):
    """Expected plain chi2 of an ordinary weighted fit with residuals correlated along delay.

    For a linear model (and to first order for a non-linear one) the weighted
    residual is ``r = (I - H) e`` with the hat matrix ``H = J B^-1 J^T`` and
    ``Cov(e) = C``, so ``E[sum r^2] = tr((I - H) C) = n - tr(B^-1 J^T C J)``
    (C has a unit diagonal; H is a symmetric projection). With C = I this is
    the usual ``n - p``. Divide the plain chi2 by it to get a reduced chi2 for
    :func:`sandwich_covariance`.

    Parameters
    ----------
    jacobian, R, valid, bread_inverse
        As for :func:`sandwich_covariance`. The Jacobian must hold every fitted
        parameter (linear amplitudes included); ``n`` is its number of
        non-zero rows (points in the fit).

    Returns
    -------
    float
    """
    meat = correlated_meat(jacobian, R, valid)
    Binv = _bread_inverse(jacobian, bread_inverse, meat.shape)
    if not np.all(np.isfinite(Binv)):
        raise ValueError("jacobian: the normal matrix is singular (a parameter is undetermined)")
    if valid is not None:
        n = int(np.count_nonzero(valid))
    elif sparse.issparse(jacobian):
        n = int(np.count_nonzero(np.diff(sparse.csr_matrix(jacobian).indptr)))
    else:
        n = int(np.count_nonzero(np.any(np.asarray(jacobian) != 0, axis=1)))
    return float(n - np.trace(Binv @ meat))
