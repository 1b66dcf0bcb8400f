"""Stage ``analyze``: absolute scale, solvent terms, SVD, kinetic/trajectory fit, structure per delay.

Reads the binned differences (and the model curves of the ``scatter`` stage
when structures are configured) and writes ``analysis.zarr``, whose arrays the
``assemble`` stage adds to the movie:

- ``solute`` (delay, q): the difference minus the fitted solvent and
  normalization terms;
- ``solvent_coef``, ``solvent_coef_err`` (delay, term): per-delay coefficients
  (for ``dT`` in K when the data are on the absolute scale);
- ``svd_values`` (component), ``svd_u`` (delay, component), ``svd_v``
  (component, q), ``svd_noise`` (component) and the component count;
- with a fit: ``model``, ``residual`` (delay, q), ``chi2`` (delay, reduced),
  ``population`` (delay, species), ``correlation`` (param, param_b), fitted
  parameters with errors in the attrs;
- with a trajectory: the best-fitting frame per delay, ``positions`` (delay,
  atom, xyz), ``element`` (atom), and each configured geometric parameter with
  its lower and upper bound per delay.

Bins under ``binning.min_shots`` are left out of the fits (their rows are NaN).

Inputs: ``binned`` (store), ``models`` (store, only with ``model.ground``); config
sections ``scaling``, ``solvent``, ``svd``, ``fit``, ``differences``. Errors of the
numeric cores are reported under the config key a user sets (:data:`CONFIG_KEYS`).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ConfigError, DataError, InputError
from ..fitting import structure, varpro
from ..fitting.models import SpeciesModel, TrajectoryModel, species_with_signal
from ..io import store
from ..io.tables import read_curve_table
from ..scattering import geometry, realspace
from ..signals import scaling, svd
from ..signals.solvent import fit_solvent, solvent_basis
from .common import Warnings, now
from .keys import config_keys

log = logging.getLogger("movieproc.analyze")

SCALE_UNITS = "e.u. per solute molecule"

#: Core parameter -> config key, for every core error a config can trigger (the stage's one table).
CONFIG_KEYS = {
    "p0.t0": "fit.time_zero_ps", "p0.sigma": "fit.irf_sigma_ps", "p0.lifetime": "fit.lifetimes_ps",
    "p0.lifetime_*": "fit.lifetimes_ps", "p0.osc_period": "fit.oscillation_period_ps",
    "p0.osc_damping": "fit.oscillation_damping_ps", "n_lifetimes": "fit.lifetimes_ps", "scheme": "fit.kinetics",
    "transitions": "fit.network", "species": "fit.signal_species", "oscillation": "fit.oscillation",
    "rates": "fit.lifetimes_ps", "terms": "solvent.terms",
    "pair": "realspace.sharpen_pair", "q_range": "realspace.q_range_invA", "damping": "realspace.damping_A2",
}
#: In the network scheme the rate matrix is made from ``fit.network``.
NETWORK_KEYS = {**CONFIG_KEYS, "rates": "fit.network"}

#: Real-space view: distances in 0.01 Å steps (peak positions to a fraction of the ~0.2-0.5 Å peak width).
REALSPACE_STEP = 0.01
#: Nuisance terms (not a solvent response): a fit's solute model cannot take their shape.
NUISANCE_TERMS = ("normalization", "energy")
#: Fit parameters in ps (the rest are amplitudes).
TIME_PARAMETERS = ("t0", "sigma", "lifetime", "osc_period", "osc_damping")


@dataclass
class Data:
    """The binned differences as the analysis uses them.

    Attributes
    ----------
    path : Path
        The binned store.
    q, delay : ndarray, shapes (n_q,), (n_delay,)
        1/Å, ps.
    diff, err : ndarray, shape (n_delay, n_q)
        Difference and its standard error (``difference_error``), in ``units``.
    low : ndarray of bool, shape (n_delay,)
        Bins under the shot threshold.
    off_mean : ndarray, shape (n_delay, n_q)
        Mean reference curve per bin.
    spread : ndarray, shape (n_delay,)
        Standard deviation of the shots' delays per bin, ps.
    boot : ndarray, shape (n_rep, n_delay, n_q), or None
        Bootstrap replicates over shots.
    units : str
    models : zarr group or None
        The store of the ``scatter`` stage.
    correlation : ndarray, shape (n_delay, n_delay), or None
        Correlation of the bins' differences along delay (``delay_correlation``), None
        when the binned store has none (errors then assume independent bins).
    """

    path: Path
    q: np.ndarray
    delay: np.ndarray
    diff: np.ndarray
    err: np.ndarray
    low: np.ndarray
    off_mean: np.ndarray
    spread: np.ndarray
    boot: np.ndarray | None
    units: str
    models: Any
    correlation: np.ndarray | None = None


def _one(value):
    """One path from a named input that may be a list (empty when the input is absent)."""
    if isinstance(value, (list, tuple)):
        return Path(value[0]) if value else None
    return Path(value) if value else None


def read_data(inputs) -> Data:
    """Read the binned store and the model store (if any) of the named inputs."""
    path, models_path = Path(inputs["binned"]), _one(inputs.get("models"))
    b = store.open_group(path, "binned store")
    q = store.read(b, "q")
    models = store.open_group(models_path, "model store") if models_path else None
    if models is not None:
        mq = store.read(models, "q")
        if mq.shape != q.shape or not np.allclose(mq, q, rtol=1e-9, atol=1e-12):
            raise InputError(f"{models_path}:q", "a q grid different from the data's", f"the q grid of {path}")
    return Data(path=path, q=q, delay=store.read(b, "delay"), diff=store.read(b, "difference").astype(float),
                err=store.read(b, "difference_error").astype(float), low=store.read(b, "low_count"),
                off_mean=store.read(b, "off_mean").astype(float), spread=store.read(b, "delay_spread"),
                boot=store.read(b, "difference_replicates").astype(float) if "difference_replicates" in b else None,
                units=b["difference"].attrs.get("units", ""), models=models,
                correlation=store.read(b, "delay_correlation").astype(float) if "delay_correlation" in b else None)


def read_differentials(path, q):
    """Solvent differentials (columns q, dS/dT[, dS/drho]; comma- or whitespace-separated) interpolated on ``q``.

    Returns a dict ``{"dT": (nq,), "drho": (nq,)}`` (``drho`` only if the file has a third column).
    """
    what = "columns q (1/Å), dS/dT[, dS/drho] (config solvent.differentials)"
    table = read_curve_table(path, min_columns=2, max_columns=3, what=what)
    if q[0] < table[0, 0] - 1e-9 or q[-1] > table[-1, 0] + 1e-9:
        raise InputError(path, f"q from {table[0, 0]:.3g} to {table[-1, 0]:.3g} 1/Å",
                         f"a q range covering the data's {q[0]:.3g}-{q[-1]:.3g} 1/Å (config solvent.differentials)")
    out = {"dT": np.interp(q, table[:, 0], table[:, 1])}
    if table.shape[1] > 2:
        out["drho"] = np.interp(q, table[:, 0], table[:, 2])
    return out


def run(inputs: dict, out: Path, config: dict) -> None:
    """Analyze the binned differences; see the module docstring for what is written."""
    warnings = Warnings("analyze", log)
    data = read_data(inputs)
    with config_keys(NETWORK_KEYS if config["fit"]["kinetics"] == "network" else CONFIG_KEYS):
        arrays, result = analyze(data, config, warnings)
    _write(out, data.q, data.delay, arrays, result, config, warnings)


def analyze(data: Data, config: dict, warnings: Warnings):
    """Scale, solvent terms, fit, SVD and structures; returns (arrays, result) for the store."""
    factor = _absolute_scale(config, data)
    data.diff, data.err = data.diff * factor, data.err * factor
    data.boot = None if data.boot is None else data.boot * factor
    usable = ~data.low & np.all(np.isfinite(data.diff), axis=1) & np.all(np.isfinite(data.err) & (data.err > 0), axis=1)
    if usable.sum() == 0:
        raise DataError(f"no delay bin of {data.path} has enough shots (binning.min_shots) for the analysis")
    basis = _basis(config, data, usable, factor, warnings)
    solute_units = SCALE_UNITS if config["scaling"]["mode"] == "solute" else data.units
    result = {"names": basis.names, "units": solute_units, "factor": factor,
              "coef_units": "K (dT), g/cm3 (drho)" if config["scaling"]["mode"] == "solute"
              and config["solvent"]["differentials"] else "arbitrary"}
    fcfg = config["fit"]
    use = _fit_rows(fcfg, data.delay, usable)
    fit = _global_fit(fcfg, data, use, basis, warnings) if fcfg["mode"] != "none" else None
    arrays, solute = _solute(fcfg, data, use, basis, fit, warnings)
    result["realspace"] = _realspace(config["realspace"], data, solute, use, arrays, solute_units)
    result["fit"] = fit
    result["svd_count"] = _svd(config["svd"], data, solute, usable, use, arrays, warnings)
    if _has_trajectory(data.models) and fcfg["mode"] != "none":
        # excited fraction at each delay from the global fit: alpha times the IRF-convolved survival
        amplitude = None
        if fit is not None and fcfg["mode"] == "trajectory":
            amplitude = fit.amplitudes["alpha"] * fit.populations[:, 0]
        structures, result["geometry_units"] = _structures(fcfg, data, use, basis.curves, warnings, amplitude)
        arrays.update(structures)
    return arrays, result


def _has_trajectory(models):
    """Whether the model store holds trajectory frames (species structures alone have none)."""
    return models is not None and "traj_dS" in models and models["traj_dS"].shape[0] > 0


def _absolute_scale(config, data):
    """Factor from normalized units to e.u. per solute molecule (1 on the relative scale)."""
    sc = config["scaling"]
    if sc["mode"] != "solute":
        return 1.0
    if data.models is None:
        raise ConfigError("scaling.mode", "'solute' without model.ground",
                          "a ground-state structure (model.ground) for the solute's scattering")
    for key in ("solvent_formula", "solvent_per_solute"):
        if sc[key] is None:
            raise ConfigError(f"scaling.{key}", "null", "a value, needed for scaling.mode 'solute'")
    ok_rows = ~data.low & np.all(np.isfinite(data.off_mean), axis=1)
    reference = np.mean(data.off_mean[ok_rows], axis=0) if ok_rows.any() else None
    els = [str(e) for e in data.models["element"][...]]
    unit = scaling.unit_cell_scattering(data.q, data.models["ground_S"][...], els, sc["solvent_formula"],
                                        sc["solvent_per_solute"])
    # the high-q window of the unit cell against the same window of the measured pump-off curve
    factor = scaling.absolute_scale(data.q, unit, config["differences"]["norm_q_range"], reference)
    log.info("absolute scale: 1 normalized unit = %.6g e.u. per solute molecule", factor)
    return factor


def _basis(config, data, use, factor, warnings):
    """The solvent and nuisance curves fitted per delay, with what a user should know about them."""
    scfg = config["solvent"]
    differentials = read_differentials(scfg["differentials"], data.q) if scfg["differentials"] else None
    basis = solvent_basis(data.q, np.nanmean(data.off_mean[use], axis=0) * factor, differentials=differentials,
                          terms=scfg["terms"], heating=scfg["enabled"],
                          late=(data.diff[use], data.err[use], data.delay[use]),
                          late_window=scfg["estimate_window_ps"],
                          normalization=config["differences"]["normalization"] != "none",
                          energy_term=scfg["energy_term"])
    for w in basis.warnings:
        warnings.add(w)
    if basis.estimated:
        warnings.add("the heating curve was estimated from late delays (solvent.estimate_window_ps); "
                     "its coefficient is in arbitrary units, not K")
    elif scfg["enabled"] and not differentials:
        warnings.add("no solvent differentials (solvent.differentials) nor estimate window: no heating term fitted")
    if scfg["enabled"] and differentials and config["scaling"]["mode"] != "solute":
        warnings.add("solvent coefficients are in arbitrary units: the differentials file is absolute (per K) but "
                     "the data are relative; set scaling.mode: solute (with the solvent composition) for dT in K")
    return basis


def _fit_rows(fcfg, delay, usable):
    """Rows of the fit: usable bins inside fit.delay_range_ps, at least fit.min_delays of them."""
    use = usable.copy()
    if fcfg["mode"] == "none":
        return use
    if fcfg["delay_range_ps"]:
        lo, hi = fcfg["delay_range_ps"]
        outside = use & ((delay < lo) | (delay > hi))
        if outside.any():
            log.info("fit.delay_range_ps [%g, %g]: %d bins left out of the analysis", lo, hi, int(outside.sum()))
        use &= ~outside
    if use.sum() < fcfg["min_delays"]:
        raise DataError(f"{int(use.sum())} delay bins with enough shots for the fit; fit.min_delays asks for "
                        f"{fcfg['min_delays']} (check binning.min_shots and fit.delay_range_ps)")
    return use


def _solute(fcfg, data, use, basis, fit, warnings):
    """Arrays of the fit (if any) and the solute difference: data minus the per-delay terms."""
    arrays: dict[str, np.ndarray] = {}
    diff, err, names, curves = data.diff[use], data.err[use], basis.names, basis.curves
    solvent_like = any(n not in NUISANCE_TERMS for n in names)
    if fit is not None:
        if fcfg["mode"] == "species" and fcfg["species_curves"] == "free" and solvent_like:
            warnings.add("species fit with free curves: the split between the species curves and the per-delay "
                         "solvent terms is a convention (curves carry no solvent-shaped part), so solvent_coef and "
                         "solute are not determined by the data alone")
        nvalid = np.maximum(np.isfinite(fit.residual).sum(axis=1) - len(names), 1)
        arrays.update(model=fit.model, residual=fit.residual, chi2=fit.chi2_delay / nvalid,
                      population=fit.populations)
        coef, coef_err = fit.solvent_coef, fit.solvent_coef_err
        solute = diff - (coef @ curves if curves is not None else 0.0)
    elif curves is not None:
        sf = fit_solvent(diff, err, curves, names=names)
        coef, coef_err, solute = sf.coef, sf.coef_err, sf.solute
        for w in sf.warnings:
            warnings.add(w)
        if fcfg["mode"] == "none" and solvent_like:
            warnings.add("no solute model in the fit (fit.mode none): solvent coefficients absorb any solute "
                         "signal that resembles the solvent curves")
    else:
        coef = coef_err = None
        solute = diff
    arrays["solute"] = solute
    if coef is not None:
        arrays.update(solvent_coef=coef, solvent_coef_err=coef_err)
    arrays = {k: _rows(v, use) for k, v in arrays.items()}
    return arrays, solute


def _realspace(rcfg, data, solute, use, arrays, units):
    """Sharpened real-space view of the solute difference; returns its attrs (what F, q range, damping)."""
    elements = [str(e) for e in data.models["element"][...]] if data.models is not None else None
    sharpen, label = realspace.sharpening(data.q, rcfg["sharpen_pair"], elements)
    r = np.arange(REALSPACE_STEP, rcfg["r_max_A"] + 1e-9, REALSPACE_STEP)
    values, kappa = realspace.sharpened_transform(data.q, solute, r, sharpen, rcfg["q_range_invA"],
                                                  rcfg["damping_A2"])
    arrays.update(solute_realspace=_rows(values, use), r=r)
    low, high = rcfg["q_range_invA"] or (float(data.q[0]), float(data.q[-1]))
    pairs = "pairs" if units == SCALE_UNITS else f"({units}) / e.u.^2"
    return {"units": f"{pairs} / Å", "meaning": "change of the number of pairs per Å (gained > 0, lost < 0), an a-b "
            "pair weighted f_a f_b / F: dP(r) = (r / pi) int q dS(q) / F(q) sin(q r) exp(-kappa q^2) dq",
            "sharpening": label, "q_range_invA": [low, high], "damping_A2": kappa,
            "peak_sigma_A": realspace.peak_width(kappa)}



def _svd(ncfg, data, solute, usable, use, arrays, warnings):
    """SVD of the solute difference and its count of significant components."""
    rows, notes = svd.noise_rows(data.delay, usable, ncfg["noise_delays_ps"])
    for w in notes:
        warnings.add(f"svd.noise_delays_ps: {w}")
    noise, noise_err = (None, None) if rows is None else (data.diff[rows], data.err[rows])
    count = svd.count_components(solute, noise, err=data.err[use], rng=np.random.default_rng(ncfg["seed"]),
                                 noise_err=noise_err)
    for w in count.warnings:
        warnings.add(w)
    u, s, vt = count.u, count.s, count.vt  # the same weighted map as the count and its noise reference
    k = min(ncfg["max_components"], s.size)
    arrays.update(svd_values=s[:k], svd_noise=count.s_noise[:k], svd_u=_rows(u[:, :k], use), svd_v=vt[:k])
    log.info("SVD: %s", count.decision)
    return {"svd_components": int(count.n), "svd_threshold": count.threshold, "svd_decision": count.decision,
            "svd_noise_source": count.noise_source, "svd_structured": [bool(b) for b in count.smooth[:k]]}


def _rows(values, use):
    """Expand rows of the used delays to all delays (NaN elsewhere)."""
    values = np.asarray(values, float)
    full = np.full((use.size,) + values.shape[1:], np.nan)
    full[use] = values
    return full


def _trajectory_model(fcfg, models, basis, spread):
    if not _has_trajectory(models):
        raise ConfigError("fit.mode", "'trajectory' without model.trajectory", "a trajectory in model.trajectory")
    times = store.read(models, "frame_time")
    if not np.all(np.isfinite(times)):
        raise InputError("model.trajectory", "frames without times", "time_ps= (or time_fs=) on every frame")
    model = TrajectoryModel(times, store.read(models, "traj_dS"), solvent=basis.curves, solvent_names=basis.names,
                            delay_spread=spread)
    return model, {"t0": fcfg["time_zero_ps"], "sigma": fcfg["irf_sigma_ps"], "lifetime": fcfg["lifetimes_ps"][0]}


def _species_model(fcfg, models, basis, spread):
    given = None
    if fcfg["species_curves"] == "model":
        if models is None or "species_dS" not in models or models["species_dS"].shape[0] == 0:
            raise ConfigError("fit.species_curves", "'model' without model.species",
                              "species structures in model.species, or fit.species_curves: free")
        given = store.read(models, "species_dS")
    n, scheme = len(fcfg["lifetimes_ps"]), fcfg["kinetics"]
    transitions = fcfg["network"] if scheme == "network" else None
    species, _ = species_with_signal(n, scheme, transitions, fcfg["product_signal"])
    species = fcfg["signal_species"] or species
    if given is not None and given.shape[0] != len(species):
        raise ConfigError("model.species", f"{given.shape[0]} species structures",
                          f"{len(species)}, one per species with a solute signal "
                          f"(fit.signal_species, or the kinetic scheme's non-final species)")
    model = SpeciesModel(n, scheme, curves=given, species=species, solvent=basis.curves, solvent_names=basis.names,
                         delay_spread=spread, transitions=transitions, oscillation=fcfg["oscillation"])
    p0 = {"t0": fcfg["time_zero_ps"], "sigma": fcfg["irf_sigma_ps"]}
    p0.update({f"lifetime_{i + 1}": v for i, v in enumerate(fcfg["lifetimes_ps"])})
    if fcfg["oscillation"]:
        p0.update({"osc_period": fcfg["oscillation_period_ps"], "osc_damping": fcfg["oscillation_damping_ps"]})
    return model, p0


#: Smallest eigenvalue of the used bins' correlation still accepted (below: a singular covariance).
MIN_CORRELATION_EIGENVALUE = 1e-10


def _correlation(data, use):
    """The used bins' correlation along delay (None, with a log line, when the binned store has none)."""
    if data.correlation is None:
        log.info("%s has no delay_correlation: fit errors ignore the correlation between delay bins "
                 "(neighbouring bins share pump-off references)", data.path)
        return None
    if data.correlation.shape != (use.size, use.size):
        raise InputError(f"{data.path}:delay_correlation", f"shape {data.correlation.shape}",
                         f"({use.size}, {use.size}), one row and column per delay bin")
    R = data.correlation[np.ix_(use, use)]
    if not np.all(np.isfinite(R)) or np.linalg.eigvalsh(R).min() <= MIN_CORRELATION_EIGENVALUE:
        raise ConfigError("differences.references", f"a singular covariance between delay bins in {data.path} "
                          "(delay_correlation not positive definite)",
                          "more references per pump-on shot, or more pump-off shots, so that the bins' "
                          "differences are not linear combinations of each other")
    return R


def _global_fit(fcfg, data, use, basis, warnings):
    """The global fit of the used rows, its flags as warnings, and its bootstrap errors."""
    spread = (data.delay[use], data.spread[use])
    make = _trajectory_model if fcfg["mode"] == "trajectory" else _species_model
    model, p0 = make(fcfg, data.models, basis, spread)
    diff, err, delay = data.diff[use], data.err[use], data.delay[use]
    res = varpro.fit(model, diff, err, delay, p0, correlation=_correlation(data, use))
    for w in res.warnings:
        warnings.add(f"fit: {w}")
    if not res.converged:
        warnings.add(f"fit did NOT converge ({res.message}); parameters are not reliable")
    if res.at_bound:
        warnings.add(f"fit parameters at a bound: {', '.join(res.at_bound)}")
    text = f"(errors for {res.error_model}) "
    text += ", ".join(f"{k} = {v:.4g} ± {res.stderr.get(k, np.nan):.2g}" for k, v in res.params.items())
    text += "".join(f", {k} = {v:.4g} ± {res.amplitudes_err.get(k, np.nan):.2g}" for k, v in res.amplitudes.items())
    log.info("%s fit: %s; reduced chi2 %.3f", fcfg["mode"], text, res.red_chi2)
    if data.boot is not None:
        res.bootstrap, failed = varpro.refit_replicates(model, res, data.boot[:, use], err, delay)
        if res.bootstrap:
            log.info("bootstrap over shots (%d replicates): %s", len(data.boot) - failed,
                     ", ".join(f"{k} ± {v.error:.2g}" for k, v in res.bootstrap.items()))
        if failed:
            warnings.add(f"{failed} of {len(data.boot)} bootstrap refits failed")
    if fcfg["bootstrap"]:
        errors, draws = varpro.refit_resamples(model, res, diff, err, delay, fcfg["bootstrap"],
                                               np.random.default_rng(fcfg["seed"]))
        for k, v in errors.items():
            res.bootstrap.setdefault(k, v)
        log.info("bootstrap over delays (%d resamples, %d failed): std %s", fcfg["bootstrap"], draws.n_failed,
                 np.array2string(draws.std, precision=3))
    return res


def _structures(fcfg, data, use, basis, warnings, amplitude=None):
    """Best trajectory frame per delay, its positions and the configured geometric parameters."""
    models = data.models
    pos = store.read(models, "traj_positions")
    n_members = len((models.attrs.get("input_files") or {}).get("trajectory", []) or [])
    if n_members > 1:
        warnings.add(f"the model curves average {n_members} trajectories, but positions and geometric parameters "
                     "are those of the first one: read them as indicative")
    params = {}
    for name, idx in fcfg["geometry"].items():
        if max(idx) >= pos.shape[1]:
            raise ConfigError(f"fit.geometry.{name}", f"atom indices {idx}", f"indices below {pos.shape[1]} atoms")
        params[name] = geometry.distance(pos, *idx) if len(idx) == 2 else geometry.angle(pos, *idx)
    ff = structure.fit_frames(data.diff[use], data.err[use], store.read(models, "traj_dS"), solvent=basis,
                              params=params, delta_chi2=fcfg["delta_chi2"], amplitude=amplitude,
                              min_sigma=fcfg["structure_min_sigma"])
    for w in ff.warnings:
        warnings.add(w)
    sig = ff.significant
    out = {"frame": _rows(np.where(sig, ff.best_frame, -1), use), "frame_amplitude": _rows(ff.amplitude, use),
           "structure_significant": _rows(sig.astype(float), use) == 1.0}
    positions = np.full((use.size,) + pos.shape[1:], np.nan)
    positions[np.flatnonzero(use)[sig]] = pos[ff.best_frame[sig]]
    out["positions"] = positions
    out["element"] = np.array([str(e) for e in models["element"][...]])
    names = list(params)
    if names:
        for kind, found in (("geometry", ff.value), ("geometry_lower", ff.lower), ("geometry_upper", ff.upper)):
            out[kind] = _rows(np.stack([np.where(sig, found[name], np.nan) for name in names], axis=1), use)
        out["parameter"] = np.array(names)
    units = {name: "Å" if len(fcfg["geometry"][name]) == 2 else "deg" for name in names}
    if ff.at_end.any():
        warnings.add(f"{int(ff.at_end[sig].sum())} delays fit best at the last trajectory frame: "
                     "the trajectory may be too short")
    return out, units


DIMS = {
    "solute": ("delay", "q"), "model": ("delay", "q"), "residual": ("delay", "q"), "chi2": ("delay",),
    "population": ("delay", "species"), "solvent_coef": ("delay", "term"), "solvent_coef_err": ("delay", "term"),
    "svd_values": ("component",), "svd_noise": ("component",), "svd_u": ("delay", "component"),
    "svd_v": ("component", "q"), "frame": ("delay",), "frame_amplitude": ("delay",),
    "structure_significant": ("delay",), "positions": ("delay", "atom", "xyz"), "element": ("atom",),
    "r": ("r",), "solute_realspace": ("delay", "r"), "geometry": ("delay", "parameter"),
    "geometry_lower": ("delay", "parameter"), "geometry_upper": ("delay", "parameter"), "parameter": ("parameter",),
}


def _fit_attrs(fit, config):
    """Attributes of a fit: parameters with errors (and bootstrap errors), chi2, flags."""
    params = {k: {"value": float(v), "error": float(fit.stderr.get(k, np.nan)),
                  "error_independent_bins": float(fit.stderr_independent.get(k, np.nan)),
                  "units": "ps" if k in TIME_PARAMETERS or k.startswith("lifetime_") else ""}
              for k, v in fit.params.items()}
    for k, v in fit.amplitudes.items():
        params[k] = {"value": float(v), "error": float(fit.amplitudes_err.get(k, np.nan)),
                     "error_independent_bins": float(fit.amplitudes_err_independent.get(k, np.nan)),
                     "units": "1" if config["scaling"]["mode"] == "solute" else "model units"}
    for k, info in fit.bootstrap.items():
        params[k]["bootstrap_error"] = info.error
        params[k]["bootstrap"] = f"{info.replicates} replicates over {info.over}"
    return {"fit_mode": config["fit"]["mode"], "fit_parameters": params, "fit_reduced_chi2": float(fit.red_chi2),
            "fit_converged": bool(fit.converged), "fit_at_bound": list(fit.at_bound),
            "fit_species": list(fit.species_names), "fit_correlation_names": list(fit.corr_names),
            "fit_errors": _error_note(fit)}


def _error_note(fit):
    """What the reported errors assume (attrs ``fit_errors``)."""
    if fit.error_model == "correlated bins":
        assumes = ("standard errors of an ordinary weighted fit under differences correlated between delay bins "
                   "(shared pump-off references): Cov(D_b(q), D_c(q)) = difference_error_b(q) difference_error_c(q) R_bc with R the "
                   "binned store's delay_correlation, no correlation between q points; sandwich covariance scaled by "
                   "chi2 over its expectation under R; linearized (asymptotic)")
    else:
        assumes = ("standard errors assuming independent delay bins (no delay_correlation in the binned store), "
                   "scaled by the reduced chi2; too small where neighbouring bins share pump-off references; "
                   "linearized (asymptotic)")
    return {"model": fit.error_model, "assumes": assumes, "scale_reduced_chi2": float(fit.error_scale),
            "error_independent_bins": "the same errors with the bins taken as independent (per-bin errors only)"}


def _array_attrs(name, result):
    """Units and meaning of an array of the analysis store."""
    units = result["units"]
    u = {"solute": units, "model": units, "residual": units, "positions": "Å", "chi2": "1 (reduced)",
         "svd_v": "1", "svd_u": "1", "svd_values": "1", "svd_noise": "1", "r": "Å",
         "solute_realspace": (result.get("realspace") or {}).get("units"), "population": "1", "frame_amplitude": "1",
         "solvent_coef": result["coef_units"], "solvent_coef_err": result["coef_units"]}.get(name)
    if name.startswith("geometry"):
        found = set(result["geometry_units"].values())
        u = found.pop() if len(found) == 1 else "Å (distances), deg (angles)"
    meaning = None
    if name == "solute_realspace":
        meaning = {k: v for k, v in result["realspace"].items() if k != "units"}
    elif name in ("solvent_coef", "solvent_coef_err"):
        meaning = {"terms": result["names"],
                   "meaning": "per-delay coefficient of each term (dT in K only on the absolute scale "
                              "with differentials per K; normalization: dimensionless nuisance)"}
    elif name.startswith("svd_"):
        meaning = {"meaning": "SVD of the solute difference weighted by 1 / (e_t e_q), the separable approximation "
                              "of 1 / difference_error (dimensionless); svd_noise: noise maps of the same weighting; "
                              "attrs svd_threshold, svd_structured, svd_decision: how the count was made"}
    return u, meaning


def _write(out, q, delay, arrays, result, config, warnings):
    fit = result.get("fit")
    attrs = {"written": now(), "analysis_units": result["units"], "absolute_scale_factor": result["factor"],
             "solvent_terms": result["names"], "warnings": list(warnings), **result["svd_count"]}
    if fit is not None:
        attrs.update(_fit_attrs(fit, config))
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, attrs)
        store.write_array(g, "q", q, ["q"], units="1/Å")
        store.write_array(g, "delay", delay, ["delay"], units="ps")
        for name, values in arrays.items():
            units, extra = _array_attrs(name, result)
            store.write_array(g, name, values, DIMS.get(name, ("delay",)), units=units, attrs=extra)
        if result["names"]:
            store.write_array(g, "term", np.array(result["names"]), ["term"])
        if fit is not None:
            store.write_array(g, "correlation", fit.correlation, ["param", "param_b"],
                              attrs={"names": list(fit.corr_names)})
            store.write_array(g, "species", np.array(fit.species_names), ["species"])
