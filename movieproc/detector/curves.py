"""Shots' frames to curves on one q axis, whatever each shot's photon energy.

Frames are integrated on a grid of q at a reference photon energy E0
(:mod:`integration`); each shot's curve is then read at q E0 / E_shot
(:func:`energy.rescale_curves`), so photon-energy jitter does not move the q
axis. The layout (:class:`CurveLayout`) is built once per run; a chunk of
shots goes through :func:`shot_curves`.

Variances of the means are read at the shot's q like the curves, by
interpolating the variance curve: exact on the grid nodes; between nodes the
interpolated mean averages neighbouring grid values whose noise is only
partly shared, so its true variance is lower (by up to about a quarter midway
for pixel noise): the interpolated variance errs on the high side there.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import energy, integration

#: Rounding allowance when counting grid steps (a fraction of a step).
STEP_ROUNDING = 1e-9
#: Extra grid points below and above the needed range: the 4-point stencil of
#: :func:`energy.rescale_curves` reaches one point below and two above.
STENCIL_BELOW, STENCIL_ABOVE = 2, 3


def reference_grid(q, scale, energy_aware=True):
    """Uniform grid at the reference energy covering q / scale for every shot.

    Parameters
    ----------
    q : ndarray (nq,)
        Uniform output q axis, 1/Å.
    scale : ndarray (n,)
        Photon energy of each shot over the reference energy.
    energy_aware : bool
        False: the grid is ``q`` itself (no rescaling).

    Returns
    -------
    ndarray (ng,) float64, 1/Å
        ``q`` extended on both sides by whole steps, with room for the stencil.
    """
    q = np.asarray(q, dtype=np.float64)
    if not energy_aware:
        return q.copy()
    scale = np.asarray(scale, dtype=np.float64)
    step = (q[-1] - q[0]) / (q.size - 1)
    below = max(0.0, q[0] - q[0] / scale.max())
    above = max(0.0, q[-1] / scale.min() - q[-1])
    lo = int(math.ceil(below / step - STEP_ROUNDING)) + STENCIL_BELOW
    hi = int(math.ceil(above / step - STEP_ROUNDING)) + STENCIL_ABOVE
    return q[0] + step * np.arange(-lo, q.size + hi)


def sector_layout(phi, sectors):
    """Sector edges (radians), azimuths wrapped into them, and the centres (degrees).

    Sector k covers azimuths [k - 1/2, k + 1/2) * 360 / S degrees, so sector 0 is
    centred on the +x (column) direction; azimuth runs from +x towards +y (rows).

    Parameters
    ----------
    phi : ndarray (ny, nx)
        Azimuth of each pixel, radians.
    sectors : int
        Number S of equal sectors (>= 2).
    """
    if int(sectors) < 2:
        raise ValueError(f"sectors must be at least 2 for a sector layout, got {sectors}")
    width = 2.0 * np.pi / sectors
    edges = width * (np.arange(sectors + 1) - 0.5)
    wrapped = np.mod(phi - edges[0], 2.0 * np.pi) + edges[0]
    wrapped = np.where(wrapped >= edges[-1], edges[0], wrapped)  # rounding at the seam
    return edges, wrapped, 360.0 * np.arange(sectors) / sectors


def uncovered(weights, grid, q, scale, energy_aware=True):
    """q points whose interpolation stencil meets a grid point without pixels.

    Parameters
    ----------
    weights : ndarray (..., ng)
        Pixel weights per grid point (e.g. ``Binning.moments[0]``).
    grid, q : ndarray
        Reference grid and output q axis, 1/Å.
    scale : ndarray (n,)
        Photon energy of each shot over the reference energy; the lowest and
        highest are probed.

    Returns
    -------
    ndarray (..., nq) bool
    """
    covered = np.where(weights > 0, 1.0, np.nan).reshape(-1, grid.size)
    if not energy_aware:
        probe = [covered]
    else:
        probe = [energy.rescale_curves(covered, grid, q, np.full(covered.shape[0], s))
                 for s in (np.min(scale), np.max(scale))]
    return (~np.all(np.isfinite(np.stack(probe)), axis=0)).reshape(weights.shape[:-1] + (q.size,))


@dataclass(frozen=True)
class CurveLayout:
    """What :func:`shot_curves` needs, built once per run.

    Attributes
    ----------
    binning : integration.Binning
        Pixel layout on the reference grid ``binning.grid`` (1/Å).
    q : ndarray (nq,)
        Output q axis, 1/Å.
    energy_aware : bool
        Read each shot's curve at q E0 / E_shot (else on the grid as it is).
    variance : {None, "counting", "spread"}
        Variance of each mean to compute (:func:`integration.mean_variance`).
    sector_empty : ndarray (S, nq) bool or None
        Sector q points without pixels (NaN there is expected, not counted as lost).
    """

    binning: integration.Binning
    q: np.ndarray
    energy_aware: bool
    variance: str | None
    sector_empty: np.ndarray | None

    def __post_init__(self):
        if self.variance not in (None, "counting", "spread"):
            raise ValueError(f"variance must be None, 'counting' or 'spread', got {self.variance!r}")
        if self.variance is not None and self.binning.n_channels > 1:
            raise ValueError(f"variance must be None with the P2 regressor, got {self.variance!r} (the variance "
                             "of the isotropic part of the P2 fit is not computed)")


@dataclass(frozen=True)
class ShotCurves:
    """Curves of a chunk of shots on the output q axis.

    Attributes
    ----------
    arrays : dict of str to ndarray
        ``curves`` (n, nq); ``curves_p2`` (n, nq) with the P2 regressor;
        ``curves_var`` (n, nq) with a variance mode; ``curves_sectors``
        (n, S, nq) with sectors. Intensity units of the frames over the
        correction factors (squared for the variance).
    excluded : int
        Pixels left out of their frame (non-finite or saturated).
    lost_sector : int
        Sector values NaN beyond the sector q points without pixels.
    lost_variance : int
        Variance values that are NaN.
    """

    arrays: dict
    excluded: int
    lost_sector: int
    lost_variance: int


def shot_curves(frames, layout: CurveLayout, scale) -> ShotCurves:
    """Integrate a chunk of shots and read their curves at the output q.

    Parameters
    ----------
    frames : array_like (n, ny, nx)
        Raw frames of the shots.
    layout : CurveLayout
    scale : ndarray (n,)
        Photon energy of each shot over the reference energy (ignored unless
        ``layout.energy_aware``).

    Returns
    -------
    ShotCurves
    """
    grid, q = layout.binning.grid, layout.q
    scale = np.asarray(scale, dtype=np.float64)

    def at_q(values):
        return energy.rescale_curves(values, grid, q, scale) if layout.energy_aware else values

    res = integration.integrate(frames, layout.binning, variance=layout.variance)
    arrays = {"curves": at_q(res.mean)}
    if res.p2 is not None:
        arrays["curves_p2"] = at_q(res.p2)
    lost_var = lost_sector = 0
    if res.variance is not None:
        var = np.maximum(at_q(res.variance), 0.0)  # interpolation overshoot; NaN stays NaN
        lost_var = int(np.sum(~np.isfinite(var)))
        arrays["curves_var"] = var
    if res.sectors is not None:
        per = res.sectors
        n, sectors = per.shape[:2]
        if layout.energy_aware:
            per = energy.rescale_curves(per.reshape(n * sectors, -1), grid, q,
                                        np.repeat(scale, sectors)).reshape(n, sectors, q.size)
        empty = layout.sector_empty if layout.sector_empty is not None else np.zeros(per.shape[1:], bool)
        lost_sector = int(np.sum(~np.isfinite(per) & ~empty[None]))
        arrays["curves_sectors"] = per
    return ShotCurves(arrays, int(res.excluded.sum()), lost_sector, lost_var)
