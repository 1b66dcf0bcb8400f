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
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..errors import ConfigError, DataError, InputError
from ..fitting import structure, varpro
from ..fitting.models import SpeciesModel, TrajectoryModel
from ..io import store
from ..scattering import geometry, realspace
from ..signals import scaling, svd
from ..signals.solvent import dS_dlnq, estimate_heating_curve, fit_solvent
from .common import Warnings, now

log = logging.getLogger("movieproc.analyze")

SCALE_UNITS = "e.u. per solute molecule"


def read_differentials(path, q):
    """Solvent differentials from a CSV (q, dS/dT, dS/drho), interpolated on ``q``.

    Returns a dict ``{"dT": (nq,), "drho": (nq,)}`` (``drho`` only if the file has a third column).
    """
    path = Path(path)
    if not path.exists():
        raise InputError(path, "no such file", "a CSV with columns q (1/Å), dS/dT, dS/drho (config solvent.differentials)")
    try:
        table = np.loadtxt(path, delimiter=",", comments="#", ndmin=2)
    except ValueError as exc:
        raise InputError(path, f"unreadable numbers ({exc})", "comma-separated columns q, dS/dT[, dS/drho]") from None
    if table.shape[1] < 2 or not np.all(np.isfinite(table)) or np.any(np.diff(table[:, 0]) <= 0):
        raise InputError(path, f"a table of shape {table.shape}", "finite columns q (increasing), dS/dT[, dS/drho]")
    if q[0] < table[0, 0] - 1e-9 or q[-1] > table[-1, 0] + 1e-9:
        raise InputError(path, f"q from {table[0, 0]:.3g} to {table[-1, 0]:.3g} 1/Å",
                         f"a q range covering the data's {q[0]:.3g}-{q[-1]:.3g} 1/Å")
    out = {"dT": np.interp(q, table[:, 0], table[:, 1])}
    if table.shape[1] > 2:
        out["drho"] = np.interp(q, table[:, 0], table[:, 2])
    return out


def _absolute_scale(config, q, models, reference):
    sc = config["scaling"]
    if sc["mode"] != "solute":
        return 1.0
    if models is None:
        raise ConfigError("scaling.mode", "'solute' without model.ground",
                          "a ground-state structure (model.ground) for the solute's scattering")
    for key in ("solvent_formula", "solvent_per_solute"):
        if sc[key] is None:
            raise ConfigError(f"scaling.{key}", "null", "a value, needed for scaling.mode 'solute'")
    els = [str(e) for e in models["element"][...]]
    unit = scaling.unit_cell_scattering(q, models["ground_S"][...], els, sc["solvent_formula"], sc["solvent_per_solute"])
    # the high-q window of the unit cell against the same window of the measured pump-off curve
    factor = scaling.absolute_scale(q, unit, config["differences"]["norm_q_range"], reference)
    log.info("absolute scale: 1 normalized unit = %.6g e.u. per solute molecule", factor)
    return factor


def run(binned_path, models_path, out, config: dict):
    """Analyze the binned differences; see the module docstring for what is written."""
    warnings = Warnings("analyze", log)
    b = store.open_group(binned_path, "binned store")
    q, delay = store.read(b, "q"), store.read(b, "delay")
    diff = store.read(b, "diff").astype(float)
    err = store.read(b, "diff_err").astype(float)
    low = store.read(b, "low_count")
    off_mean = store.read(b, "off_mean").astype(float)
    models = store.open_group(models_path, "model store") if models_path else None
    mq = store.read(models, "q") if models is not None else None
    if models is not None and (mq.shape != q.shape or not np.allclose(mq, q, rtol=1e-9, atol=1e-12)):
        raise InputError(f"{models_path}:q", "a q grid different from the data's", f"the q grid of {binned_path}")

    ok_rows = ~low & np.all(np.isfinite(off_mean), axis=1)
    factor = _absolute_scale(config, q, models, np.mean(off_mean[ok_rows], axis=0) if ok_rows.any() else None)
    units = SCALE_UNITS if config["scaling"]["mode"] == "solute" else b["diff"].attrs.get("units", "")
    diff, err = diff * factor, err * factor
    use = ~low & np.all(np.isfinite(diff), axis=1) & np.all(np.isfinite(err) & (err > 0), axis=1)
    usable = use.copy()  # before any fit delay range: the SVD noise rows are chosen from these
    if use.sum() == 0:
        raise DataError(f"no delay bin of {binned_path} has enough shots (binning.min_shots) for the analysis")

    # --- solvent and nuisance terms (curves with a free coefficient per delay)
    scfg = config["solvent"]
    names, curves = [], []
    if scfg["enabled"]:
        if scfg["differentials"]:
            diffs = read_differentials(scfg["differentials"], q)
            for term in scfg["terms"]:
                if term not in diffs:
                    raise ConfigError("solvent.terms", f"'{term}'", f"a term present in {scfg['differentials']}")
                names.append(term)
                curves.append(diffs[term])
        elif scfg["estimate_window_ps"]:
            heat = estimate_heating_curve(diff[use], err[use], delay[use], scfg["estimate_window_ps"])
            for w in heat.warnings:
                warnings.add(w)
            names.append("dT")
            curves.append(heat.curve)
            warnings.add("the heating curve was estimated from late delays (solvent.estimate_window_ps); "
                         "its coefficient is in arbitrary units, not K")
        else:
            warnings.add("no solvent differentials (solvent.differentials) nor estimate window: no heating term fitted")
    reference = np.nanmean(off_mean[use], axis=0) * factor
    if config["differences"]["normalization"] != "none":
        names.append("normalization")
        curves.append(reference)
    if scfg["energy_term"]:
        # a photon-energy mismatch between pump-on and reference shots moves the curve in q:
        # dS ~ -(dS/d ln q) dE/E, fitted per delay as a nuisance term
        names.append("energy")
        curves.append(dS_dlnq(q, reference))
    basis = np.array(curves) if curves else None

    result = {"names": names, "units": units, "factor": factor, "use": use,
              "coef_units": "K (dT), g/cm3 (drho)" if config["scaling"]["mode"] == "solute" and scfg["differentials"]
              else "arbitrary"}
    if scfg["enabled"] and scfg["differentials"] and config["scaling"]["mode"] != "solute":
        warnings.add("solvent coefficients are in arbitrary units: the differentials file is absolute (per K) but "
                     "the data are relative; set scaling.mode: solute (with the solvent composition) for dT in K")
    arrays = {}

    # --- fits
    fcfg = config["fit"]
    fit_res = None
    if fcfg["mode"] != "none" and fcfg["delay_range_ps"]:
        lo, hi = fcfg["delay_range_ps"]
        outside = use & ((delay < lo) | (delay > hi))
        if outside.any():
            log.info("fit.delay_range_ps [%g, %g]: %d bins left out of the analysis", lo, hi, int(outside.sum()))
        use = use & ~outside
    if fcfg["mode"] != "none" and use.sum() < fcfg["min_delays"]:
        raise DataError(f"{int(use.sum())} delay bins with enough shots for the fit; fit.min_delays asks for "
                        f"{fcfg['min_delays']} (check binning.min_shots and fit.delay_range_ps)")
    if fcfg["mode"] != "none":
        spread = (delay[use], store.read(b, "delay_spread")[use])
        boot = store.read(b, "diff_boot").astype(float) * factor if "diff_boot" in b else None
        fit_res = _global_fit(fcfg, models, diff[use], err[use], delay[use], basis, names, warnings, spread,
                              None if boot is None else boot[:, use])
    if fit_res is not None and fcfg["mode"] == "species" and fcfg["species_curves"] == "free" and \
            any(n not in ("normalization", "energy") for n in names):
        warnings.add("species fit with free curves: the split between the species curves and the per-delay solvent "
                     "terms is a convention (curves carry no solvent-shaped part), so solvent_coef and solute are "
                     "not determined by the data alone")
    if fit_res is not None:
        arrays["model"] = _rows(fit_res.model, use)
        arrays["residual"] = _rows(fit_res.residual, use)
        nvalid = np.maximum(np.isfinite(fit_res.residual).sum(axis=1) - (len(names) if names else 0), 1)
        arrays["chi2"] = _rows(fit_res.chi2_delay / nvalid, use)
        arrays["population"] = _rows(fit_res.populations, use)
        coef, coef_err = fit_res.solvent_coef, fit_res.solvent_coef_err
        removed = coef @ basis if basis is not None else 0.0
        solute = diff[use] - removed
        result["fit"] = fit_res
    else:
        if basis is not None:
            sf = fit_solvent(diff[use], err[use], basis, names=names)
            coef, coef_err, solute = sf.coef, sf.coef_err, sf.solute
            for w in sf.warnings:
                warnings.add(w)
            if fcfg["mode"] == "none" and any(n not in ("normalization", "energy") for n in names):
                warnings.add("no solute model in the fit (fit.mode none): solvent coefficients absorb any solute "
                             "signal that resembles the solvent curves")
        else:
            coef = coef_err = None
            solute = diff[use]
    arrays["solute"] = _rows(solute, use)
    # real-space view: which distances change (damped sine transform of q * solute)
    r = np.arange(0.0, 10.0 + 1e-9, 0.05)
    arrays["solute_realspace"] = _rows(realspace.sine_transform(q, solute, r, kappa=0.03), use)
    arrays["r"] = r
    if coef is not None:
        arrays["solvent_coef"] = _rows(coef, use)
        arrays["solvent_coef_err"] = _rows(coef_err, use)

    # --- SVD of the solute difference
    ncfg = config["svd"]
    noise = noise_err = None
    if ncfg["noise_delays_ps"]:
        lo, hi = ncfg["noise_delays_ps"]
        rows = usable & (delay >= lo) & (delay <= hi)
        if rows.sum() >= 2:
            noise, noise_err = diff[rows], err[rows]
        else:
            warnings.add(f"svd.noise_delays_ps [{lo}, {hi}] holds {rows.sum()} usable bins; noise drawn from the errors")
    count = svd.count_components(solute, noise, err=err[use], rng=np.random.default_rng(ncfg["seed"]),
                                 noise_err=noise_err)
    for w in count.warnings:
        warnings.add(w)
    u, s, vt = svd.svd(solute, weights=1.0 / err[use])
    k = min(ncfg["max_components"], s.size)
    arrays["svd_values"] = s[:k]
    arrays["svd_noise"] = count.s_noise[:k]
    arrays["svd_u"] = _rows(u[:, :k], use)
    arrays["svd_v"] = vt[:k]
    result["svd_count"] = int(count.n)
    log.info("SVD: %d significant component(s) (values %s; noise %s)", count.n,
             np.array2string(s[:k], precision=3), np.array2string(count.s_noise[:k], precision=3))

    # --- structure per delay
    if models is not None and "traj_dS" in models and fcfg["mode"] != "none":
        amplitude = None
        if fit_res is not None and fcfg["mode"] == "trajectory":
            # excited fraction at each delay from the global fit: alpha times the IRF-convolved survival
            amplitude = fit_res.amplitudes["alpha"] * fit_res.populations[:, 0]
        structures, result["geometry_units"] = _structures(fcfg, models, diff, err, use, basis, delay, warnings,
                                                           amplitude)
        arrays.update(structures)

    _write(out, q, delay, arrays, result, config, warnings)


def _rows(values, use):
    """Expand rows of the used delays to all delays (NaN elsewhere)."""
    values = np.asarray(values, float)
    full = np.full((use.size,) + values.shape[1:], np.nan)
    full[use] = values
    return full


#: Keys the fitting cores name (their own parameter names) -> the config keys a user sets.
_CORE_KEYS = {
    "fit.initial.t0": "fit.time_zero_ps", "fit.initial.sigma": "fit.irf_sigma_ps",
    "fit.initial.lifetime": "fit.lifetimes_ps", "fit.initial.osc_period": "fit.oscillation_period_ps",
    "fit.initial.osc_damping": "fit.oscillation_damping_ps", "fit.kinetics.species": "fit.signal_species",
    "fit.model.oscillation": "fit.oscillation", "fit.kinetics.n_lifetimes": "fit.lifetimes_ps",
}


def _global_fit(fcfg, models, diff, err, delay, basis, names, warnings, spread=None, boot=None):
    """The global fit, with errors of the fitting cores named by the config keys a user sets."""
    try:
        return _fit(fcfg, models, diff, err, delay, basis, names, warnings, spread, boot)
    except (ConfigError, DataError) as err_:
        # a model that cannot be evaluated at the starting values is a config problem too
        exc = err_ if isinstance(err_, ConfigError) else err_.__cause__
        if not isinstance(exc, ConfigError):
            raise
        key = _CORE_KEYS.get(exc.key, exc.key)
        if key.startswith("fit.initial.tau_"):
            key = "fit.lifetimes_ps"
        if key == "fit.kinetics.rates":
            key = "fit.network" if fcfg["kinetics"] == "network" else "fit.lifetimes_ps"
        if key == exc.key and exc is err_:
            raise
        raise ConfigError(key, exc.found, exc.expected) from err_


def _fit(fcfg, models, diff, err, delay, basis, names, warnings, spread=None, boot=None):
    if fcfg["mode"] == "trajectory":
        if models is None or "traj_dS" not in models:
            raise ConfigError("fit.mode", "'trajectory' without model.trajectory", "a trajectory in model.trajectory")
        times = store.read(models, "frame_time")
        if not np.all(np.isfinite(times)):
            raise InputError("model.trajectory", "frames without times", "time_ps= (or time_fs=) on every frame")
        model = TrajectoryModel(times, store.read(models, "traj_dS"), solvent=basis, solvent_names=names,
                                delay_spread=spread)
        p0 = {"t0": fcfg["time_zero_ps"], "sigma": fcfg["irf_sigma_ps"], "lifetime": fcfg["lifetimes_ps"][0]}
    else:
        given = None
        if fcfg["species_curves"] == "model":
            if models is None or "species_dS" not in models or models["species_dS"].shape[0] == 0:
                raise ConfigError("fit.species_curves", "'model' without model.species",
                                  "species structures in model.species, or fit.species_curves: free")
            given = store.read(models, "species_dS")
        n = len(fcfg["lifetimes_ps"])
        scheme = fcfg["kinetics"]
        transitions = fcfg["network"] if scheme == "network" else None
        if scheme == "network":
            if not transitions or len(transitions) != n:
                raise ConfigError("fit.network", f"{transitions!r}",
                                  f"one [from, to] transition per lifetime in fit.lifetimes_ps ({n})")
            sinks = sorted(set(range(max(max(t) for t in transitions) + 1)) - {t[0] for t in transitions})
            transient = [i for i in range(max(max(t) for t in transitions) + 1) if i not in sinks]
            species = fcfg["signal_species"] or (None if fcfg["product_signal"] else transient)
        else:
            species = fcfg["signal_species"] or (None if fcfg["product_signal"] else list(range(n)))
        n_all = (max(max(t) for t in transitions) + 1) if scheme == "network" else n + 1
        if given is not None and given.shape[0] != len(species or range(n_all)):
            raise ConfigError("model.species", f"{given.shape[0]} species structures",
                              f"{len(species or range(n_all))}, one per species with a solute signal "
                              f"(fit.signal_species, or the kinetic scheme's non-final species)")
        model = SpeciesModel(n, scheme, curves=given, species=species, solvent=basis, solvent_names=names,
                             delay_spread=spread, transitions=transitions, oscillation=fcfg["oscillation"])
        p0 = {"t0": fcfg["time_zero_ps"], "sigma": fcfg["irf_sigma_ps"]}
        p0.update({f"tau_{i + 1}": v for i, v in enumerate(fcfg["lifetimes_ps"])})
        if fcfg["oscillation"]:
            p0.update({"osc_period": fcfg["oscillation_period_ps"], "osc_damping": fcfg["oscillation_damping_ps"]})
    res = varpro.fit(model, diff, err, delay, p0)
    for w in res.warnings:
        warnings.add(f"fit: {w}")
    if not res.converged:
        warnings.add(f"fit did NOT converge ({res.message}); parameters are not reliable")
    if res.at_bound:
        warnings.add(f"fit parameters at a bound: {', '.join(res.at_bound)}")
    text = ", ".join(f"{k} = {v:.4g} ± {res.stderr.get(k, np.nan):.2g}" for k, v in res.params.items())
    text += "".join(f", {k} = {v:.4g} ± {res.amplitudes_err.get(k, np.nan):.2g}" for k, v in res.amplitudes.items())
    log.info("%s fit: %s; reduced chi2 %.3f", fcfg["mode"], text, res.red_chi2)
    names_all = list(model.param_names) + list(res.amplitudes)
    res.bootstrap = {}
    if boot is not None:
        # refit every bootstrap replicate over shots; its spread is the parameters' error
        samples = []
        for rep in boot:
            try:
                r = varpro.fit(model, rep, err, delay, res.params, linear_errors=False)
            except (DataError, ConfigError):
                continue
            samples.append([r.params[k] for k in model.param_names] + list(r.amplitudes.values()))
        if len(samples) >= 2:
            sd = np.std(np.array(samples), axis=0, ddof=1)
            res.bootstrap = {n: {"error": float(v), "replicates": len(samples), "over": "shots"}
                             for n, v in zip(names_all, sd)}
            log.info("bootstrap over shots (%d replicates): %s", len(samples),
                     ", ".join(f"{n} ± {v:.2g}" for n, v in zip(names_all, sd)))
        if len(samples) < len(boot):
            warnings.add(f"{len(boot) - len(samples)} of {len(boot)} bootstrap refits failed")
    if fcfg["bootstrap"]:
        def refit(d, e, t):
            order = np.argsort(t, kind="stable")
            r = varpro.fit(model, d[order], e[order], t[order], res.params, linear_errors=False)
            return [r.params[k] for k in model.param_names] + list(r.amplitudes.values())

        bs = varpro.bootstrap(refit, (diff, err, delay), fcfg["bootstrap"], np.random.default_rng(fcfg["seed"]))
        for n, v in zip(names_all, bs.std):
            res.bootstrap.setdefault(n, {"error": float(v), "replicates": int(len(bs.samples)), "over": "delays"})
        log.info("bootstrap over delays (%d resamples, %d failed): std %s", fcfg["bootstrap"], bs.n_failed,
                 np.array2string(bs.std, precision=3))
    return res


def _structures(fcfg, models, diff, err, use, basis, delay, warnings, amplitude=None):
    pos = store.read(models, "traj_positions")
    elements = [str(e) for e in models["element"][...]]
    n_members = len((models.attrs.get("input_files") or {}).get("trajectory", []) or [])
    if n_members > 1:
        warnings.add(f"the model curves average {n_members} trajectories, but positions and geometric parameters "
                     "are those of the first one: read them as indicative")
    params, units = {}, {}
    for name, idx in fcfg["geometry"].items():
        if max(idx) >= pos.shape[1]:
            raise ConfigError(f"fit.geometry.{name}", f"atom indices {idx}", f"indices below {pos.shape[1]} atoms")
        params[name] = geometry.distance(pos, *idx) if len(idx) == 2 else geometry.angle(pos, *idx)
    ff = structure.fit_frames(diff[use], err[use], store.read(models, "traj_dS"), solvent=basis, params=params,
                              delta_chi2=fcfg["delta_chi2"], amplitude=amplitude,
                              min_sigma=fcfg["structure_min_sigma"])
    for w in ff.warnings:
        warnings.add(w)
    sig = ff.significant
    out = {"frame": _rows(np.where(sig, ff.best_frame, -1), use),
           "frame_amplitude": _rows(ff.amplitude, use),
           "structure_significant": _rows(sig.astype(float), use) == 1.0}
    positions = np.full((use.size,) + pos.shape[1:], np.nan)
    positions[np.flatnonzero(use)[sig]] = pos[ff.best_frame[sig]]
    out["positions"] = positions
    out["element"] = np.array(elements)
    for name in params:
        for kind, values in (("", ff.value[name]), ("_lower", ff.lower[name]), ("_upper", ff.upper[name])):
            out[f"geometry_{name}{kind}"] = _rows(np.where(sig, values, np.nan), use)
            units[f"geometry_{name}{kind}"] = "Å" if len(fcfg["geometry"][name]) == 2 else "deg"
    if ff.at_end.any():
        warnings.add(f"{int(ff.at_end[sig].sum())} delays fit best at the last trajectory frame: the trajectory may be too short")
    return out, units


DIMS = {
    "solute": ("delay", "q"), "model": ("delay", "q"), "residual": ("delay", "q"), "chi2": ("delay",),
    "population": ("delay", "species"), "solvent_coef": ("delay", "term"), "solvent_coef_err": ("delay", "term"),
    "svd_values": ("component",), "svd_noise": ("component",), "svd_u": ("delay", "component"),
    "svd_v": ("component", "q"), "frame": ("delay",), "frame_amplitude": ("delay",),
    "structure_significant": ("delay",), "positions": ("delay", "atom", "xyz"), "element": ("atom",),
    "r": ("r",), "solute_realspace": ("delay", "r"),
}


def _write(out, q, delay, arrays, result, config, warnings):
    units = result["units"]
    fit = result.get("fit")
    attrs = {"written": now(), "analysis_units": units, "absolute_scale_factor": result["factor"],
             "svd_components": result["svd_count"], "solvent_terms": result["names"],
             "warnings": list(warnings)}
    if fit is not None:
        attrs["fit_mode"] = config["fit"]["mode"]
        attrs["fit_parameters"] = {k: {"value": float(v), "error": float(fit.stderr.get(k, np.nan)),
                                       "units": "ps" if k in ("t0", "sigma", "lifetime", "osc_period", "osc_damping")
                                       or k.startswith("tau") else ""}
                                   for k, v in fit.params.items()}
        for k, v in fit.amplitudes.items():
            attrs["fit_parameters"][k] = {"value": float(v), "error": float(fit.amplitudes_err.get(k, np.nan)),
                                          "units": "1" if config["scaling"]["mode"] == "solute" else "model units"}
        for k, info in (getattr(fit, "bootstrap", None) or {}).items():
            attrs["fit_parameters"][k]["bootstrap_error"] = info["error"]
            attrs["fit_parameters"][k]["bootstrap"] = f"{info['replicates']} replicates over {info['over']}"
        attrs.update({"fit_reduced_chi2": float(fit.red_chi2), "fit_converged": bool(fit.converged),
                      "fit_at_bound": list(fit.at_bound), "fit_species": list(fit.species_names),
                      "fit_correlation_names": list(fit.corr_names)})
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, attrs)
        store.write_array(g, "q", q, ["q"], units="1/Å")
        store.write_array(g, "delay", delay, ["delay"], units="ps")
        for name, values in arrays.items():
            dims = DIMS.get(name, ("delay",))
            u = {"solute": units, "model": units, "residual": units, "positions": "Å", "chi2": "1 (reduced)",
                 "svd_v": "1", "svd_u": "1", "svd_values": "1", "svd_noise": "1", "r": "Å",
                 "solute_realspace": f"({units}) / Å", "population": "1", "frame_amplitude": "1",
                 "solvent_coef": result["coef_units"], "solvent_coef_err": result["coef_units"]}.get(name)
            if name.startswith("geometry_"):
                u = result["geometry_units"][name]
            if name == "solute_realspace":
                attrs_extra = {"meaning": "r^2 dS(r) = r / (2 pi^2) * integral of q dS(q) sin(q r) exp(-kappa q^2) dq, "
                                          "kappa = 0.03 Å^2: which distances change"}
            elif name == "solvent_coef" or name == "solvent_coef_err":
                attrs_extra = {"terms": result["names"],
                               "meaning": "per-delay coefficient of each term (dT in K only on the absolute scale "
                                          "with differentials per K; normalization: dimensionless nuisance)"}
            elif name.startswith("svd_"):
                attrs_extra = {"meaning": "SVD of the solute difference weighted by 1 / diff_err (dimensionless)"}
            else:
                attrs_extra = None
            store.write_array(g, name, values, dims, units=u, attrs=attrs_extra)
        if result["names"]:
            store.write_array(g, "term", np.array(result["names"]), ["term"])
        if fit is not None:
            store.write_array(g, "correlation", fit.correlation, ["param", "param_b"],
                              attrs={"names": list(fit.corr_names)})
            store.write_array(g, "species", np.array(fit.species_names), ["species"])
