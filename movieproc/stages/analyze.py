"""Stage ``analyze``: absolute scale, solvent terms, SVD, kinetic/trajectory fit, structure per delay.

Reads the binned differences (and the model curves of the ``scatter`` stage
when structures are configured) and writes ``analysis.zarr``, whose arrays the
``assemble`` stage adds to the movie:

- ``solute`` (delay, q): the difference minus the fitted solvent and
  normalization terms;
- ``solvent_coefficient``, ``solvent_coefficient_error`` (delay, term): per-delay
  coefficients, the unit of each term in ``term_units`` (``dT`` in K when the data
  are on the absolute scale);
- ``svd_values``, ``svd_noise_values``, ``svd_structured`` (component),
  ``svd_delay_vectors`` (delay, component), ``svd_q_vectors`` (component, q) and
  the component count (attrs);
- with a fit: ``model``, ``residual`` (delay, q), ``reduced_chi_squared`` (delay),
  ``population`` (delay, species), ``fit_value``, ``fit_error``... (fit_parameter),
  ``fit_correlation`` (correlated_parameter, correlated_parameter_other);
- with a trajectory: the best-fitting frame per delay, ``positions`` (delay,
  atom, axis), ``element`` (atom), and ``geometry``, ``geometry_lower``,
  ``geometry_upper`` (delay, parameter) for the configured geometric parameters.

Every array has ``long_name`` and a pint-parseable ``units`` (strings: none).
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
#: Units of the solvent coefficients on the absolute scale with differentials per K (others: pure numbers).
TERM_UNITS = {"dT": "K", "drho": "g/cm^3"}
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
        Short label of the differences' units (``display_units``; their ``units`` are "1").
    units_description : str
        What a number of the differences means (normalized units).
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
    units_description: str
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
                err=store.read(b, "difference_error").astype(float), low=store.read(b, "too_few_shots"),
                off_mean=store.read(b, "pump_off_mean").astype(float), spread=store.read(b, "delay_spread"),
                boot=store.read(b, "difference_replicates").astype(float) if "difference_replicates" in b else None,
                units=b["difference"].attrs.get("display_units", ""),
                units_description=b["difference"].attrs.get("description", ""), models=models,
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


def _no_usable_bin(data: Data) -> str:
    """Why no bin can be analysed: too few shots, non-finite values, or q points without an error."""
    enough = ~data.low
    bad_q = ~np.all(np.isfinite(data.err[enough]) & (data.err[enough] > 0), axis=0) if enough.any() else None
    text = (f"no delay bin of {data.path} can be analysed: {int(data.low.sum())} of {data.low.size} bins have "
            "fewer shots than binning.min_shots")
    if bad_q is not None and bad_q.any():
        qs = ", ".join(f"{v:.3g}" for v in data.q[bad_q][:6]) + (" ..." if bad_q.sum() > 6 else "")
        text += (f"; the others have no finite, positive standard error at {int(bad_q.sum())} q point(s) "
                 f"({qs} 1/Å): every shot is the same there (masked, behind the beam stop or off the detector?); "
                 "mask those pixels or raise detector.q_min")
    return text


def analyze(data: Data, config: dict, warnings: Warnings):
    """Scale, solvent terms, fit, SVD and structures; returns (arrays, result) for the store."""
    factor = _absolute_scale(config, data)
    data.diff, data.err = data.diff * factor, data.err * factor
    data.boot = None if data.boot is None else data.boot * factor
    usable = ~data.low & np.all(np.isfinite(data.diff), axis=1) & np.all(np.isfinite(data.err) & (data.err > 0), axis=1)
    if usable.sum() == 0:
        raise DataError(_no_usable_bin(data))
    basis = _basis(config, data, usable, factor, warnings)
    solute_units = SCALE_UNITS if config["scaling"]["mode"] == "solute" else data.units
    physical = config["scaling"]["mode"] == "solute" and bool(config["solvent"]["differentials"])
    result = {"names": basis.names, "units": solute_units, "factor": factor,
              "units_description": data.units_description,
              "term_units": [TERM_UNITS.get(n, store.DIMENSIONLESS) if physical else store.DIMENSIONLESS
                             for n in basis.names]}
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
        arrays.update(model=fit.model, residual=fit.residual, reduced_chi_squared=fit.chi2_delay / nvalid,
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
        arrays.update(solvent_coefficient=coef, solvent_coefficient_error=coef_err)
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
    return {"display_units": f"{pairs} / Å", "description": "an a-b pair weighted f_a f_b / F: dP(r) = (r / pi) "
            "int q dS(q) / F(q) sin(q r) exp(-kappa q^2) dq" + ("" if units == SCALE_UNITS else
                                                                 f"; in ({units}) / e.u.^2 per Å, not pairs"),
            "sharpening": label, "q_range_invA": [float(low), float(high)], "damping_A2": float(kappa),
            "peak_sigma_A": float(realspace.peak_width(kappa))}



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
    arrays.update(svd_values=s[:k], svd_noise_values=count.s_noise[:k], svd_delay_vectors=_rows(u[:, :k], use),
                  svd_q_vectors=vt[:k], component=np.arange(1, k + 1),
                  svd_structured=np.array([bool(b) for b in count.smooth[:k]]))
    log.info("SVD: %s", count.decision)
    return {"svd_components": int(count.n), "svd_threshold": float(count.threshold), "svd_decision": count.decision,
            "svd_noise_source": count.noise_source}


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
    n_members = len((store.yaml_value(models.attrs, "input_files_yaml", {}) or {}).get("trajectory", []) or [])
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
    out = {"best_frame": _rows(np.where(sig, ff.best_frame, -1), use), "best_frame_amplitude": _rows(ff.amplitude, use),
           "structure_significant": _rows(sig.astype(float), use) == 1.0}
    positions = np.full((use.size,) + pos.shape[1:], np.nan)
    positions[np.flatnonzero(use)[sig]] = pos[ff.best_frame[sig]]
    out["positions"] = positions
    out["element"] = np.array([str(e) for e in models["element"][...]])
    out["atom"], out["axis"] = np.arange(pos.shape[1]), np.array(["x", "y", "z"])
    names = list(params)
    if names:
        for kind, found in (("geometry", ff.value), ("geometry_lower", ff.lower), ("geometry_upper", ff.upper)):
            out[kind] = _rows(np.stack([np.where(sig, found[name], np.nan) for name in names], axis=1), use)
        out["parameter"] = np.array(names)
    units = {name: store.ANGSTROM if len(fcfg["geometry"][name]) == 2 else store.DEGREE for name in names}
    if ff.at_end.any():
        warnings.add(f"{int(ff.at_end[sig].sum())} delays fit best at the last trajectory frame: "
                     "the trajectory may be too short")
    return out, units


DIMS = {
    "solute": ("delay", "q"), "model": ("delay", "q"), "residual": ("delay", "q"), "reduced_chi_squared": ("delay",),
    "population": ("delay", "species"), "solvent_coefficient": ("delay", "term"),
    "solvent_coefficient_error": ("delay", "term"), "component": ("component",), "svd_values": ("component",),
    "svd_noise_values": ("component",), "svd_structured": ("component",), "svd_delay_vectors": ("delay", "component"),
    "svd_q_vectors": ("component", "q"), "positions": ("delay", "atom", "axis"), "element": ("atom",),
    "atom": ("atom",), "axis": ("axis",), "r": ("r",), "solute_realspace": ("delay", "r"),
    "geometry": ("delay", "parameter"), "geometry_lower": ("delay", "parameter"),
    "geometry_upper": ("delay", "parameter"), "parameter": ("parameter",),
}
#: long_name of each array of the analysis store.
LONG_NAMES = {
    "solute": "solute difference: the difference minus the fitted solvent and normalization terms",
    "model": "fitted model of the difference", "residual": "difference minus model",
    "reduced_chi_squared": "reduced chi-squared of the fit at each delay",
    "population": "population of each species (initial excited population 1)",
    "solvent_coefficient": "coefficient of each solvent or nuisance term per delay",
    "solvent_coefficient_error": "standard error of solvent_coefficient",
    "component": "number of the SVD component",
    "svd_values": "singular values of the weighted solute difference",
    "svd_noise_values": "singular values of noise maps of the same weighting (the count's threshold)",
    "svd_structured": "flag: both singular vectors of the component are smooth (lag-1 autocorrelation test)",
    "svd_delay_vectors": "left singular vectors (along delay) of the weighted solute difference",
    "svd_q_vectors": "right singular vectors (along q) of the weighted solute difference",
    "best_frame": "trajectory frame that fits the delay best (-1: no significant structure)",
    "best_frame_amplitude": "amplitude of the best frame's difference curve",
    "structure_significant": "flag: the solute signal at this delay determines a structure",
    "positions": "atom positions of the best-fitting trajectory frame",
    "element": "chemical element of the atom", "atom": "atom number, as in the structure files (0-based)",
    "axis": "Cartesian axis", "r": "interatomic distance",
    "solute_realspace": "change of the number of atom pairs per Å (gained > 0, lost < 0)",
    "geometry": "geometric parameter of the best-fitting structure (fit.geometry)",
    "geometry_lower": "lower end of the geometric parameter's interval (fit.delta_chi2)",
    "geometry_upper": "upper end of the geometric parameter's interval (fit.delta_chi2)",
    "parameter": "geometric parameter (fit.geometry name)",
}
#: What the SVD arrays are computed from (their description).
SVD_NOTE = ("SVD of the solute difference weighted by 1 / (e_t e_q), the separable approximation of "
            "1 / difference_error (dimensionless); attrs svd_threshold, svd_decision: how the count was made")


def _parameter_units(fit, config):
    """Unit of each fitted parameter (pint strings) and what the amplitudes' unit means."""
    units = {k: store.PS if k in TIME_PARAMETERS or k.startswith("lifetime_") else store.DIMENSIONLESS
             for k in fit.params}
    units.update({k: store.DIMENSIONLESS for k in fit.amplitudes})
    absolute = config["scaling"]["mode"] == "solute"
    note = ("amplitudes: fraction of solute molecules (absolute scale)" if absolute
            else "amplitudes: factors of the model curves (model units)")
    return units, note


def _fit_arrays(g, fit, config):
    """The fitted parameters with their errors, over a ``fit_parameter`` coordinate, and their correlation."""
    units, note = _parameter_units(fit, config)
    names = list(fit.params) + list(fit.amplitudes)
    value = {**fit.params, **fit.amplitudes}
    error = {**fit.stderr, **fit.amplitudes_err}
    independent = {**fit.stderr_independent, **fit.amplitudes_err_independent}
    boot = {k: info.error for k, info in fit.bootstrap.items()}
    unit, described = _common_units([units[k] for k in names], "fit_parameter_units")
    columns = (("fit_value", value, "fitted value"),
               ("fit_error", error, f"standard error ({fit.error_model})"),
               ("fit_error_independent_bins", independent, "standard error with the delay bins taken as independent"),
               ("fit_bootstrap_error", boot, "bootstrap standard error (NaN: no bootstrap)"))
    store.write_array(g, "fit_parameter", np.array(names), ["fit_parameter"], long_name="fitted parameter")
    store.write_array(g, "fit_parameter_units", np.array([units[k] for k in names]), ["fit_parameter"],
                      long_name="unit of each fitted parameter", attrs={"description": note})
    for var, table, long_name in columns:
        store.write_array(g, var, np.array([float(table.get(k, np.nan)) for k in names]), ["fit_parameter"],
                          units=unit, long_name=long_name, attrs={"description": described + "; " + note})
    store.write_array(g, "fit_bootstrap", np.array([f"{fit.bootstrap[k].replicates} replicates over "
                                                     f"{fit.bootstrap[k].over}" if k in fit.bootstrap else ""
                                                     for k in names]), ["fit_parameter"],
                      long_name="bootstrap behind fit_bootstrap_error (empty: none)")
    store.write_array(g, "fit_at_bound", np.array([k in fit.at_bound for k in names]), ["fit_parameter"],
                      units=store.DIMENSIONLESS, long_name="flag: the parameter ended at a bound of the fit")
    store.write_array(g, "correlated_parameter", np.array(fit.corr_names), ["correlated_parameter"],
                      long_name="parameter of the fit's correlation matrix")
    store.write_array(g, "correlated_parameter_other", np.array(fit.corr_names), ["correlated_parameter_other"],
                      long_name="parameter of the fit's correlation matrix (second axis)")
    store.write_array(g, "fit_correlation", fit.correlation, ["correlated_parameter", "correlated_parameter_other"],
                      units=store.DIMENSIONLESS, long_name="correlation between the fitted parameters")


def _common_units(units, coordinate):
    """A variable's units over a labelled axis: the entries' common unit, or "1" with a pointer to their units."""
    if len(set(units)) == 1:
        return units[0], f"unit {units[0]} for every entry"
    return store.DIMENSIONLESS, (f"entries in different units: each value is a number of the unit that "
                                 f"{coordinate} gives for its entry")


def _fit_attrs(fit, config):
    """Scalar attributes of a fit (netCDF-safe): mode, reduced chi2, convergence, what the errors assume."""
    note = _error_note(fit)
    return {"fit_mode": config["fit"]["mode"], "fit_reduced_chi2": float(fit.red_chi2),
            "fit_converged": int(bool(fit.converged)), "fit_error_model": note["model"],
            "fit_error_assumptions": note["assumes"], "fit_error_scale": note["scale_reduced_chi2"]}


def _error_note(fit):
    """What the reported errors assume (attrs ``fit_error_model``, ``fit_error_assumptions``, ``fit_error_scale``)."""
    if fit.error_model == "correlated bins":
        assumes = ("standard errors of an ordinary weighted fit under differences correlated between delay bins "
                   "(shared pump-off references): Cov(D_b(q), D_c(q)) = difference_error_b(q) "
                   "difference_error_c(q) R_bc with R the binned store's delay_correlation, no correlation "
                   "between q points; sandwich covariance scaled by chi2 over its expectation under R; "
                   "linearized (asymptotic)")
    else:
        assumes = ("standard errors assuming independent delay bins (no delay_correlation in the binned store), "
                   "scaled by the reduced chi2; too small where neighbouring bins share pump-off references; "
                   "linearized (asymptotic)")
    return {"model": fit.error_model, "assumes": assumes, "scale_reduced_chi2": float(fit.error_scale)}


def _array_attrs(name, result):
    """units, long_name and further attributes of an array of the analysis store."""
    analysis = {"display_units": result["units"],
                "description": store.ELECTRON_UNITS + " per solute molecule" if result["units"] == SCALE_UNITS
                else result.get("units_description", "")}
    table = {"solute": analysis, "model": analysis, "residual": analysis,
             "solute_realspace": {k: v for k, v in (result.get("realspace") or {}).items()},
             "svd_values": {"description": SVD_NOTE}, "svd_noise_values": {"description": SVD_NOTE},
             "svd_delay_vectors": {"description": SVD_NOTE}, "svd_q_vectors": {"description": SVD_NOTE}}
    extra = dict(table.get(name, {}))
    units: str | None = store.DIMENSIONLESS
    if name in ("positions", "r"):
        units = store.ANGSTROM
    elif name == "solute_realspace":
        units = "1/angstrom"
    elif name in ("solvent_coefficient", "solvent_coefficient_error"):
        units, extra["description"] = _common_units(result["term_units"], "term_units")
    elif name.startswith("geometry"):
        units, extra["description"] = _common_units(list(result["geometry_units"].values()), "parameter_units")
    elif name in ("element", "axis", "parameter"):
        units = None
    return units, LONG_NAMES.get(name, name), extra


def _write(out, q, delay, arrays, result, config, warnings):
    fit = result.get("fit")
    attrs = {"written": now(), "analysis_units": result["units"], "absolute_scale_factor": result["factor"],
             "warnings": store.lines_text(warnings), **result["svd_count"]}
    if fit is not None:
        attrs.update(_fit_attrs(fit, config))
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, attrs)
        store.write_array(g, "q", q, ["q"], units=store.INVERSE_ANGSTROM,
                          long_name="momentum transfer q = 4 pi sin(theta) / lambda")
        store.write_array(g, "delay", delay, ["delay"], units=store.PS,
                          long_name="pump-probe delay: mean corrected delay of the bin's pump-on shots")
        for name, values in arrays.items():
            units, long_name, extra = _array_attrs(name, result)
            store.write_array(g, name, values, DIMS.get(name, ("delay",)), units=units, long_name=long_name,
                              attrs=extra)
        _labels(g, result)
        if fit is not None:
            _fit_arrays(g, fit, config)
            store.write_array(g, "species", np.array(fit.species_names), ["species"], long_name="species of the fit")


def _labels(g, result):
    """The term and geometric-parameter coordinates with the unit of each entry."""
    if result["names"]:
        store.write_array(g, "term", np.array(result["names"]), ["term"],
                          long_name="solvent or nuisance term fitted per delay")
        store.write_array(g, "term_units", np.array(result["term_units"]), ["term"],
                          long_name="unit of each term's coefficient",
                          attrs={"description": "dT in K and drho in g/cm^3 only on the absolute scale with "
                                                "differentials per K; otherwise (and normalization) pure numbers"})
    if result.get("geometry_units"):
        store.write_array(g, "parameter_units", np.array(list(result["geometry_units"].values())), ["parameter"],
                          long_name="unit of each geometric parameter")
