"""Stage ``scatter``: model curves of structures and trajectories.

Reads a ground-state structure, optionally an ensemble of trajectories of the
excited molecule (same atoms in the same order) and a few species structures;
writes a zarr v3 store with the Debye curves on the requested q grid:

==================  ====================  ========  ==========================================
array               dims                  units     content
==================  ====================  ========  ==========================================
``q``               (q,)                  1/Å       the q grid
``ground_S``        (q,)                  e.u.^2    S(q) of the ground state
``ground_positions`` (atom, axis)         Å         ground-state structure
``element``         (atom,)               -         element symbol per atom
``frame_time``      (frame,)              ps        frame times (NaN where the files give none)
``traj_dS``         (frame, q)            e.u.^2    ensemble mean of S(frame) - S(ground)
``traj_positions``  (frame, atom, axis)   Å         positions of the first ensemble member
``species``         (species,)            -         species names
``species_dS``      (species, q)          e.u.^2    S(species) - S(ground)
==================  ====================  ========  ==========================================

Inputs: ``shots`` (the store whose q grid the curves take) and ``structures`` (the
structure files, listed for tracking; their roles come from the config). Config
sections ``model`` and ``compute``; the schema checks the values, and the errors of
the scattering cores are reported under the config keys of :data:`CONFIG_KEYS`.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io import store
from ..io.structures import read_ensemble, read_structure
from ..scattering import model
from ..scattering.formfactors import WATER_ELECTRON_DENSITY
from .common import Warnings, now, versions
from ..progress import DaskProgress
from .keys import config_keys

log = logging.getLogger("movieproc.scatter")

#: Parameter of the scattering cores -> config key (the stage's one table).
CONFIG_KEYS = {"dr": "model.dr", "photon_energy": "model.photon_energy_kev", "damping": "model.damping_A",
               "excluded_volume": "model.excluded_volume", "workers": "compute.workers"}


def curve_options(config: dict) -> dict:
    """Keyword arguments of :func:`movieproc.scattering.model.trajectory_curves` from the config sections."""
    m = config["model"]
    return {"dr": m["dr"], "photon_energy": m["photon_energy_kev"], "anomalous": m["anomalous"],
            # the dummy-atom correction displaces bulk water (0.334 e/Å^3)
            "excluded_volume": WATER_ELECTRON_DENSITY if m["excluded_volume"] else None,
            "damping": m["damping_A"], "workers": config["compute"]["workers"]}


def read_q(path) -> np.ndarray:
    """The q grid (1/Å) of the shots store."""
    q = np.asarray(store.read(store.open_group(path, "shots store"), "q"), dtype=np.float64)
    if q.ndim != 1 or q.size == 0 or not np.all(np.isfinite(q)) or q.min() < 0:
        raise InputError(f"{path}:q", f"array of shape {q.shape}", "a non-empty 1-D grid of q >= 0 (1/Å)")
    return q


def run(inputs: dict, out: Path, config: dict) -> None:
    """Compute the model curves of the configured structures and write them to ``out`` (atomically)."""
    q = read_q(inputs["shots"])
    m = config["model"]
    options = curve_options(config)
    warnings = Warnings("scatter", log)
    with config_keys(CONFIG_KEYS):
        curves = model_curves(q, m["ground"], m["trajectory"], m["species"], options, warnings)
    attrs = {
        "stage": "scatter",
        "options_yaml": store.yaml_text(options),
        "input_files_yaml": store.yaml_text({"ground": str(m["ground"]),
                                             "trajectory": [str(p) for p in m["trajectory"]],
                                             "species": {str(k): str(v) for k, v in m["species"].items()}}),
        "method": ("Debye equation through element-pair distance histograms with linear sharing "
                   f"(dr = {options['dr']} Å); Waasmaier-Kirfel f0 from periodictable"
                   + ("; Henke f', f''" if options["anomalous"] else "")
                   + ("; dummy-atom excluded volume" if options["excluded_volume"] is not None else "")),
        "traj_positions": "first member of the trajectory ensemble",
        "software_versions": store.yaml_text(versions()),
        "written": now(),
        "warnings": store.lines_text(warnings),
    }
    _write(out, q, curves, attrs)


def model_curves(q, ground, trajectory, species, options, warnings) -> dict:
    """Curves and positions of the ground state, the trajectory ensemble and the species structures.

    Parameters
    ----------
    q : ndarray, shape (nq,)
        1/Å.
    ground : path
        Ground-state structure file (XYZ, extended XYZ or PDB).
    trajectory : sequence of path
        Trajectory files of one ensemble (averaged frame by frame); may be empty.
    species : dict
        Species name -> structure file; may be empty.
    options : dict
        Keyword arguments of the curve functions (:func:`curve_options`).
    warnings : Warnings

    Returns
    -------
    dict
        Arrays of the store, named as in the module docstring.
    """
    elements, ground_pos = read_structure(ground)
    out = {"ground_S": model.trajectory_curves(q, ground_pos[None], elements, **options)[0],
           "ground_positions": ground_pos, "element": list(elements)}
    log.info("ground state %s: %d atoms", ground, len(elements))
    out.update(_trajectory(q, ground, elements, ground_pos, [Path(p) for p in trajectory or []], options, warnings))
    structures = {str(name): read_structure(path) for name, path in (species or {}).items()}
    out["species"], out["species_dS"] = model.species_difference_curves(q, structures, ground_pos, elements,
                                                                        **options)
    if out["species"]:
        log.info("species: %s", ", ".join(out["species"]))
    return out


def _trajectory(q, ground, elements, ground_pos, trajectory, options, warnings):
    """Ensemble-mean difference curves, first member's positions and frame times of a trajectory."""
    if not trajectory:
        return {"traj_dS": np.empty((0, q.size)), "traj_positions": np.empty((0, len(elements), 3)),
                "frame_time": np.empty(0)}
    ens = read_ensemble(trajectory)
    if ens.elements != tuple(elements):
        raise InputError(trajectory[0], f"atoms {''.join(ens.elements)}",
                         f"the atoms of the ground state {ground} ({''.join(elements)}) in the same order")
    with DaskProgress("scatter", "frame blocks"):  # the trajectory's frames, computed by dask
        traj_dS = model.ensemble_difference_curves(q, ens.positions, elements, ground_pos, **options)
    if ens.times is None:
        frame_time = np.full(traj_dS.shape[0], np.nan)
        warnings.add(f"no frame times in {trajectory[0]}: frame_time left as NaN")
    else:
        frame_time = ens.times
    log.info("trajectory ensemble: %d member(s), %d frames", ens.positions.shape[0], traj_dS.shape[0])
    return {"traj_dS": traj_dS, "traj_positions": ens.positions[0], "frame_time": frame_time}


#: What the curves' numbers mean (their units are "1").
SQUARED_ELECTRON_UNITS = "e.u.^2: " + store.ELECTRON_UNITS + ", squared (a scattered intensity)"


def _write(out, q, curves, attrs):
    text = np.dtypes.StringDType()
    eu2 = {"description": SQUARED_ELECTRON_UNITS, "display_units": "e.u.^2"}
    n_atoms = len(curves["element"])
    with store.atomic_path(out) as tmp:
        group = store.new_group(tmp, attrs)
        store.write_array(group, "q", q, ["q"], units=store.INVERSE_ANGSTROM,
                          long_name="momentum transfer q = 4 pi sin(theta) / lambda")
        store.write_array(group, "atom", np.arange(n_atoms), ["atom"], units=store.DIMENSIONLESS,
                          long_name="atom number, as in the structure files (0-based)")
        store.write_array(group, "axis", np.array(["x", "y", "z"], dtype=text), ["axis"], long_name="Cartesian axis")
        store.write_array(group, "frame", np.arange(curves["traj_dS"].shape[0]), ["frame"], units=store.DIMENSIONLESS,
                          long_name="trajectory frame number")
        store.write_array(group, "ground_S", curves["ground_S"], ["q"], units=store.DIMENSIONLESS,
                          long_name="scattering S(q) of the ground-state structure", attrs=eu2)
        store.write_array(group, "ground_positions", curves["ground_positions"], ["atom", "axis"],
                          units=store.ANGSTROM, long_name="ground-state atom positions")
        store.write_array(group, "element", np.array(curves["element"], dtype=text), ["atom"],
                          long_name="chemical element of the atom")
        store.write_array(group, "frame_time", curves["frame_time"], ["frame"], units=store.PS,
                          long_name="time of the trajectory frame (NaN where the files give none)")
        store.write_array(group, "traj_dS", curves["traj_dS"], ["frame", "q"], units=store.DIMENSIONLESS,
                          long_name="ensemble mean of S(frame) - S(ground)", attrs=eu2)
        store.write_array(group, "traj_positions", curves["traj_positions"], ["frame", "atom", "axis"],
                          units=store.ANGSTROM, long_name="atom positions of the first ensemble member")
        store.write_array(group, "species", np.array(curves["species"], dtype=text), ["species"],
                          long_name="species structure (model.species name)")
        store.write_array(group, "species_dS", curves["species_dS"], ["species", "q"], units=store.DIMENSIONLESS,
                          long_name="S(species) - S(ground)", attrs=eu2)
    log.info("scatter store written to %s", out)


__all__ = ["CONFIG_KEYS", "curve_options", "model_curves", "read_q", "run"]
