"""Synthetic pump-probe runs of the invented demo scenario, with their ground truth.

The scenario (``demo_data/scenario.yaml``) is an invented dinuclear iridium
complex in an invented solvent. This module builds its structures, a simulated
excited-state trajectory, the solvent's scattering and heating differentials,
the true difference signal as a function of delay, and single-shot runs in the
input contract (curves mode; frames mode through the detector's forward model),
with what makes real runs hard: SASE-like pulse energies and dropouts, timing
jitter read by a noisy timing tool with failed and weak edges, photon-energy
jitter, interleaved pump-off shots, shot noise, a drifting background and
occasional distorted shots. The ground truth is saved beside the run.

Everything is deterministic from the seed.
"""

from __future__ import annotations

import logging
from pathlib import Path

import h5py
import numpy as np

from .io import store
from .signals.normalize import window_mask

log = logging.getLogger(__name__)


def load_scenario(path) -> dict:
    """Read a scenario YAML file."""
    path = Path(path)
    from .errors import InputError

    if not path.exists():
        raise InputError(path, "no such file", "a scenario YAML file (see demo_data/scenario.yaml)")
    from .config import read_yaml

    return read_yaml(path.read_text())


# ----------------------------------------------------------------------------- structure

def molecule(distance, mol: dict):
    """The demo complex with a given metal-metal distance.

    Metals on the z axis at +-d/2; four bridging atoms in the xy plane at the
    radius that keeps the metal-bridge bond length; a carbonyl on each end of
    the axis.

    Parameters
    ----------
    distance : float
        Metal-metal distance, Å.
    mol : dict
        The scenario's ``molecule`` section.

    Returns
    -------
    elements : list of str (10,)
    positions : ndarray (10, 3) float64, Å
    """
    h = distance / 2.0
    r = np.sqrt(mol["metal_bridge_bond"] ** 2 - h * h)
    mc, co = mol["metal_carbon"], mol["carbon_oxygen"]
    pos = [(0, 0, h), (0, 0, -h)]
    pos += [(r * np.cos(a), r * np.sin(a), 0.0) for a in np.deg2rad([0, 90, 180, 270])]
    pos += [(0, 0, h + mc), (0, 0, -h - mc), (0, 0, h + mc + co), (0, 0, -h - mc - co)]
    elements = [mol["metal"]] * 2 + [mol["bridge"]] * 4 + ["C", "C", "O", "O"]
    return elements, np.array(pos, dtype=float)


def excited_distance(tau, mol: dict):
    """Metal-metal distance (Å) at time ``tau`` (ps) after excitation.

    A damped cosine from the ground-state distance towards the excited-state
    minimum; ``tau < 0`` gives the ground-state distance.
    """
    tau = np.asarray(tau, float)
    d0, d1 = mol["distance_ground"], mol["distance_excited"]
    w = 2 * np.pi / mol["vibration_period"]
    d = d1 + (d0 - d1) * np.exp(-np.maximum(tau, 0) / mol["vibration_damping"]) * np.cos(w * np.maximum(tau, 0))
    return np.where(tau < 0, d0, d)


def trajectory(mol: dict):
    """The simulated excited-state trajectory of the scenario.

    Returns
    -------
    times : ndarray (F,), ps
    elements : list of str
    positions : ndarray (F, N, 3), Å
    """
    times = np.round(np.arange(0.0, mol["trajectory_length"] + 1e-9, mol["trajectory_step"]), 6)
    frames = [molecule(d, mol)[1] for d in excited_distance(times, mol)]
    elements = molecule(mol["distance_ground"], mol)[0]
    return times, elements, np.stack(frames)


# ----------------------------------------------------------------------------- solvent

def solvent_curves(q, solv: dict):
    """Scattering of the invented solvent per solvent molecule, and its heating differentials.

    The molecule's independent-atom scattering (sum of f0^2, plus incoherent
    scattering) with one Gaussian liquid peak on the coherent part; heating
    shifts and broadens the peak. At high q the liquid structure fades and the
    curve tends to the independent-atom value, as a real liquid's does.

    Returns
    -------
    S : ndarray (nq,), e.u. per solvent molecule
    dS_dT : ndarray (nq,), e.u. per molecule per K at constant density
    dS_drho : ndarray (nq,), e.u. per molecule per (g/cm^3) at constant temperature
    """
    from .signals.scaling import independent_atom_scattering

    q = np.asarray(q, float)
    coh, inc = independent_atom_scattering(q, solv["formula"])

    def s_of(q0, w):
        return coh * (1.0 + solv["peak_height"] * np.exp(-0.5 * ((q - q0) / w) ** 2)) + inc

    q0, w = solv["peak_q"], solv["peak_width"]
    h = 1e-3
    dT = (s_of(q0 + h * solv["dq_dT"], w + h * solv["dwidth_dT"])
          - s_of(q0 - h * solv["dq_dT"], w - h * solv["dwidth_dT"])) / (2 * h)
    drho = (s_of(q0 + h * solv["dq_drho"], w) - s_of(q0 - h * solv["dq_drho"], w)) / (2 * h)
    return s_of(q0, w), dT, drho


# ----------------------------------------------------------------------------- truth

def _gauss_convolve(t_fine, y, sigma):
    """Convolve samples on a uniform grid with a normalized Gaussian of width sigma (ps)."""
    dt = t_fine[1] - t_fine[0]
    half = int(np.ceil(6 * sigma / dt))
    k = np.exp(-0.5 * (np.arange(-half, half + 1) * dt / sigma) ** 2)
    k /= k.sum()
    pad = np.pad(y, [(half, half)] + [(0, 0)] * (y.ndim - 1), mode="edge")
    out = np.empty_like(y)
    for j in range(y.shape[1]):
        out[:, j] = np.convolve(pad[:, j], k, mode="valid")
    return out


def true_signal(scenario: dict, q, t):
    """Noise-free difference scattering per solute molecule at delays ``t``.

    dS(q, t) = alpha [g * (H(tau) exp(-tau/T1) (S(frame(tau)) - S_ground))](t - t0)
               + dT(t) N_solv dS/dT

    with g the Gaussian IRF, the excited structure following the trajectory and
    holding its last frame after it ends.

    Returns
    -------
    dict with arrays: ``dS`` (nt, nq) e.u., ``solute`` (nt, nq), ``heat`` (nt,) K,
    ``excited`` (nt,) fraction of solutes excited, ``distance`` (nt,) mean
    metal-metal distance of excited molecules (Å; NaN where none are excited),
    ``S_total`` (nq,) ground-state scattering per solute including its solvent
    share, ``dS_dT`` (nq,) and ``dS_drho`` (nq,) per solute share of solvent.
    """
    from .scattering.debye import debye
    from .scattering.formfactors import incoherent

    mol, kin, solv = scenario["molecule"], scenario["kinetics"], scenario["solvent"]
    q = np.asarray(q, float)
    t = np.asarray(t, float)
    els, ground = molecule(mol["distance_ground"], mol)
    s_ground = debye(q, ground, els)
    times, _, frames = trajectory(mol)
    s_frames = np.stack([debye(q, p, els) for p in frames]) - s_ground
    n_solv = solv["molecules_per_solute"]
    s_solv, dsdT, dsdrho = solvent_curves(q, solv)

    sigma, t0, T1 = kin["irf_sigma"], kin["time_zero"], kin["lifetime"]
    dt = 0.002
    t_fine = np.arange(-1.5, 6.0 + dt / 2, dt)
    tau = t_fine  # time after excitation, before the IRF
    surv = np.where(tau >= 0, np.exp(-np.maximum(tau, 0) / T1), 0.0)
    fidx = np.clip(np.searchsorted(times, tau, side="right") - 1, 0, len(times) - 1)
    # linear interpolation between trajectory frames
    nxt = np.clip(fidx + 1, 0, len(times) - 1)
    frac = np.clip((tau - times[fidx]) / np.maximum(times[nxt] - times[fidx], 1e-12), 0, 1)[:, None]
    shape = (1 - frac) * s_frames[fidx] + frac * s_frames[nxt]
    dist = excited_distance(tau, mol)
    exc_fine = _gauss_convolve(t_fine, surv[:, None], sigma)[:, 0]
    sol_fine = _gauss_convolve(t_fine, surv[:, None] * shape, sigma)
    dist_fine = _gauss_convolve(t_fine, (surv * dist)[:, None], sigma)[:, 0]
    heat_fine = _gauss_convolve(
        t_fine, (kin["heat_fast"] * (tau >= 0)
                 + kin["heat_slow"] * np.where(tau >= 0, 1 - surv, 0))[:, None], sigma)[:, 0]

    x = t - t0
    alpha = kin["excitation_fraction"]
    late = x > t_fine[-1] - 6 * sigma
    excited = np.interp(x, t_fine, exc_fine)
    excited[late] = np.exp(-x[late] / T1)
    solute = np.stack([np.interp(x, t_fine, sol_fine[:, j]) for j in range(q.size)], axis=1)
    solute[late] = np.exp(-x[late] / T1)[:, None] * s_frames[-1][None, :]
    heat = np.interp(x, t_fine, heat_fine)
    heat[late] = kin["heat_fast"] + kin["heat_slow"] * (1 - np.exp(-x[late] / T1))
    with np.errstate(invalid="ignore", divide="ignore"):
        distance = np.interp(x, t_fine, dist_fine) / np.maximum(excited, 1e-300)
    distance[late] = mol["distance_excited"]
    distance[excited < 1e-3] = np.nan
    solute = alpha * solute
    dS = solute + heat[:, None] * n_solv * dsdT[None, :]
    return {
        "dS": dS, "solute": solute, "heat": heat, "excited": alpha * excited, "distance": distance,
        "S_total": s_ground + sum(incoherent(q, e) for e in els) + n_solv * s_solv,
        "dS_dT": n_solv * dsdT, "dS_drho": n_solv * dsdrho,
    }


def normalized_difference(S_total, dS, q, q_range):
    """The difference a pipeline normalizing over ``q_range`` should find.

    (S + dS) / <S + dS>_window - S / <S>_window, with <.> the mean over the window.
    """
    m = window_mask(q, q_range)
    on = S_total[None, :] + dS
    return on / on[:, m].mean(axis=1, keepdims=True) - (S_total / S_total[m].mean())[None, :]


def truth_grid(scenario: dict):
    """Delays (ps) on which the ground truth is tabulated: fine near time zero, then sparse."""
    fine = np.arange(-1.2, 3.0 + 1e-9, 0.005)
    late = np.geomspace(3.05, 150.0, 200)
    return np.concatenate([fine, late])


# ----------------------------------------------------------------------------- run

def simulate_shots(scenario: dict, n_shots: int, rng: np.random.Generator):
    """The shot table of a synthetic run and the hidden per-shot truth.

    Returns
    -------
    table : dict of (N,) arrays in the input contract (pulse_id, stage_delay,
        pump_on, pulse_energy, timing_edge, timing_amplitude, photon_energy)
    hidden : dict of (N,) arrays: true_delay (ps), outlier (bool), gain
    """
    beam, tim, run = scenario["beam"], scenario["timing"], scenario["run"]
    n = int(n_shots)
    pulse_id = 1000 + np.cumsum(1 + (rng.random(n) < 0.01) * rng.integers(1, 20, n))
    steps = np.asarray(run["stage_delays"], float)
    step_index = (np.arange(n) // run["shots_per_step"]) % steps.size
    stage_delay = steps[step_index]
    pump_on = (np.arange(n) % run["pump_off_every"]) != run["pump_off_every"] - 1
    m = beam["pulse_energy_modes"]
    pulse_energy = rng.gamma(m, 1.0 / m, n) * 1.2  # mJ
    drop = rng.random(n) < beam["dropout_fraction"]
    pulse_energy[drop] *= 0.05
    photon_energy = beam["photon_energy"] * (1 + beam["photon_energy_jitter"] * rng.standard_normal(n))

    jitter = tim["jitter_rms"] * rng.standard_normal(n)  # ps: true delay - nominal
    true_delay = stage_delay + jitter
    measured_fs = 1000 * (jitter + tim["tool_noise_rms"] * rng.standard_normal(n))
    amplitude = rng.lognormal(np.log(0.08), 0.25, n)
    weak = rng.random(n) < tim["weak_fraction"]
    measured_fs[weak] += rng.normal(0, 400.0, weak.sum())
    amplitude[weak] *= 0.15
    # invert the calibration: sign * (P(edge) - P(edge0)) = measured
    c0, c1, c2 = tim["calibration_fs"]
    p_edge0 = c0 + c1 * tim["edge_at_time_zero"] + c2 * tim["edge_at_time_zero"] ** 2
    target = p_edge0 + tim["sign"] * measured_fs
    # the root of c2 e^2 + c1 e + (c0 - target) = 0 near the linear solution, in the form that
    # stays finite for c2 = 0 (a linear calibration) and avoids cancellation for small c2
    edge = 2 * (target - c0) / (c1 + np.sqrt(c1 * c1 - 4 * c2 * (c0 - target)))
    missing = rng.random(n) < tim["missing_fraction"]
    edge[missing] = np.nan
    amplitude[missing] = rng.uniform(0, 0.005, missing.sum())
    outlier = rng.random(n) < run["outlier_fraction"]
    table = {
        "pulse_id": pulse_id.astype(np.int64), "stage_delay": stage_delay, "pump_on": pump_on,
        "pulse_energy": pulse_energy, "timing_edge": edge, "timing_amplitude": amplitude,
        "photon_energy": photon_energy,
    }
    return table, {"true_delay": true_delay, "outlier": outlier}


def synthesize_run(scenario_path, n_shots, seed, files, truth_path, mode="curves", norm_q_range=(3.5, 4.5),
                   chunk=2000):
    """Write a synthetic run (HDF5 files in the input contract) and its ground truth.

    Parameters
    ----------
    scenario_path : path
        Scenario YAML.
    n_shots : int
        Total shots, split evenly over ``files``.
    seed : int
        Seed of the numpy Generator; same seed, same bytes.
    files : list of path
        Run files to write.
    truth_path : path
        Zarr store for the ground truth.
    mode : {"curves", "frames"}
        Pre-integrated curves, or detector frames via the detector's forward model.
    norm_q_range : (float, float)
        Window (1/Å) used for the normalized truth ``diff_true``.
    """
    scenario = load_scenario(scenario_path)
    rng = np.random.default_rng(seed)
    run, beam = scenario["run"], scenario["beam"]
    q = np.linspace(run["q_min"], run["q_max"], run["q_count"])
    table, hidden = simulate_shots(scenario, n_shots, rng)
    t_grid = truth_grid(scenario)
    truth = true_signal(scenario, q, t_grid)
    S = truth["S_total"]
    norm = S[window_mask(q, norm_q_range)].mean()
    phot = beam["photons_per_point"] / norm  # photons per e.u. for an average shot

    n = len(table["pulse_id"])
    gain = table["pulse_energy"] / 1.2
    drift_shape = np.exp(-q / 1.5)
    drift = run["drift_amplitude"] * norm * (0.5 + 0.5 * np.sin(2 * np.pi * np.arange(n) / (0.37 * n)))
    wobble = 1 + 0.05 * np.sin(3.0 * q)
    files = [Path(f) for f in files]
    bounds = np.linspace(0, n, len(files) + 1).astype(int)

    def ideal_for(sl):
        """Noise-free detected intensity per shot (e.u. times the shot's relative pulse energy)."""
        dS = _interp_rows(t_grid, truth["dS"], hidden["true_delay"][sl])
        ideal = S[None, :] + table["pump_on"][sl, None] * dS + drift[sl, None] * drift_shape[None, :]
        ideal = np.where(hidden["outlier"][sl, None], ideal * wobble[None, :], ideal)
        return gain[sl, None] * ideal

    def curves_for(sl):
        counts = phot * ideal_for(sl)
        noisy = counts + np.sqrt(counts) * rng.standard_normal(counts.shape)
        return (noisy / phot).astype(np.float32)  # detector units: e.u.-scaled photons

    if mode == "frames":
        from .detector import forward

        det = scenario["detector"]
        fr = scenario["frames"]
        shape = tuple(det["shape_px"])
        hot = forward.pick_hot_pixels(shape, fr["hot_pixels"], rng)
        dark = forward.render_dark(shape, fr["dark_frames"], rng, level=fr["dark_level"], noise=fr["dark_noise"],
                                   hot_pixels=hot)
        out_dir = files[0].parent
        out_dir.mkdir(parents=True, exist_ok=True)
        with store.atomic_path(out_dir / "dark.npy") as tmp:
            with open(tmp, "wb") as fh:
                np.save(fh, dark)
        with store.atomic_path(out_dir / "mask.npy") as tmp:
            with open(tmp, "wb") as fh:
                np.save(fh, forward.default_mask(det, shape))
        pedestal = np.full(shape, fr["dark_level"])

        def frames_for(sl):
            return forward.render_frames(q, ideal_for(sl), table["photon_energy"][sl], det, rng, shape=shape,
                                         photons_per_pixel=fr["photons_per_pixel"] / norm, hot_pixels=hot,
                                         dark=pedestal)

    for i, path in enumerate(files):
        lo, hi = int(bounds[i]), int(bounds[i + 1])
        path.parent.mkdir(parents=True, exist_ok=True)
        with store.atomic_path(path) as tmp:
            with h5py.File(tmp, "w") as h5:
                grp = h5.create_group("shots")
                for name, values in table.items():
                    grp.create_dataset(name, data=values[lo:hi])
                h5.attrs["scenario"] = str(scenario.get("name", ""))
                h5.attrs["synthetic"] = True
                if mode == "curves":
                    h5.create_dataset("q", data=q)
                    ds = h5.create_dataset("curves", shape=(hi - lo, q.size), dtype="f4",
                                           chunks=(min(chunk, hi - lo), q.size))
                    fill = curves_for
                elif mode == "frames":
                    ds = h5.create_dataset("frames", shape=(hi - lo, *shape), dtype="u2",
                                           chunks=(min(64, hi - lo), *shape))
                    fill = frames_for
                else:
                    from .errors import ConfigError

                    raise ConfigError("run.generate.mode", repr(mode), "curves or frames")
                for a in range(lo, hi, chunk):
                    b = min(a + chunk, hi)
                    ds[a - lo:b - lo] = fill(slice(a, b))

    diff_true = normalized_difference(S, truth["dS"], q, norm_q_range)
    with store.atomic_path(truth_path) as tmp:
        g = store.new_group(tmp, {"scenario": scenario, "seed": int(seed), "n_shots": int(n),
                                  "norm_q_range": list(norm_q_range),
                                  "description": "ground truth of a synthetic run"})
        store.write_array(g, "q", q, ["q"], units="1/Å")
        store.write_array(g, "time", t_grid, ["time"], units="ps")
        store.write_array(g, "diff_true", diff_true, ["time", "q"], units="fraction of window mean",
                          attrs={"meaning": "noise-free normalized on-minus-off difference"})
        store.write_array(g, "dS_true", truth["dS"], ["time", "q"], units="e.u. per solute")
        store.write_array(g, "solute_true", truth["solute"], ["time", "q"], units="e.u. per solute")
        store.write_array(g, "heat_true", truth["heat"], ["time"], units="K")
        store.write_array(g, "excited_true", truth["excited"], ["time"], units="1")
        store.write_array(g, "distance_true", truth["distance"], ["time"], units="Å")
        store.write_array(g, "S_total", S, ["q"], units="e.u. per solute")
        store.write_array(g, "dS_dT", truth["dS_dT"], ["q"], units="e.u. per solute per K")
        store.write_array(g, "dS_drho", truth["dS_drho"], ["q"], units="e.u. per solute per g/cm3")
        store.write_array(g, "true_delay", hidden["true_delay"], ["shot"], units="ps")
        store.write_array(g, "outlier", hidden["outlier"], ["shot"])
        store.write_array(g, "pulse_id", table["pulse_id"], ["shot"])
    log.info("synthesized %d shots into %d file(s); truth in %s", n, len(files), truth_path)
    return files


def _interp_rows(t_grid, table, t):
    """Linear interpolation of a (nt, nq) table at times t (n,) -> (n, nq)."""
    i = np.clip(np.searchsorted(t_grid, t) - 1, 0, len(t_grid) - 2)
    w = np.clip((t - t_grid[i]) / (t_grid[i + 1] - t_grid[i]), 0, 1)[:, None]
    return (1 - w) * table[i] + w * table[i + 1]


def write_scenario_inputs(scenario_path, out_dir):
    """Write the scenario's structure and solvent files (the committed demo inputs).

    ``ground.xyz`` (ground-state structure), ``excited_trajectory.xyz``
    (extended XYZ, one frame per trajectory step with its time), and
    ``solvent_differentials.csv`` (q, dS/dT, dS/drho per solute share of solvent).
    """
    from .io.structures import write_trajectory

    scenario = load_scenario(scenario_path)
    mol, run = scenario["molecule"], scenario["run"]
    out = Path(out_dir)
    els, ground = molecule(mol["distance_ground"], mol)
    write_trajectory(out / "ground.xyz", els, ground[None], None)
    times, els, frames = trajectory(mol)
    write_trajectory(out / "excited_trajectory.xyz", els, frames, times)
    q = np.linspace(run["q_min"], run["q_max"], run["q_count"])
    _, dT, drho = solvent_curves(q, scenario["solvent"])
    n = scenario["solvent"]["molecules_per_solute"]
    np.savetxt(out / "solvent_differentials.csv", np.column_stack([q, n * dT, n * drho]), delimiter=",",
               header="q (1/A), dS/dT at constant density (e.u./K), dS/drho at constant T (e.u. per g/cm3); "
                      "per solute share of solvent",
               fmt="%.6g")
