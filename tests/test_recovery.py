"""Ground-truth recovery: the movie of a synthetic run of 24,000 shots against the truth saved
beside it by the synthesizer.

The truth per bin is the average, over the bin's shots (the bins store's ``index``), of the
noise-free normalized difference ``diff_true`` (truth store, time x q) interpolated at each
shot's true delay. The recovered difference must lie within 3 standard errors of it at
>= 95 % of the (delay, q) points, with a normalized residual spread between 0.8 and 1.25
(honest errors), and each bin's delay must match the mean true delay of its shots within 10 fs.
"""

import numpy as np
import pytest
import zarr

from movieproc import config as C
from movieproc.stages import bins as bins_stage
from movieproc.stages import difference as difference_stage

# on the xdist worker of the other tests of the session's demo run (--dist loadgroup): it is made once
pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("demo-run")]


def _read(path, *names):
    g = zarr.open_group(str(path), mode="r")
    return [g[n][...] for n in names]


def truth_per_bin(truth_path, index, nbins):
    """Mean over each bin's shots of diff_true interpolated (np.interp, linear) at the true delay,
    and the mean true delay per bin."""
    time, diff_true, true_delay = _read(truth_path, "time", "diff_true", "true_delay")
    assert np.all(np.diff(time) > 0)
    binned = np.flatnonzero(index >= 0)
    t = true_delay[binned]
    per_shot = np.empty((t.size, diff_true.shape[1]))
    for j in range(diff_true.shape[1]):
        per_shot[:, j] = np.interp(t, time, diff_true[:, j])
    b = index[binned]
    count = np.bincount(b, minlength=nbins)
    truth = np.zeros((nbins, diff_true.shape[1]))
    np.add.at(truth, b, per_shot)
    with np.errstate(invalid="ignore", divide="ignore"):
        return truth / count[:, None], np.bincount(b, weights=t, minlength=nbins) / count, count


def check_recovery(diff, err, delay, n_shots, index, truth_path, use=None):
    """Assert the acceptance criteria; return the figures for the failure message."""
    nbins = diff.shape[0]
    truth, true_delay, count = truth_per_bin(truth_path, index, nbins)
    np.testing.assert_array_equal(n_shots, count)  # the movie's counts are the bins store's
    use = np.ones(nbins, bool) if use is None else use
    assert use.sum() >= 10
    z = (diff[use].astype(float) - truth[use]) / err[use].astype(float)
    assert np.all(np.isfinite(z))
    within = float(np.mean(np.abs(z) < 3))
    spread = float(np.std(z))
    delay_dev_fs = 1000 * np.abs(delay[use] - true_delay[use])
    figures = f"within 3 s.e.: {within:.4f}; std of z: {spread:.3f}; max delay deviation {delay_dev_fs.max():.2f} fs"
    assert within >= 0.95, figures
    assert 0.8 <= spread <= 1.25, figures
    assert np.all(delay_dev_fs < 10.0), figures
    # the signal is really there: far above the noise at some delays (not a trivially-zero truth)
    assert np.max(np.abs(truth[use]) / err[use]) > 10, figures
    return figures


def test_demo_run_recovers_the_truth(demo_run):
    """Through Snakemake: the README demo command's movie against its ground truth."""
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-3000:]
    shots_pid, = _read(demo_run.out / "shots.zarr", "pulse_id")
    truth_pid, true_delay = _read(demo_run.truth, "pulse_id", "true_delay")
    assert true_delay.size >= 20000
    np.testing.assert_array_equal(shots_pid, truth_pid)  # truth and shots in the same order
    index, = _read(demo_run.out / "bins.zarr", "index")
    diff, err, delay, n, low = _read(demo_run.movie, "difference", "difference_error", "delay",
                                      "shot_count", "too_few_shots")
    assert not low.any()  # every bin of the demo has enough shots: all are compared
    print(check_recovery(diff, err, delay, n, index, demo_run.truth))


@pytest.mark.parametrize("binning", [
    ["binning.mode=population", "binning.count=30"],
    ["binning.mode=width", "binning.width_ps=0.1", "binning.start_ps=-1", "binning.stop_ps=2"],
], ids=["population", "width"])
def test_stage_functions_recover_the_truth_with_other_bins(demo_run, tmp_path, binning):
    """The bin and difference stages called directly on the demo's shots, selection and delays."""
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-3000:]
    cfg = C.load(overrides=["compute.progress=false", *binning])
    out = demo_run.out
    bins_stage.run({"shots": out / "shots.zarr", "selection": out / "selection.zarr", "delays": out / "delays.zarr"},
                   tmp_path / "bins.zarr", cfg)
    difference_stage.run({"shots": out / "shots.zarr", "selection": out / "selection.zarr",
                          "bins": tmp_path / "bins.zarr"}, tmp_path / "binned.zarr", cfg)
    index, = _read(tmp_path / "bins.zarr", "index")
    diff, err, delay, n, low = _read(tmp_path / "binned.zarr", "difference", "difference_error", "delay",
                                      "shot_count", "too_few_shots")
    assert diff.shape[0] == 30  # binning.count = 30, or (2 - (-1)) / 0.1 bins of fixed width
    # bins flagged too_few_shots (fewer than binning.min_shots shots) have no reliable variance: left out
    print(check_recovery(diff, err, delay, n, index, demo_run.truth, use=~low))
