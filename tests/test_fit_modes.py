"""Every fit mode runs or refuses clearly.

One small synthetic run of the demo scenario (6,000 shots) is reduced once; the
analyze stage is then called directly for every combination of fit mode (species,
trajectory, none), species-curve source (model, free), model store with or
without a trajectory (ground and excited structures only: the fixed-structure
species fit), solvent terms on or off, and a bootstrap over shots or none. Each
case must give a result with finite parameters and errors, or a ConfigError whose
key exists in the config schema. The fixed-structure species fit also runs end to
end through ``movieproc process``.
"""

import numpy as np
import pytest

from movieproc import cli
from movieproc import config as mpconfig
from movieproc import synth
from movieproc.errors import ConfigError
from movieproc.io import movie, shotstore, store
from movieproc.signals import covariance as C
from movieproc.signals.differences import nearest_references
from movieproc.stages import analyze, bins, delays, difference, ingest, scatter, select
from test_analysis import ANALYZE_SECTIONS, SCATTER_SECTIONS, _schema_has, _sections

ROOT = mpconfig.ROOT
SCENARIO = ROOT / "demo_data" / "scenario.yaml"
N_SHOTS = 6000
#: Coarser bins than the demo's (21 instead of 42): the same physics in half the fit time.
EDGES = "[-1.5, -0.4, -0.2, -0.1, 0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.65, 0.8, 1.0, 1.3, 1.85, 2.5, 4.0, 7.5, 15.0, " \
        "30.0, 55.0, 115.0]"
FRAME_LINES = 12  # an XYZ frame of the demo's 10 atoms: count line, comment line, 10 atom lines


def _excited_structure(folder):
    """The last frame of the demo trajectory as a single-structure XYZ file (the excited species)."""
    lines = (ROOT / "demo_data" / "excited_trajectory.xyz").read_text().splitlines()
    path = folder / "excited.xyz"
    path.write_text("\n".join(lines[-FRAME_LINES:]) + "\n")
    return path


def _config(folder, *extra, trajectory=True):
    excited = folder / "excited.xyz"
    items = [f"output_dir={folder}", "compute.progress=false", "binning.min_shots=20", f"binning.edges_ps={EDGES}",
             f"model.ground={ROOT}/demo_data/ground.xyz", f"model.species={{'A1': '{excited}'}}",
             f"solvent.differentials={ROOT}/demo_data/solvent_differentials.csv"]
    items.append(f"model.trajectory=['{ROOT}/demo_data/excited_trajectory.xyz']" if trajectory
                 else "model.trajectory=[]")
    return mpconfig.load(ROOT / "config" / "config.yaml", items + list(extra))


def _write_correlation(d, binned):
    """The bins' correlation along delay from the run's shared references (as the difference stage defines it)."""
    cfg = _config(d)
    shots = shotstore.open_shots(d / "shots.zarr")
    keep = store.read(store.open_group(d / "selection.zarr"), "keep")
    index = store.read(store.open_group(d / "bins.zarr"), "index")
    nbins = store.read(store.open_group(d / "bins.zarr"), "edges").size - 1
    refs, _ = nearest_references(shots.table["pulse_id"], index >= 0, keep & ~shots.table["pump_on"],
                                 cfg["differences"]["references"])
    R = C.bin_correlation(C.bin_coefficient_overlap(index[index >= 0], refs, nbins))
    import zarr

    g = zarr.open_group(str(binned), mode="a")
    store.write_array(g, "delay_correlation", R, ["delay", "delay_other"], units="1")


#: Every test of this module on one xdist worker (--dist loadgroup): the module's `small` run is made once.
pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("fit-modes-small")]  # a reduced run: slow


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A small run reduced once: binned stores (with and without a bootstrap) and two model stores."""
    d = tmp_path_factory.mktemp("modes")
    _excited_structure(d)
    cfg = _config(d)
    files = [d / "run_000.h5"]
    synth.synthesize_run(SCENARIO, N_SHOTS, 4, files, d / "truth.zarr")
    ingest.run({"files": files}, d / "shots.zarr", cfg)
    select.run({"shots": d / "shots.zarr"}, d / "selection.zarr", cfg)
    delays.run({"shots": d / "shots.zarr"}, d / "delays.zarr", cfg)
    bins.run({"shots": d / "shots.zarr", "selection": d / "selection.zarr", "delays": d / "delays.zarr"},
             d / "bins.zarr", cfg)
    stores = {"shots": d / "shots.zarr", "selection": d / "selection.zarr", "bins": d / "bins.zarr"}
    difference.run(stores, d / "binned.zarr", cfg)
    difference.run(stores, d / "binned_boot.zarr", _config(d, "differences.bootstrap=2"))
    for name in ("binned.zarr", "binned_boot.zarr"):
        if "delay_correlation" not in store.open_group(d / name):
            _write_correlation(d, d / name)
    scatter.run({"shots": d / "shots.zarr", "structures": []}, d / "models_traj.zarr",
                _sections(cfg, SCATTER_SECTIONS))
    scatter.run({"shots": d / "shots.zarr", "structures": []}, d / "models_fixed.zarr",
                _sections(_config(d, trajectory=False), SCATTER_SECTIONS))
    return d


CASES = ([("species", curves, traj, solvent, boot) for curves in ("model", "free") for traj in (True, False)
          for solvent in (True, False) for boot in (False, True)]
         + [(mode, "model", traj, solvent, boot) for mode in ("trajectory", "none") for traj in (True, False)
            for solvent in (True, False) for boot in (False, True)])


def _case_id(case):
    mode, curves, traj, solvent, boot = case
    return f"{mode}-{curves}-{'traj' if traj else 'fixed'}-{'solvent' if solvent else 'nosolvent'}-" \
           f"{'boot' if boot else 'noboot'}"


@pytest.mark.parametrize("case", CASES, ids=[_case_id(c) for c in CASES])
def test_fit_mode_runs_or_refuses_clearly(small, case, tmp_path):
    mode, curves, traj, solvent, boot = case
    extra = [f"fit.mode={mode}", f"fit.species_curves={curves}", f"solvent.enabled={str(solvent).lower()}"]
    if mode == "species":  # one excited species decaying to the ground state
        extra += ["fit.lifetimes_ps=[20.0]"]
    cfg = _config(small, *extra, trajectory=traj)
    binned = small / ("binned_boot.zarr" if boot else "binned.zarr")
    models = small / ("models_traj.zarr" if traj else "models_fixed.zarr")
    out = tmp_path / "analysis.zarr"
    try:
        analyze.run({"binned": binned, "models": [models]}, out, _sections(cfg, ANALYZE_SECTIONS))
    except ConfigError as exc:
        assert _schema_has(exc.key), exc.key
        assert not out.exists()
        # the only refusal expected in this matrix: a trajectory fit without a trajectory
        assert (mode, traj) == ("trajectory", False), exc
        return
    a = store.open_group(out)
    assert np.all(np.isfinite(store.read(a, "solute")[np.isfinite(store.read(a, "solute")).any(axis=1)]))
    if mode == "none":
        assert "fit_parameters" not in a.attrs
        return
    p = movie.fit_parameters(a)
    assert a.attrs["fit_error_model"] == "correlated bins"
    for name, v in p.items():
        assert np.isfinite(v["value"]) and v["error"] > 0 and np.isfinite(v["error"]), (name, v)
        assert v["error_independent_bins"] > 0, (name, v)
        if boot:
            assert "2 replicates over shots" in v.get("bootstrap", ""), (name, v)
    # the per-delay structure step runs exactly when the model store has trajectory frames
    assert ("best_frame" in a) == traj


def test_species_fit_with_fixed_structures_through_the_cli(small, tmp_path, monkeypatch, capfd):
    """Ground and excited XYZ (no trajectory), species curves from the model: ``movieproc process`` ends."""
    out = tmp_path / "out"
    sets = ["compute.progress=false", "binning.count=15", f"model.ground={ROOT / 'demo_data' / 'ground.xyz'}",
            f"model.species={{A1: '{small / 'excited.xyz'}'}}", "fit.mode=species", "fit.species_curves=model",
            "fit.lifetimes_ps=[20.0]", "render.animation=false"]  # the analysis store is checked, not movie.gif
    monkeypatch.chdir(tmp_path)
    args = ["process", str(small / "run_000.h5"), "--out", str(out)]
    for item in sets:
        args += ["--set", item]
    rc = cli.main(args)
    assert rc == 0, capfd.readouterr().err[-3000:]
    a = store.open_group(out / "analysis.zarr")
    assert a.attrs["fit_mode"] == "species" and "alpha" in movie.fit_parameters(a)
    assert "best_frame" not in a
