"""Internal coordinates of structures, vectorised over frames.

Positions in Å, distances in Å, angles in degrees.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["distance", "angle"]


def _atoms(positions, indices):
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim < 2 or positions.shape[-1] != 3:
        raise InputError("positions", f"shape {positions.shape}", "shape (..., N, 3) (Å)")
    n = positions.shape[-2]
    for i in indices:
        if not (-n <= int(i) < n):
            raise InputError("positions", f"atom index {i}", f"an index below {n} (atoms)")
    return positions


def distance(positions, i, j):
    """Distance between atoms i and j.

    Parameters
    ----------
    positions : array_like, shape (..., N, 3)
        Positions, Å (any leading frame axes).
    i, j : int
        Atom indices.

    Returns
    -------
    ndarray, shape (...)
        |r_j - r_i|, Å, float64 (a 0-d array for a single structure).
    """
    p = _atoms(positions, (i, j))
    return np.linalg.norm(p[..., j, :] - p[..., i, :], axis=-1)


def angle(positions, i, j, k):
    """Angle i-j-k at atom j.

    Parameters
    ----------
    positions : array_like, shape (..., N, 3)
        Positions, Å.
    i, j, k : int
        Atom indices; j is the vertex.

    Returns
    -------
    ndarray, shape (...)
        Angle between r_i - r_j and r_k - r_j, degrees in [0, 180], float64.
    """
    p = _atoms(positions, (i, j, k))
    a = p[..., i, :] - p[..., j, :]
    b = p[..., k, :] - p[..., j, :]
    # atan2(|a x b|, a . b) stays accurate near 0 and 180 degrees
    cross = np.linalg.norm(np.cross(a, b), axis=-1)
    dot = (a * b).sum(axis=-1)
    return np.degrees(np.arctan2(cross, dot))
