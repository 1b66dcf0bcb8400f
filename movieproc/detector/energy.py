"""Per-shot photon energy: FEL resonance, choice of source, and curves moved to each shot's q.

At a fixed pixel q = 4 pi sin(theta) / lambda is proportional to the photon
energy, so a shot at energy E sees at a pixel the q that a shot at the
reference energy E0 sees times E / E0. Frames are therefore integrated once on
a grid of q0 (q at E0), and each shot's curve at q is read off its q0 curve at
q0 = q E0 / E (:func:`rescale_curves`).
"""

from __future__ import annotations

import numpy as np
from scipy import constants

from ..xray import HC_KEV_ANGSTROM

#: Electron rest energy m_e c^2 in GeV (CODATA, scipy.constants).
ELECTRON_REST_GEV = constants.physical_constants["electron mass energy equivalent in MeV"][0] * 1e-3

#: Codes for where a shot's photon energy came from.
FROM_RUN, FROM_ELECTRON, FROM_CONFIG, MISSING = 0, 1, 2, -1


def resonance_energy(electron_energy_gev, period_mm, k, kind="planar", harmonic=1):
    """Photon energy of the undulator resonance on axis, keV.

    lambda = lambda_u / (2 gamma^2) (1 + K^2 / 2) for a planar undulator and
    lambda_u / (2 gamma^2) (1 + K^2) for a helical one, gamma = E_e / (m_e c^2);
    harmonic n has lambda / n.

    Parameters
    ----------
    electron_energy_gev : float or array_like
        Electron beam energy, GeV.
    period_mm : float
        Undulator period lambda_u, mm.
    k : float
        Undulator parameter K (dimensionless).
    kind : {"planar", "helical"}
    harmonic : int
        Harmonic number (odd harmonics on axis for a planar undulator).

    Returns
    -------
    float or ndarray
        Photon energy, keV.
    """
    if kind == "planar":
        bracket = 1.0 + k * k / 2.0
    elif kind == "helical":
        bracket = 1.0 + k * k
    else:
        raise ValueError(f"undulator kind must be 'planar' or 'helical', got {kind!r}")
    if not (period_mm > 0 and k >= 0 and harmonic >= 1):
        raise ValueError("undulator period must be positive, K non-negative, harmonic >= 1")
    gamma = np.asarray(electron_energy_gev, dtype=float) / ELECTRON_REST_GEV
    with np.errstate(divide="ignore"):
        wavelength_a = period_mm * 1e7 / (2.0 * gamma ** 2) * bracket / harmonic
        out = HC_KEV_ANGSTROM / wavelength_a
    return out.item() if out.ndim == 0 else out


def choose_photon_energy(n, photon=None, electron=None, *, source="auto", default_kev=None,
                         undulator=None):
    """Photon energy of every shot, and where each value came from.

    Parameters
    ----------
    n : int
        Number of shots.
    photon : ndarray (n,) or None
        Measured photon energies (``shots/photon_energy``), keV.
    electron : ndarray (n,) or None
        Electron energies (``shots/electron_energy``), GeV.
    source : {"auto", "run", "electron", "config"}
        ``auto``: the measured value where it is finite and positive, else the
        resonance energy from the electron energy (when ``undulator`` is
        complete), else ``default_kev``. The others use only that source.
    default_kev : float or None
        Fallback photon energy, keV.
    undulator : dict or None
        ``period_mm``, ``k``, ``kind`` and ``harmonic`` for :func:`resonance_energy`;
        unusable when period or K is None.

    Returns
    -------
    energy : ndarray (n,) float64
        keV; NaN where no source gives a value.
    origin : ndarray (n,) int8
        :data:`FROM_RUN`, :data:`FROM_ELECTRON`, :data:`FROM_CONFIG` or :data:`MISSING`.
    """
    if source not in ("auto", "run", "electron", "config"):
        raise ValueError(f"unknown photon energy source {source!r}")
    energy = np.full(n, np.nan)
    origin = np.full(n, MISSING, dtype=np.int8)

    def fill(values, code):
        values = np.asarray(values, dtype=float)
        with np.errstate(invalid="ignore"):
            take = (origin == MISSING) & np.isfinite(values) & (values > 0)
        energy[take] = values[take]
        origin[take] = code

    if photon is not None and source in ("auto", "run"):
        fill(photon, FROM_RUN)
    und = undulator or {}
    usable = und.get("period_mm") is not None and und.get("k") is not None
    if electron is not None and usable and source in ("auto", "electron"):
        electron = np.asarray(electron, dtype=float)
        with np.errstate(invalid="ignore"):
            ok = np.isfinite(electron) & (electron > 0)
        values = np.full(n, np.nan)
        values[ok] = resonance_energy(electron[ok], und["period_mm"], und["k"], und.get("kind", "planar"),
                                      und.get("harmonic", 1))
        fill(values, FROM_ELECTRON)
    if default_kev is not None and source in ("auto", "config"):
        fill(np.full(n, float(default_kev)), FROM_CONFIG)
    return energy, origin


def rescale_curves(curves, grid, q, scale):
    """Read each shot's curve at q off its curve on the reference grid.

    The value at q of shot i is its reference curve at q / scale[i], with
    scale = E_i / E0, by 4-point Lagrange (cubic) interpolation on the uniform
    ``grid`` (exact for cubic polynomials; error of order step^4 times the
    fourth derivative).

    Parameters
    ----------
    curves : array_like (n, ng)
        Curves on ``grid`` (e.g. integrated at the reference energy E0).
    grid : array_like (ng,)
        Uniform increasing grid, 1/Å.
    q : array_like (nq,)
        Where the output curves are wanted, 1/Å.
    scale : array_like (n,)
        Photon energy of each shot over the reference energy.

    Returns
    -------
    ndarray (n, nq) float64
        NaN where the 4-point stencil leaves the grid or meets NaN.
    """
    curves = np.asarray(curves, dtype=np.float64)
    grid = np.asarray(grid, dtype=np.float64)
    q = np.asarray(q, dtype=np.float64)
    scale = np.asarray(scale, dtype=np.float64)
    if curves.ndim != 2 or curves.shape[1] != grid.size or scale.shape != (curves.shape[0],):
        raise ValueError(f"curves {curves.shape}, grid {grid.shape} and scale {scale.shape} do not match")
    step = (grid[-1] - grid[0]) / (grid.size - 1)
    t = (q[None, :] / scale[:, None] - grid[0]) / step
    base = np.floor(t).astype(np.int64)
    u = t - base
    weights = (-u * (u - 1) * (u - 2) / 6, (u + 1) * (u - 1) * (u - 2) / 2,
               -(u + 1) * u * (u - 2) / 2, (u + 1) * u * (u - 1) / 6)
    inside = (base >= 1) & (base + 2 <= grid.size - 1)
    idx = np.clip(base, 1, grid.size - 3)
    out = np.zeros(t.shape)
    for offset, w in zip((-1, 0, 1, 2), weights, strict=True):
        out += w * np.take_along_axis(curves, idx + offset, axis=1)
    return np.where(inside, out, np.nan)
