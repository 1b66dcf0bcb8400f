"""The fitted kinetic model of a movie, rebuilt from its attrs and evaluated on a fine delay grid.

The analyze stage stores the fitted parameters (``fit_parameters``: t0, sigma,
lifetimes, alpha...) and the movie records the config it was made with; this module
rebuilds the same kinetic scheme with the cores of :mod:`movieproc.fitting` and
evaluates the IRF-convolved populations on a grid fine enough to show the rise
through the instrument response, and names the curves the way the config names the
species.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..fitting import irf
from ..fitting.models import SpeciesModel, species_with_signal

__all__ = ["PopulationCurves", "fine_delays", "population_curves"]

#: Fine grid: 4 fs steps over the first picoseconds (resolves an IRF of tens of fs), log-spaced beyond.
FINE_STEP_PS = 0.004
#: Linear part of the fine grid ends here (ps after the earliest delay or 2 ps, whichever is later).
FINE_LINEAR_END_PS = 2.0
#: Points of the log-spaced part of the fine grid.
FINE_LOG_POINTS = 400


@dataclass
class PopulationCurves:
    """Fitted populations on a fine delay grid, ready to draw.

    Attributes
    ----------
    delay : ndarray, shape (n_fine,)
        Fine delays, ps.
    values : ndarray, shape (n_fine, n_species)
        IRF-convolved populations, times the excitation fraction alpha where the fit has one.
    at_bins : ndarray, shape (n_delay, n_species)
        The stored populations at the bin delays (bin width included), same scale.
    names : list of str
        Species names (from the config where it names them).
    ylabel : str
        What the values are, with units.
    """

    delay: np.ndarray
    values: np.ndarray
    at_bins: np.ndarray
    names: list
    ylabel: str


def fine_delays(delay):
    """A fine delay grid (ps) over the span of ``delay``: linear steps near time zero, log-spaced after."""
    d = np.asarray(delay, float)
    d = d[np.isfinite(d)]
    low, high = float(d.min()), float(d.max())
    linear_end = min(high, max(FINE_LINEAR_END_PS, low + FINE_LINEAR_END_PS))
    grid = np.arange(low, linear_end + FINE_STEP_PS / 2, FINE_STEP_PS)
    if high > linear_end:
        grid = np.concatenate([grid, np.geomspace(linear_end, high, FINE_LOG_POINTS)[1:]])
    return grid


def _values(params):
    return {k: float(v["value"]) for k, v in params.items()}


def _species_names(fit_cfg, model_cfg, stored):
    """Names of the species: the config's model.species keys for the species with a signal, letters otherwise."""
    names = list(stored)
    n = len(fit_cfg.get("lifetimes_ps") or [])
    scheme = fit_cfg.get("kinetics", "sequential")
    signal = fit_cfg.get("signal_species") or species_with_signal(n, scheme, fit_cfg.get("network"),
                                                                  fit_cfg.get("product_signal", False))[0]
    if fit_cfg.get("species_curves") == "model":
        for idx, key in zip(signal, (model_cfg.get("species") or {}), strict=False):
            names[idx] = f"{key} ({names[idx]})"
    for idx in range(len(names)):
        if idx not in signal and scheme != "network":
            names[idx] = f"{names[idx]}: recovered ground state"
    return names


def _evaluate(mode, fit_cfg, p, fine):
    """Populations (n_fine, n_species) of the fitted scheme on ``fine`` (IRF only, no bin width)."""
    if mode == "trajectory":
        rate = 0.0 if not np.isfinite(p["lifetime"]) else 1.0 / p["lifetime"]
        return irf.exp_gauss(fine, rate, p["t0"], p["sigma"])[:, None]
    n = len(fit_cfg["lifetimes_ps"])
    scheme = fit_cfg["kinetics"]
    model = SpeciesModel(n, scheme, transitions=fit_cfg["network"] if scheme == "network" else None)
    return model.populations(p, fine)


def population_curves(attrs, delay, population):
    """The fitted populations of a movie on a fine grid, named and scaled, or None without a fit.

    Parameters
    ----------
    attrs : mapping
        The movie's attrs (``fit_mode``, ``fit_parameters``, ``fit_species``,
        ``config`` with sections ``fit``, ``model``, ``scaling``).
    delay : ndarray, shape (n_delay,)
        Bin delays, ps.
    population : ndarray, shape (n_delay, n_species)
        Stored populations at the bins (unscaled, initial excited population 1).

    Returns
    -------
    PopulationCurves or None
    """
    params = attrs.get("fit_parameters") or {}
    mode = attrs.get("fit_mode")
    if population is None or not params or mode in (None, "none"):
        return None
    cfg = attrs.get("config") or {}
    fit_cfg, model_cfg = cfg.get("fit") or {}, cfg.get("model") or {}
    p = _values(params)
    fine = fine_delays(delay)
    values = _evaluate(mode, fit_cfg, p, fine)
    names = (["excited state"] if mode == "trajectory"
             else _species_names(fit_cfg, model_cfg, attrs.get("fit_species") or []))
    scale, ylabel = 1.0, "population (initial excited = 1;\nthe free curves carry the scale)"
    if "alpha" in p:
        scale = p["alpha"]
        absolute = (cfg.get("scaling") or {}).get("mode") == "solute"
        ylabel = ("fraction of solute molecules\n(alpha × population, absolute scale)" if absolute
                  else "alpha × population\n(model units: alpha scales the model curves)")
    return PopulationCurves(delay=fine, values=values * scale, at_bins=np.asarray(population, float) * scale,
                            names=names[: values.shape[1]], ylabel=ylabel)
