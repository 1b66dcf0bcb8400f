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

These are linearized (asymptotic) errors. They describe the scatter well when every
component is clearly above the noise; for a weak component with free curves (each
free curve adds n_q linear unknowns that also fit noise) the chi2 surface in theta
gets noise-driven local minima and the errors can be far too small. Check such
parameters with :func:`bootstrap` or a chi2 scan.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from movieproc.errors import ConfigError, DataError, InputError, MovieprocError

__all__ = ["LinearSolution", "solve_linear", "FitResult", "fit", "BootstrapResult", "bootstrap"]


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


def _sym_pinv_solve(M, r, rcond=1e-11):
    """Solve symmetric PSD M x = r (r may have several columns) in the pseudo-inverse sense."""
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
        good = qvalid & (np.linalg.cond(Abb) < 1e12)
        if np.any(good):
            Y[good] = np.linalg.solve(Abb[good], rhs[good])
        if np.any(~good):
            Y[~good] = np.linalg.pinv(Abb[~good], rcond=1e-12) @ rhs[~good]
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
    if K and J:
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


def fit(model, diff, diff_err, delay, p0, *, bounds=None, fixed=(), max_nfev=None, linear_errors=True,
        jac="3-point", ftol=1e-10, xtol=1e-10, gtol=1e-10):
    """Fit a model to a (delay, q) difference map by variable projection.

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

    Returns
    -------
    FitResult

    Raises
    ------
    ConfigError
        Unknown, missing or out-of-bounds parameters (key ``fit.initial.NAME`` or
        ``fit.bounds.NAME``).
    DataError
        Too few delays for the number of parameters (before fitting), or a model
        that is not finite at the initial guess.
    """
    D, w, valid, t = _check_data(diff, diff_err, delay)
    names = list(model.param_names)
    unknown = set(p0) - set(names)
    if unknown:
        raise ConfigError(f"fit.initial.{sorted(unknown)[0]}", "an unknown parameter", f"one of {names}")
    missing = [n for n in names if n not in p0]
    if missing:
        raise ConfigError(f"fit.initial.{missing[0]}", "no initial value", "a number (ps for times)")
    bad_fixed = set(fixed) - set(names)
    if bad_fixed:
        raise ConfigError("fit.fixed", f"unknown names {sorted(bad_fixed)}", f"names among {names}")
    bnd = dict(model.default_bounds)
    for k, v in (bounds or {}).items():
        if k not in names:
            raise ConfigError(f"fit.bounds.{k}", "an unknown parameter", f"one of {names}")
        bnd[k] = (float(v[0]), float(v[1]))
    free = [n for n in names if n not in set(fixed)]
    for n in names:
        lo, hi = bnd.get(n, (-np.inf, np.inf))
        v = float(p0[n])
        if not lo < hi:
            raise ConfigError(f"fit.bounds.{n}", f"({lo}, {hi})", "lower < upper")
        if not (lo <= v <= hi) or np.isnan(v):
            raise ConfigError(f"fit.initial.{n}", f"{v}", f"a value within the bounds [{lo}, {hi}]")
    base = {n: float(p0[n]) for n in names}

    # Counting: the kinetics are shaped by the delays only.
    design0 = None
    try:
        design0 = model.design(base, t)
    except MovieprocError as err:
        raise DataError(f"the model cannot be evaluated at the initial guess {base}: {err}") from err
    K = 0 if design0.profiles is None else design0.profiles.shape[1]
    ng = 0 if design0.maps is None else design0.maps.shape[0]
    n_delays = int(np.count_nonzero(valid.any(axis=1)))
    need = len(free) + K + ng
    if n_delays <= need:
        raise DataError(f"too few delays: {n_delays} delays with data for {len(free)} non-linear parameters "
                        f"and {K + ng} amplitude profiles; more than {need} delays are needed")
    n_data = int(valid.sum())

    bad = _design_arrays_finite(design0)
    if bad:
        raise DataError(f"the model is not finite at the initial guess {base}: {', '.join(bad)}")

    def params_of(x):
        p = dict(base)
        p.update(zip(free, map(float, x)))
        return p

    def residual(x):
        p = params_of(x)
        try:
            des = model.design(p, t)
        except MovieprocError as err:
            raise DataError(f"the model cannot be evaluated at {p}: {err}") from err
        sol = solve_linear(des, D, w)
        return (w * (D - sol.model))[valid]

    r0 = residual(np.array([base[n] for n in free]))
    if not np.all(np.isfinite(r0)):
        raise DataError(f"the weighted residual is not finite at the initial guess {base} "
                        f"({np.count_nonzero(~np.isfinite(r0))} points)")
    lin0 = solve_linear(design0, D, w)
    n_params = len(free) + lin0.n_linear
    if n_data <= n_params:
        raise DataError(f"too few data points: {n_data} for {n_params} parameters")

    x0 = np.array([base[n] for n in free])
    lo = np.array([bnd[n][0] for n in free])
    hi = np.array([bnd[n][1] for n in free])
    if free:
        res = optimize.least_squares(residual, x0, bounds=(lo, hi), jac=jac, x_scale="jac", method="trf",
                                     max_nfev=max_nfev, ftol=ftol, xtol=xtol, gtol=gtol)
        xhat, converged, message, nfev = res.x, res.status > 0, res.message, res.nfev
        active = res.active_mask
        Jproj = res.jac
    else:
        xhat, converged, message, nfev = x0, True, "no free parameters", 1
        active = np.zeros(0, int)
        Jproj = np.zeros((n_data, 0))
    phat = params_of(xhat)
    des = model.design(phat, t)
    sol = solve_linear(des, D, w)
    rw = np.where(valid, w * (D - sol.model), 0.0)
    chi2_delay = (rw**2).sum(axis=1)
    chi2 = float(chi2_delay.sum())
    dof = n_data - n_params
    red = chi2 / dof

    warnings = []
    if not converged:
        warnings.append(f"fit not converged ({message}); parameters and errors are not trustworthy")
    at_bound = []
    for i, n in enumerate(free):
        span = hi[i] - lo[i]
        tol = 1e-6 * (span if np.isfinite(span) else max(abs(xhat[i]), 1.0))
        if active[i] != 0 or xhat[i] - lo[i] <= tol or hi[i] - xhat[i] <= tol:
            at_bound.append(n)
    if at_bound:
        warnings.append(f"parameters at a bound: {at_bound}; their errors do not describe the uncertainty")

    # Covariances.
    p = len(free)
    amplitudes = dict(zip(model.map_names, sol.map_coef.tolist()))
    amplitudes_err = {n: np.nan for n in model.map_names}
    curves_err, coef_err = None, None
    corr_names = list(free)
    if linear_errors:
        cov_theta, cov_lin_diag, cov_small = _full_covariance(model, phat, free, lo, hi, t, D, w, valid, des, sol)
        cov_theta = cov_theta * red
        nt, nq = D.shape
        K = 0 if sol.curves is None else sol.curves.shape[0]
        J = 0 if sol.curve_coef is None else sol.curve_coef.shape[1]
        var = cov_lin_diag * red
        if K:
            curves_err = np.sqrt(var[: K * nq]).reshape(nq, K).T
        if J:
            coef_err = np.sqrt(var[K * nq: K * nq + nt * J]).reshape(nt, J)
        ng = sol.map_coef.size
        if ng:
            amplitudes_err = dict(zip(model.map_names, np.sqrt(var[K * nq + nt * J:]).tolist()))
        cov_corr = cov_small * red
        corr_names = list(free) + list(model.map_names)
    else:
        cov_theta = _inv_psd(Jproj.T @ Jproj) * red
        cov_corr = cov_theta
    se = np.sqrt(np.clip(np.diag(cov_theta), 0, None)) if p else np.zeros(0)
    se = np.where(np.isfinite(np.diag(cov_theta)), se, np.inf) if p else se
    stderr = {n: (float(se[free.index(n)]) if n in free else np.nan) for n in names}
    with np.errstate(invalid="ignore", divide="ignore"):
        dcorr = np.sqrt(np.diag(cov_corr))
        corr = cov_corr / np.outer(dcorr, dcorr)
    undetermined = [n for n in free if not np.isfinite(stderr[n])]
    if undetermined:
        warnings.append(f"the data do not determine {undetermined} (singular Jacobian)")
    if corr.size:
        iu = np.triu_indices(len(corr_names), 1)
        strong = [(corr_names[i], corr_names[j], corr[i, j]) for i, j in zip(*iu) if abs(corr[i, j]) > 0.95]
        for a, b, c in strong:
            warnings.append(f"parameters {a} and {b} are strongly correlated ({c:+.3f})")
    if dof > 0 and red > 1 + 5 * np.sqrt(2.0 / dof):
        warnings.append(f"reduced chi2 = {red:.3g} over {dof} dof: the model misses signal or the errors are "
                        "underestimated (standard errors were scaled by sqrt(reduced chi2))")
    if n_delays < 3 * need:
        warnings.append(f"only {n_delays} delays for {need} time-shaping parameters and profiles: "
                        "parameters may be poorly constrained")

    residual_map = np.where(valid, np.asarray(diff, float) - sol.model, np.nan)
    return FitResult(params=phat, stderr=stderr, free=free, correlation=corr, corr_names=corr_names,
                     amplitudes=amplitudes, amplitudes_err=amplitudes_err,
                     species_curves=sol.curves, species_curves_err=curves_err,
                     profile_names=list(getattr(model, "profile_names", [])),
                     solvent_coef=sol.curve_coef, solvent_coef_err=coef_err,
                     solvent_names=list(getattr(model, "solvent_names", [])),
                     chi2_delay=chi2_delay, chi2=chi2, dof=int(dof), red_chi2=float(red), model=sol.model,
                     residual=residual_map, populations=des.populations,
                     species_names=list(getattr(model, "species_names", [])), delay=t.copy(),
                     converged=bool(converged), message=str(message), nfev=int(nfev), at_bound=at_bound,
                     warnings=warnings, n_data=n_data, n_params=int(n_params))


def _inv_psd(N):
    """Inverse of a symmetric PSD matrix; inf on the diagonal where singular."""
    if N.size == 0:
        return N
    d = np.sqrt(np.diag(N))
    if np.any(d == 0):
        out = np.full(N.shape, np.nan)
        np.fill_diagonal(out, np.inf)
        return out
    Ns = N / np.outer(d, d)
    lam, V = np.linalg.eigh(Ns)
    if lam.min() <= 1e-13 * lam.max():
        out = np.full(N.shape, np.nan)
        np.fill_diagonal(out, np.inf)
        return out
    return (V / lam) @ V.T / np.outer(d, d)


def _full_covariance(model, phat, free, lo, hi, t, D, w, valid, des, sol):
    """Gauss-Newton covariance (unscaled) of (theta, linear amplitudes).

    Returns the theta block (p, p), the diagonal of the linear block (n_L,) in the
    order [B (q-major, K), s (t-major, J), beta], and the covariance of
    (theta, beta) for the correlation matrix.
    """
    nt, nq = D.shape
    C, X, G = des.profiles, des.maps, des.curves
    K = 0 if C is None else C.shape[1]
    J = 0 if G is None else G.shape[0]
    ng = 0 if X is None else X.shape[0]
    p = len(free)
    nL = K * nq + nt * J + ng
    # Jacobian columns of the weighted model, dense (n_data points kept only).
    vidx = np.nonzero(valid.ravel())[0]
    cols = []

    def fixed_model(par):
        d = model.design(par, t)
        return _model_from(d.profiles, d.maps, d.curves, sol.curves, sol.map_coef, sol.curve_coef, D.shape)

    for i, n in enumerate(free):
        x = phat[n]
        h = 1e-5 * (abs(x) + 1e-2)
        up, dn = dict(phat), dict(phat)
        if x - h < lo[i]:
            up[n] = x + h
            dm = (fixed_model(up) - sol.model) / h
        elif x + h > hi[i]:
            dn[n] = x - h
            dm = (sol.model - fixed_model(dn)) / h
        else:
            up[n], dn[n] = x + h, x - h
            dm = (fixed_model(up) - fixed_model(dn)) / (2 * h)
        cols.append((w * dm).ravel()[vidx])
    Jt = np.array(cols).T if p else np.zeros((vidx.size, 0))
    # Normal matrix N = [Jt, JL]^T [Jt, JL], assembled block by block from the
    # structure of the linear design (JL itself would be n_data x n_L, too large).
    W2 = w * w
    N = np.zeros((p + nL, p + nL))
    N[:p, :p] = Jt.T @ Jt
    iB, iS, iG = p, p + K * nq, p + K * nq + nt * J
    Vfull = np.zeros((p, nt * nq))
    Vfull[:, vidx] = Jt.T
    Vfull = Vfull.reshape(p, nt, nq)
    VW = Vfull * w  # theta column times the weight of the linear columns
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
    N = np.triu(N) + np.triu(N, 1).T
    M = N.copy()
    if K and J:
        # Constraint rows sum_q G_j(q) B_k(q) = 0, scaled like the B block.
        scale = np.sqrt(np.mean(np.diag(N)[p: p + K * nq]))
        L = np.zeros((K * J, p + nL))
        for k in range(K):
            for j in range(J):
                L[k * J + j, p + np.arange(nq) * K + k] = G[j] / np.linalg.norm(G[j]) * scale
        M = M + L.T @ L
    d = np.sqrt(np.diag(M))
    d[d == 0] = 1.0
    Ms = M / np.outer(d, d)
    lam, V = np.linalg.eigh(Ms)
    keep = lam > 1e-12 * lam.max()
    Minv = (V[:, keep] / lam[keep]) @ V[:, keep].T / np.outer(d, d)
    cov = Minv @ N @ Minv
    if not np.all(keep):
        # Directions the data do not determine: make them visible as infinite variance.
        null = V[:, ~keep] / d[:, None]
        bad = np.any(np.abs(null) > 1e-8 * np.abs(null).max(), axis=1)
        cov[bad, bad] = np.inf
    cov_theta = cov[:p, :p]
    diag_lin = np.diag(cov)[p:]
    sel = list(range(p)) + list(range(p + K * nq + nt * J, p + nL))
    return cov_theta, diag_lin, cov[np.ix_(sel, sel)]


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
    for _ in range(int(n)):
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
    return BootstrapResult(samples=S, mean=S.mean(0), std=S.std(0, ddof=1) if len(S) > 1 else np.full(S.shape[1], np.nan),
                           low=np.quantile(S, a, axis=0), high=np.quantile(S, 1 - a, axis=0),
                           n_failed=failed, ci=float(ci))
