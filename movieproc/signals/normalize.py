"""Per-shot normalization of scattering curves.

Each curve is divided by its mean over a q window where the solute and heating
signals are small (``window``), or over the whole q range (``total``, the total
scattering). After normalization curves are dimensionless, with a mean of 1 in
the window, so differences read as a fraction of the window intensity.
"""

from __future__ import annotations

import numpy as np

from ..errors import DataError

#: The normalization modes :func:`normalization_factors` knows.
MODES = ("window", "total", "none")


def window_mask(q, q_range):
    """Boolean mask (nq,) of the q points inside ``q_range`` = [low, high] (1/Å).

    Raises
    ------
    ValueError
        Naming ``q_range`` when no q point lies inside it.
    """
    q = np.asarray(q, float)
    if q_range is None:
        raise ValueError("q_range must be [low, high] in 1/Å, got None")
    low, high = q_range
    mask = (q >= low) & (q <= high)
    if not mask.any():
        raise ValueError(f"q_range [{low}, {high}] 1/Å holds no q point: expected a window overlapping the "
                         f"data's q range [{q[0]:.3g}, {q[-1]:.3g}] 1/Å")
    return mask


def normalization_factors(curves, q, mode="window", q_range=None):
    """Per-shot normalization factors (n,) float64.

    Parameters
    ----------
    curves : array_like (n, nq)
        Scattering curves.
    q : array_like (nq,)
        q, 1/Å.
    mode : {"window", "total", "none"}
        Mean over ``q_range``, mean over all q, or no normalization (1).
    q_range : (float, float)
        Window in 1/Å for ``mode="window"``.

    Raises
    ------
    ValueError
        Naming ``mode`` or ``q_range`` when they are unusable.
    DataError
        When a shot's factor is not positive.
    """
    curves = np.asarray(curves)
    if mode == "none":
        return np.ones(curves.shape[0])
    if mode == "total":
        factors = curves.mean(axis=1, dtype=np.float64)
    elif mode == "window":
        factors = curves[:, window_mask(q, q_range)].mean(axis=1, dtype=np.float64)
    else:
        raise ValueError(f"mode must be one of {', '.join(MODES)}, got {mode!r}")
    if np.any(~(factors > 0)):
        bad = int(np.argmax(~(factors > 0)))
        raise DataError(f"shot {bad} has a normalization factor of {factors[bad]!r} "
                        f"({mode} mode): expected a positive mean intensity")
    return factors


def normalize(curves, q, mode="window", q_range=None):
    """Normalized curves (n, nq) float32; see :func:`normalization_factors`."""
    f = normalization_factors(curves, q, mode, q_range)
    return (np.asarray(curves, np.float32) / f[:, None].astype(np.float32)).astype(np.float32, copy=False)
