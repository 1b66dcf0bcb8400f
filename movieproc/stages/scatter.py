"""Stage ``scatter``: model curves of structures and trajectories.

Reads a ground-state structure, optionally an ensemble of trajectories of the
excited molecule (same atoms in the same order) and a few species structures;
writes a zarr v3 store with the Debye curves on the requested q grid:

==================  ====================  ========  ==========================================
array               dims                  units     content
==================  ====================  ========  ==========================================
``q``               (q,)                  1/Å       the q grid
``ground_S``        (q,)                  e.u.^2    S(q) of the ground state
``ground_positions`` (atom, xyz)          Å         ground-state structure
``element``         (atom,)               -         element symbol per atom
``frame_time``      (frame,)              ps        frame times (NaN where the files give none)
``traj_dS``         (frame, q)            e.u.^2    ensemble mean of S(frame) - S(ground)
``traj_positions``  (frame, atom, xyz)    Å         positions of the first ensemble member
``species``         (species,)            -         species names
``species_dS``      (species, q)          e.u.^2    S(species) - S(ground)
==================  ====================  ========  ==========================================
"""

from __future__ import annotations

import logging
from numbers import Real
from pathlib import Path

import numpy as np

from ..errors import ConfigError, InputError
from ..io import store
from ..io.structures import read_ensemble, read_structure
from ..scattering import model
from ..scattering.formfactors import WATER_ELECTRON_DENSITY
from .common import Warnings, now, versions

log = logging.getLogger("movieproc.scatter")

#: Options of the stage and their defaults.
DEFAULTS = {
    "dr": 0.01,  # Å, distance-histogram grid step
    "energy": None,  # keV, photon energy (needed for anomalous terms)
    "anomalous": False,  # include f' + i f''
    "excluded_volume": False,  # False, True (water, 0.334 e/Å^3) or a solvent density in e/Å^3
    "damping": None,  # None, a sigma in Å, or {"Ir-Cl": sigma, ...}
    "num_workers": None,  # dask threads (default: dask's choice)
}


def _number(key, value, low=0.0, strict=True):
    ok = isinstance(value, Real) and not isinstance(value, bool) and np.isfinite(value)
    if not ok or (value <= low if strict else value < low):
        raise ConfigError(f"scatter.{key}", repr(value),
                          f"a number {'>' if strict else '>='} {low:g}")
    return float(value)


def resolve_options(options):
    """Check the stage options and fill defaults.

    Parameters
    ----------
    options : dict or None
        Keys of :data:`DEFAULTS`.

    Returns
    -------
    dict
        Options with defaults filled; ``excluded_volume`` is None or a density in e/Å^3.

    Raises
    ------
    ConfigError
        Unknown key or a value of the wrong type or range.
    """
    options = dict(options or {})
    unknown = sorted(set(options) - set(DEFAULTS))
    if unknown:
        raise ConfigError(f"scatter.{unknown[0]}", "an unknown option", f"one of {sorted(DEFAULTS)}")
    out = {**DEFAULTS, **options}
    out["dr"] = _number("dr", out["dr"])
    if out["energy"] is not None:
        out["energy"] = _number("energy", out["energy"])
    if not isinstance(out["anomalous"], bool):
        raise ConfigError("scatter.anomalous", repr(out["anomalous"]), "true or false")
    if out["anomalous"] and out["energy"] is None:
        raise ConfigError("scatter.energy", "none, with anomalous: true",
                          "the photon energy in keV for the anomalous terms")
    ev = out["excluded_volume"]
    if ev is None or ev is False:
        out["excluded_volume"] = None
    elif ev is True:
        out["excluded_volume"] = WATER_ELECTRON_DENSITY
    else:
        out["excluded_volume"] = _number("excluded_volume", ev, strict=False)
    damping = out["damping"]
    if isinstance(damping, dict):
        out["damping"] = {str(k): _number(f"damping.{k}", v, strict=False) for k, v in damping.items()}
    elif damping is not None:
        out["damping"] = _number("damping", damping, strict=False)
    nw = out["num_workers"]
    if nw is not None and (isinstance(nw, bool) or not isinstance(nw, int) or nw < 1):
        raise ConfigError("scatter.num_workers", repr(nw), "an integer >= 1 or null")
    return out


def run(ground, trajectory, species, q, out, options):
    """Compute model curves and write them to the zarr store ``out`` (atomically).

    Parameters
    ----------
    ground : path
        Ground-state structure file (XYZ, extended XYZ or PDB).
    trajectory : sequence of path
        Trajectory files of one ensemble (averaged frame by frame); may be empty.
    species : dict
        Species name -> structure file; may be empty.
    q : array_like, shape (nq,)
        q grid, 1/Å.
    out : path
        zarr store to write.
    options : dict
        See :data:`DEFAULTS`.
    """
    opts = resolve_options(options)
    q = np.asarray(q, dtype=np.float64)
    if q.ndim != 1 or q.size == 0 or not np.all(np.isfinite(q)) or q.min() < 0:
        raise InputError("q grid", f"array of shape {q.shape}", "a non-empty 1-D grid of q >= 0 (1/Å)")
    warnings = Warnings("scatter", log)
    curve_opts = {k: opts[k] for k in ("dr", "energy", "anomalous", "damping", "excluded_volume")}
    curve_opts["num_workers"] = opts["num_workers"]

    elements, ground_pos = read_structure(ground)
    ground_S = model.trajectory_curves(q, ground_pos[None], elements, **curve_opts)[0]
    log.info("ground state %s: %d atoms", ground, len(elements))

    trajectory = [Path(p) for p in (trajectory or [])]
    if trajectory:
        ens = read_ensemble(trajectory)
        if ens.elements != tuple(elements):
            raise InputError(trajectory[0], f"atoms {''.join(ens.elements)}",
                             f"the atoms of the ground state {ground} ({''.join(elements)}) in the same order")
        traj_dS = model.ensemble_difference_curves(q, ens.positions, elements, ground_pos, **curve_opts)
        traj_positions = ens.positions[0]
        if ens.times is None:
            frame_time = np.full(traj_dS.shape[0], np.nan)
            warnings.add(f"no frame times in {trajectory[0]}: frame_time left as NaN")
        else:
            frame_time = ens.times
        log.info("trajectory ensemble: %d member(s), %d frames", ens.positions.shape[0], traj_dS.shape[0])
    else:
        traj_dS = np.empty((0, q.size))
        traj_positions = np.empty((0, len(elements), 3))
        frame_time = np.empty(0)

    species = dict(species or {})
    structures = {}
    for name, path in species.items():
        structures[str(name)] = read_structure(path)
    names, species_dS = model.species_difference_curves(q, structures, ground_pos, elements,
                                                        **curve_opts)
    if names:
        log.info("species: %s", ", ".join(names))

    attrs = {
        "stage": "scatter",
        "options": opts,
        "input_files": {"ground": str(ground), "trajectory": [str(p) for p in trajectory],
                        "species": {str(k): str(v) for k, v in species.items()}},
        "method": ("Debye equation through element-pair distance histograms with linear sharing "
                   f"(dr = {opts['dr']} Å); Waasmaier-Kirfel f0 from periodictable"
                   + ("; Henke f', f''" if opts["anomalous"] else "")
                   + ("; dummy-atom excluded volume" if opts["excluded_volume"] is not None else "")),
        "traj_positions": "first member of the trajectory ensemble",
        "versions": versions(),
        "written": now(),
        "warnings": list(warnings),
    }
    text = np.dtypes.StringDType()
    with store.atomic_path(out) as tmp:
        group = store.new_group(tmp, attrs)
        store.write_array(group, "q", q, ["q"], units="1/Å")
        store.write_array(group, "ground_S", ground_S, ["q"], units="e.u.^2")
        store.write_array(group, "ground_positions", ground_pos, ["atom", "xyz"], units="Å")
        store.write_array(group, "element", np.array(elements, dtype=text), ["atom"])
        store.write_array(group, "frame_time", frame_time, ["frame"], units="ps")
        store.write_array(group, "traj_dS", traj_dS, ["frame", "q"], units="e.u.^2")
        store.write_array(group, "traj_positions", traj_positions, ["frame", "atom", "xyz"], units="Å")
        store.write_array(group, "species", np.array(names, dtype=text), ["species"])
        store.write_array(group, "species_dS", species_dS, ["species", "q"], units="e.u.^2")
    log.info("scatter store written to %s", out)
    return Path(out)


__all__ = ["DEFAULTS", "resolve_options", "run"]
