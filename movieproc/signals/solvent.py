"""Solvent terms in difference signals: per-delay fits, heating shape, projection.

A difference curve at each delay is described as a linear combination of basis
curves: solvent differentials (dS/dT at constant density, dS/drho at constant
temperature), optionally solute model curves, and optionally the nuisance term
dS/d ln q (a photon-energy mismatch between pumped and reference shots shifts q by
dq/q = dE/E and adds ~ -(dS/d ln q) dE/E). Each delay is fitted by weighted linear
least squares with weights 1/diff_err^2, independently of the other delays.

Coefficients are in units of data per basis-curve unit (e.g. K for a dS/dT curve in
data units per K). Standard errors come from the covariance (A^T W A)^-1 of the
weighted fit; with ``scale_errors=True`` they are multiplied by sqrt(chi2 / dof) of
that delay, which is right when the given errors are off by a common factor but
not when the model misses a signal.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from movieproc.errors import DataError, InputError, ParameterError

__all__ = ["dS_dlnq", "SolventFit", "fit_solvent", "HeatingCurve", "estimate_heating_curve", "project_out",
           "SolventBasis", "solvent_basis"]


def dS_dlnq(q, curve):
    """Derivative of a curve with respect to ln q: q dS/dq.

    Parameters
    ----------
    q : array_like, shape (n_q,)
        Momentum transfer, 1/Å, strictly increasing.
    curve : array_like, shape (..., n_q)
        Curve(s) S(q), any unit.

    Returns
    -------
    ndarray, shape (..., n_q)
        q dS/dq (second-order central differences inside, one-sided at the ends),
        in the unit of ``curve``.
    """
    q = np.asarray(q, dtype=float)
    if q.ndim != 1 or q.size < 3 or not np.all(np.diff(q) > 0):
        raise InputError("argument 'q'", f"shape {q.shape}", "a strictly increasing 1-D q grid (1/Å) of >= 3 points")
    return q * np.gradient(np.asarray(curve, dtype=float), q, axis=-1, edge_order=2)


def _prepare(diff, diff_err, nq_expected=None):
    d = np.asarray(diff, dtype=float)
    e = np.asarray(diff_err, dtype=float)
    single = d.ndim == 1
    d2 = np.atleast_2d(d)
    if e.shape != d.shape or d2.ndim != 2:
        raise InputError("arguments 'diff' / 'diff_err'", f"shapes {d.shape} and {e.shape}",
                         "equal shapes (n_delay, n_q) or (n_q,)")
    e2 = np.atleast_2d(e)
    if nq_expected is not None and d2.shape[1] != nq_expected:
        raise InputError("argument 'basis'", f"{nq_expected} q points", f"{d2.shape[1]} like 'diff'")
    valid = np.isfinite(d2) & np.isfinite(e2) & (e2 > 0)
    return d2, e2, valid, single


@dataclass
class SolventFit:
    """Per-delay weighted least-squares fit of difference curves on a basis.

    Attributes
    ----------
    coef, coef_err : ndarray, shape (n_delay, n_basis)
        Coefficients and standard errors (data units per basis unit); NaN for a
        delay that could not be fitted.
    chi2 : ndarray, shape (n_delay,)
        Weighted sum of squared residuals per delay.
    dof : ndarray of int, shape (n_delay,)
        Valid points minus basis size per delay.
    red_chi2 : ndarray, shape (n_delay,)
        chi2 / dof (NaN where dof <= 0).
    covariance : ndarray, shape (n_delay, n_basis, n_basis)
        Covariance of the coefficients (scaled like ``coef_err``).
    fitted : ndarray, shape (n_delay, n_q)
        Full fitted curve.
    removed : ndarray, shape (n_delay, n_q)
        Fitted contribution of the removed terms (solvent and nuisance).
    solute : ndarray, shape (n_delay, n_q)
        diff - removed: the solute-only difference signal.
    names : list of str
    remove : ndarray of bool, shape (n_basis,)
    errors_scaled : bool
    warnings : list of str
    """

    coef: np.ndarray
    coef_err: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    red_chi2: np.ndarray
    covariance: np.ndarray
    fitted: np.ndarray
    removed: np.ndarray
    solute: np.ndarray
    names: list
    remove: np.ndarray
    errors_scaled: bool
    warnings: list = field(default_factory=list)


def fit_solvent(diff, diff_err, basis, *, remove=None, names=None, scale_errors=False):
    """Fit each delay's difference curve on a basis of solvent (and other) curves.

    Parameters
    ----------
    diff : array_like, shape (n_delay, n_q) or (n_q,)
        Difference signal.
    diff_err : array_like, same shape as ``diff``
        Standard errors; points with non-finite value or error, or error <= 0,
        are left out of the fit.
    basis : array_like, shape (n_basis, n_q)
        Basis curves, e.g. ``[dS/dT, dS/drho, solute_1, ..., dS/d ln q]``.
    remove : array_like of bool, shape (n_basis,), optional
        Which basis curves are removed from the data to give ``solute`` (solvent and
        nuisance terms: True; solute model curves: False). Default: all.
    names : sequence of str, optional
        Names of the basis curves (for messages and downstream labels).
    scale_errors : bool
        Multiply the standard errors by sqrt(chi2/dof) of each delay.

    Returns
    -------
    SolventFit
        Arrays with a leading delay axis (length 1 for a single curve).

    Raises
    ------
    InputError
        On shape mismatches or non-finite basis curves.
    """
    d, e, valid, _ = _prepare(diff, diff_err)
    B = np.atleast_2d(np.asarray(basis, dtype=float))
    nd, nq = d.shape
    if B.ndim != 2 or B.shape[1] != nq:
        raise InputError("argument 'basis'", f"shape {B.shape}", f"(n_basis, {nq})")
    if not np.all(np.isfinite(B)):
        raise InputError("argument 'basis'", "non-finite values", "finite basis curves")
    nb = B.shape[0]
    rm = np.ones(nb, bool) if remove is None else np.asarray(remove, dtype=bool)
    if rm.shape != (nb,):
        raise InputError("argument 'remove'", f"shape {rm.shape}", f"({nb},) booleans")
    names = [f"basis_{i}" for i in range(nb)] if names is None else list(names)
    if len(names) != nb:
        raise InputError("argument 'names'", f"{len(names)} names", f"{nb}")

    coef = np.full((nd, nb), np.nan)
    cov = np.full((nd, nb, nb), np.nan)
    chi2 = np.full(nd, np.nan)
    dof = valid.sum(axis=1) - nb
    warnings = []
    for i in range(nd):
        v = valid[i]
        if dof[i] < 0:
            warnings.append(f"delay index {i}: {v.sum()} valid points for {nb} basis curves; not fitted")
            continue
        w = 1.0 / e[i, v]
        A = (B[:, v] * w).T                          # (n_valid, nb)
        b = d[i, v] * w
        U, s, Vt = np.linalg.svd(A, full_matrices=False)
        if s[-1] <= s[0] * 1e-12:
            warnings.append(f"delay index {i}: basis curves are linearly dependent on the valid points; not fitted")
            continue
        c = Vt.T @ ((U.T @ b) / s)
        coef[i] = c
        cov[i] = (Vt.T / s**2) @ Vt
        chi2[i] = np.sum((b - A @ c) ** 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        red = np.where(dof > 0, chi2 / np.maximum(dof, 1), np.nan)
    if scale_errors:
        cov = cov * red[:, None, None]
    coef_err = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    fitted = coef @ B
    removed = coef[:, rm] @ B[rm]
    solute = np.where(valid, d, np.nan) - removed
    return SolventFit(coef=coef, coef_err=coef_err, chi2=chi2, dof=dof, red_chi2=red, covariance=cov,
                      fitted=fitted, removed=removed, solute=solute, names=names, remove=rm,
                      errors_scaled=bool(scale_errors), warnings=warnings)


HEATING_ASSUMPTION = (
    "At the delays in the late window the difference signal is solvent heating alone, with one "
    "q-shape: dS(q, t) = A(t) h(q). Any solute signal still present there (a long-lived product, "
    "a slow structural change) is absorbed into h and will be removed from every delay with it; "
    "density changes (acoustic expansion, ~10-100 ns) change the shape and must not fall in the window."
)


@dataclass
class HeatingCurve:
    """Heating-differential shape estimated from late delays.

    Attributes
    ----------
    curve : ndarray, shape (n_q,)
        Shape h(q), normalized to max |h| = 1, sign chosen so that the mean
        amplitude is positive. Arbitrary unit: the temperature scale is unknown.
    curve_err : ndarray, shape (n_q,)
        Standard error of ``curve`` (amplitudes held fixed).
    amplitudes, amplitude_err : ndarray, shape (n_used,)
        A(t) at the delays used, in data units (data = A h).
    delay_used : ndarray, shape (n_used,)
        Delays of the window, ps.
    chi2, dof, red_chi2 : float, int, float
        Fit of the late curves by the single shape (2-D weighted rank-1 fit).
    assumption : str
        The assumption this estimate rests on.
    warnings : list of str
    """

    curve: np.ndarray
    curve_err: np.ndarray
    amplitudes: np.ndarray
    amplitude_err: np.ndarray
    delay_used: np.ndarray
    chi2: float
    dof: int
    red_chi2: float
    assumption: str = HEATING_ASSUMPTION
    warnings: list = field(default_factory=list)


def estimate_heating_curve(diff, diff_err, delay, late_window, *, max_iter=200, tol=1e-12):
    """Estimate the heating differential's shape from late delays, where only heat remains.

    The curves at delays ``late_window[0] <= delay <= late_window[1]`` are fitted as
    A_i h(q) by weighted least squares (weights 1/diff_err^2), alternating between
    the amplitudes A_i and the shape h (each step is an exact weighted LS solve,
    so chi2 never increases); the start is the weighted mean curve.

    **Assumption**: see :data:`HEATING_ASSUMPTION` (also returned in the result).

    Parameters
    ----------
    diff : array_like, shape (n_delay, n_q)
        Difference signal.
    diff_err : array_like, shape (n_delay, n_q)
        Standard errors.
    delay : array_like, shape (n_delay,)
        Delays, ps.
    late_window : (float, float)
        Inclusive delay range, ps, where only heat is assumed to remain.
    max_iter : int
        Maximum alternating iterations.
    tol : float
        Convergence on the relative change of chi2.

    Returns
    -------
    HeatingCurve

    Raises
    ------
    DataError
        No delay in the window, or a q point with no valid data in the window.
    """
    d, e, valid, _ = _prepare(diff, diff_err)
    delay = np.asarray(delay, dtype=float)
    if delay.shape != (d.shape[0],):
        raise InputError("argument 'delay'", f"shape {delay.shape}", f"({d.shape[0]},) like diff's delay axis")
    lo, hi = map(float, late_window)
    sel = (delay >= lo) & (delay <= hi)
    if not np.any(sel):
        raise DataError(f"no delay in the late window [{lo:g}, {hi:g}] ps (delays span "
                        f"{delay.min():g} to {delay.max():g} ps)")
    D, V = d[sel], valid[sel]
    W = np.where(V, 1.0 / np.where(V, e[sel], 1.0) ** 2, 0.0)
    D = np.where(V, D, 0.0)
    if np.any(W.sum(axis=0) == 0):
        raise DataError("some q points have no valid data in the late window; mask them first")
    h = (W * D).sum(0) / W.sum(0)
    warnings = []
    chi2_old = np.inf
    for _ in range(max_iter):
        den = (W * h**2).sum(1)
        a = np.where(den > 0, (W * h * D).sum(1) / np.where(den > 0, den, 1.0), 0.0)
        den_h = (W * a[:, None] ** 2).sum(0)
        if np.any(den_h == 0):
            raise DataError("the late curves have zero amplitude at some q points: no heating shape there")
        h = (W * a[:, None] * D).sum(0) / den_h
        chi2 = float((W * (D - np.outer(a, h)) ** 2).sum())
        if abs(chi2_old - chi2) <= tol * max(chi2, 1e-300):
            break
        chi2_old = chi2
    else:
        warnings.append(f"alternating rank-1 fit not converged after {max_iter} iterations")
    # Amplitudes for the final shape, then normalize.
    den = (W * h**2).sum(1)
    a = (W * h * D).sum(1) / den
    scale = np.abs(h).max()
    sign = 1.0 if a.mean() >= 0 else -1.0
    h = h * sign / scale
    a = a * sign * scale
    chi2 = float((W * (D - np.outer(a, h)) ** 2).sum())
    h_err = 1.0 / np.sqrt((W * a[:, None] ** 2).sum(0))
    a_err = 1.0 / np.sqrt((W * h**2).sum(1))
    n_used = int(sel.sum())
    dof = int(V.sum() - (d.shape[1] + n_used - 1))
    red = chi2 / dof if dof > 0 else np.nan
    if n_used == 1:
        warnings.append("only one delay in the late window: the shape is that curve; its consistency is untested")
    elif dof > 0 and red > 1 + 5 * np.sqrt(2.0 / dof):
        warnings.append(f"late curves do not share one shape (reduced chi2 {red:.2f} over {dof} dof): "
                        "solute signal or density change may remain in the window")
    if np.any(a * np.sign(a.mean()) < -3 * a_err):
        warnings.append("heating amplitude changes sign inside the late window")
    return HeatingCurve(curve=h, curve_err=h_err, amplitudes=a, amplitude_err=a_err, delay_used=delay[sel],
                        chi2=chi2, dof=dof, red_chi2=red, warnings=warnings)


def project_out(data, basis, err=None):
    """Project curves orthogonally to a basis (e.g. solvent terms), delay by delay.

    With errors, the projection is in the weighted sense: each curve minus its
    weighted least-squares fit on the basis, so that A^T W r = 0 (W = 1/err^2).
    Apply the same call (same ``err``) to model curves to compare them with
    projected data.

    Parameters
    ----------
    data : array_like, shape (n_delay, n_q) or (n_q,)
        Curves to project.
    basis : array_like, shape (n_basis, n_q)
        Curves to project out.
    err : array_like, same shape as ``data``, optional
        Standard errors (weights 1/err^2); unweighted if omitted. Points with
        non-finite data or error are NaN in the output and do not enter the fit.

    Returns
    -------
    ndarray, same shape as ``data``
    """
    arr = np.asarray(data, dtype=float)
    e = np.ones_like(arr) if err is None else err
    res = fit_solvent(arr, e, basis)
    out = np.where(np.isfinite(res.fitted), np.atleast_2d(arr) - res.fitted, np.nan)
    d2, e2, valid, single = _prepare(arr, e)
    out = np.where(valid, out, np.nan)
    return out[0] if single else out


@dataclass
class SolventBasis:
    """Curves fitted with a free coefficient per delay (solvent and nuisance terms).

    Attributes
    ----------
    names : list of str
        Term names: ``dT``/``drho`` (heating, density), ``normalization``, ``energy``.
    curves : ndarray, shape (J, n_q), or None
        The curves on the data's q grid, data units per coefficient unit; None without terms.
    estimated : bool
        The heating curve was estimated from late delays (its coefficient is in
        arbitrary units, not K).
    warnings : list of str
    """

    names: list
    curves: np.ndarray | None
    estimated: bool = False
    warnings: list = field(default_factory=list)


def solvent_basis(q, reference, *, differentials=None, terms=("dT",), heating=True, late=None, late_window=None,
                  normalization=True, energy_term=False):
    """Collect the curves fitted per delay: heating (and density), normalization, photon energy.

    Parameters
    ----------
    q : array_like, shape (n_q,)
        q grid, 1/Å.
    reference : array_like, shape (n_q,)
        Mean reference (pump-off) curve in the data's units.
    differentials : dict, optional
        Term name -> curve (n_q,) of the solvent differentials (e.g. ``{"dT": ..., "drho": ...}``).
    terms : sequence of str
        Terms of ``differentials`` to fit.
    heating : bool
        Include solvent terms at all.
    late : (diff, diff_err, delay), optional
        Data (n_delay, n_q), (n_delay, n_q), (n_delay,) ps from which the heating curve
        is estimated when no ``differentials`` are given (see :func:`estimate_heating_curve`).
    late_window : (float, float), optional
        Delay range, ps, of that estimate; None: no estimate.
    normalization : bool
        Fit the reference curve per delay (a residual normalization error).
    energy_term : bool
        Fit -dS/d ln q of the reference per delay (a photon-energy mismatch between pump-on
        and reference shots moves the curve in q: dS ~ -(dS/d ln q) dE/E).

    Returns
    -------
    SolventBasis

    Raises
    ------
    ParameterError
        A term of ``terms`` missing from ``differentials``.
    """
    names, curves, warnings, estimated = [], [], [], False
    if heating and differentials:
        for term in terms:
            if term not in differentials:
                raise ParameterError("terms", f"'{term}'", f"a term of the differentials ({sorted(differentials)})")
            names.append(term)
            curves.append(np.asarray(differentials[term], float))
    elif heating and late_window and late is not None:
        late_diff, late_err, late_delay = late
        heat = estimate_heating_curve(late_diff, late_err, late_delay, late_window)
        warnings += list(heat.warnings)
        names.append("dT")
        curves.append(heat.curve)
        estimated = True
    reference = np.asarray(reference, float)
    if normalization:
        names.append("normalization")
        curves.append(reference)
    if energy_term:
        names.append("energy")
        curves.append(dS_dlnq(q, reference))
    return SolventBasis(names=names, curves=np.array(curves) if curves else None, estimated=estimated,
                        warnings=warnings)
