"""Real-space view of difference curves: which distances change.

r^2 dS(r) ~ (r / (2 pi^2)) int q dS(q) sin(q r) exp(-kappa q^2) dq,

the sine Fourier transform of q dS(q), with a Gaussian damping exp(-kappa q^2) that
suppresses the truncation ripples at the end of the measured q range (kappa ~ 0.03 Å^2).
A shortened distance shows as a negative peak at the old and a positive one at the
new distance. Units: q in 1/Å, r in Å, kappa in Å^2.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["sine_transform"]


def sine_transform(q, dS, r, kappa=0.03):
    """Damped sine transform of difference curves to real space.

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
    q = np.asarray(q, dtype=np.float64)
    r = np.asarray(r, dtype=np.float64)
    dS = np.asarray(dS, dtype=np.float64)
    if q.ndim != 1 or q.size < 2 or np.any(np.diff(q) <= 0):
        raise InputError("q", f"array of shape {q.shape}", "an increasing 1-D q grid (1/Å)")
    if dS.shape[-1:] != q.shape:
        raise InputError("dS", f"shape {dS.shape}", f"last axis of length {q.size} (the q grid)")
    if r.ndim != 1:
        raise InputError("r", f"shape {r.shape}", "a 1-D array of distances (Å)")
    if not (np.isfinite(kappa) and kappa >= 0):
        raise InputError("kappa", f"{kappa!r}", "a damping constant >= 0 (Å^2)")
    weight = q * np.exp(-kappa * q**2)  # (nq,)
    kernel = np.sin(np.multiply.outer(q, r)) * weight[:, None]  # (nq, nr)
    dq = np.diff(q)
    trap = np.zeros_like(q)
    trap[:-1] += dq / 2
    trap[1:] += dq / 2
    return (r / (2.0 * np.pi**2)) * ((dS * trap) @ kernel)
