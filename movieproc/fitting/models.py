"""Global models of difference maps dS(delay, q) for variable-projection fitting.

A model splits into non-linear parameters theta (time zero, IRF width, lifetimes,
oscillation period and damping) and linear amplitudes. For given theta it returns a
:class:`LinearDesign`, the linear part of

    dS(t, q) = sum_k P_k(t) B_k(q)          profiles with free q-curves B (solved per q)
             + sum_g beta_g X_g(t, q)        global maps, one scale each (e.g. alpha)
             + sum_j s_j(t) G_j(q)           curves scaled per delay (solvent terms)

which :mod:`movieproc.fitting.varpro` solves by weighted linear least squares inside
the non-linear fit.

Models
------
:class:`SpeciesModel`
    Populations of a sequential or parallel first-order scheme, convolved with the
    Gaussian IRF, times species curves that are either free (solved from the data,
    B = D pinv(C^T) in the weighted sense) or given (e.g. from the scattering engine,
    S_k - S_ground) and scaled by one excitation fraction alpha; optionally a damped
    oscillation with free curves; plus per-delay solvent coefficients.
:class:`TrajectoryModel`
    A simulated trajectory's difference curves dS(q, tau_f) mapped onto delay
    through time zero and the IRF, times the excited-state survival exp(-tau/T)
    (after the last frame the structure holds the last frame), scaled by alpha,
    plus per-delay solvent coefficients.

All times in ps; q-curves on the data's q grid (1/Å).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from movieproc.errors import InputError, ParameterError
from movieproc.fitting import irf, kinetics

__all__ = ["LinearDesign", "SpeciesModel", "TrajectoryModel", "species_with_signal"]


#: Lower bound of lifetimes, periods and damping times, ps: keeps the rates 1 / time finite.
MIN_TIME = 1e-6


@dataclass
class LinearDesign:
    """Linear part of a model at fixed non-linear parameters.

    Attributes
    ----------
    profiles : ndarray, shape (n_delay, K), or None
        Temporal profiles whose q-curves are free linear unknowns.
    maps : ndarray, shape (n_g, n_delay, n_q), or None
        Model maps each scaled by one global linear coefficient.
    curves : ndarray, shape (J, n_q), or None
        Curves scaled by a coefficient per delay (solvent terms).
    populations : ndarray, shape (n_delay, n_species)
        Populations to report (IRF-convolved).
    """

    profiles: np.ndarray | None
    maps: np.ndarray | None
    curves: np.ndarray | None
    populations: np.ndarray


def _solvent(solvent, solvent_names, nq):
    if solvent is None:
        return None, []
    G = np.atleast_2d(np.asarray(solvent, dtype=float))
    if G.ndim != 2 or (nq is not None and G.shape[1] != nq) or not np.all(np.isfinite(G)):
        raise InputError("argument 'solvent'", f"shape {G.shape}",
                         "finite solvent curves (J, n_q) on the data's q grid")
    names = [f"solvent_{j}" for j in range(G.shape[0])] if solvent_names is None else list(solvent_names)
    if len(names) != G.shape[0]:
        raise InputError("argument 'solvent_names'", f"{len(names)} names", f"{G.shape[0]}")
    return G.copy(), names


class _BinWidth:
    """Per-bin delay spread added in quadrature to the IRF width.

    A bin averages shots whose delays spread around its mean delay; to second
    order that is one more Gaussian convolution, of the bin's delay standard
    deviation. Spreads are looked up by delay value (so resampled delays keep
    theirs).
    """

    def __init__(self, delay=None, spread=None):
        self.delay: np.ndarray | None = None
        self.spread: np.ndarray | None = None
        if spread is None:
            return
        d = np.asarray(delay, dtype=float)
        sp = np.asarray(spread, dtype=float)
        if d.shape != sp.shape or d.ndim != 1 or not np.all(np.isfinite(d)):
            raise InputError("argument 'delay_spread'", f"shapes {d.shape}, {sp.shape}",
                             "(n_delay,) delays and spreads (ps)")
        order = np.argsort(d)
        self.delay, self.spread = d[order], np.nan_to_num(sp[order], nan=0.0)

    def evaluate(self, fn, delay, sigma):
        """``fn(delay_subset, width)`` evaluated with each delay's effective width; rows stacked."""
        delay = np.asarray(delay, dtype=float)
        if self.delay is None or self.spread is None:  # set together in __init__
            return fn(delay, sigma)
        idx = np.clip(np.searchsorted(self.delay, delay), 0, self.delay.size - 1)
        prev = np.clip(idx - 1, 0, self.delay.size - 1)
        near = np.where(np.abs(self.delay[prev] - delay) < np.abs(self.delay[idx] - delay), prev, idx)
        width = np.sqrt(float(sigma) ** 2 + self.spread[near] ** 2)
        out = None
        for w in np.unique(width):
            rows = np.flatnonzero(width == w)
            part = fn(delay[rows], w)
            if out is None:
                out = np.empty((delay.size,) + part.shape[1:], dtype=part.dtype)
            out[rows] = part
        return out


def _transitions(transitions, m):
    """[from, to] species indices of the network's m steps, as an (m, 2) int array."""
    tr = np.asarray(transitions if transitions is not None else [], dtype=float)
    if tr.ndim != 2 or tr.shape != (m, 2) or not np.all(tr == np.round(tr)) or np.any(tr < 0):
        raise ParameterError("transitions", f"{transitions!r}",
                             f"{m} transitions [from, to] of species indices >= 0, one per lifetime")
    if np.any(tr[:, 0] == tr[:, 1]):
        raise ParameterError("transitions", f"{transitions!r}", "transitions between different species")
    return tr.astype(int)


def _initial(scheme, initial, m, n_species):
    """Populations right after excitation (None for the sequential scheme: all in A1)."""
    if scheme == "network":
        init = np.eye(n_species)[0] if initial is None else np.asarray(initial, dtype=float)
        if init.shape != (n_species,) or not np.all(np.isfinite(init)):
            raise ParameterError("initial", f"{initial!r}", f"{n_species} finite initial populations")
        return init
    if scheme == "parallel":
        init = np.full(m, 1.0 / m) if initial is None else np.asarray(initial, dtype=float)
        if init.shape != (m,) or not np.all(np.isfinite(init)):
            raise ParameterError("initial", f"{initial!r}", f"{m} finite initial populations")
        return np.append(init, 0.0)
    return None


def _curves(curves, n_species):
    """Given species curves as a finite (n_species, n_q) float array."""
    B = np.atleast_2d(np.asarray(curves, dtype=float))
    if B.shape[0] != n_species or not np.all(np.isfinite(B)):
        raise InputError("argument 'curves'", f"shape {B.shape}",
                         f"finite curves ({n_species}, n_q), one per contributing species")
    return B.copy()


class SpeciesModel:
    """Kinetic species model: dS = sum_k c_k(t; theta) B_k(q) [+ oscillation] + solvent.

    Parameters
    ----------
    n_lifetimes : int
        Number of decay steps m (>= 1). The scheme has m + 1 species.
    scheme : {"sequential", "parallel", "network"}
        ``sequential``: A1 -> A2 -> ... -> Am -> P, starting in A1.
        ``parallel``: A1..Am decay independently into P, starting with populations
        ``initial`` (default 1/m each).
        ``network``: a general first-order network of species S0, S1, ... given by
        ``transitions``, starting in S0 (or ``initial``).
    curves : array_like, shape (n_used, n_q), optional
        Given species difference curves (S_k - S_ground) for the species in
        ``species``; the model is alpha * sum_k c_k B_k with one linear scale alpha
        (the excitation fraction when the curves are absolute). If omitted the
        curves are free linear unknowns solved from the data.
    species : sequence of int, optional
        Indices (0..m) of the species that contribute a curve; default all m + 1.
        Leave out P when it is the recovered ground state (no solute signal).
    solvent : array_like, shape (J, n_q), optional
        Curves with a free coefficient per delay (dS/dT, dS/drho, dS/d ln q...).
    solvent_names : sequence of str, optional
    oscillation : bool
        Add a damped oscillation exp(-x/damping) [cos, sin](2 pi x / period), IRF-
        convolved, as two profiles with free curves (free-curve mode only);
        parameters ``osc_period`` and ``osc_damping`` (ps).
    initial : array_like, shape (m,), optional
        Initial populations for the parallel scheme.
    delay_spread : (array_like, array_like), optional
        Bin delays and the standard deviation of the shots' delays in each bin
        (ps); added in quadrature to ``sigma`` per bin, so ``sigma`` is the
        instrument response itself rather than the response widened by binning.
    transitions : array_like of int, shape (m, 2), optional
        ``network`` scheme: [from, to] species indices of each transition, whose
        rate is 1 / lifetime_i (i in the order given). The rate matrix is checked to
        be a valid first-order network.

    Notes
    -----
    With free curves for all of A1..Am the span of the sequential populations is
    that of the m exponentials, so the model is unchanged when lifetimes are
    exchanged: the data then give the set of lifetimes, and which species owns which
    needs given curves or a constraint (e.g. bounds that keep lifetime_1 < lifetime_2).

    Attributes
    ----------
    param_names : tuple of str
        ``t0`` (ps), ``sigma`` (ps, IRF standard deviation), ``lifetime_1``..``lifetime_m``
        (lifetimes, ps), then ``osc_period``, ``osc_damping`` if enabled.
    default_bounds : dict
        name -> (lower, upper).
    species_names : list of str
    map_names : list of str
        Names of the global linear coefficients (``["alpha"]`` with given curves).
    profile_names : list of str
        Names of the free-curve profiles.
    solvent_names : list of str
    """

    def __init__(self, n_lifetimes, scheme="sequential", curves=None, species=None, solvent=None,
                 solvent_names=None, oscillation=False, initial=None, delay_spread=None, transitions=None):
        self.width = _BinWidth(*(delay_spread or (None, None)))
        m = int(n_lifetimes)
        if m < 1:
            raise ParameterError("n_lifetimes", str(n_lifetimes), "an integer >= 1")
        if scheme not in ("sequential", "parallel", "network"):
            raise ParameterError("scheme", repr(scheme), "'sequential', 'parallel' or 'network'")
        self.n_lifetimes, self.scheme = m, scheme
        self.transitions = _transitions(transitions, m) if scheme == "network" else None
        n_species = m + 1 if self.transitions is None else int(self.transitions.max()) + 1
        letters = ([f"A{i + 1}" for i in range(m)] + ["P"] if scheme != "network"
                   else [f"S{i}" for i in range(n_species)])
        self.species_names = letters
        self.species = list(range(n_species)) if species is None else [int(s) for s in species]
        if (not self.species or any(s < 0 or s >= n_species for s in self.species)
                or len(set(self.species)) != len(self.species)):
            raise ParameterError("species", f"{species!r}", f"distinct indices in 0..{n_species - 1}")
        self.initial = _initial(scheme, initial, m, n_species)
        self.curves = None if curves is None else _curves(curves, len(self.species))
        nq = None if self.curves is None else self.curves.shape[1]
        if oscillation and curves is not None:
            raise ParameterError("oscillation", "an oscillation with given species curves",
                                 "free species curves (no curve is known for the oscillation)")
        self.oscillation = bool(oscillation)
        self.solvent, self.solvent_names = _solvent(solvent, solvent_names, nq)
        names = ["t0", "sigma"] + [f"lifetime_{i + 1}" for i in range(m)]
        if self.oscillation:
            names += ["osc_period", "osc_damping"]
        self.param_names = tuple(names)
        self.default_bounds = {"t0": (-np.inf, np.inf), "sigma": (0.0, np.inf)}
        for i in range(m):
            self.default_bounds[f"lifetime_{i + 1}"] = (MIN_TIME, np.inf)
        if self.oscillation:
            self.default_bounds["osc_period"] = (MIN_TIME, np.inf)
            self.default_bounds["osc_damping"] = (MIN_TIME, np.inf)
        self.map_names = ["alpha"] if self.curves is not None else []
        self.profile_names = [] if self.curves is not None else [letters[s] for s in self.species]
        if self.oscillation:
            self.profile_names += ["osc_cos", "osc_sin"]

    def rate_matrix(self, params):
        """Rate matrix (1/ps) of the scheme for parameters ``params`` (dict)."""
        k = np.array([1.0 / params[f"lifetime_{i + 1}"] for i in range(self.n_lifetimes)])
        if self.scheme == "sequential":
            return kinetics.sequential_rate_matrix(k)
        if self.transitions is not None:  # set for the network scheme only
            n = len(self.species_names)
            K = np.zeros((n, n))
            for (i, j), rate in zip(self.transitions, k, strict=True):
                K[j, i] += rate
                K[i, i] -= rate
            kinetics.validate_rate_matrix(K)
            return K
        return kinetics.parallel_rate_matrix(k)

    def populations(self, params, delay):
        """IRF-convolved populations (n_delay, m + 1) of all species."""
        K = self.rate_matrix(params)
        if self.scheme == "sequential":
            c0 = np.zeros(K.shape[0])
            c0[0] = 1.0
        else:
            c0 = self.initial
        return self.width.evaluate(lambda t, w: kinetics.populations_irf(K, c0, t, params["t0"], w),
                                   delay, params["sigma"])

    def design(self, params, delay):
        """Linear design at non-linear parameters ``params`` for delays ``delay`` (ps).

        Parameters
        ----------
        params : dict
            Values for every name in ``param_names``.
        delay : ndarray, shape (n_delay,)
            Delays, ps.

        Returns
        -------
        LinearDesign
        """
        delay = np.asarray(delay, dtype=float)
        pop = self.populations(params, delay)
        used = pop[:, self.species]
        profiles, maps = None, None
        if self.curves is not None:
            maps = (used @ self.curves)[None]
        else:
            profiles = used
        if self.oscillation:
            per, damp = params["osc_period"], params["osc_damping"]
            omega = 2 * np.pi / per
            osc = [self.width.evaluate(
                lambda t, w, ph=ph: irf.damped_oscillation_gauss(t, damp, omega, params["t0"], w, phase=ph),
                delay, params["sigma"]) for ph in (0.0, -np.pi / 2)]
            profiles = np.column_stack([profiles] + osc)
        return LinearDesign(profiles=profiles, maps=maps, curves=self.solvent, populations=pop)


def species_with_signal(n_lifetimes, scheme="sequential", transitions=None, product_signal=False):
    """Species of a kinetic scheme that carry a solute signal by default.

    Every species but the final product(s) (the recovered ground state), unless
    ``product_signal``: then all of them.

    Parameters
    ----------
    n_lifetimes : int
        Number of decay steps (lifetimes).
    scheme : {"sequential", "parallel", "network"}
    transitions : sequence of (int, int), optional
        ``network``: [from, to] of each step, one per lifetime.
    product_signal : bool
        The final product(s) have a solute signal of their own.

    Returns
    -------
    species : list of int
        Indices of the species with a signal.
    n_species : int
        Number of species of the scheme.

    Raises
    ------
    ParameterError
        ``transitions`` missing or not one per lifetime in the network scheme.
    """
    n = int(n_lifetimes)
    if scheme == "network":
        if not transitions or len(transitions) != n:
            raise ParameterError("transitions", f"{transitions!r}", f"one [from, to] transition per lifetime ({n})")
        n_species = max(max(t) for t in transitions) + 1
        sources = {t[0] for t in transitions}
        transient = [i for i in range(n_species) if i in sources]
    else:
        n_species = n + 1
        transient = list(range(n))
    return (list(range(n_species)) if product_signal else transient), n_species


class TrajectoryModel:
    """Trajectory model: alpha * [IRF o (dS_traj(tau) exp(-tau/T))](t - t0) + solvent.

    The trajectory's difference curves are taken as piecewise linear between frame
    times and constant (the last frame) after the last frame; the excited-state
    survival exp(-tau/T) multiplies them (applied at the frames, and exactly as an
    exponential tail after the last frame; between frames the product is
    interpolated linearly, relative error <= (h/T)^2/8 for frame spacing h). The
    convolution with the Gaussian IRF is in closed form
    (:func:`movieproc.fitting.irf.convolve_tabulated`).

    Parameters
    ----------
    frame_times : array_like, shape (F,)
        Frame times tau_f after excitation, ps, strictly increasing, >= 0.
    frame_curves : array_like, shape (F, n_q)
        Difference curves S_f(q) - S_ground(q) of the frames (absolute or relative
        units; alpha carries the scale).
    solvent : array_like, shape (J, n_q), optional
        Curves with a free coefficient per delay.
    solvent_names : sequence of str, optional
    delay_spread : (array_like, array_like), optional
        Bin delays and per-bin delay standard deviations (ps), added in
        quadrature to ``sigma`` (see :class:`SpeciesModel`).

    Attributes
    ----------
    param_names : tuple
        ``t0`` (ps), ``sigma`` (ps), ``lifetime`` (ps; ``np.inf`` allowed as a fixed
        value for no decay).
    default_bounds : dict
    map_names : list
        ``["alpha"]``.
    species_names : list
        ``["excited"]``: the reported population is the IRF-convolved survival.
    """

    def __init__(self, frame_times, frame_curves, solvent=None, solvent_names=None, delay_spread=None):
        self.width = _BinWidth(*(delay_spread or (None, None)))
        tf = np.asarray(frame_times, dtype=float)
        Y = np.asarray(frame_curves, dtype=float)
        if tf.ndim != 1 or tf.size < 1 or not np.all(np.isfinite(tf)) or np.any(tf < 0):
            raise InputError("argument 'frame_times'", f"shape {tf.shape}", "finite frame times >= 0 ps")
        if tf.size > 1 and not np.all(np.diff(tf) > 0):
            raise InputError("argument 'frame_times'", "non-increasing times", "strictly increasing frame times (ps)")
        if Y.ndim != 2 or Y.shape[0] != tf.size or not np.all(np.isfinite(Y)):
            raise InputError("argument 'frame_curves'", f"shape {Y.shape}", f"finite curves ({tf.size}, n_q)")
        self.frame_times, self.frame_curves = tf.copy(), Y.copy()
        self.solvent, self.solvent_names = _solvent(solvent, solvent_names, Y.shape[1])
        self.param_names = ("t0", "sigma", "lifetime")
        self.default_bounds = {"t0": (-np.inf, np.inf), "sigma": (0.0, np.inf), "lifetime": (MIN_TIME, np.inf)}
        self.map_names = ["alpha"]
        self.profile_names = []
        self.species_names = ["excited"]

    def signal(self, params, delay):
        """Model map before scaling by alpha, shape (n_delay, n_q)."""
        T = float(params["lifetime"])
        rate = 0.0 if np.isinf(T) else 1.0 / T
        surv = np.exp(-rate * self.frame_times)
        Y = self.frame_curves * surv[:, None]
        return self.width.evaluate(
            lambda t, w: irf.convolve_tabulated(self.frame_times, Y, t, params["t0"], w, tail_rate=rate),
            delay, params["sigma"])

    def design(self, params, delay):
        """Linear design at ``params`` (dict with t0, sigma, lifetime) for ``delay`` (ps)."""
        delay = np.asarray(delay, dtype=float)
        T = float(params["lifetime"])
        rate = 0.0 if np.isinf(T) else 1.0 / T
        pop = self.width.evaluate(lambda t, w: irf.exp_gauss(t, rate, params["t0"], w), delay,
                                  params["sigma"])[:, None]
        return LinearDesign(profiles=None, maps=self.signal(params, delay)[None], curves=self.solvent,
                            populations=pop)
