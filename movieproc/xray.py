"""X-ray wavelength, scattering angle and momentum transfer.

Conventions: energy in keV, wavelength in Å, q in 1/Å, angles in radians.
``two_theta`` is the full scattering angle; ``s = sin(theta) / lambda = q / (4 pi)``.
"""

from __future__ import annotations

import numpy as np
from scipy import constants

#: h c in keV Å, from CODATA values in scipy.constants (about 12.398 keV Å).
HC_KEV_ANGSTROM = constants.h * constants.c / (constants.e * 1e3) * 1e10


def wavelength(energy):
    """Photon wavelength in Å for a photon energy in keV (lambda = h c / E).

    Parameters
    ----------
    energy : float or array_like
        Photon energy, keV; must be positive.

    Returns
    -------
    float or ndarray
        Wavelength, Å.
    """
    energy = np.asarray(energy, dtype=float)
    if np.any(~(energy > 0)) or not np.all(np.isfinite(energy)):
        raise ValueError(f"photon energy must be positive and finite, got {energy}")
    out = HC_KEV_ANGSTROM / energy
    return out.item() if out.ndim == 0 else out


def q_from_two_theta(two_theta, energy):
    """Momentum transfer q = 4 pi sin(theta) / lambda, 1/Å.

    Parameters
    ----------
    two_theta : array_like
        Full scattering angle 2 theta, radians.
    energy : float or array_like
        Photon energy, keV (broadcast against ``two_theta``).
    """
    return 4.0 * np.pi * np.sin(np.asarray(two_theta) / 2.0) / wavelength(energy)


def two_theta_from_q(q, energy):
    """Full scattering angle 2 theta (radians) at momentum transfer q (1/Å)."""
    x = np.asarray(q) * wavelength(energy) / (4.0 * np.pi)
    if np.any(np.abs(x) > 1):
        raise ValueError("q beyond 4 pi / lambda cannot be reached at this photon energy")
    return 2.0 * np.arcsin(x)
