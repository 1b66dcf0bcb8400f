"""Gaussian instrument response: closed-form convolutions of kinetic responses.

The instrument response (IRF) is a normalized Gaussian of standard deviation
``sigma`` (ps) centred at time zero ``t0`` (ps). Every function here returns a
response *already convolved* with it, evaluated at delays ``t`` (ps); ``x = t - t0``.

Closed forms (x = t - t0, rate k in 1/ps):

* step  H(x) * g      = 1/2 erfc(-x / (sqrt(2) sigma))
* exp   e^{-kx} H(x) * g = 1/2 exp(k^2 sigma^2 / 2 - k x) erfc(z),
  z = (k sigma^2 - x) / (sqrt(2) sigma)
       = 1/2 exp(-x^2 / (2 sigma^2)) erfcx(z)          (same quantity)

The second form is used where Re z >= 0 and the first where Re z < 0, so that
no factor overflows for large k sigma or large |x|. For complex k (a damped
oscillation, k = 1/tau - i omega) erfcx(z) = w(i z), w the Faddeeva function
(scipy.special.wofz), and for Re z < 0 the identity erfc(z) = 2 - erfc(-z) keeps
every factor bounded. In the limit sigma -> 0 the unconvolved response is
returned, with the value at the jump x = 0 equal to half the jump (the limit of
the convolution).

``convolve_tabulated`` convolves a tabulated response (e.g. a simulated
trajectory's per-frame difference curves) treated as piecewise linear between
its nodes; the integrals are evaluated in closed form, so the result is exact
for that interpolant.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from movieproc.errors import InputError

__all__ = [
    "step_gauss",
    "exp_gauss",
    "damped_oscillation_gauss",
    "tabulated_weights",
    "convolve_tabulated",
]

_SQRT2 = np.sqrt(2.0)
_SQRT2PI = np.sqrt(2.0 * np.pi)


def _check_sigma(sigma):
    sigma = float(sigma)
    if not (sigma >= 0.0 and np.isfinite(sigma)):
        raise InputError("argument 'sigma'", f"{sigma!r}", "a finite IRF width >= 0 ps")
    return sigma


def step_gauss(t, t0, sigma):
    """Heaviside step at ``t0`` convolved with the Gaussian IRF.

    Parameters
    ----------
    t : array_like
        Delays, ps, any shape.
    t0 : float
        Time zero, ps.
    sigma : float
        IRF standard deviation, ps (>= 0; 0 gives the bare step with value 1/2 at t0).

    Returns
    -------
    ndarray
        1/2 erfc(-(t - t0) / (sqrt(2) sigma)), same shape as ``t``, dimensionless.
    """
    sigma = _check_sigma(sigma)
    x = np.asarray(t, dtype=float) - float(t0)
    if sigma == 0.0:
        return np.where(x > 0, 1.0, np.where(x < 0, 0.0, 0.5))
    return 0.5 * special.erfc(-x / (_SQRT2 * sigma))


def _exp_gauss_real(x, k, sigma):
    """exp(-k x) H(x) convolved with the Gaussian; x, k real, broadcast."""
    x, k = np.broadcast_arrays(np.asarray(x, float), np.asarray(k, float))
    if sigma == 0.0:
        with np.errstate(over="ignore", invalid="ignore"):
            out = np.where(x > 0, np.exp(-k * np.where(x > 0, x, 0.0)), 0.0)
        return np.where(x == 0, 0.5, out)
    z = (k * sigma**2 - x) / (_SQRT2 * sigma)
    out = np.empty(x.shape)
    pos = z >= 0
    # Re z >= 0: exp(-x^2/2s^2) <= 1 and erfcx(z) <= 1: bounded, no overflow.
    out[pos] = 0.5 * np.exp(-x[pos] ** 2 / (2 * sigma**2)) * special.erfcx(z[pos])
    # z < 0 means x > k sigma^2; for k >= 0 the exponent k(k sigma^2/2 - x) < 0,
    # and erfc(z) lies in (1, 2): bounded, no cancellation.
    neg = ~pos
    kn, xn = k[neg], x[neg]
    out[neg] = 0.5 * np.exp(kn**2 * sigma**2 / 2 - kn * xn) * special.erfc(z[neg])
    return out


def _exp_gauss_complex(x, k, sigma):
    """exp(-k x) H(x) convolved with the Gaussian; complex k, complex result."""
    x, k = np.broadcast_arrays(np.asarray(x, float), np.asarray(k, complex))
    if sigma == 0.0:
        xp = np.where(x > 0, x, 0.0)
        out = np.where(x > 0, np.exp(-k * xp), 0.0 + 0.0j)
        return np.where(x == 0, 0.5 + 0.0j, out)
    z = (k * sigma**2 - x) / (_SQRT2 * sigma)
    gauss = np.exp(-x**2 / (2 * sigma**2))
    out = np.empty(x.shape, dtype=complex)
    pos = z.real >= 0
    # erfcx(z) = w(i z); Im(i z) = Re z >= 0, where |w| <= 1.
    out[pos] = 0.5 * gauss[pos] * special.wofz(1j * z[pos])
    # Re z < 0: erfc(z) = 2 - erfc(-z) = 2 - exp(-z^2) w(-i z), so
    # E = exp(k^2 s^2/2 - k x) - 1/2 exp(-x^2/2s^2) w(-i z); Im(-i z) = -Re z > 0
    # keeps w bounded, and Re(k^2 s^2/2 - k x) < 0 there for Re k >= 0.
    neg = ~pos
    kn, xn = k[neg], x[neg]
    out[neg] = (np.exp(kn**2 * sigma**2 / 2 - kn * xn)
                - 0.5 * gauss[neg] * special.wofz(-1j * z[neg]))
    return out


def exp_gauss(t, k, t0, sigma):
    """Exponential decay exp(-k (t - t0)) starting at ``t0``, convolved with the IRF.

    Parameters
    ----------
    t : array_like
        Delays, ps.
    k : array_like
        Rate(s), 1/ps, broadcast against ``t`` (e.g. ``t[:, None]`` with ``k[None, :]``
        gives shape (n_t, n_k)). Real rates should be >= 0 (a growing exponential,
        k < 0, is evaluated but may overflow like the function itself). Complex
        rates give the complex convolution of exp(-k x) H(x); for k = 1/tau - i omega
        its real part is exp(-x/tau) cos(omega x) H(x) convolved.
    t0 : float
        Time zero, ps.
    sigma : float
        IRF standard deviation, ps (>= 0).

    Returns
    -------
    ndarray
        Broadcast shape of ``t`` and ``k``; float for real ``k``, complex for complex
        ``k``. Dimensionless (the unconvolved response is 1 at t = t0+).

    Notes
    -----
    k = 0 gives the convolved step. Stable for any k sigma and |t - t0|: the
    formula is switched on the sign of Re z (see the module docstring).
    """
    sigma = _check_sigma(sigma)
    x = np.asarray(t, dtype=float) - float(t0)
    k = np.asarray(k)
    if np.iscomplexobj(k):
        return _exp_gauss_complex(x, k, sigma)
    return _exp_gauss_real(x, k.astype(float), sigma)


def damped_oscillation_gauss(t, damping_time, omega, t0, sigma, phase=0.0):
    """Damped cosine exp(-x/damping_time) cos(omega x + phase) H(x) convolved with the IRF.

    Parameters
    ----------
    t : array_like
        Delays, ps.
    damping_time : float or array_like
        Damping time of the amplitude, ps (> 0; ``np.inf`` for an undamped cosine).
    omega : float or array_like
        Angular frequency, rad/ps (2 pi / period).
    t0 : float
        Time zero, ps.
    sigma : float
        IRF standard deviation, ps.
    phase : float
        Phase, rad; ``phase = -pi/2`` gives the sine-type oscillation.

    Returns
    -------
    ndarray
        Broadcast shape of ``t``, ``damping_time`` and ``omega``, float, dimensionless.
    """
    damping_time = np.asarray(damping_time, dtype=float)
    k = 1.0 / damping_time - 1j * np.asarray(omega, dtype=float)
    e = exp_gauss(t, k, t0, sigma)
    # Re[exp(i phase) exp(-k x)] = exp(-x/damping_time) cos(omega x + phase).
    return np.real(np.exp(1j * phase) * e)


def _phi_diff(p, q):
    """Phi(p) - Phi(q) for p >= q (Phi the standard normal CDF), without cancellation."""
    both_pos = q >= 0
    a = 0.5 * (special.erfc(q / _SQRT2) - special.erfc(p / _SQRT2))
    b = 0.5 * (special.erfc(-p / _SQRT2) - special.erfc(-q / _SQRT2))
    return np.where(both_pos, a, b)


def _pdf(u):
    return np.exp(-0.5 * u**2) / _SQRT2PI


def tabulated_weights(t_model, t, t0, sigma, tail_rate=0.0):
    """Weights W with (W @ y) = IRF-convolved piecewise-linear response at delays ``t``.

    Parameters
    ----------
    t_model : array_like, shape (F,)
        Strictly increasing node times tau_f, ps, relative to excitation (>= 0).
    t : array_like, shape (n_t,)
        Delays, ps.
    t0 : float
        Time zero, ps.
    sigma : float
        IRF standard deviation, ps (>= 0).
    tail_rate : float or None
        Behaviour after the last node: ``0`` holds the last value, ``k > 0``
        continues as y_F exp(-k (tau - tau_F)) (k in 1/ps), ``None`` drops to zero.

    Returns
    -------
    ndarray, shape (n_t, F)
        Dimensionless weights; the response is zero before the first node.
    """
    sigma = _check_sigma(sigma)
    tm = np.asarray(t_model, dtype=float)
    if tm.ndim != 1 or tm.size < 1 or not np.all(np.isfinite(tm)):
        raise InputError("argument 't_model'", f"shape {tm.shape}", "a finite 1-D array of node times (ps)")
    if tm.size > 1 and not np.all(np.diff(tm) > 0):
        raise InputError("argument 't_model'", "non-increasing node times", "strictly increasing times (ps)")
    if tail_rate is not None and not (np.isfinite(tail_rate) and tail_rate >= 0):
        raise InputError("argument 'tail_rate'", f"{tail_rate!r}", "None or a finite rate >= 0 (1/ps)")
    x = np.asarray(t, dtype=float).reshape(-1) - float(t0)
    n_t, F = x.size, tm.size
    W = np.zeros((n_t, F))
    if sigma == 0.0:
        # Limit sigma -> 0: the response itself (linear interpolation between the
        # nodes), with half the jump where it is discontinuous.
        if F > 1:
            inside = (x > tm[0]) & (x < tm[-1])
            rows = np.nonzero(inside)[0]
            j = np.clip(np.searchsorted(tm, x[inside], side="right") - 1, 0, F - 2)
            frac = (x[inside] - tm[j]) / (tm[j + 1] - tm[j])
            W[rows, j] += 1.0 - frac
            W[rows, j + 1] += frac
            W[x == tm[0], 0] += 0.5                    # jump up from zero
            W[x == tm[-1], -1] += 1.0 if tail_rate is not None else 0.5
        elif tail_rate is not None:
            W[x == tm[0], 0] += 0.5                    # single node: jump onto the tail
        after = x > tm[-1]
        if tail_rate is not None:
            W[after, -1] += np.exp(-tail_rate * (x[after] - tm[-1]))
        return W
    xs = x[:, None] / sigma
    if F > 1:
        a = tm[:-1][None, :] / sigma  # segment starts, units of sigma
        b = tm[1:][None, :] / sigma
        dl = b - a
        p = xs - a  # (x - a)/sigma  >=  q = (x - b)/sigma
        q = xs - b
        i0 = _phi_diff(p, q)                      # int_a^b g(x - tau) dtau
        m1 = p * i0 - (_pdf(q) - _pdf(p))         # int_a^b (tau - a)/sigma g dtau
        right = m1 / dl                           # weight of node b (hat rising)
        left = i0 - right                         # weight of node a
        W[:, :-1] += left
        W[:, 1:] += right
    if tail_rate is not None:
        xl = x - tm[-1]
        W[:, -1] += _exp_gauss_real(xl, np.full_like(xl, float(tail_rate)), sigma)
    return W


def convolve_tabulated(t_model, y_model, t, t0, sigma, tail_rate=0.0):
    """Convolve a tabulated response y(tau) with the Gaussian IRF, at delays ``t``.

    y(tau) is taken as zero before the first node, piecewise linear between nodes,
    and after the last node as set by ``tail_rate``. The Gaussian integrals over
    each linear piece are done in closed form (normal CDF and density), so the
    result is exact for the piecewise-linear interpolant up to rounding (absolute
    error ~1e-14 of max|y|); a response that is not linear between the nodes is
    represented to the accuracy of that interpolation (error <= h^2 max|y''| / 8
    for node spacing h).

    Parameters
    ----------
    t_model : array_like, shape (F,)
        Strictly increasing node times tau_f, ps after excitation.
    y_model : array_like, shape (F, ...)
        Response at the nodes, e.g. a trajectory's difference curves (F, nq).
    t : array_like, shape (n_t,)
        Delays, ps.
    t0 : float
        Time zero, ps (excitation at t = t0).
    sigma : float
        IRF standard deviation, ps (>= 0; 0 gives linear interpolation).
    tail_rate : float or None
        After the last node: ``0`` (default) holds the last value, ``k > 0`` decays
        as exp(-k (tau - tau_F)) (1/ps), ``None`` sets it to zero.

    Returns
    -------
    ndarray, shape (n_t, ...)
        Convolved response, in the units of ``y_model``.
    """
    y = np.asarray(y_model, dtype=float)
    tm = np.asarray(t_model, dtype=float)
    if y.shape[:1] != tm.shape:
        raise InputError("argument 'y_model'", f"shape {y.shape}",
                         f"leading axis of length {tm.size} matching t_model")
    W = tabulated_weights(tm, t, t0, sigma, tail_rate)
    return (W @ y.reshape(tm.size, -1)).reshape((W.shape[0],) + y.shape[1:])
