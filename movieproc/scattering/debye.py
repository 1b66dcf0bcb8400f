"""Debye scattering of atomic structures, exact and through distance histograms.

S(q) = sum_i |f_i|^2 + 2 sum_{i<j} Re(f_i f_j*) sin(q r_ij) / (q r_ij) [* exp(-sigma_ij^2 q^2 / 2)]

Conventions: q in 1/Å, positions and distances in Å, energy in keV, S in e.u.^2
(electrons squared) per structure.

Two paths:

- :func:`debye` sums over all atom pairs (exact; pairs processed in chunks so memory
  stays bounded). For small structures and as the reference.
- :func:`distance_histograms` + :func:`debye_from_histograms` (or :func:`debye_histogram`):
  pair distances per element pair are binned on a grid r_k = k dr, each distance shared
  linearly between its two neighbouring grid points (weights 1 - t and t, t the
  fractional position), so that sum_k n(r_k) sinc(q r_k) is the sum of sinc(q r_ij)
  linearly interpolated between grid points. The histograms do not depend on q or
  energy; the q-dependent part is one matrix product with a tabulated sinc.

sinc values are evaluated in float32 (np.sin is much faster there). Rounding the
argument x = q r to float32 changes it by at most 6e-8 x, so sin(x)/x changes by at
most ~6e-8 in absolute terms for any x; sums are accumulated in float64.
"""

from __future__ import annotations

from dataclasses import dataclass
from math import sqrt

import numba
import numpy as np

from ..errors import InputError
from . import formfactors

__all__ = [
    "DistanceHistograms",
    "debye",
    "distance_histograms",
    "debye_from_histograms",
    "debye_histogram",
    "effective_form_factors",
    "sinc_table",
    "pair_damping",
]


# ---------------------------------------------------------------------------
# Input checks and form factors
# ---------------------------------------------------------------------------

def _check_structure(positions, elements, what="structure", frames=False):
    positions = np.asarray(positions, dtype=np.float64)
    want = 3 if frames else 2
    if positions.ndim != want or positions.shape[-1] != 3:
        shape = "(F, N, 3)" if frames else "(N, 3)"
        raise InputError(what, f"positions with shape {positions.shape}", f"shape {shape} (Å)")
    elements = [str(e) for e in elements]
    if len(elements) != positions.shape[-2]:
        raise InputError(what, f"{len(elements)} element symbols for {positions.shape[-2]} atoms",
                         "one element symbol per atom")
    if positions.shape[-2] == 0:
        raise InputError(what, "no atoms", "at least one atom")
    if not np.all(np.isfinite(positions)):
        bad = np.argwhere(~np.isfinite(positions))[0]
        where = f"frame {bad[0]}, atom {bad[1]}" if frames else f"atom {bad[0]}"
        raise InputError(what, f"non-finite coordinates at {where}", "finite positions (Å)")
    return positions, elements


def _check_q(q):
    q = np.asarray(q, dtype=np.float64)
    if q.ndim != 1 or (q.size and (not np.all(np.isfinite(q)) or q.min() < 0)):
        raise InputError("q", f"array of shape {q.shape} (min {np.nanmin(q) if q.size else 'n/a'})",
                         "a 1-D array of finite q >= 0 (1/Å)")
    return q


def effective_form_factors(q, elements, photon_energy=None, anomalous=False, excluded_volume=None):
    """Form factors of the distinct elements, optionally less their displaced solvent.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    elements : sequence of str
        Element or ion symbol per atom.
    photon_energy : float, optional
        Photon energy, keV (for ``anomalous``).
    anomalous : bool
        Include f' + i f''.
    excluded_volume : float or None
        Bulk solvent electron density rho0 (e/Å^3); when given, the dummy-atom factor
        g(q) of :func:`movieproc.scattering.formfactors.dummy_form_factor` is
        subtracted from each f(q).

    Returns
    -------
    unique : list of str, length n_unique
        Distinct symbols in order of first appearance.
    table : ndarray, shape (n_unique, nq)
        float64, or complex128 when ``anomalous``.
    """
    unique, table = formfactors.form_factor_table(q, elements, photon_energy=photon_energy, anomalous=anomalous)
    if excluded_volume is not None and excluded_volume is not False:
        rho0 = float(excluded_volume)
        table = table - np.array([formfactors.dummy_form_factor(q, e, rho0) for e in unique])
    return unique, table


def _pair_weights(table):
    """Re(f_a f_b*) for a <= b: (pairs list, weights (P, nq) float64)."""
    n = table.shape[0]
    pairs = [(a, b) for a in range(n) for b in range(a, n)]
    w = np.array([np.real(table[a] * np.conj(table[b])) for a, b in pairs])
    return pairs, w.reshape(len(pairs), table.shape[1])


def pair_damping(damping, pair_symbols, q):
    """Debye-Waller damping factors exp(-sigma^2 q^2 / 2) per element pair.

    Parameters
    ----------
    damping : None, float or dict
        None: no damping. float: one sigma (Å, rms spread of each pair distance) for
        all pairs. dict: ``{("Ir", "Cl"): 0.05, ...}`` or ``{"Ir-Cl": 0.05}``; order
        within a pair does not matter; pairs not listed are undamped.
    pair_symbols : sequence of (str, str), length P
        Element pairs.
    q : ndarray, shape (nq,)
        Momentum transfer, 1/Å.

    Returns
    -------
    ndarray, shape (P, nq) or None
        Factors (float64), None when ``damping`` is None.
    """
    if damping is None:
        return None
    if isinstance(damping, dict):
        sig = {}
        for key, value in damping.items():
            a, b = key.split("-") if isinstance(key, str) else key
            sig[frozenset((str(a), str(b)))] = float(value)
        sigmas = np.array([sig.get(frozenset(p), 0.0) for p in pair_symbols])
    else:
        try:
            sigmas = np.full(len(pair_symbols), float(damping))
        except (TypeError, ValueError):
            raise InputError("damping", f"{type(damping).__name__} {damping!r}",
                             "None, a sigma in Å, or a dict of element pair -> sigma") from None
    if np.any(~np.isfinite(sigmas)) or np.any(sigmas < 0):
        raise InputError("damping", f"sigmas {sigmas}", "finite sigma >= 0 (Å)")
    return np.exp(-0.5 * np.multiply.outer(sigmas**2, q**2))


def _sinc32(x):
    """sin(x)/x in float32 for float32 ``x`` >= 0 (1 at x = 0).

    x is raised to at least 1e-30 (a normal float32), where sin(x)/x is exactly 1.
    """
    y = np.maximum(np.asarray(x, dtype=np.float32), np.float32(1e-30))
    out = np.sin(y)
    out /= y
    return out


# ---------------------------------------------------------------------------
# Exact path
# ---------------------------------------------------------------------------

def debye(q, positions, elements, photon_energy=None, anomalous=False, damping=None,
          excluded_volume=None, max_chunk=2**22):
    """Debye scattering by an explicit sum over all atom pairs.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    positions : array_like, shape (N, 3)
        Atom positions, Å.
    elements : sequence of str, length N
        Element or ion symbol per atom.
    photon_energy : float, optional
        Photon energy, keV (for ``anomalous``).
    anomalous : bool
        Use f0 + f' + i f''.
    damping : None, float, dict or array_like (N, N)
        Pair damping exp(-sigma_ij^2 q^2 / 2): see :func:`pair_damping`; an (N, N)
        array gives sigma_ij (Å) per atom pair (the upper triangle is used).
    excluded_volume : float, optional
        Solvent electron density (e/Å^3) for the dummy-atom correction.
    max_chunk : int
        Largest number of (pair, q) values held at once; bounds memory
        (~4 bytes each).

    Returns
    -------
    ndarray, shape (nq,)
        S(q), e.u.^2, float64.
    """
    q = _check_q(q)
    positions, elements = _check_structure(positions, elements)
    unique, table = effective_form_factors(
        q, elements, photon_energy=photon_energy, anomalous=anomalous, excluded_volume=excluded_volume)
    unique, types, pairs, pair_row = _types(elements)
    n = len(elements)
    counts = np.bincount(types, minlength=len(unique))
    s = (counts[:, None] * np.abs(table) ** 2).sum(axis=0)
    _, weights = _pair_weights(table)
    per_atom_sigma = None
    if damping is not None and not isinstance(damping, dict) and np.ndim(damping) == 2:
        per_atom_sigma = np.asarray(damping, dtype=np.float64)
        if per_atom_sigma.shape != (n, n):
            raise InputError("damping", f"array of shape {per_atom_sigma.shape}",
                             f"shape ({n}, {n}) of sigma_ij in Å")
        factors = None
    else:
        factors = pair_damping(damping, [(unique[a], unique[b]) for a, b in pairs], q)
    q32 = q.astype(np.float32)
    q2 = q**2
    sums = np.zeros((len(pairs), q.size))  # sum of sinc over the pairs of each element pair
    n_pairs = n * (n - 1) // 2
    step = max(1, int(max_chunk) // max(1, q.size))
    for start in range(0, n_pairs, step):
        i, j = _condensed_to_ij(np.arange(start, min(start + step, n_pairs)), n)
        p = pair_row[types[i], types[j]]
        order = np.argsort(p, kind="stable")
        i, j, p = i[order], j[order], p[order]
        d = np.sqrt(((positions[i] - positions[j]) ** 2).sum(axis=1))
        block = _sinc32(np.multiply.outer(d.astype(np.float32), q32))
        if per_atom_sigma is not None:
            sig = per_atom_sigma[i, j]
            block *= np.exp(-0.5 * np.multiply.outer(sig**2, q2)).astype(np.float32)
        bounds = np.flatnonzero(np.r_[True, p[1:] != p[:-1], True])
        for a, b in zip(bounds[:-1], bounds[1:], strict=True):
            sums[p[a]] += block[a:b].sum(axis=0, dtype=np.float64)
    if factors is not None:
        sums *= factors
    return s + 2.0 * (weights * sums).sum(axis=0)


def _condensed_to_ij(k, n):
    """Atom indices (i, j), i < j, of condensed pair indices k (row-major upper triangle)."""
    i = (n - 2 - np.floor(np.sqrt(-8.0 * k + 4.0 * n * (n - 1) - 7) / 2.0 - 0.5)).astype(np.int64)
    j = (k + i + 1 - n * (n - 1) // 2 + (n - i) * (n - i - 1) // 2).astype(np.int64)
    return i, j


# ---------------------------------------------------------------------------
# Histogram path
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class DistanceHistograms:
    """Pair-distance histograms per element pair, independent of q and energy.

    Attributes
    ----------
    elements : tuple of str, length n_unique
        Distinct element symbols, in order of first appearance.
    atom_counts : ndarray, shape (n_unique,), int64
        Number of atoms of each element.
    pairs : tuple of (int, int), length P
        Element pairs (a, b), a <= b, as indices into ``elements``.
    dr : float
        Grid step, Å.
    counts : ndarray, shape (P, K) or (F, P, K), float64
        Pair counts on the grid r_k = k dr, k = 0..K-1, each pair shared linearly
        between its two neighbouring grid points (F frames when built from a
        trajectory).
    """

    elements: tuple
    atom_counts: np.ndarray
    pairs: tuple
    dr: float
    counts: np.ndarray

    @property
    def r(self):
        """Grid r_k = k dr, shape (K,), Å."""
        return np.arange(self.counts.shape[-1]) * self.dr

    @property
    def pair_symbols(self):
        """Element symbol pairs, length P."""
        return tuple((self.elements[a], self.elements[b]) for a, b in self.pairs)


@numba.njit(nogil=True, cache=True)
def _histogram_frame(pos, types, pair_row, inv_dr, out):  # pragma: no cover - compiled
    """Add the linear-share histogram of one frame to ``out`` (P, K).

    For each atom i the distances to atoms j > i are first computed into a buffer
    (a loop the compiler vectorises), then scattered into the histogram.
    Returns the largest distance that did not fit on the grid (0.0 if none), Å.
    """
    n = pos.shape[0]
    x = np.ascontiguousarray(pos[:, 0])
    y = np.ascontiguousarray(pos[:, 1])
    z = np.ascontiguousarray(pos[:, 2])
    buf = np.empty(n)
    k_last = out.shape[1] - 1
    overflow = 0.0
    for i in range(n - 1):
        xi = x[i]
        yi = y[i]
        zi = z[i]
        m = n - i - 1
        for jj in range(m):
            j = i + 1 + jj
            dx = x[j] - xi
            dy = y[j] - yi
            dz = z[j] - zi
            buf[jj] = sqrt(dx * dx + dy * dy + dz * dz) * inv_dr
        row_i = pair_row[types[i]]
        for jj in range(m):
            u = buf[jj]
            k = int(u)
            if k >= k_last:
                overflow = max(overflow, u / inv_dr)
                continue
            t = u - k
            row = row_i[types[i + 1 + jj]]
            out[row, k] += 1.0 - t
            out[row, k + 1] += t
    return overflow


def _types(elements):
    unique = list(dict.fromkeys(elements))
    index = {e: k for k, e in enumerate(unique)}
    types = np.array([index[e] for e in elements], dtype=np.int64)
    n = len(unique)
    pairs = [(a, b) for a in range(n) for b in range(a, n)]
    pair_row = np.empty((n, n), dtype=np.int64)
    for p, (a, b) in enumerate(pairs):
        pair_row[a, b] = pair_row[b, a] = p
    return unique, types, pairs, pair_row


def _used_bins(counts):
    """Number of leading grid points up to the last non-empty one (the rest add 0)."""
    nonzero = np.flatnonzero(counts.reshape(-1, counts.shape[-1]).any(axis=0))
    return int(nonzero[-1]) + 1 if nonzero.size else 0


def default_r_max(positions, dr):
    """A histogram range that holds every pair distance: the largest bounding-box
    diagonal over all frames plus two grid steps, Å. ``positions`` (..., N, 3)."""
    positions = np.asarray(positions, dtype=np.float64)
    span = positions.max(axis=-2) - positions.min(axis=-2)
    return float(np.sqrt((span**2).sum(axis=-1)).max()) + 2.0 * dr


def histogram_grid_size(r_max, dr):
    """Number of grid points K so that the grid k dr, k < K, reaches ``r_max``."""
    return int(np.ceil(r_max / dr)) + 2


def distance_histograms(positions, elements, dr=0.01, r_max=None):
    """Pair-distance histograms per element pair with linear sharing.

    Parameters
    ----------
    positions : array_like, shape (N, 3) or (F, N, 3)
        Atom positions, Å (one structure or F frames of one trajectory).
    elements : sequence of str, length N
        Element or ion symbol per atom.
    dr : float
        Grid step, Å (default 0.01).
    r_max : float, optional
        Largest distance the grid must hold, Å; default from the bounding box.

    Returns
    -------
    DistanceHistograms
        ``counts`` has shape (P, K) for one structure, (F, P, K) for frames.

    Raises
    ------
    InputError
        Bad shapes, non-finite positions, ``dr <= 0`` or a distance beyond ``r_max``.
    """
    frames = np.ndim(positions) == 3
    positions, elements = _check_structure(positions, elements, frames=frames)
    if not (np.isfinite(dr) and dr > 0):
        raise InputError("dr", f"{dr!r}", "a grid step > 0 (Å)")
    if r_max is None:
        r_max = default_r_max(positions, dr)
    k_size = histogram_grid_size(r_max, dr)
    unique, types, pairs, pair_row = _types(elements)
    stack = positions if frames else positions[None]
    counts = np.zeros((stack.shape[0], len(pairs), k_size))
    for f in range(stack.shape[0]):
        overflow = _histogram_frame(stack[f], types, pair_row, 1.0 / dr, counts[f])
        if overflow > 0:
            raise InputError(f"frame {f}" if frames else "structure",
                             f"pair distances up to {overflow:.3f} Å",
                             f"distances below r_max = {r_max:g} Å")
    return DistanceHistograms(
        elements=tuple(unique),
        atom_counts=np.bincount(types, minlength=len(unique)).astype(np.int64),
        pairs=tuple(pairs),
        dr=float(dr),
        counts=counts if frames else counts[0],
    )


def sinc_table(q, r):
    """sin(q r) / (q r) on a grid, shape (K, nq), float64 (evaluated in float32).

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    r : array_like, shape (K,)
        Distances, Å.
    """
    q = _check_q(q)
    r = np.asarray(r, dtype=np.float64)
    return _sinc32(np.multiply.outer(r.astype(np.float32), q.astype(np.float32))).astype(np.float64)


def debye_from_histograms(q, histograms, form_factors, damping=None, sinc=None):
    """Debye scattering from distance histograms and a form-factor table.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    histograms : DistanceHistograms
        From :func:`distance_histograms` (one structure or F frames).
    form_factors : array_like, shape (n_unique, nq)
        Form factor of each of ``histograms.elements`` at ``q`` (real or complex),
        e.g. from :func:`effective_form_factors`.
    damping : None, float or dict
        Pair damping by element pair, see :func:`pair_damping`.
    sinc : ndarray, shape (K, nq), optional
        Precomputed :func:`sinc_table` ``(q, histograms.r)``, to reuse across calls.

    Returns
    -------
    ndarray, shape (nq,) or (F, nq)
        S(q), e.u.^2, float64.
    """
    q = _check_q(q)
    table = np.asarray(form_factors)
    if table.shape != (len(histograms.elements), q.size):
        raise InputError("form_factors", f"table of shape {table.shape}",
                         f"shape ({len(histograms.elements)}, {q.size}) matching the histogram elements")
    if sinc is None:
        sinc = sinc_table(q, histograms.r)
    counts = histograms.counts
    self_term = (histograms.atom_counts[:, None] * np.abs(table) ** 2).sum(axis=0)
    pairs, weights = _pair_weights(table)
    if tuple(pairs) != tuple(histograms.pairs):
        raise InputError("histograms", "element pairs in an unexpected order",
                         "histograms from distance_histograms")
    factors = pair_damping(damping, histograms.pair_symbols, q)
    if factors is not None:
        weights = weights * factors
    used = _used_bins(counts)
    pair_sums = counts[..., :used] @ sinc[:used]  # (..., P, nq)
    return self_term + 2.0 * (pair_sums * weights).sum(axis=-2)


def debye_histogram(q, positions, elements, dr=0.01, r_max=None, photon_energy=None, anomalous=False,
                    damping=None, excluded_volume=None):
    """Debye scattering through linear-share distance histograms.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    positions : array_like, shape (N, 3) or (F, N, 3)
        Atom positions, Å.
    elements : sequence of str, length N
        Element or ion symbol per atom.
    dr : float
        Histogram grid step, Å.
    r_max : float, optional
        Histogram range, Å (default from the bounding box).
    photon_energy, anomalous, damping, excluded_volume
        As in :func:`debye` (``damping`` by element pair only).

    Returns
    -------
    ndarray, shape (nq,) or (F, nq)
        S(q), e.u.^2, float64.
    """
    q = _check_q(q)
    hist = distance_histograms(positions, elements, dr=dr, r_max=r_max)
    unique, table = effective_form_factors(q, list(hist.elements), photon_energy=photon_energy,
                                           anomalous=anomalous, excluded_volume=excluded_volume)
    return debye_from_histograms(q, hist, table, damping=damping)
