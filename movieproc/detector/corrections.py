"""Per-pixel intensity factors of a flat detector, each one switchable.

Each factor is the ratio between what a pixel records and what it would
record for the same differential cross-section under reference conditions
(the solid angle of a pixel at the beam centre of an untilted detector, no
polarization loss, normal incidence on the sensor, no sample absorption). A
corrected intensity is ``(frame - dark) / factor``; the combined divisor is
:func:`combined_factor`.
"""

from __future__ import annotations

import numpy as np

from .geometry import Geometry, incidence_cosine, lab_positions, normal, scattering_angles


def solid_angle_factor(geometry: Geometry) -> np.ndarray:
    """Relative solid angle of each pixel, Omega_pix / (A_pix / D^2).

    Omega_pix = A_pix (P . n) / |P|^3 (P the pixel centre, n the detector
    normal); without tilt this is cos^3(2theta), 1 at the beam centre.

    Returns
    -------
    ndarray, float64, shape (ny, nx)
    """
    pos = lab_positions(geometry)
    dist = np.linalg.norm(pos, axis=-1)
    return geometry.distance_mm ** 2 * (pos @ normal(geometry)) / dist ** 3


def polarization_factor(two_theta, phi, fraction, plane=0.0):
    """Polarization factor of elastic scattering for a partly linearly polarized beam.

    Pol = f (1 - sin^2(2theta) cos^2(phi - psi)) + (1 - f) (1 - sin^2(2theta) sin^2(phi - psi))

    with f the fraction of the intensity polarized along the azimuth psi and
    1 - f along the perpendicular direction; f = 1/2 gives the unpolarized
    (1 + cos^2(2theta)) / 2.

    Parameters
    ----------
    two_theta, phi : array_like
        Scattering angle and azimuth, radians (broadcast together).
    fraction : float
        Fraction of the intensity polarized along ``plane``, 0 to 1.
    plane : float
        Azimuth psi of the polarization direction, radians (0: along +x).

    Returns
    -------
    ndarray, float64
    """
    if not 0.0 <= fraction <= 1.0:
        raise ValueError(f"polarization fraction must lie in [0, 1], got {fraction}")
    s2 = np.sin(np.asarray(two_theta, dtype=float)) ** 2
    c2 = np.cos(np.asarray(phi, dtype=float) - plane) ** 2
    return fraction * (1.0 - s2 * c2) + (1.0 - fraction) * (1.0 - s2 * (1.0 - c2))


def sensor_factor(cos_incidence, mu_per_mm, thickness_mm):
    """Sensor absorption efficiency relative to normal incidence.

    A sensor layer of thickness t and attenuation mu absorbs a fraction
    1 - exp(-mu t / cos(alpha)) of the photons reaching it at incidence alpha.

    Parameters
    ----------
    cos_incidence : array_like
        cos(alpha), from :func:`geometry.incidence_cosine`.
    mu_per_mm : float
        Linear attenuation coefficient of the sensor, 1/mm.
    thickness_mm : float
        Sensor thickness, mm.

    Returns
    -------
    ndarray, float64
        (1 - exp(-mu t / cos alpha)) / (1 - exp(-mu t)); NaN where cos alpha <= 0.
    """
    mut = float(mu_per_mm) * float(thickness_mm)
    if not mut > 0:
        raise ValueError(f"sensor mu * thickness must be positive, got {mut}")
    c = np.asarray(cos_incidence, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = -np.expm1(-mut / c) / -np.expm1(-mut)
    return np.where(c > 0, out, np.nan)


def absorption_factor(two_theta, mu_per_mm, thickness_mm):
    """Self-absorption of a flat sample sheet normal to the beam, relative to 2theta = 0.

    Scattered intensity from a sheet of thickness d is proportional to
    [exp(-mu d) - exp(-mu d / cos 2theta)] / [mu (1 / cos 2theta - 1)];
    divided by its forward limit d exp(-mu d) this is (1 - exp(-x)) / x with
    x = mu d (1 / cos 2theta - 1).

    Parameters
    ----------
    two_theta : array_like
        Scattering angle, radians.
    mu_per_mm : float
        Linear attenuation coefficient of the sample, 1/mm.
    thickness_mm : float
        Sheet thickness, mm.

    Returns
    -------
    ndarray, float64
        1 at 2theta = 0, decreasing with angle; NaN at 2theta >= 90 deg.
    """
    mud = float(mu_per_mm) * float(thickness_mm)
    if not mud >= 0:
        raise ValueError(f"sample mu * thickness must be non-negative, got {mud}")
    c = np.cos(np.asarray(two_theta, dtype=float))
    with np.errstate(divide="ignore", invalid="ignore"):
        x = mud * (1.0 / c - 1.0)
        out = np.where(x > 1e-12, -np.expm1(-x) / np.where(x > 1e-12, x, 1.0), 1.0 - x / 2.0)
    return np.where(c > 0, out, np.nan)


def combined_factor(geometry: Geometry, *, solid_angle=True, polarization_fraction=None,
                    polarization_plane_deg=0.0, sensor=None, absorption=None) -> np.ndarray:
    """Product of the chosen per-pixel factors: the divisor of dark-subtracted frames.

    Parameters
    ----------
    geometry : Geometry
    solid_angle : bool
        Include :func:`solid_angle_factor`.
    polarization_fraction : float or None
        Include :func:`polarization_factor` with this fraction (None: off).
    polarization_plane_deg : float
        Azimuth of the polarization direction, degrees.
    sensor : (mu_per_mm, thickness_mm) or None
        Include :func:`sensor_factor`.
    absorption : (mu_per_mm, thickness_mm) or None
        Include :func:`absorption_factor`.

    Returns
    -------
    ndarray, float64, shape (ny, nx)
        Non-finite where a factor is undefined (such pixels are left out).
    """
    factor = np.ones(geometry.shape)
    if solid_angle:
        factor = factor * solid_angle_factor(geometry)
    if polarization_fraction is not None or absorption is not None:
        two_theta, phi = scattering_angles(geometry)
        if polarization_fraction is not None:
            factor = factor * polarization_factor(two_theta, phi, polarization_fraction,
                                                  np.deg2rad(polarization_plane_deg))
        if absorption is not None:
            factor = factor * absorption_factor(two_theta, *absorption)
    if sensor is not None:
        factor = factor * sensor_factor(incidence_cosine(geometry), *sensor)
    return factor


def factor_from_config(geometry: Geometry, detector: dict) -> np.ndarray:
    """:func:`combined_factor` with the switches of the ``detector`` config section.

    Uses ``solid_angle``, ``polarization``, ``polarization_fraction``,
    ``polarization_plane_deg``, ``sensor`` and ``absorption`` (see
    config/schemas/detector.schema.yaml).
    """
    sensor = detector.get("sensor") or {}
    absorption = detector.get("absorption") or {}
    return combined_factor(
        geometry,
        solid_angle=detector.get("solid_angle", True),
        polarization_fraction=(detector.get("polarization_fraction", 0.99)
                               if detector.get("polarization", True) else None),
        polarization_plane_deg=detector.get("polarization_plane_deg", 0.0),
        sensor=(sensor["mu_per_mm"], sensor["thickness_mm"]) if sensor.get("enabled") else None,
        absorption=(absorption["mu_per_mm"], absorption["thickness_mm"]) if absorption.get("enabled") else None,
    )
