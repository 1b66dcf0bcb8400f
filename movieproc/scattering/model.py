"""Model difference curves from structures and trajectories.

dS(q, frame) = S(frame) - S(ground), with S from the Debye equation (histogram path,
see :mod:`movieproc.scattering.debye`). Frames are processed in parallel with dask
(threads by default: the histogram kernel releases the GIL), one compiled kernel
call per frame and one matrix product per task.

Conventions: q in 1/Å, positions in Å, photon energy in keV, S and dS in e.u.^2 per molecule.

Solvent terms
-------------
- Excluded volume: ``excluded_volume=rho0`` (e/Å^3) replaces each f by f - g, g the
  dummy-atom factor (Fraser, MacRae & Suzuki 1978).
- Solute-solvent cage: :func:`cage_term` turns pair distribution functions g_ab(r)
  from a simulation into S_uv(q); the cage contribution to a difference curve is
  ``cage_term(q, r, g_excited, ...) - cage_term(q, r, g_ground, ...)``, added to the
  solute dS by the caller.
"""

from __future__ import annotations

import dask
import numpy as np

from ..errors import InputError, ParameterError
from . import debye as _debye

__all__ = [
    "trajectory_curves",
    "difference_curves",
    "ensemble_difference_curves",
    "species_difference_curves",
    "cage_term",
]


#: Bytes of distance-histogram counts one dask task may hold (bounded memory per task).
TASK_BYTES = 2**25
#: Tasks per worker, so that workers stay busy when frames take unequal time.
TASKS_PER_WORKER = 4


class _Prepared:
    """q-grid-dependent quantities shared by every frame."""

    def __init__(self, q, elements, r_max, dr, photon_energy, anomalous, damping, excluded_volume):
        unique, types, pairs, pair_row = _debye._types(list(elements))
        _, table = _debye.effective_form_factors(q, unique, photon_energy=photon_energy, anomalous=anomalous,
                                                 excluded_volume=excluded_volume)
        _, weights = _debye._pair_weights(table)
        factors = _debye.pair_damping(damping, [(unique[a], unique[b]) for a, b in pairs], q)
        if factors is not None:
            weights = weights * factors
        self.types, self.pair_row = types, pair_row
        self.dr = float(dr)
        self.k_size = _debye.histogram_grid_size(r_max, dr)
        self.sinc = _debye.sinc_table(q, np.arange(self.k_size) * self.dr)
        self.weights2 = 2.0 * weights  # (P, nq)
        counts = np.bincount(types, minlength=len(unique))
        self.self_term = (counts[:, None] * np.abs(table) ** 2).sum(axis=0)
        self.r_max = r_max

    def curves(self, frames, first_index=0):
        """S(q) for frames (f, N, 3) -> (f, nq)."""
        n_pairs = self.weights2.shape[0]
        counts = np.zeros((frames.shape[0], n_pairs, self.k_size))
        for k in range(frames.shape[0]):
            overflow = _debye._histogram_frame(frames[k], self.types, self.pair_row,
                                               1.0 / self.dr, counts[k])
            if overflow > 0:
                raise InputError(f"frame {first_index + k}", f"pair distances up to {overflow:.3f} Å",
                                 f"distances below r_max = {self.r_max:g} Å")
        used = _debye._used_bins(counts)  # the bounding-box range is generous: skip empty bins
        sums = (counts.reshape(-1, self.k_size)[:, :used] @ self.sinc[:used]).reshape(
            frames.shape[0], n_pairs, -1)
        return self.self_term + np.einsum("fpq,pq->fq", sums, self.weights2)


def _check_frames(positions, elements, what):
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim == 2:
        positions = positions[None]
    positions, elements = _debye._check_structure(positions, elements, what=what, frames=True)
    return positions, elements


def trajectory_curves(q, positions, elements, dr=0.01, r_max=None, photon_energy=None, anomalous=False,
                      damping=None, excluded_volume=None, scheduler="threads", workers=None,
                      frames_per_task=None):
    """Debye S(q) of every frame of a trajectory.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    positions : array_like, shape (F, N, 3)
        Atom positions per frame, Å.
    elements : sequence of str, length N
        Element or ion symbol per atom.
    dr : float
        Distance-histogram grid step, Å.
    r_max : float, optional
        Histogram range, Å; default the largest bounding-box diagonal over frames.
    photon_energy : float, optional
        Photon energy, keV (for ``anomalous``).
    anomalous : bool
        Use f0 + f' + i f''.
    damping : None, float or dict
        Debye-Waller damping by element pair (sigma in Å), see
        :func:`movieproc.scattering.debye.pair_damping`.
    excluded_volume : float, optional
        Solvent electron density rho0 (e/Å^3) for the dummy-atom correction.
    scheduler : str
        dask scheduler: "threads" (default), "synchronous" or "processes".
    workers : int, optional
        Number of dask workers (default: dask's choice).
    frames_per_task : int, optional
        Frames per dask task (default: bounded memory, several tasks per worker).

    Returns
    -------
    ndarray, shape (F, nq)
        S(q) per frame, e.u.^2, float64.
    """
    q = _debye._check_q(q)
    positions, elements = _check_frames(positions, elements, "trajectory")
    if not (np.isfinite(dr) and dr > 0):
        raise ParameterError("dr", f"{dr!r}", "a grid step > 0 (Å)")
    if anomalous and photon_energy is None:
        raise ParameterError("photon_energy", "None with anomalous=True", "a photon energy in keV")
    if excluded_volume is not None and not (np.isfinite(excluded_volume) and excluded_volume >= 0):
        raise ParameterError("excluded_volume", f"{excluded_volume!r}", "a solvent electron density >= 0 (e/Å^3)")
    if r_max is None:
        r_max = _debye.default_r_max(positions, dr)
    prep = _Prepared(q, elements, r_max, dr, photon_energy, anomalous, damping, excluded_volume)
    n_frames = positions.shape[0]
    if frames_per_task is None:
        per_frame = prep.weights2.shape[0] * prep.k_size * 8
        frames_per_task = max(1, min(int(TASK_BYTES // per_frame), -(-n_frames // (TASKS_PER_WORKER * (workers or 2)))))
    starts = range(0, n_frames, int(frames_per_task))
    tasks = [dask.delayed(prep.curves)(np.ascontiguousarray(positions[s:s + frames_per_task]), s)
             for s in starts]
    kwargs = {"scheduler": scheduler}
    if workers is not None:
        kwargs["num_workers"] = int(workers)  # dask's own keyword
    parts = dask.compute(*tasks, **kwargs)
    return np.concatenate(parts, axis=0) if parts else np.empty((0, q.size))


def difference_curves(q, positions, elements, ground, ground_elements=None, **options):
    """Model difference curves dS = S(frame) - S(ground).

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    positions : array_like, shape (F, N, 3)
        Atom positions per frame, Å.
    elements : sequence of str, length N
        Element or ion symbol per atom.
    ground : array_like, shape (N0, 3)
        Ground-state positions, Å.
    ground_elements : sequence of str, length N0, optional
        Ground-state elements (default ``elements``).
    **options
        Passed to :func:`trajectory_curves` (dr, r_max, photon_energy, anomalous, damping,
        excluded_volume, scheduler, workers, frames_per_task). Ground and frames
        go through the same histogram path, so its small errors largely cancel.

    Returns
    -------
    ndarray, shape (F, nq)
        dS(q) per frame, e.u.^2, float64.
    """
    ground_elements = elements if ground_elements is None else ground_elements
    positions, elements = _check_frames(positions, elements, "trajectory")
    ground, ground_elements = _check_frames(ground, ground_elements, "ground structure")
    s_frames = trajectory_curves(q, positions, elements, **options)
    ground_options = {k: v for k, v in options.items() if k not in ("r_max", "frames_per_task")}
    s_ground = trajectory_curves(q, ground, ground_elements, **ground_options)[0]
    return s_frames - s_ground


def ensemble_difference_curves(q, positions, elements, ground, ground_elements=None,
                               return_members=False, **options):
    """Ensemble-averaged model difference curves, frame by frame.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    positions : array_like, shape (M, F, N, 3)
        M trajectories of F frames (e.g. from
        :func:`movieproc.io.structures.read_ensemble`), Å.
    elements : sequence of str, length N
        Element or ion symbol per atom.
    ground : array_like, shape (N0, 3)
        Ground-state positions, Å.
    ground_elements : sequence of str, optional
        Ground-state elements (default ``elements``).
    return_members : bool
        Also return the curves of each member.
    **options
        As in :func:`difference_curves`.

    Returns
    -------
    mean : ndarray, shape (F, nq)
        Mean over members of dS(q, frame), e.u.^2.
    members : ndarray, shape (M, F, nq)
        Only if ``return_members``.
    """
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim != 4 or positions.shape[-1] != 3:
        raise InputError("trajectory ensemble", f"positions of shape {positions.shape}",
                         "shape (M, F, N, 3) (Å)")
    m, f = positions.shape[:2]
    flat = positions.reshape(m * f, *positions.shape[2:])
    members = difference_curves(q, flat, elements, ground, ground_elements, **options).reshape(m, f, -1)
    mean = members.mean(axis=0)
    return (mean, members) if return_members else mean


def species_difference_curves(q, species, ground, ground_elements, **options):
    """Difference curves of a few species structures against the ground state.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    species : dict
        name -> (elements (N_k,), positions (N_k, 3) Å).
    ground : array_like, shape (N0, 3)
        Ground-state positions, Å.
    ground_elements : sequence of str, length N0
        Ground-state elements.
    **options
        As in :func:`difference_curves`.

    Returns
    -------
    names : list of str, length n_species
        Species names in the order of ``species``.
    curves : ndarray, shape (n_species, nq)
        S(species) - S(ground), e.u.^2.
    """
    q = _debye._check_q(q)
    names = list(species)
    out = np.empty((len(names), q.size))
    options = {k: v for k, v in options.items() if k not in ("r_max", "frames_per_task")}
    for k, name in enumerate(names):
        elements, positions = species[name]
        out[k] = difference_curves(q, np.asarray(positions)[None], elements, ground,
                                   ground_elements, **options)[0]
    return names, out


def cage_term(q, r, g, f_a, f_b, n_a, n_b, volume, window="lorch", r_cut=None):
    """Solute-solvent (cage) scattering from pair distribution functions.

    S_uv(q) = 2 sum_{ab} Re(f_a f_b*) (N_a N_b / V) int_0^R 4 pi r^2 [g_ab(r) - 1]
    W(r) sin(q r)/(q r) dr, over pairs of solute atom type a and solvent atom type b.

    Parameters
    ----------
    q : array_like, shape (nq,)
        Momentum transfer, 1/Å.
    r : array_like, shape (nr,)
        Increasing distances at which g is given, Å.
    g : array_like, shape (P, nr) or (nr,)
        g_ab(r) for each of P solute-solvent type pairs (dimensionless, -> 1 far out).
    f_a, f_b : array_like, shape (P, nq) or (nq,)
        Form factors of the solute type a and solvent type b of each pair, e.u.
    n_a, n_b : array_like, shape (P,) or scalar
        Numbers of atoms of type a (solute) and b (solvent) in the simulation box.
    volume : float
        Box volume, Å^3.
    window : {"lorch", None}
        W(r): Lorch's sin(pi r/R)/(pi r/R), which damps the truncation ripples of the
        finite integral, or None for W = 1.
    r_cut : float, optional
        Upper limit R, Å (default ``r[-1]``); must stay below half the box length
        for a periodic simulation.

    Returns
    -------
    ndarray, shape (nq,)
        S_uv(q), e.u.^2, float64.
    """
    q = _debye._check_q(q)
    r = np.asarray(r, dtype=np.float64)
    g = np.atleast_2d(np.asarray(g, dtype=np.float64))
    f_a = np.atleast_2d(np.asarray(f_a))
    f_b = np.atleast_2d(np.asarray(f_b))
    n_pairs = g.shape[0]
    n_a = np.broadcast_to(np.asarray(n_a, dtype=np.float64), (n_pairs,))
    n_b = np.broadcast_to(np.asarray(n_b, dtype=np.float64), (n_pairs,))
    if r.ndim != 1 or g.shape[1] != r.size or np.any(np.diff(r) <= 0):
        raise InputError("cage_term", f"r of shape {r.shape} and g of shape {g.shape}",
                         "increasing r (nr,) and g (P, nr)")
    if f_a.shape != (n_pairs, q.size) or f_b.shape != (n_pairs, q.size):
        raise InputError("cage_term", f"form factors of shapes {f_a.shape}, {f_b.shape}",
                         f"({n_pairs}, {q.size}) each")
    if not (volume > 0):
        raise InputError("cage_term", f"volume {volume!r}", "a box volume > 0 (Å^3)")
    r_cut = float(r[-1] if r_cut is None else r_cut)
    keep = r <= r_cut
    rr, gg = r[keep], g[:, keep]
    if window == "lorch":
        w = np.sinc(rr / r_cut)  # np.sinc(x) = sin(pi x)/(pi x)
    elif window is None:
        w = np.ones_like(rr)
    else:
        raise InputError("cage_term", f"window {window!r}", "'lorch' or None")
    kernel = np.sinc(np.multiply.outer(rr, q) / np.pi)  # (nr, nq) sin(q r)/(q r)
    integrand = 4.0 * np.pi * rr**2 * (gg - 1.0) * w  # (P, nr)
    radial = np.trapezoid(integrand[:, :, None] * kernel[None], rr, axis=1)  # (P, nq)
    pref = 2.0 * n_a * n_b / float(volume)
    return (pref[:, None] * np.real(f_a * np.conj(f_b)) * radial).sum(axis=0)
