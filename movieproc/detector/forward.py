"""Synthetic detector frames from known curves: the forward model of the integrate stage.

Each shot's I(q) is placed on the detector through the same geometry and
per-pixel factors the integrating side divides out, at the shot's own photon
energy, then counted with Poisson noise. A beamstop shadow (see
:func:`default_mask`) reads 0 and chosen hot pixels read a fixed high value,
so the demo can exercise masks: write ``default_mask(...)`` to a .npy file
named by ``detector.mask_file``, and hot pixels show up in a dark series from
:func:`render_dark`.
"""

from __future__ import annotations

import numpy as np

from ..xray import HC_KEV_ANGSTROM
from . import corrections, geometry
from .anisotropy import p2_regressor


def _section(detector: dict) -> dict:
    """The detector section with schema defaults filled in."""
    from ..config import validate

    return validate({"run": {"files": ["(forward model)"]}, "detector": dict(detector)})["detector"]


def _shape(detector: dict, shape):
    shape = shape if shape is not None else detector.get("shape_px")
    if shape is None:
        raise ValueError("the frame shape is needed: pass shape=(ny, nx) or set detector['shape_px']")
    return tuple(int(v) for v in shape)


def default_mask(detector: dict, shape=None) -> np.ndarray:
    """The beamstop shadow rendered by :func:`render_frames` by default.

    A disc of radius max(3, nx / 40) pixels around the beam centre and its
    holder, a strip max(2, nx / 32) pixels wide from the centre to the last
    row.

    Parameters
    ----------
    detector : dict
        ``detector`` config section (``beam_center_px``, ``shape_px``).
    shape : (int, int), optional
        Frame shape; default ``detector['shape_px']``.

    Returns
    -------
    ndarray, bool, shape (ny, nx)
        True in the shadow (pixels to leave out).
    """
    ny, nx = _shape(detector, shape)
    centre = detector.get("beam_center_px") or ((ny - 1) / 2.0, (nx - 1) / 2.0)
    rows, cols = np.indices((ny, nx), dtype=float)
    radius = max(3.0, nx / 40.0)
    half = max(2.0, nx / 32.0) / 2.0
    disc = (rows - centre[0]) ** 2 + (cols - centre[1]) ** 2 <= radius ** 2
    holder = (rows >= centre[0]) & (np.abs(cols - centre[1]) <= half)
    return disc | holder


def pick_hot_pixels(shape, count, rng) -> np.ndarray:
    """Distinct random pixel positions, (count, 2) int64 (row, col), drawn with ``rng``."""
    ny, nx = (int(v) for v in shape)
    flat = rng.choice(ny * nx, size=int(count), replace=False)
    return np.stack(np.unravel_index(np.sort(flat), (ny, nx)), axis=1).astype(np.int64)


def render_dark(shape, n, rng, *, level=10.0, noise=1.0, hot_pixels=None, hot_value=50000.0):
    """A dark series: Gaussian pedestal plus hot pixels.

    Parameters
    ----------
    shape : (int, int)
    n : int
        Number of dark frames.
    rng : numpy.random.Generator
    level, noise : float
        Pedestal mean and standard deviation, detector units.
    hot_pixels : (k, 2) int array, optional
        Positions (row, col) that read ``hot_value``.

    Returns
    -------
    ndarray (n, ny, nx) float32
    """
    ny, nx = (int(v) for v in shape)
    dark = (level + noise * rng.standard_normal((n, ny, nx))).astype(np.float32)
    if hot_pixels is not None and len(hot_pixels):
        hot = np.asarray(hot_pixels, dtype=np.int64)
        dark[:, hot[:, 0], hot[:, 1]] = hot_value
    return dark


def _shadow(masked_region, detector, shape):
    """Flat indices' mask of the pixels that read 0, or None."""
    if isinstance(masked_region, str):
        if masked_region != "default":
            raise ValueError(f"masked_region must be 'default', an array or None, got {masked_region!r}")
        masked_region = default_mask(detector, shape)
    return None if masked_region is None else np.asarray(masked_region, dtype=bool).ravel()


def _hot_indices(hot_pixels, shape, rng):
    """Flat indices of the hot pixels (a count drawn from ``rng``, or given positions), or None."""
    if isinstance(hot_pixels, (int, np.integer)):
        hot_pixels = pick_hot_pixels(shape, hot_pixels, rng)
    if hot_pixels is None or not len(hot_pixels):
        return None
    return np.ravel_multi_index(tuple(np.asarray(hot_pixels, dtype=np.int64).T), shape)


def render_frames(q, curves, energies, detector, rng, *, shape=None, photons_per_pixel=1000.0,
                  hot_pixels=None, hot_value=50000.0, masked_region="default", curves_p2=None,
                  pump_polarization_deg=0.0, dark=None, dtype=None):
    """Detector frames of shots with known I(q).

    The expected signal of pixel p in shot i is

        photons_per_pixel * [I_i(q_p) + P2(cos(theta_p) cos(phi_p - phi_L)) I2_i(q_p)] * F_p

    with q_p the pixel's q at the shot's photon energy, F_p the per-pixel
    factor the integrating side divides out (solid angle, polarization and
    the optional sensor/absorption terms, as switched in ``detector``), I2
    the optional P2 part. Curves are interpolated linearly in q and held at
    their end values outside ``q``.

    Parameters
    ----------
    q : array_like (nq,)
        Increasing q grid of the curves, 1/Å; should cover the detector.
    curves : array_like (n, nq)
        I(q) per shot, in photons per pixel per unit F when
        ``photons_per_pixel`` is 1.
    energies : array_like (n,)
        Photon energy of each shot, keV.
    detector : dict
        ``detector`` config section (missing keys take the schema defaults).
    rng : numpy.random.Generator
        Source of the Poisson noise (and of hot pixel positions when
        ``hot_pixels`` is a count).
    shape : (int, int), optional
        Frame shape; default ``detector['shape_px']``.
    photons_per_pixel : float or None
        Scale of the expected counts; None renders the expected signal itself
        (no noise, no scale).
    hot_pixels : int, (k, 2) int array, or None
        Hot pixels reading ``hot_value`` in every frame: a count (positions
        drawn from ``rng``, once per call: pass an array from
        :func:`pick_hot_pixels` to keep them fixed over calls) or positions.
    hot_value : float
        Reading of a hot pixel, detector units.
    masked_region : "default", (ny, nx) bool array, or None
        Pixels reading 0 (a shadow); "default" is :func:`default_mask`.
    curves_p2 : array_like (n, nq), optional
        P2 part I2(q) per shot.
    pump_polarization_deg : float
        Azimuth phi_L of the pump polarization, degrees.
    dark : array_like (ny, nx), optional
        Pedestal added to every frame, detector units.
    dtype : numpy dtype, optional
        Output type; default uint16 with noise (clipped to 0..65535),
        float32 without.

    Returns
    -------
    ndarray (n, ny, nx)
        Frames; uint16 or float32 by default (see ``dtype``).
    """
    detector = _section(detector)
    shape = _shape(detector, shape)
    geo = geometry.from_config(detector, shape)
    q = np.asarray(q, dtype=np.float64)
    curves = np.atleast_2d(np.asarray(curves, dtype=np.float64))
    energies = np.atleast_1d(np.asarray(energies, dtype=np.float64))
    n = curves.shape[0]
    if curves.shape[1] != q.size or energies.shape != (n,):
        raise ValueError(f"curves {curves.shape}, q {q.shape} and energies {energies.shape} do not match")
    if np.any(~(energies > 0)):
        raise ValueError("photon energies must be positive")
    two_theta, phi = geometry.scattering_angles(geo)
    q_per_kev = (4.0 * np.pi * np.sin(two_theta / 2.0) / HC_KEV_ANGSTROM).ravel()
    factor = corrections.factor_from_config(geo, detector).ravel()
    gain = 1.0 if photons_per_pixel is None else float(photons_per_pixel)
    factor = np.nan_to_num(factor * gain, nan=0.0)
    regressor = None
    if curves_p2 is not None:
        curves_p2 = np.atleast_2d(np.asarray(curves_p2, dtype=np.float64))
        if curves_p2.shape != curves.shape:
            raise ValueError(f"curves_p2 has shape {curves_p2.shape}, expected {curves.shape}")
        regressor = p2_regressor(two_theta, phi, np.deg2rad(pump_polarization_deg)).ravel()
    shadow = _shadow(masked_region, detector, shape)
    hot = _hot_indices(hot_pixels, shape, rng)
    pedestal = None if dark is None else np.asarray(dark, dtype=np.float64).ravel()
    noisy = photons_per_pixel is not None
    dtype = np.dtype(dtype or (np.uint16 if noisy else np.float32))
    out = np.empty((n, shape[0] * shape[1]), dtype=dtype)
    for i in range(n):
        qp = q_per_kev * energies[i]
        signal = np.interp(qp, q, curves[i])
        if regressor is not None:
            signal += regressor * np.interp(qp, q, curves_p2[i])
        expected = np.clip(signal * factor, 0.0, None)
        frame = rng.poisson(expected).astype(np.float64) if noisy else expected
        if pedestal is not None:
            frame += pedestal
        if shadow is not None:
            frame[shadow] = 0.0
        if hot is not None:
            frame[hot] = hot_value
        if dtype.kind in "iu":
            info = np.iinfo(dtype)
            frame = np.clip(np.rint(frame), info.min, info.max)
        out[i] = frame
    return out.reshape((n,) + shape)
