"""Pixel masks found from the data: hot, dead and saturated pixels.

Convention throughout the detector package: a mask is a boolean array that is
True where a pixel is *left out*.
"""

from __future__ import annotations

import numpy as np

#: Standard deviation of a normal distribution per unit median absolute deviation.
MAD_TO_SIGMA = 1.4826


def _robust_z(values: np.ndarray) -> np.ndarray:
    finite = np.isfinite(values)
    if not finite.any():
        return np.full(values.shape, np.inf)
    centre = np.median(values[finite])
    spread = MAD_TO_SIGMA * np.median(np.abs(values[finite] - centre))
    spread = spread if spread > 0 else np.finfo(float).tiny
    with np.errstate(invalid="ignore"):
        return np.where(finite, (values - centre) / spread, np.inf)


def hot_pixels(dark, threshold=10.0) -> np.ndarray:
    """Pixels whose dark level (or dark noise) stands far above the rest.

    Parameters
    ----------
    dark : array_like, shape (ny, nx) or (n, ny, nx)
        One dark frame or a series of dark frames, detector units.
    threshold : float
        Robust z-score (in units of 1.4826 x the median absolute deviation
        over the frame) above which a pixel is hot.

    Returns
    -------
    ndarray, bool, shape (ny, nx)
        True for hot pixels (the pixel's mean, or for a series of at least
        three frames its standard deviation, is above the threshold), and for
        pixels with non-finite dark values.
    """
    dark = np.asarray(dark, dtype=np.float64)
    if dark.ndim == 2:
        return _robust_z(dark) > threshold
    if dark.ndim != 3 or dark.shape[0] < 1:
        raise ValueError(f"dark must be (ny, nx) or (n, ny, nx), got shape {dark.shape}")
    hot = _robust_z(dark.mean(axis=0)) > threshold
    if dark.shape[0] >= 3:
        hot |= _robust_z(dark.std(axis=0)) > threshold
    return hot


def dead_pixels(flat, fraction=0.2) -> np.ndarray:
    """Pixels that respond far less than the rest to a flat illumination.

    Parameters
    ----------
    flat : array_like, shape (ny, nx) or (n, ny, nx)
        Flat-field frame(s), dark subtracted, detector units.
    fraction : float
        A pixel whose mean response is below ``fraction`` times the median
        response is dead.

    Returns
    -------
    ndarray, bool, shape (ny, nx)
        True for dead pixels and pixels with non-finite values.
    """
    flat = np.asarray(flat, dtype=np.float64)
    if flat.ndim == 3:
        flat = flat.mean(axis=0)
    if flat.ndim != 2:
        raise ValueError(f"flat must be (ny, nx) or (n, ny, nx), got shape {flat.shape}")
    finite = np.isfinite(flat)
    level = np.median(flat[finite]) if finite.any() else np.nan
    with np.errstate(invalid="ignore"):
        return ~finite | ~(flat >= fraction * level)


def saturated(frames, level) -> np.ndarray:
    """Pixels at or above a saturation level, per frame.

    Parameters
    ----------
    frames : array_like, shape (..., ny, nx)
        Raw frames, detector units.
    level : float
        Saturation level, detector units.

    Returns
    -------
    ndarray, bool, same shape as ``frames``
    """
    return np.asarray(frames) >= level
