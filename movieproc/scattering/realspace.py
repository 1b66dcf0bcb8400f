"""Real-space view of difference curves: which pair distances are lost and gained.

The Debye equation (P. Debye, Ann. Phys. 351 (1915) 809, reference from memory; the
project's :mod:`movieproc.scattering.debye`) gives for a change of pair distances

    dS(q) = 2 sum_{i<j} f_i(q) f_j(q) [sin(q r'_ij) / (q r'_ij) - sin(q r_ij) / (q r_ij)].

Dividing q dS(q) by a sharpening form-factor product F(q) (f_a f_b of the pair of
interest) leaves, for that pair, 2 [sin(q r') / r' - sin(q r) / r], whose sine transform
is a pair of delta functions (the orthogonality (2/pi) int_0^inf sin(q x) sin(q y) dq =
delta(x - y)). The sharpened transform

    dP(r) = (r / pi) int_{q_low}^{q_high} q dS(q) / F(q) sin(q r) exp(-kappa q^2) dq

is therefore the change of the number of a-b pairs per Å (gained positive, lost
negative), each delta broadened by the damping into a Gaussian of standard deviation
sqrt(2 kappa) Å (the transform of exp(-kappa q^2)). Pairs of other elements appear with
the weight f_c f_d / F. The damping handles the truncation at q_high: by default kappa
is chosen so that exp(-kappa q_high^2) = :data:`DAMPING_AT_Q_HIGH`, which keeps the
ripples of the cut-off below a few % of a peak. Two peaks closer than about 3.5 sqrt(2
kappa) merge into one derivative-like shape whose extrema sit outside the true distances
(its zero crossing is near their mean). The part of q dS below q_low is missing: a slow
baseline in r. Units: q in 1/Å, r in Å, kappa in Å^2.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError, ParameterError
from . import formfactors

__all__ = ["sine_transform", "sharpening", "default_damping", "peak_width", "sharpened_transform"]

#: Damping factor exp(-kappa q_high^2) left at the upper end of the q range by the default kappa:
#: a 5 % step at the cut-off makes ripples of a few % of a peak (exp(-3); common practice 1-10 %).
DAMPING_AT_Q_HIGH = 0.05


def _trapezoid_weights(q):
    dq = np.diff(q)
    trap = np.zeros_like(q)
    trap[:-1] += dq / 2
    trap[1:] += dq / 2
    return trap


def _check_grid(q, dS, r):
    q = np.asarray(q, dtype=np.float64)
    r = np.asarray(r, dtype=np.float64)
    dS = np.asarray(dS, dtype=np.float64)
    if q.ndim != 1 or q.size < 2 or np.any(np.diff(q) <= 0):
        raise InputError("q", f"array of shape {q.shape}", "an increasing 1-D q grid (1/Å)")
    if dS.shape[-1:] != q.shape:
        raise InputError("dS", f"shape {dS.shape}", f"last axis of length {q.size} (the q grid)")
    if r.ndim != 1:
        raise InputError("r", f"shape {r.shape}", "a 1-D array of distances (Å)")
    return q, dS, r


def sine_transform(q, dS, r, kappa=0.03):
    """Damped sine transform of difference curves, without sharpening.

    r^2 dS(r) ~ (r / (2 pi^2)) int q dS(q) sin(q r) exp(-kappa q^2) dq. The form factors
    stay in the integrand, so the peaks are broadened and shifted by their fall with q;
    :func:`sharpened_transform` is the view that puts peaks at the distances.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Increasing momentum transfer, 1/Å.
    dS : array_like, shape (..., nq)
        Difference curves on ``q`` (e.u.^2 or any unit).
    r : array_like, shape (nr,)
        Distances, Å.
    kappa : float
        Damping constant, Å^2 (>= 0).

    Returns
    -------
    ndarray, shape (..., nr)
        r^2 dS(r), units of dS times 1/Å, float64 (trapezoid rule over ``q``).
    """
    q, dS, r = _check_grid(q, dS, r)
    if not (np.isfinite(kappa) and kappa >= 0):
        raise ParameterError("kappa", f"{kappa!r}", "a damping constant >= 0 (Å^2)")
    weight = q * np.exp(-kappa * q**2)  # (nq,)
    kernel = np.sin(np.multiply.outer(q, r)) * weight[:, None]  # (nq, nr)
    return (r / (2.0 * np.pi**2)) * ((dS * _trapezoid_weights(q)) @ kernel)


def sharpening(q, pair=None, elements=None):
    """Sharpening form-factor product F(q), shape (nq,), e.u.^2.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    pair : (str, str), optional
        Element symbols a, b: F = f_a(q) f_b(q) (Waasmaier-Kirfel form factors,
        :func:`movieproc.scattering.formfactors.form_factor`).
    elements : sequence of str, optional
        The structure's element per atom. With ``pair``, both must be among them;
        without, F = (mean over atoms of f(q))^2.

    Returns
    -------
    F : ndarray, shape (nq,)
    label : str
        What F is, in words (for figures and attrs).

    Raises
    ------
    ParameterError
        ``pair`` not two symbols, or an element of it not in ``elements``.
    """
    q = np.asarray(q, dtype=np.float64)
    if pair is not None:
        if len(pair) != 2:
            raise ParameterError("pair", f"{pair!r}", "two element symbols, e.g. [Pt, Pt]")
        a, b = (str(e) for e in pair)
        if elements is not None:
            missing = [e for e in (a, b) if e not in {str(x) for x in elements}]
            if missing:
                raise ParameterError("pair", f"{missing} not in the structure (elements {sorted(set(elements))})",
                                     "elements of the ground-state structure")
        return formfactors.form_factor(q, a) * formfactors.form_factor(q, b), f"f_{a}(q) f_{b}(q)"
    if elements is None or len(elements) == 0:
        return np.ones_like(q), "none (no structure to take form factors from)"
    unique, table = formfactors.form_factor_table(q, [str(e) for e in elements])
    counts = np.array([sum(str(e) == u for e in elements) for u in unique], float)
    mean = (counts[:, None] * np.real(table)).sum(axis=0) / counts.sum()
    return mean**2, "<f(q)>^2 (mean over the structure's atoms)"


def default_damping(q_high):
    """kappa (Å^2) with exp(-kappa q_high^2) = :data:`DAMPING_AT_Q_HIGH`."""
    return float(-np.log(DAMPING_AT_Q_HIGH) / q_high**2)


def peak_width(kappa):
    """Standard deviation (Å) of the Gaussian a single distance becomes: sqrt(2 kappa)."""
    return float(np.sqrt(2.0 * kappa))


def sharpened_transform(q, dS, r, sharpen, q_range=None, damping=None):
    """Sharpened, damped sine transform: change of the number of pairs per Å.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Increasing momentum transfer, 1/Å.
    dS : array_like, shape (..., nq)
        Difference curves (e.u.^2 per molecule for pairs per Å; else any unit).
    r : array_like, shape (nr,)
        Distances, Å.
    sharpen : array_like, shape (nq,)
        F(q) of :func:`sharpening`, > 0.
    q_range : (float, float), optional
        q window of the integral, 1/Å; default the whole grid.
    damping : float, optional
        kappa, Å^2 (>= 0); default :func:`default_damping` of the window's upper end.

    Returns
    -------
    values : ndarray, shape (..., nr)
        dP(r) (see the module docstring): units of dS / F per Å.
    kappa : float
        The damping used, Å^2.
    """
    q, dS, r = _check_grid(q, dS, r)
    sharpen = np.asarray(sharpen, dtype=np.float64)
    if sharpen.shape != q.shape or not np.all(np.isfinite(sharpen)) or np.any(sharpen <= 0):
        raise InputError("sharpen", f"shape {sharpen.shape}", f"positive form-factor products on the q grid ({q.size})")
    low, high = (q[0], q[-1]) if q_range is None else (float(q_range[0]), float(q_range[1]))
    inside = (q >= low - 1e-12) & (q <= high + 1e-12)
    if not low < high or inside.sum() < 2:
        raise ParameterError("q_range", f"[{low}, {high}] with {int(inside.sum())} q points of the data "
                             f"({q[0]:.3g}-{q[-1]:.3g} 1/Å)", "an increasing pair holding at least 2 q points")
    qw = q[inside]
    kappa = default_damping(qw[-1]) if damping is None else float(damping)
    if not (np.isfinite(kappa) and kappa >= 0):
        raise ParameterError("damping", f"{damping!r}", "a damping constant >= 0 (Å^2)")
    weight = qw / sharpen[inside] * np.exp(-kappa * qw**2) * _trapezoid_weights(qw)
    kernel = np.sin(np.multiply.outer(qw, r)) * weight[:, None]  # (nq_in, nr)
    return (r / np.pi) * (dS[..., inside] @ kernel), kappa
