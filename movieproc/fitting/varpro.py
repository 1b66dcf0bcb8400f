"""Variable-projection fitting of difference maps, with honest uncertainties and flags.

The non-linear parameters theta (time zero, IRF width, lifetimes, oscillation) are
fitted by :func:`scipy.optimize.least_squares` (trust-region reflective, bounds).
For each trial theta the linear amplitudes (free species curves, global scales such
as the excitation fraction alpha, per-delay solvent coefficients) are solved exactly
by weighted linear least squares (weights 1/diff_err), so the optimizer sees the
projected residual r(theta) = W (D - model(theta, lin_hat(theta))) only
(Golub & Pereyra's variable projection).

Linear solve
------------
Unknowns: free curves B (K per q point), per-delay coefficients s (J per delay),
global coefficients beta. The weighted normal equations are reduced by
eliminating B q-point by q-point (K x K blocks), leaving a dense system in
(s, beta) of size n_delay J + n_g, solved by a Jacobi-scaled symmetric
eigen-decomposition (pseudo-inverse, relative cut-off 1e-11).

Free curves together with per-delay solvent coefficients are degenerate: adding
eps G_j to B_k and -eps c_k(t) to s_j(t) leaves the model unchanged. The
convention used here: **species curves carry no component along the solvent
curves** (sum_q G_j(q) B_k(q) = 0), i.e. everything shaped like a solvent curve
is attributed to the solvent; the model, residual and chi2 do not depend on it.

Uncertainties
-------------
Standard errors come from the Gauss-Newton covariance (J^T J)^-1 multiplied by
the reduced chi2 (so they include the misfit when chi2/dof > 1). With
``linear_errors=True`` (default) the full normal matrix of (theta, linear
amplitudes) is formed, with the Jacobian in theta at fixed amplitudes by central
differences; the covariance of the constrained estimate is M^-1 N M^-1 with
M = N + L^T L (L the convention above), which gives theta's errors including the
correlation with every amplitude, and the amplitudes' errors. Otherwise theta's
errors come from the Jacobian of the projected residual.
Costs: the full matrix has (K n_q + J n_delay + n_g + p)^2 entries.

Correlated delay bins
---------------------
Neighbouring delay bins share pump-off references, so their differences are
correlated along delay: ``Cov(D_b(q), D_c(q)) = err_b(q) err_c(q) R_bc``
(:mod:`movieproc.signals.covariance`). The fit itself stays an ordinary weighted
fit (weights 1/err); with ``correlation=R`` the errors are the sandwich
``M^-1 (J^T C J) M^-1`` (C = R kron I_nq, :mod:`movieproc.fitting.correlated`)
scaled by the plain chi2 over its expectation under R (``correlated_dof``), and
the per-bin-only errors (R = I) are kept beside them (``stderr_independent``).
Without ``correlation`` both are the per-bin-only errors.

These are linearized (asymptotic) errors. They describe the scatter well when every
component is clearly above the noise; for a weak component with free curves (each
free curve adds n_q linear unknowns that also fit noise) the chi2 surface in theta
gets noise-driven local minima and the errors can be far too small. Check such
parameters with :func:`bootstrap` or a chi2 scan.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, sparse

from movieproc.errors import DataError, InputError, MovieprocError, ParameterError
from movieproc.fitting.correlated import correlated_dof, inverse_psd, reduced_chi2, sandwich_covariance
from movieproc.fitting.models import SpeciesModel, TrajectoryModel
from movieproc.progress import iterate
from movieproc.signals.covariance import check_correlation

__all__ = ["LinearSolution", "solve_linear", "FitResult", "Problem", "Optimum", "Errors", "validate",
           "optimize_parameters", "parameter_errors", "flags", "fit", "BootstrapResult", "bootstrap",
           "ParameterBootstrap", "refit_replicates", "refit_resamples"]

#: A per-q K x K block of the linear solve above this condition number is solved by
#: pseudo-inverse instead (no data or degenerate profiles at that q).
MAX_BLOCK_CONDITION = 1e12
#: Relative eigenvalue cut-off of the pseudo-inverses: well above double-precision rounding
#: (~1e-16) of the scaled matrices, far below any direction the data determine.
PINV_RCOND = 1e-12
#: Relative cut-off of the Jacobi-scaled eigen-solve of the reduced (s, beta) system.
SYSTEM_RCOND = 1e-11
#: Correlations beyond this magnitude are reported: the two parameters trade off against each other.
STRONG_CORRELATION = 0.95
#: A free parameter within this fraction of its bound range (or of its value) counts as at the bound.
AT_BOUND_RTOL = 1e-6
#: The reduced chi2 is flagged beyond 1 + this many of its standard deviations sqrt(2 / dof).
CHI2_SIGMAS = 5.0
#: Fewer delays than this many per time-shaping parameter and profile: poorly constrained.
DELAYS_PER_PARAMETER = 3
#: Relative central-difference step of the Jacobian in theta (plus an absolute 1e-2 of it, for values near 0).
JACOBIAN_STEP = 1e-5
#: A parameter takes part in an undetermined direction when its share of a null vector exceeds this.
NULL_SHARE = 1e-8


# ----------------------------------------------------------------------------- linear

@dataclass
class LinearSolution:
    """Weighted least-squares amplitudes at fixed non-linear parameters.

    Attributes
    ----------
    curves : ndarray, shape (K, n_q) or None
        Free curves (species difference curves), data units per unit population.
    map_coef : ndarray, shape (n_g,)
        Global scales (e.g. alpha).
    curve_coef : ndarray, shape (n_delay, J) or None
        Per-delay coefficients of the solvent curves.
    model : ndarray, shape (n_delay, n_q)
        The fitted model.
    n_linear : int
        Number of independent linear unknowns (the degeneracy removed).
    """

    curves: np.ndarray | None
    map_coef: np.ndarray
    curve_coef: np.ndarray | None
    model: np.ndarray
    n_linear: int


def _sym_pinv_solve(M, r, rcond=None):
    """Solve symmetric PSD M x = r (r may have several columns) in the pseudo-inverse sense."""
    rcond = SYSTEM_RCOND if rcond is None else rcond
    d = np.sqrt(np.clip(np.diag(M), 0, None))
    d[d == 0] = 1.0
    Ms = M / d[:, None] / d[None, :]
    lam, V = np.linalg.eigh(Ms)
    keep = lam > rcond * max(lam.max(), 0.0)
    inv = np.where(keep, 1.0 / np.where(keep, lam, 1.0), 0.0)
    rs = (r.T / d).T
    x = V @ (inv[:, None] * (V.T @ rs)) if rs.ndim == 2 else V @ (inv * (V.T @ rs))
    return (x.T / d).T


def _model_from(design_profiles, design_maps, design_curves, B, beta, S, shape):
    model = np.zeros(shape)
    if design_profiles is not None:
        model += design_profiles @ B
    if design_maps is not None:
        model += np.tensordot(beta, design_maps, axes=1)
    if design_curves is not None:
        model += S @ design_curves
    return model


def solve_linear(design, D, w):
    """Solve the linear amplitudes of a design by weighted least squares.

    Parameters
    ----------
    design : movieproc.fitting.models.LinearDesign
        ``profiles`` (n_delay, K) or None, ``maps`` (n_g, n_delay, n_q) or None,
        ``curves`` (J, n_q) or None.
    D : ndarray, shape (n_delay, n_q)
        Data (finite; invalid points must carry zero weight).
    w : ndarray, shape (n_delay, n_q)
        Weights 1/err (0 for points left out).

    Returns
    -------
    LinearSolution
    """
    C, X, G = design.profiles, design.maps, design.curves
    nt, nq = D.shape
    W2 = w * w
    K = 0 if C is None else C.shape[1]
    J = 0 if G is None else G.shape[0]
    ng = 0 if X is None else X.shape[0]
    nz = nt * J + ng
    # z-block: [s (t, j) flattened, beta]
    Azz = np.zeros((nz, nz))
    bz = np.zeros(nz)
    if J:
        Ass = np.einsum("jq,tq,lq->tjl", G, W2, G)
        idx = np.arange(nt)[:, None] * J + np.arange(J)[None, :]
        for t in range(nt):
            Azz[np.ix_(idx[t], idx[t])] = Ass[t]
        bz[: nt * J] = np.einsum("jq,tq->tj", G, W2 * D).ravel()
    if ng:
        XW = X * W2
        Azz[nt * J:, nt * J:] = np.einsum("gtq,htq->gh", XW, X)
        bz[nt * J:] = np.einsum("gtq,tq->g", XW, D)
        if J:
            Asb = np.einsum("jq,gtq->tjg", G, XW).reshape(nt * J, ng)
            Azz[: nt * J, nt * J:] = Asb
            Azz[nt * J:, : nt * J] = Asb.T
    B = None
    n_lin = nz
    if K:
        qvalid = W2.sum(0) > 0
        Abb = np.einsum("tq,tk,tl->qkl", W2, C, C)
        bb = np.einsum("tq,tk->qk", W2 * D, C)
        Abz = np.zeros((nq, K, nz))
        if J:
            Abz[:, :, : nt * J] = np.einsum("tq,tk,jq->qktj", W2, C, G).reshape(nq, K, nt * J)
        if ng:
            Abz[:, :, nt * J:] = np.einsum("tq,tk,gtq->qkg", W2, C, X)
        rhs = np.concatenate([Abz, bb[:, :, None]], axis=2)
        # Per-q K x K solves; pseudo-inverse where a block is singular (no data at that q).
        Y = np.zeros_like(rhs)
        good = qvalid & (np.linalg.cond(Abb) < MAX_BLOCK_CONDITION)
        if np.any(good):
            Y[good] = np.linalg.solve(Abb[good], rhs[good])
        if np.any(~good):
            Y[~good] = np.linalg.pinv(Abb[~good], rcond=PINV_RCOND) @ rhs[~good]
        Yz, Yb = Y[:, :, :nz], Y[:, :, nz]
        if nz:
            M = Azz - np.einsum("qkz,qky->zy", Abz, Yz)
            r = bz - np.einsum("qkz,qk->z", Abz, Yb)
            z = _sym_pinv_solve(M, r)
            B = (Yb - np.einsum("qkz,z->qk", Yz, z)).T
        else:
            z = np.zeros(0)
            B = Yb.T
        n_lin = K * int(qvalid.sum()) + nz - (K * J)
    else:
        z = _sym_pinv_solve(Azz, bz) if nz else np.zeros(0)
    S = z[: nt * J].reshape(nt, J) if J else None
    beta = z[nt * J:]
    if B is not None and S is not None:  # K profiles and J solvent curves
        # Convention: species curves orthogonal to the solvent curves (model unchanged).
        A = np.linalg.solve(G @ G.T, G @ B.T).T  # (K, J)
        B = B - A @ G
        S = S + C @ A
    model = _model_from(C, X, G, B, beta, S, D.shape)
    return LinearSolution(curves=B, map_coef=beta, curve_coef=S, model=model, n_linear=int(n_lin))


# ----------------------------------------------------------------------------- result

@dataclass
class FitResult:
    """Outcome of :func:`fit`. Read ``converged``, ``at_bound`` and ``warnings`` first.

    Attributes
    ----------
    params : dict
        Non-linear parameters (all, fixed ones included), ps for times.
    stderr : dict
        Standard errors (scaled by sqrt(red_chi2)); NaN for fixed parameters, inf
        where the data do not determine a parameter.
    free : list of str
        Names of the fitted non-linear parameters.
    correlation : ndarray, shape (n_corr, n_corr)
        Correlation matrix of ``corr_names``.
    corr_names : list of str
        Free non-linear parameters, then global scales (with linear errors).
    amplitudes, amplitudes_err : dict
        Global linear scales (e.g. ``alpha``) and their standard errors (NaN
        without ``linear_errors``).
    species_curves, species_curves_err : ndarray, shape (K, n_q) or None
        Free curves and their standard errors.
    profile_names : list of str
    solvent_coef, solvent_coef_err : ndarray, shape (n_delay, J) or None
        Per-delay solvent coefficients and errors.
    solvent_names : list of str
    chi2_delay : ndarray, shape (n_delay,)
        Weighted squared residuals summed over q, per delay.
    chi2 : float
    dof : int
        n_data - n_params.
    red_chi2 : float
    model, residual : ndarray, shape (n_delay, n_q)
        Model and data - model (NaN at points left out).
    populations : ndarray, shape (n_delay, n_species)
    species_names : list of str
    delay : ndarray, shape (n_delay,)
    converged : bool
        The optimizer met a convergence criterion (not stopped by max_nfev).
    message : str
        The optimizer's message.
    nfev : int
    at_bound : list of str
        Free parameters that ended on (or within 1e-6 of the range of) a bound.
    warnings : list of str
        Human-readable statements of everything that may make the result mislead.
    n_data : int
        Number of data points used.
    n_params : int
        Free non-linear parameters plus independent linear amplitudes.
    bootstrap : dict
        Parameter name -> :class:`ParameterBootstrap`, filled by the caller from
        :func:`refit_replicates` / :func:`refit_resamples` (empty without a bootstrap).
    stderr_independent, amplitudes_err_independent : dict
        The same errors under independent delay bins (R = I), scaled by ``red_chi2``;
        equal to ``stderr`` / ``amplitudes_err`` when no correlation was given.
    error_model : str
        What ``stderr`` assumes: ``"correlated bins"`` or ``"independent bins"``.
    error_scale : float
        The reduced chi2 that scaled ``stderr``: ``red_chi2`` for independent bins,
        the plain chi2 over its expectation under the correlation otherwise.
    """

    params: dict
    stderr: dict
    free: list
    correlation: np.ndarray
    corr_names: list
    amplitudes: dict
    amplitudes_err: dict
    species_curves: np.ndarray | None
    species_curves_err: np.ndarray | None
    profile_names: list
    solvent_coef: np.ndarray | None
    solvent_coef_err: np.ndarray | None
    solvent_names: list
    chi2_delay: np.ndarray
    chi2: float
    dof: int
    red_chi2: float
    model: np.ndarray
    residual: np.ndarray
    populations: np.ndarray
    species_names: list
    delay: np.ndarray
    converged: bool
    message: str
    nfev: int
    at_bound: list
    warnings: list = field(default_factory=list)
    n_data: int = 0
    n_params: int = 0
    bootstrap: dict = field(default_factory=dict)
    stderr_independent: dict = field(default_factory=dict)
    amplitudes_err_independent: dict = field(default_factory=dict)
    error_model: str = "independent bins"
    error_scale: float = float("nan")


# ----------------------------------------------------------------------------- fitting



def _check_data(diff, diff_err, delay):
    D = np.asarray(diff, dtype=float)
    E = np.asarray(diff_err, dtype=float)
    t = np.asarray(delay, dtype=float)
    if D.ndim != 2 or E.shape != D.shape or t.shape != (D.shape[0],):
        raise InputError("arguments 'diff' / 'diff_err' / 'delay'",
                         f"shapes {D.shape}, {E.shape}, {t.shape}", "(n_delay, n_q), (n_delay, n_q), (n_delay,)")
    if not np.all(np.isfinite(t)):
        raise InputError("argument 'delay'", "non-finite delays", "finite delays (ps)")
    valid = np.isfinite(D) & np.isfinite(E) & (E > 0)
    w = np.where(valid, 1.0 / np.where(valid, E, 1.0), 0.0)
    return np.where(valid, D, 0.0), w, valid, t


def _design_arrays_finite(design):
    bad = []
    for name in ("profiles", "maps", "curves", "populations"):
        a = getattr(design, name)
        if a is not None and not np.all(np.isfinite(a)):
            bad.append(f"{name} ({np.count_nonzero(~np.isfinite(a))} non-finite values)")
    return bad


@dataclass
class Problem:
    """A checked fit problem: data as weights, parameters as names, bounds and start.

    Attributes
    ----------
    model : SpeciesModel or TrajectoryModel
    diff : ndarray, shape (n_delay, n_q)
        The data as given (NaN kept), for the residual map.
    D, w : ndarray, shape (n_delay, n_q)
        Data (0 where left out) and weights 1/diff_err (0 where left out).
    valid : ndarray of bool, shape (n_delay, n_q)
    delay : ndarray, shape (n_delay,)
        Delays, ps.
    names, free : list of str
        All non-linear parameters; the fitted ones.
    start : dict
        Initial value of every parameter.
    low, high : ndarray, shape (n_free,)
        Bounds of the free parameters.
    n_data, n_params, n_delays, n_shaping : int
        Data points; free parameters plus independent linear amplitudes; delays with
        data; free parameters plus amplitude profiles (what the delays must shape).
    correlation : ndarray, shape (n_delay, n_delay), or None
        Correlation R of the delay bins' differences (None: independent bins).
    """

    model: SpeciesModel | TrajectoryModel
    diff: np.ndarray
    D: np.ndarray
    w: np.ndarray
    valid: np.ndarray
    delay: np.ndarray
    names: list
    free: list
    start: dict
    low: np.ndarray
    high: np.ndarray
    n_data: int = 0
    n_params: int = 0
    n_delays: int = 0
    n_shaping: int = 0
    correlation: np.ndarray | None = None

    def params_of(self, x):
        """All parameters with the free ones set to ``x``."""
        p = dict(self.start)
        p.update(zip(self.free, map(float, x), strict=True))
        return p

    def design(self, params):
        """The model's linear design at ``params``; a model that fails is a DataError."""
        try:
            return self.model.design(params, self.delay)
        except MovieprocError as err:
            raise DataError(f"the model cannot be evaluated at {params}: {err}") from err

    def residual(self, x):
        """Weighted projected residual at free parameters ``x``, shape (n_data,)."""
        sol = solve_linear(self.design(self.params_of(x)), self.D, self.w)
        return (self.w * (self.D - sol.model))[self.valid]


@dataclass
class Optimum:
    """Where the optimizer stopped, with the linear solution and chi2 there."""

    params: dict
    design: object
    solution: LinearSolution
    converged: bool
    message: str
    nfev: int
    x: np.ndarray
    active: np.ndarray
    jacobian: np.ndarray
    chi2_delay: np.ndarray
    chi2: float
    dof: int
    red_chi2: float


@dataclass
class Errors:
    """Standard errors and correlations of a fit (scaled by a reduced chi2).

    ``stderr``, ``amplitudes_err``, ``curves_err``, ``coef_err`` and ``correlation``
    follow ``error_model``; the ``*_independent`` errors assume independent delay bins.
    """

    stderr: dict
    correlation: np.ndarray
    corr_names: list
    amplitudes_err: dict
    curves_err: np.ndarray | None
    coef_err: np.ndarray | None
    stderr_independent: dict = field(default_factory=dict)
    amplitudes_err_independent: dict = field(default_factory=dict)
    error_model: str = "independent bins"
    error_scale: float = float("nan")


def _check_parameters(model, p0, bounds, fixed):
    """Check ``p0``, ``bounds`` and ``fixed`` against the model; return names, free, bounds and start."""
    names = list(model.param_names)
    unknown = set(p0) - set(names)
    if unknown:
        raise ParameterError(f"p0.{sorted(unknown)[0]}", "an unknown parameter", f"one of {names}")
    missing = [n for n in names if n not in p0]
    if missing:
        raise ParameterError(f"p0.{missing[0]}", "no initial value", "a number (ps for times)")
    bad_fixed = set(fixed) - set(names)
    if bad_fixed:
        raise ParameterError("fixed", f"unknown names {sorted(bad_fixed)}", f"names among {names}")
    bnd = dict(model.default_bounds)
    for k, v in (bounds or {}).items():
        if k not in names:
            raise ParameterError(f"bounds.{k}", "an unknown parameter", f"one of {names}")
        bnd[k] = (float(v[0]), float(v[1]))
    for n in names:
        lo, hi = bnd.get(n, (-np.inf, np.inf))
        v = float(p0[n])
        if not lo < hi:
            raise ParameterError(f"bounds.{n}", f"({lo}, {hi})", "lower < upper")
        if not (lo <= v <= hi) or np.isnan(v):
            raise ParameterError(f"p0.{n}", f"{v}", f"a value within the bounds [{lo}, {hi}]")
    free = [n for n in names if n not in set(fixed)]
    return names, free, bnd, {n: float(p0[n]) for n in names}


def _check_correlation(correlation, n_delay):
    """The bin correlation as a checked (n_delay, n_delay) array, or None."""
    if correlation is None:
        return None
    R = np.asarray(correlation, dtype=float)
    try:
        return check_correlation(R, n_delay)
    except ValueError as exc:
        raise InputError("argument 'correlation'", str(exc),
                         f"a ({n_delay}, {n_delay}) correlation matrix of the delays with unit diagonal") from None


def validate(model, diff, diff_err, delay, p0, bounds=None, fixed=(), correlation=None):
    """Check a fit problem before any optimization; see :func:`fit` for the arguments.

    Returns
    -------
    Problem

    Raises
    ------
    ParameterError
        Unknown, missing or out-of-bounds parameters (``p0.NAME``, ``bounds.NAME``, ``fixed``).
    DataError
        Too few delays or data points for the parameters, or a model that is not finite
        at the initial guess.
    """
    D, w, valid, t = _check_data(diff, diff_err, delay)
    names, free, bnd, start = _check_parameters(model, p0, bounds, fixed)
    prob = Problem(model=model, diff=np.asarray(diff, float), D=D, w=w, valid=valid, delay=t, names=names,
                   free=free, start=start, low=np.array([bnd[n][0] for n in free]),
                   high=np.array([bnd[n][1] for n in free]), correlation=_check_correlation(correlation, t.size))
    design0 = prob.design(start)  # the kinetics are shaped by the delays only
    K = 0 if design0.profiles is None else design0.profiles.shape[1]
    ng = 0 if design0.maps is None else design0.maps.shape[0]
    prob.n_delays = int(np.count_nonzero(valid.any(axis=1)))
    prob.n_shaping = len(free) + K + ng
    if prob.n_delays <= prob.n_shaping:
        raise DataError(f"too few delays: {prob.n_delays} delays with data for {len(free)} non-linear parameters "
                        f"and {K + ng} amplitude profiles; more than {prob.n_shaping} delays are needed")
    prob.n_data = int(valid.sum())
    bad = _design_arrays_finite(design0)
    if bad:
        raise DataError(f"the model is not finite at the initial guess {start}: {', '.join(bad)}")
    r0 = prob.residual(np.array([start[n] for n in free]))
    if not np.all(np.isfinite(r0)):
        raise DataError(f"the weighted residual is not finite at the initial guess {start} "
                        f"({np.count_nonzero(~np.isfinite(r0))} points)")
    prob.n_params = len(free) + solve_linear(design0, D, w).n_linear
    if prob.n_data <= prob.n_params:
        raise DataError(f"too few data points: {prob.n_data} for {prob.n_params} parameters")
    return prob


def optimize_parameters(prob, *, max_nfev=None, jac="3-point", ftol=1e-10, xtol=1e-10, gtol=1e-10):
    """Minimize the projected chi2 over the free parameters (trust-region reflective).

    Returns
    -------
    Optimum
    """
    x0 = np.array([prob.start[n] for n in prob.free])
    if prob.free:
        res = optimize.least_squares(prob.residual, x0, bounds=(prob.low, prob.high), jac=jac, x_scale="jac",
                                     method="trf", max_nfev=max_nfev, ftol=ftol, xtol=xtol, gtol=gtol)
        x, converged, message, nfev, active, jproj = res.x, res.status > 0, res.message, res.nfev, \
            res.active_mask, res.jac
    else:
        x, converged, message, nfev = x0, True, "no free parameters", 1
        active, jproj = np.zeros(0, int), np.zeros((prob.n_data, 0))
    params = prob.params_of(x)
    des = prob.design(params)
    sol = solve_linear(des, prob.D, prob.w)
    rw = np.where(prob.valid, prob.w * (prob.D - sol.model), 0.0)
    chi2_delay = (rw**2).sum(axis=1)
    chi2 = float(chi2_delay.sum())
    dof = prob.n_data - prob.n_params
    return Optimum(params=params, design=des, solution=sol, converged=bool(converged), message=str(message),
                   nfev=int(nfev), x=np.asarray(x, float), active=np.asarray(active), jacobian=jproj,
                   chi2_delay=chi2_delay, chi2=chi2, dof=int(dof), red_chi2=float(chi2 / dof))


def parameter_errors(prob, opt, linear_errors=True):
    """Standard errors (scaled by a reduced chi2) and correlations at the optimum.

    With ``linear_errors`` the full covariance of (theta, linear amplitudes) is used
    (see the module notes); otherwise theta's errors come from the projected Jacobian.
    With ``prob.correlation`` the errors are the sandwich under the bin correlation,
    and the per-bin-only errors are kept in ``stderr_independent``.

    Returns
    -------
    Errors
    """
    if linear_errors:
        cov_ind, cov_cor, scale = _full_errors(prob, opt)
    else:
        cov_ind, cov_cor, scale = _projected_errors(prob, opt)
    model, free = prob.model, prob.free
    ind, cor = _split(prob, opt, cov_ind, linear_errors), _split(prob, opt, cov_cor, linear_errors)
    corr_names = list(free) + (list(model.map_names) if linear_errors else [])
    with np.errstate(invalid="ignore", divide="ignore"):
        dcorr = np.sqrt(np.diag(cor["small"]))
        corr = cor["small"] / np.outer(dcorr, dcorr)
    return Errors(stderr=cor["stderr"], correlation=corr, corr_names=corr_names, amplitudes_err=cor["amplitudes"],
                  curves_err=cor["curves"], coef_err=cor["coef"], stderr_independent=ind["stderr"],
                  amplitudes_err_independent=ind["amplitudes"],
                  error_model="independent bins" if prob.correlation is None else "correlated bins",
                  error_scale=float(scale))


def _projected_errors(prob, opt):
    """Covariances of theta (independent, correlated) from the projected Jacobian, and the error scale.

    The scale is the plain reduced chi2 (the linear amplitudes are not in this Jacobian,
    so its expectation under the correlation is not computed).
    """
    Jp, red = opt.jacobian, opt.red_chi2
    cov_ind = inverse_psd(Jp.T @ Jp) * red
    if prob.correlation is None or not prob.free or not np.all(np.isfinite(cov_ind)):
        return cov_ind, cov_ind, red
    return cov_ind, sandwich_covariance(Jp, prob.correlation, prob.valid, red_chi2=red), red


def _full_errors(prob, opt):
    """Covariances of (theta, linear amplitudes), independent and correlated, and the correlated error scale."""
    des, sol, red = opt.design, opt.solution, opt.red_chi2
    nq = prob.D.shape[1]
    K = 0 if des.profiles is None else des.profiles.shape[1]
    p = len(prob.free)
    Jt = _theta_jacobian(prob.model, opt.params, prob.free, prob.low, prob.high, prob.delay, prob.D, prob.w,
                         prob.valid, sol)
    N = _normal_matrix(Jt, des, prob.w, prob.valid)
    Minv, bad = _constrained_inverse(N, p, des.curves, K, nq)
    cov_ind = _mark_undetermined(Minv @ N @ Minv, bad) * red
    if prob.correlation is None:
        return cov_ind, cov_ind, red
    Jfull = _full_jacobian(Jt, des, prob.w, prob.valid)
    rw = np.where(prob.valid, prob.w * (prob.D - sol.model), np.nan)
    scale = reduced_chi2(rw, max(correlated_dof(Jfull, prob.correlation, prob.valid, bread_inverse=Minv), 1.0))
    cov = sandwich_covariance(Jfull, prob.correlation, prob.valid, bread_inverse=Minv, red_chi2=scale)
    return cov_ind, _mark_undetermined(cov, bad), scale


def _split(prob, opt, cov, linear_errors):
    """Standard errors of theta, amplitudes, curves and coefficients, and the (theta, beta) block, of one covariance."""
    model, sol, free = prob.model, opt.solution, prob.free
    p = len(free)
    out: dict[str, Any] = {"amplitudes": {n: np.nan for n in model.map_names}, "curves": None, "coef": None}
    diag = np.diag(cov)
    se = np.where(np.isfinite(diag[:p]), np.sqrt(np.clip(diag[:p], 0, None)), np.inf)
    out["stderr"] = {n: (float(se[free.index(n)]) if n in free else np.nan) for n in prob.names}
    if not linear_errors:
        out["small"] = cov
        return out
    nt, nq = prob.D.shape
    K = 0 if sol.curves is None else sol.curves.shape[0]
    J = 0 if sol.curve_coef is None else sol.curve_coef.shape[1]
    var = diag[p:]
    if K:
        out["curves"] = np.sqrt(var[: K * nq]).reshape(nq, K).T
    if J:
        out["coef"] = np.sqrt(var[K * nq: K * nq + nt * J]).reshape(nt, J)
    if sol.map_coef.size:
        out["amplitudes"] = dict(zip(model.map_names, np.sqrt(var[K * nq + nt * J:]).tolist(), strict=True))
    sel = list(range(p)) + list(range(p + K * nq + nt * J, cov.shape[0]))
    out["small"] = cov[np.ix_(sel, sel)]
    return out


def _at_bound(prob, opt):
    out = []
    for i, n in enumerate(prob.free):
        lo, hi, x = prob.low[i], prob.high[i], opt.x[i]
        span = hi - lo
        tol = AT_BOUND_RTOL * (span if np.isfinite(span) else max(abs(x), 1.0))
        if opt.active[i] != 0 or x - lo <= tol or hi - x <= tol:
            out.append(n)
    return out


def flags(prob, opt, errors):
    """Everything that may make a fit mislead, in plain words.

    Returns
    -------
    at_bound : list of str
        Free parameters that ended on (or within ``AT_BOUND_RTOL`` of) a bound.
    warnings : list of str
    """
    warnings = []
    if not opt.converged:
        warnings.append(f"fit not converged ({opt.message}); parameters and errors are not trustworthy")
    at_bound = _at_bound(prob, opt)
    if at_bound:
        warnings.append(f"parameters at a bound: {at_bound}; their errors do not describe the uncertainty")
    undetermined = [n for n in prob.free if not np.isfinite(errors.stderr[n])]
    if undetermined:
        warnings.append(f"the data do not determine {undetermined} (singular Jacobian)")
    corr, names = errors.correlation, errors.corr_names
    if corr.size:
        for i, j in zip(*np.triu_indices(len(names), 1), strict=True):
            if abs(corr[i, j]) > STRONG_CORRELATION:
                warnings.append(f"parameters {names[i]} and {names[j]} are strongly correlated ({corr[i, j]:+.3f})")
    dof, red = opt.dof, opt.red_chi2
    if dof > 0 and red > 1 + CHI2_SIGMAS * np.sqrt(2.0 / dof):
        warnings.append(f"reduced chi2 = {red:.3g} over {dof} dof: the model misses signal or the errors are "
                        "underestimated (standard errors were scaled by sqrt(reduced chi2))")
    if prob.n_delays < DELAYS_PER_PARAMETER * prob.n_shaping:
        warnings.append(f"only {prob.n_delays} delays for {prob.n_shaping} time-shaping parameters and profiles: "
                        "parameters may be poorly constrained")
    return at_bound, warnings


def fit(model, diff, diff_err, delay, p0, *, bounds=None, fixed=(), max_nfev=None, linear_errors=True,
        jac="3-point", ftol=1e-10, xtol=1e-10, gtol=1e-10, correlation=None):
    """Fit a model to a (delay, q) difference map by variable projection.

    Runs :func:`validate`, :func:`optimize_parameters`, :func:`parameter_errors` and
    :func:`flags` in turn.

    Parameters
    ----------
    model : SpeciesModel or TrajectoryModel
        Any object with ``param_names``, ``default_bounds``, ``design(params, delay)``
        and the name lists of :mod:`movieproc.fitting.models`.
    diff : array_like, shape (n_delay, n_q)
        Difference signal.
    diff_err : array_like, shape (n_delay, n_q)
        Standard errors; weights are 1/diff_err. Points with non-finite value or
        error, or error <= 0, are left out.
    delay : array_like, shape (n_delay,)
        Delays, ps.
    p0 : dict
        Initial value of every non-linear parameter (ps for times).
    bounds : dict, optional
        name -> (lower, upper); missing names take ``model.default_bounds``.
    fixed : sequence of str
        Parameters held at their ``p0`` value.
    max_nfev : int, optional
        Maximum number of residual evaluations (``least_squares``).
    linear_errors : bool
        Compute the full covariance including linear amplitudes (see module notes).
    jac : {"2-point", "3-point"}
        Finite-difference scheme of the optimizer.
    ftol, xtol, gtol : float
        ``least_squares`` tolerances.
    correlation : array_like, shape (n_delay, n_delay), optional
        Correlation R of the rows' differences along delay (unit diagonal;
        :func:`movieproc.signals.covariance.bin_correlation`), with
        ``Cov(D_b(q), D_c(q)) = diff_err_b(q) diff_err_c(q) R_bc``. The fit is
        unchanged; the errors become the sandwich under R (module notes). Default:
        independent rows.

    Returns
    -------
    FitResult

    Raises
    ------
    ParameterError
        Unknown, missing or out-of-bounds parameters, naming ``p0.NAME``,
        ``bounds.NAME`` or ``fixed``.
    DataError
        Too few delays for the number of parameters (before fitting), or a model
        that is not finite at the initial guess (its cause the model's own error).
    """
    prob = validate(model, diff, diff_err, delay, p0, bounds=bounds, fixed=fixed, correlation=correlation)
    opt = optimize_parameters(prob, max_nfev=max_nfev, jac=jac, ftol=ftol, xtol=xtol, gtol=gtol)
    errors = parameter_errors(prob, opt, linear_errors)
    at_bound, warnings = flags(prob, opt, errors)
    sol = opt.solution
    return FitResult(params=opt.params, stderr=errors.stderr, free=list(prob.free), correlation=errors.correlation,
                     corr_names=errors.corr_names,
                     amplitudes=dict(zip(model.map_names, sol.map_coef.tolist(), strict=True)),
                     amplitudes_err=errors.amplitudes_err, species_curves=sol.curves,
                     species_curves_err=errors.curves_err, profile_names=list(getattr(model, "profile_names", [])),
                     solvent_coef=sol.curve_coef, solvent_coef_err=errors.coef_err,
                     solvent_names=list(getattr(model, "solvent_names", [])), chi2_delay=opt.chi2_delay,
                     chi2=opt.chi2, dof=opt.dof, red_chi2=opt.red_chi2, model=sol.model,
                     residual=np.where(prob.valid, prob.diff - sol.model, np.nan), populations=opt.design.populations,
                     species_names=list(getattr(model, "species_names", [])), delay=prob.delay.copy(),
                     converged=opt.converged, message=opt.message, nfev=opt.nfev, at_bound=at_bound,
                     warnings=warnings, n_data=prob.n_data, n_params=int(prob.n_params),
                     stderr_independent=errors.stderr_independent,
                     amplitudes_err_independent=errors.amplitudes_err_independent, error_model=errors.error_model,
                     error_scale=errors.error_scale)


def _theta_jacobian(model, phat, free, lo, hi, t, D, w, valid, sol):
    """Jacobian (n_data, p) of the weighted model in theta at fixed linear amplitudes (central differences)."""
    vidx = np.nonzero(valid.ravel())[0]

    def fixed_model(par):
        d = model.design(par, t)
        return _model_from(d.profiles, d.maps, d.curves, sol.curves, sol.map_coef, sol.curve_coef, D.shape)

    cols = []
    for i, n in enumerate(free):
        x = phat[n]
        h = JACOBIAN_STEP * (abs(x) + 1e-2)
        up, dn = dict(phat), dict(phat)
        if x - h < lo[i]:  # one-sided at a bound
            up[n] = x + h
            dm = (fixed_model(up) - sol.model) / h
        elif x + h > hi[i]:
            dn[n] = x - h
            dm = (sol.model - fixed_model(dn)) / h
        else:
            up[n], dn[n] = x + h, x - h
            dm = (fixed_model(up) - fixed_model(dn)) / (2 * h)
        cols.append((w * dm).ravel()[vidx])
    return np.array(cols).T if free else np.zeros((vidx.size, 0))


def _design_counts(des) -> tuple[int, int, int]:
    """Free curves K, per-delay curves J and global maps n_g of a linear design."""
    C, X, G = des.profiles, des.maps, des.curves
    return (0 if C is None else C.shape[1], 0 if G is None else G.shape[0], 0 if X is None else X.shape[0])


def _normal_matrix(Jt, des, w, valid):
    """Normal matrix N = [Jt, JL]^T [Jt, JL] of (theta, B, s, beta), assembled block by block.

    JL itself (n_data x n_L) would be too large; its blocks follow from the structure of
    the linear design.
    """
    nt, nq = w.shape
    C, X, G = des.profiles, des.maps, des.curves
    K, J, ng = _design_counts(des)
    p = Jt.shape[1]
    nL = K * nq + nt * J + ng
    W2 = w * w
    N = np.zeros((p + nL, p + nL))
    N[:p, :p] = Jt.T @ Jt
    iB, iS, iG = p, p + K * nq, p + K * nq + nt * J
    Vfull = np.zeros((p, nt * nq))
    Vfull[:, np.nonzero(valid.ravel())[0]] = Jt.T
    VW = Vfull.reshape(p, nt, nq) * w  # theta column times the weight of the linear columns
    if K:
        N[:p, iB:iS] = np.einsum("ptq,tk->pqk", VW, C).reshape(p, nq * K)
        Abb = np.einsum("tq,tk,tl->qkl", W2, C, C)
        for q in range(nq):
            N[iB + q * K: iB + (q + 1) * K, iB + q * K: iB + (q + 1) * K] = Abb[q]
        if J:
            N[iB:iS, iS:iG] = np.einsum("tq,tk,jq->qktj", W2, C, G).reshape(nq * K, nt * J)
        if ng:
            N[iB:iS, iG:] = np.einsum("tq,tk,gtq->qkg", W2, C, X).reshape(nq * K, ng)
    if J:
        N[:p, iS:iG] = np.einsum("ptq,jq->ptj", VW, G).reshape(p, nt * J)
        Ass = np.einsum("jq,tq,lq->tjl", G, W2, G)
        for tt in range(nt):
            N[iS + tt * J: iS + (tt + 1) * J, iS + tt * J: iS + (tt + 1) * J] = Ass[tt]
        if ng:
            N[iS:iG, iG:] = np.einsum("jq,tq,gtq->tjg", G, W2, X).reshape(nt * J, ng)
    if ng:
        N[:p, iG:] = np.einsum("ptq,gtq->pg", VW, X)
        N[iG:, iG:] = np.einsum("gtq,tq,htq->gh", X, W2, X)
    return np.triu(N) + np.triu(N, 1).T


def _constrained_inverse(N, p, G, K, nq):
    """Inverse M^-1 of M = N + L^T L under the convention (curves orthogonal to the solvent curves).

    L holds the constraint rows sum_q G_j(q) B_k(q) = 0 (scaled like the B block); the
    covariance of the constrained estimate is M^-1 N M^-1 (for independent bins).

    Returns
    -------
    Minv : ndarray, shape (n, n)
        Pseudo-inverse (directions the data do not determine left out).
    bad : ndarray of bool, shape (n,)
        Unknowns taking part in a direction the data do not determine.
    """
    M = N.copy()
    J = 0 if G is None else G.shape[0]
    if K and J:
        scale = np.sqrt(np.mean(np.diag(N)[p: p + K * nq]))
        L = np.zeros((K * J, N.shape[0]))
        for k in range(K):
            for j in range(J):
                L[k * J + j, p + np.arange(nq) * K + k] = G[j] / np.linalg.norm(G[j]) * scale
        M = M + L.T @ L
    d = np.sqrt(np.diag(M))
    d[d == 0] = 1.0
    lam, V = np.linalg.eigh(M / np.outer(d, d))
    keep = lam > PINV_RCOND * lam.max()
    Minv = (V[:, keep] / lam[keep]) @ V[:, keep].T / np.outer(d, d)
    bad = np.zeros(N.shape[0], dtype=bool)
    if not np.all(keep):
        null = V[:, ~keep] / d[:, None]
        bad = np.any(np.abs(null) > NULL_SHARE * np.abs(null).max(), axis=1)
    return Minv, bad


def _mark_undetermined(cov, bad):
    """``cov`` with infinite variance on the unknowns the data do not determine."""
    cov = np.array(cov, dtype=float)
    cov[bad, bad] = np.inf
    return cov


def _full_jacobian(Jt, des, w, valid):
    """Error-weighted Jacobian of the model in (theta, B, s, beta) on the valid points, sparse.

    Rows: valid points in ``valid.ravel()`` order (delay-major); columns in the order of
    :func:`_normal_matrix` (theta, B q-major with K per q, s delay-major with J per delay, beta).

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n_valid, p + K n_q + n_delay J + n_g)
    """
    nt, nq = w.shape
    C, X, G = des.profiles, des.maps, des.curves
    K, J, ng = _design_counts(des)
    p = Jt.shape[1]
    tt, qq = np.meshgrid(np.arange(nt), np.arange(nq), indexing="ij")
    row = (tt * nq + qq).ravel()
    rows, cols, vals = [], [], []
    if K:
        for k in range(K):
            rows.append(row)
            cols.append(p + qq.ravel() * K + k)
            vals.append((w * C[:, k][:, None]).ravel())
    if J:
        for j in range(J):
            rows.append(row)
            cols.append(p + K * nq + tt.ravel() * J + j)
            vals.append((w * G[j][None, :]).ravel())
    for g in range(ng):
        rows.append(row)
        cols.append(np.full(row.size, p + K * nq + nt * J + g))
        vals.append((w * X[g]).ravel())
    n_cols = p + K * nq + nt * J + ng
    lin = sparse.csr_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                            shape=(nt * nq, n_cols)) if vals else sparse.csr_matrix((nt * nq, n_cols))
    lin = lin[np.flatnonzero(valid.ravel())]
    theta = sparse.csr_matrix(np.hstack([Jt, np.zeros((Jt.shape[0], n_cols - p))]))
    return (theta + lin).tocsr()


# ----------------------------------------------------------------------------- bootstrap

@dataclass
class BootstrapResult:
    """Bootstrap distribution of statistics.

    Attributes
    ----------
    samples : ndarray, shape (n_ok, m)
        Statistics of the successful replicates.
    mean, std : ndarray, shape (m,)
        Mean and standard deviation (ddof=1) over replicates.
    low, high : ndarray, shape (m,)
        Percentile interval of coverage ``ci``.
    n_failed : int
        Replicates for which ``fun`` raised a MovieprocError or returned None.
    ci : float
    """

    samples: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    low: np.ndarray
    high: np.ndarray
    n_failed: int
    ci: float


def bootstrap(fun, arrays, n, rng, *, ci=0.95):
    """Case-resampling bootstrap over the leading axis (delays or shots).

    Each replicate draws ``len(arrays[0])`` indices with replacement using ``rng``
    and calls ``fun(*[a[idx] for a in arrays])``, which returns a 1-D array of
    statistics (e.g. fitted parameters) or None when it fails. Resampling delays
    keeps the per-delay errors with their delays; duplicated delays are allowed
    by :func:`fit`.

    Parameters
    ----------
    fun : callable
        ``fun(*resampled) -> array_like (m,) or None``.
    arrays : sequence of array_like
        Arrays sharing the leading axis, e.g. ``(diff, diff_err, delay)``.
    n : int
        Number of replicates.
    rng : numpy.random.Generator
        Source of the resampling (seeded by the caller).
    ci : float
        Coverage of the percentile interval.

    Returns
    -------
    BootstrapResult
    """
    if not isinstance(rng, np.random.Generator):
        raise InputError("argument 'rng'", type(rng).__name__, "a seeded numpy.random.Generator")
    arrays = [np.asarray(a) for a in arrays]
    m = arrays[0].shape[0]
    if any(a.shape[:1] != (m,) for a in arrays):
        raise InputError("argument 'arrays'", f"leading lengths {[a.shape[:1] for a in arrays]}", "equal lengths")
    out, failed = [], 0
    for _ in iterate(range(int(n)), "bootstrap resamples", unit="fits"):
        idx = rng.integers(0, m, size=m)
        try:
            v = fun(*[a[idx] for a in arrays])
        except MovieprocError:
            v = None
        if v is None:
            failed += 1
            continue
        out.append(np.atleast_1d(np.asarray(v, dtype=float)))
    if not out:
        raise DataError(f"all {n} bootstrap replicates failed")
    S = np.array(out)
    a = (1 - ci) / 2
    std = S.std(0, ddof=1) if len(S) > 1 else np.full(S.shape[1], np.nan)
    return BootstrapResult(samples=S, mean=S.mean(0), std=std,
                           low=np.quantile(S, a, axis=0), high=np.quantile(S, 1 - a, axis=0),
                           n_failed=failed, ci=float(ci))


# ----------------------------------------------------------------------------- refits

@dataclass
class ParameterBootstrap:
    """Bootstrap error of one fitted parameter.

    Attributes
    ----------
    error : float
        Standard deviation (ddof=1) of the parameter over the refitted replicates, in
        the parameter's units.
    replicates : int
        Number of successful refits.
    over : str
        What was resampled: ``"shots"`` or ``"delays"``.
    """

    error: float
    replicates: int
    over: str


def _refit(model, result, diff, diff_err, delay):
    """Parameters, then amplitudes, of a refit started at ``result``'s parameters."""
    r = fit(model, diff, diff_err, delay, result.params, linear_errors=False)
    return [r.params[k] for k in model.param_names] + list(r.amplitudes.values())


def _per_parameter(model, result, samples, over):
    names = list(model.param_names) + list(result.amplitudes)
    sd = np.std(np.asarray(samples, float), axis=0, ddof=1)
    return {n: ParameterBootstrap(error=float(v), replicates=len(samples), over=over)
            for n, v in zip(names, sd, strict=True)}


def refit_replicates(model, result, replicates, diff_err, delay):
    """Refit replicate maps (e.g. a bootstrap over shots); their spread is the parameters' error.

    Parameters
    ----------
    model : SpeciesModel or TrajectoryModel
        The model of ``result``.
    result : FitResult
        The fit to the full data; its parameters start every refit.
    replicates : array_like, shape (n_rep, n_delay, n_q)
        Replicate difference maps on the delays of ``result``.
    diff_err, delay : array_like
        Errors (n_delay, n_q) and delays (n_delay,), ps, of the full data.

    Returns
    -------
    errors : dict
        Parameter name -> :class:`ParameterBootstrap` (empty when fewer than 2 refits succeed).
    n_failed : int
        Replicates whose refit raised a MovieprocError.
    """
    samples = []
    for rep in iterate(replicates, "refit replicates", unit="fits"):
        try:
            samples.append(_refit(model, result, rep, diff_err, delay))
        except MovieprocError:
            continue
    n_failed = len(replicates) - len(samples)
    if len(samples) < 2:
        return {}, n_failed
    return _per_parameter(model, result, samples, "shots"), n_failed


def refit_resamples(model, result, diff, diff_err, delay, n, rng):
    """Case-resampling bootstrap over delays, each resample refitted from ``result``'s parameters.

    Parameters
    ----------
    model, result
        As for :func:`refit_replicates`.
    diff, diff_err : array_like, shape (n_delay, n_q)
    delay : array_like, shape (n_delay,)
        Delays, ps.
    n : int
        Number of resamples.
    rng : numpy.random.Generator
        Seeded source of the resampling.

    Returns
    -------
    errors : dict
        Parameter name -> :class:`ParameterBootstrap`.
    draws : BootstrapResult
        The resampled parameters (``n_failed`` counts failed refits).
    """
    def one(d, e, t):
        order = np.argsort(t, kind="stable")
        return _refit(model, result, d[order], e[order], t[order])

    draws = bootstrap(one, (diff, diff_err, delay), n, rng)
    names = list(model.param_names) + list(result.amplitudes)
    errors = {k: ParameterBootstrap(error=float(v), replicates=int(len(draws.samples)), over="delays")
              for k, v in zip(names, draws.std, strict=True)}
    return errors, draws
