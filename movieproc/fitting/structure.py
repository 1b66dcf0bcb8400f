"""Per-delay structure: which trajectory frame best explains each delay's curve.

For each delay t and each frame f of a trajectory (or any set of candidate
structures) the difference curve is fitted as

    dS_t(q) ~ a_tf dS_f(q) + sum_j s_tfj G_j(q),      a_tf >= 0,

by weighted linear least squares (weights 1/err^2), giving chi2_tf. The best
frame minimizes chi2_tf. The frames with chi2_tf - chi2_min <= threshold form the
set of acceptable structures; the range of a geometric parameter (e.g. a
metal-metal distance, Å) over that set is its uncertainty interval.

Threshold: delta chi2 = 1 is the 68.3 % level for one parameter of interest
(Press et al., Numerical Recipes, section 15.6); it is multiplied by the reduced
chi2 of the best frame, which widens the interval when the best frame does not
describe the data to within the errors (and narrows it when the errors are
overestimated). The frame index is treated as that one parameter; this is an
approximation when frames are not ordered along one coordinate, and the
interval is only as fine as the trajectory samples the parameter.

The amplitude a >= 0 (the excited fraction times a population) is solved in
closed form: if the unconstrained optimum is negative the constrained optimum of
the convex quadratic is a = 0 (solvent terms only).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from movieproc.errors import InputError

__all__ = ["FrameFit", "fit_frames"]


@dataclass
class FrameFit:
    """Per-delay best frame and parameter intervals.

    Attributes
    ----------
    best_frame : ndarray of int, shape (n_delay,)
    amplitude, amplitude_err : ndarray, shape (n_delay,)
        a >= 0 of the best frame and its standard error (scaled by
        sqrt(max(1, red_chi2))).
    chi2 : ndarray, shape (n_delay, F)
        chi2 of every frame.
    chi2_best, red_chi2_best : ndarray, shape (n_delay,)
    dof : ndarray of int, shape (n_delay,)
        Valid points minus (1 + J).
    threshold : ndarray, shape (n_delay,)
        Delta-chi2 threshold used.
    accepted : ndarray of bool, shape (n_delay, F)
        Frames within the threshold.
    value, lower, upper : dict of ndarray, shape (n_delay,)
        Per parameter: value at the best frame and the range over accepted frames,
        each frame covering the values half-way to its neighbours.
    solvent_coef : ndarray, shape (n_delay, J) or None
        Solvent coefficients of the best frame.
    at_end : ndarray of bool, shape (n_delay,)
        Best frame is the last one (the structure may continue beyond the
        trajectory; the interval is then one-sided).
    at_start : ndarray of bool, shape (n_delay,)
        Best frame is the first one.
    significant : ndarray of bool, shape (n_delay,)
        amplitude >= 2 amplitude_err; where False the structure is not determined.
        Necessary, not sufficient: the best of F frames is selected, so pure noise
        passes somewhat more often than the single-frame one-sided 2.3 % (on a
        smooth toy trajectory of 300 frames, ~2-3 %).
    warnings : list of str
    """

    best_frame: np.ndarray
    amplitude: np.ndarray
    amplitude_err: np.ndarray
    chi2: np.ndarray
    chi2_best: np.ndarray
    red_chi2_best: np.ndarray
    dof: np.ndarray
    threshold: np.ndarray
    accepted: np.ndarray
    value: dict
    lower: dict
    upper: dict
    solvent_coef: np.ndarray | None
    at_end: np.ndarray
    at_start: np.ndarray
    significant: np.ndarray
    warnings: list = field(default_factory=list)


def fit_frames(diff, diff_err, frame_curves, solvent=None, params=None, *, delta_chi2=1.0, scale_threshold=True,
               amplitude=None, min_sigma=2.0):
    """Fit every delay's curve with every frame's curve (plus solvent terms).

    Parameters
    ----------
    diff : array_like, shape (n_delay, n_q)
        Difference signal (solute signal, or raw with ``solvent`` given).
    diff_err : array_like, shape (n_delay, n_q)
        Standard errors; non-finite or non-positive ones leave the point out.
    frame_curves : array_like, shape (F, n_q)
        Difference curves S_f - S_ground of the frames.
    solvent : array_like, shape (J, n_q), optional
        Curves with a free coefficient per delay and frame.
    params : dict of array_like (F,), optional
        Geometric parameters per frame (e.g. {"Pt-Pt": distances in Å}).
    delta_chi2 : float
        Threshold before scaling (1.0: 68 % for one parameter).
    scale_threshold : bool
        Multiply the threshold by the best frame's reduced chi2.
    amplitude : array_like, shape (n_delay,), optional
        Fixed amplitude per delay (e.g. excitation fraction times the excited
        population from a global kinetic fit) instead of a free a >= 0. With a
        free amplitude, frames whose curves differ mainly in size (small
        displacements) are nearly interchangeable; fixing it removes that
        freedom, so the structure is set by the curve's size as well as its shape.
    min_sigma : float
        A delay's structure counts as determined ("significant") when the best
        frame lowers chi2 below that of no solute signal by at least
        ``min_sigma**2`` (scaled like the threshold).

    Returns
    -------
    FrameFit
    """
    d, e, Y, G, params, fixed = _check(diff, diff_err, frame_curves, solvent, params, amplitude)
    nt, F, J = d.shape[0], Y.shape[0], G.shape[0]
    valid = np.isfinite(d) & np.isfinite(e) & (e > 0)
    dof = valid.sum(1) - ((0 if fixed is not None else 1) + J)
    warnings = [f"delay index {t}: {valid[t].sum()} valid points for {1 + J} unknowns; not fitted"
                for t in np.nonzero(dof <= 0)[0]]
    chi2, amp, amp_var, chi2_zero = _frame_chi2(d, e, Y, G, valid, dof, fixed)
    fitted = np.isfinite(chi2).any(axis=1)
    best = np.zeros(nt, dtype=int)
    best[fitted] = np.nanargmin(chi2[fitted], axis=1)
    rows = np.arange(nt)
    chi2_best = np.where(fitted, chi2[rows, best], np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        red = np.where(dof > 0, chi2_best / np.maximum(dof, 1), np.nan)
    thr = delta_chi2 * (red if scale_threshold else np.ones(nt))
    accepted = ((chi2 - chi2_best[:, None]) <= thr[:, None]) & fitted[:, None]
    a_best = np.where(fitted, amp[rows, best], np.nan)
    scale = np.maximum(1.0, np.nan_to_num(red, nan=1.0))
    a_err = np.sqrt(amp_var[rows, best] * scale)
    # Significant: the best frame lowers chi2 below that of no solute signal by at least
    # min_sigma^2 (e.g. 4: 2 sigma for one amplitude), scaled like the threshold. For a
    # free amplitude this is a >= min_sigma * sigma_a.
    with np.errstate(invalid="ignore"):
        significant = fitted & ((chi2_zero - chi2_best) >= min_sigma**2 * scale)
    value, lower, upper = _intervals(params, best, fitted, accepted)
    sc_best = _solvent_of_best(d, e, Y, G, valid, fitted, best, amp, fixed) if J else None
    at_end = fitted & (best == F - 1)
    at_start = fitted & (best == 0)
    if np.any(at_end):
        warnings.append(f"{int(at_end.sum())} delays are best described by the last frame: the structure may "
                        "lie beyond the trajectory; their upper/lower limits are bounded by it")
    if np.any(fitted & ~significant):
        warnings.append(f"{int((fitted & ~significant).sum())} delays have no significant solute amplitude "
                        f"(< {min_sigma:g} standard errors): their structure is not determined")
    return FrameFit(best_frame=best, amplitude=a_best, amplitude_err=a_err, chi2=chi2, chi2_best=chi2_best,
                    red_chi2_best=red, dof=dof, threshold=thr, accepted=accepted, value=value, lower=lower,
                    upper=upper, solvent_coef=sc_best, at_end=at_end, at_start=at_start,
                    significant=significant, warnings=warnings)


def _check(diff, diff_err, frame_curves, solvent, params, amplitude):
    """The arguments of :func:`fit_frames` as checked float arrays."""
    d = np.asarray(diff, dtype=float)
    e = np.asarray(diff_err, dtype=float)
    Y = np.asarray(frame_curves, dtype=float)
    if d.ndim != 2 or e.shape != d.shape:
        raise InputError("arguments 'diff' / 'diff_err'", f"shapes {d.shape}, {e.shape}", "equal (n_delay, n_q)")
    nt, nq = d.shape
    if Y.ndim != 2 or Y.shape[1] != nq or not np.all(np.isfinite(Y)):
        raise InputError("argument 'frame_curves'", f"shape {Y.shape}", f"finite curves (F, {nq})")
    G = np.zeros((0, nq)) if solvent is None else np.atleast_2d(np.asarray(solvent, dtype=float))
    if G.shape[1] != nq or not np.all(np.isfinite(G)):
        raise InputError("argument 'solvent'", f"shape {G.shape}", f"finite curves (J, {nq})")
    params = {} if params is None else {k: np.asarray(v, dtype=float) for k, v in params.items()}
    for k, v in params.items():
        if v.shape != (Y.shape[0],):
            raise InputError(f"argument 'params[{k!r}]'", f"shape {v.shape}", f"({Y.shape[0]},), one value per frame")
    fixed = None if amplitude is None else np.asarray(amplitude, dtype=float)
    if fixed is not None and fixed.shape != (nt,):
        raise InputError("argument 'amplitude'", f"shape {fixed.shape}", f"({nt},), one amplitude per delay")
    return d, e, Y, G, params, fixed


def _weighted(d, e, G, valid, t):
    """Weights of delay t's valid points, its weighted curve and the orthonormal basis of the weighted solvent."""
    v = valid[t]
    w = 1.0 / e[t, v]
    Qg = np.linalg.qr((G[:, v] * w).T)[0] if G.shape[0] else None
    return v, w, d[t, v] * w, Qg


def _frame_chi2(d, e, Y, G, valid, dof, fixed):
    """chi2 (n_delay, F) of every frame at every delay, its amplitude and variance, and chi2 of no solute signal.

    The solvent curves are projected out of data and frames (their coefficients are free).
    """
    nt, F = d.shape[0], Y.shape[0]
    chi2, amp, amp_var = (np.full((nt, F), np.nan) for _ in range(3))
    chi2_zero = np.full(nt, np.nan)
    for t in np.nonzero(dof > 0)[0]:
        v, w, y, Qg = _weighted(d, e, G, valid, t)
        Yw = Y[:, v] * w                       # (F, n_valid)
        yp, Yp = (y, Yw) if Qg is None else (y - Qg @ (Qg.T @ y), Yw - (Yw @ Qg) @ Qg.T)
        ff = np.einsum("fq,fq->f", Yp, Yp)
        if fixed is not None:
            a = np.full(F, max(float(fixed[t]), 0.0) if np.isfinite(fixed[t]) else 0.0)
        else:
            with np.errstate(invalid="ignore", divide="ignore"):
                a = np.where(ff > 0, (Yp @ yp) / np.where(ff > 0, ff, 1.0), 0.0)
            a = np.clip(a, 0.0, None)
        # Direct sum of squares (not yy - fy^2/ff, which cancels to ~eps * yy).
        res = yp[None, :] - a[:, None] * Yp
        chi2[t] = np.einsum("fq,fq->f", res, res)
        amp[t] = a
        with np.errstate(divide="ignore"):
            amp_var[t] = np.where(ff > 0, 1.0 / np.where(ff > 0, ff, 1.0), np.inf)
        chi2_zero[t] = yp @ yp
    return chi2, amp, amp_var, chi2_zero


def _intervals(params, best, fitted, accepted):
    """Value of each geometric parameter at the best frame, and its range over the accepted frames."""
    value, lower, upper = {}, {}, {}
    for k, v in params.items():
        value[k] = np.where(fitted, v[best], np.nan)
        # Each frame stands for the parameter values half-way to its neighbouring
        # frames: the interval cannot be finer than the trajectory samples it.
        mid = np.concatenate([[v[0]], (v[1:] + v[:-1]) / 2, [v[-1]]])
        v_lo = np.minimum(v, np.minimum(mid[:-1], mid[1:]))
        v_hi = np.maximum(v, np.maximum(mid[:-1], mid[1:]))
        with np.errstate(all="ignore"):
            lower[k] = np.where(fitted, np.min(np.where(accepted, v_lo[None, :], np.inf), axis=1), np.nan)
            upper[k] = np.where(fitted, np.max(np.where(accepted, v_hi[None, :], -np.inf), axis=1), np.nan)
    return value, lower, upper


def _solvent_of_best(d, e, Y, G, valid, fitted, best, amp, fixed):
    """Solvent coefficients (n_delay, J) of the best frame (unweighted basis), per delay."""
    sc_best = np.full((d.shape[0], G.shape[0]), np.nan)
    for t in np.nonzero(fitted)[0]:
        v, w, y, _ = _weighted(d, e, G, valid, t)
        A = np.vstack([Y[best[t]], G])[:, v].T * w[:, None]
        a = amp[t, best[t]]
        if fixed is not None:
            coef = np.linalg.lstsq(A[:, 1:], (d[t, v] - a * Y[best[t], v]) * w, rcond=None)[0]
        elif a == 0.0:
            coef = np.linalg.lstsq(A[:, 1:], y, rcond=None)[0]
        else:
            coef = np.linalg.lstsq(A, y, rcond=None)[0][1:]
        sc_best[t] = coef
    return sc_best
