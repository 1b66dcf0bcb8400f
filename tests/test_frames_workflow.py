"""The whole workflow from detector frames: synthetic frames -> integrate -> ... -> movie.

The run is synthesized by the detector's forward model (polarization, solid angle,
per-shot photon energy, Poisson noise, a beam-stop shadow, hot pixels); the
recovered differences are compared with the scenario's ground truth.
"""

import numpy as np
import pytest
import xarray as xr

from movieproc import config as mpconfig
from movieproc.io import movie as movie_attrs
from movieproc.io import store
from movieproc.synth import _interp_rows
from movieproc.workflow import run_workflow

ROOT = mpconfig.ROOT


@pytest.mark.slow
def test_frames_demo_end_to_end(tmp_path):
    res = tmp_path / "resources"
    cfg = mpconfig.load(ROOT / "config" / "demo_frames.yaml", [
        f"run.files=['{res}/run_000.h5']", "run.generate.shots=6000", f"run.generate.truth={res}/truth.zarr",
        f"run.generate.scenario={ROOT}/demo_data/scenario.yaml", f"output_dir={tmp_path}/out",
        f"detector.mask_file={res}/mask.npy", f"detector.dark_file={res}/dark.npy",
        f"model.ground={ROOT}/demo_data/ground.xyz", f"model.trajectory=['{ROOT}/demo_data/excited_trajectory.xyz']",
        f"solvent.differentials={ROOT}/demo_data/solvent_differentials.csv", "compute.progress=false",
        "render.animation=false"])  # difference_map.png is checked, not movie.gif
    updated = run_workflow(cfg, cores=2, workdir=tmp_path)
    out = tmp_path / "out"
    assert any("movie.zarr" in u for u in updated)
    movie = xr.open_zarr(out / "movie.zarr", consolidated=False)
    assert movie["difference"].dims == ("delay", "q") and movie["q"].attrs["units"] == "1/angstrom"
    np.testing.assert_allclose(movie["q"].values[[0, -1]], [0.75, 5.0])
    shots = store.open_group(out / "shots.zarr")
    assert shots.attrs["mode"] == "frames"
    # per-bin truth: the noise-free normalized difference averaged over each bin's shots
    t = store.open_group(res / "truth.zarr")
    index = store.read(store.open_group(out / "bins.zarr"), "index")
    true_delay, grid = store.read(t, "true_delay"), store.read(t, "time")
    q_truth, table = store.read(t, "q"), store.read(t, "diff_true")
    q = movie["q"].values
    on_q = np.stack([np.interp(q, q_truth, row) for row in table])
    diff, err = movie["difference"].values, movie["difference_error"].values
    truth = np.stack([_interp_rows(grid, on_q, true_delay[index == k]).mean(0) for k in range(diff.shape[0])])
    z = (diff - truth) / err
    # the acceptance figure for recovery: within 3 standard errors at >= 95 % of points
    assert np.mean(np.abs(z) < 3) >= 0.95, np.mean(np.abs(z) < 3)
    assert 0.8 < np.std(z) < 1.25
    # the fit runs on integrated frames too and finds the scenario's lifetime (30 ps) and
    # excitation fraction (0.15) within 4 of its standard errors (6,000 shots: errors ~10 %)
    p = movie_attrs.fit_parameters(store.open_group(out / "movie.zarr"))
    assert abs(p["lifetime"]["value"] - 30.0) < 4 * p["lifetime"]["error"]
    assert abs(p["alpha"]["value"] - 0.15) < 4 * p["alpha"]["error"]
    assert (out / "figures" / "difference_map.png").stat().st_size > 10_000
