"""Isotropic and P2 parts of a scattering pattern after polarized excitation.

A pump pulse linearly polarized along the azimuth phi_L (in the detector
plane convention of :mod:`geometry`) aligns the excited molecules, and a ring
of momentum transfer q carries

    S(q, phi) = S0(q) + P2(cos(theta) cos(phi - phi_L)) S2(q)

with theta half the scattering angle and P2(x) = (3 x^2 - 1) / 2. The two
parts are found per q by linear least squares over the pixels of the ring:
with y the corrected pixel values, w their weights and g = P2(...) their
regressor, the normal equations are

    [sum w     sum w g  ] [S0]   [sum w y  ]
    [sum w g   sum w g^2] [S2] = [sum w g y]

whose sums :func:`integration.bin_sums` returns as channels 0 and 1 of a
binning built with ``regressors=[p2_regressor(...)]``.
"""

from __future__ import annotations

import numpy as np


def legendre_p2(x):
    """Second Legendre polynomial P2(x) = (3 x^2 - 1) / 2."""
    x = np.asarray(x, dtype=float)
    return 1.5 * x * x - 0.5


def p2_regressor(two_theta, phi, pump_polarization):
    """P2(cos(theta) cos(phi - phi_L)) of each pixel.

    Parameters
    ----------
    two_theta, phi : array_like (ny, nx)
        Scattering angle and azimuth, radians.
    pump_polarization : float
        Azimuth phi_L of the pump polarization, radians.

    Returns
    -------
    ndarray, float64, same shape
        Between -1/2 and 1.
    """
    theta = np.asarray(two_theta, dtype=float) / 2.0
    return legendre_p2(np.cos(theta) * np.cos(np.asarray(phi, dtype=float) - pump_polarization))


def solve(sums, moments):
    """Isotropic and P2 parts from the normal equations, per frame and grid point.

    Parameters
    ----------
    sums : array_like (..., 2, ng)
        Channel sums (sum w y, sum w g y) from a binning with the P2 regressor.
    moments : array_like (..., 3, ng)
        (sum w, sum w g, sum w g^2) over the same pixels.

    Returns
    -------
    s0, s2 : ndarray (..., ng) float64
        NaN where the ring does not sample enough azimuths to separate the
        two parts (determinant below 1e-9 of sum w times sum w g^2).
    """
    sums = np.asarray(sums, dtype=np.float64)
    moments = np.asarray(moments, dtype=np.float64)
    y0, y1 = sums[..., 0, :], sums[..., 1, :]
    w, wg, wgg = moments[..., 0, :], moments[..., 1, :], moments[..., 2, :]
    det = w * wgg - wg * wg
    ok = det > 1e-9 * w * wgg
    with np.errstate(invalid="ignore", divide="ignore"):
        s0 = (wgg * y0 - wg * y1) / det
        s2 = (w * y1 - wg * y0) / det
    return np.where(ok, s0, np.nan), np.where(ok, s2, np.nan)
