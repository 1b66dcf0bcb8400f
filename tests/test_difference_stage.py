"""Tests of the difference stage on a small hand-made run: its differences against a direct
numpy reduction, its between-bin correlation against the Gram matrix of an explicit coefficient
matrix built shot by shot, its bootstrap replicates against that correlation, and the
independence of the results from the chunking and the number of workers."""

import numpy as np
from movieproc.io import shotstore, store
from movieproc.shots.binning import assign_bins
from movieproc.signals import covariance as C
from movieproc.stages import difference

N, NB, K, NQ = 2400, 8, 2, 24


def make_run(tmp_path, seed=0, positions=8, jitter=1.0):
    """Stage scan: every 4th shot pump-off, contiguous stage positions, delays with a Gaussian
    jitter of ``jitter`` bin widths so pump-on shots of one position spread over neighbouring bins."""
    rng = np.random.default_rng(seed)
    q = np.linspace(0.5, 4.0, NQ)
    pump_on = np.arange(N) % 4 != 3
    position = np.minimum(np.arange(N) * positions // N, positions - 1)
    delay = (position + 0.5) * NB / positions + jitter * rng.standard_normal(N)
    signal = 0.02 * np.sin(q)[None, :] * (delay[:, None] > NB / 2) * pump_on[:, None]
    curves = (1.0 + 0.3 * np.exp(-q) + signal + 0.01 * rng.standard_normal((N, NQ))).astype(np.float32)
    table = {"pulse_id": np.arange(N, dtype=np.int64) + 100, "pump_on": pump_on,
             "stage_delay": delay, "pulse_energy": np.ones(N), "timing_edge": np.zeros(N)}
    g = shotstore.create(tmp_path / "shots.zarr", q, table, 256)
    g["curves"][...] = curves
    keep = np.ones(N, bool)
    keep[rng.random(N) < 0.05] = False  # a few shots cut
    sel = store.new_group(tmp_path / "selection.zarr")
    store.write_array(sel, "keep", keep, ["shot"])
    edges = np.arange(NB + 1.0)
    index = np.where(keep & pump_on, assign_bins(delay, edges), -1)
    count = np.bincount(index[index >= 0], minlength=NB)
    b = store.new_group(tmp_path / "bins.zarr", {"binning": {"mode": "edges"}})
    store.write_array(b, "edges", edges, ["edge"], units="ps")
    store.write_array(b, "index", index.astype(np.int32), ["shot"])
    store.write_array(b, "delay_mean", edges[:-1] + 0.5, ["bin"], units="ps")
    store.write_array(b, "delay_spread", np.zeros(NB), ["bin"], units="ps")
    store.write_array(b, "n_shots", count, ["bin"])
    return curves, keep, pump_on, index


def config(bootstrap=0, chunk=64, workers=1):
    return {"differences": {"references": K, "normalization": "total", "norm_q_range": None,
                            "bootstrap": bootstrap, "seed": 5, "max_reference_gap": None},
            "binning": {"min_shots": 10},
            "compute": {"workers": workers, "scheduler": "threads", "chunk_shots": chunk, "progress": False}}


def run_stage(tmp_path, name, cfg):
    inputs = {k: tmp_path / f"{k}.zarr" for k in ("shots", "selection", "bins")}
    difference.run(inputs, tmp_path / name, cfg)
    g = store.open_group(tmp_path / name)
    return {k: store.read(g, k) for k in g.array_keys()}


def explicit(curves, keep, pump_on, index):
    """Per-shot normalization, k nearest kept pump-off shots by brute force, bin means, and the
    coefficient matrix A (bins x shots) of the bin mean differences, by loops over shots."""
    x = curves.astype(np.float64) / curves.astype(np.float64).mean(axis=1, keepdims=True)
    off = np.flatnonzero(keep & ~pump_on)
    A = np.zeros((NB, N))
    count = np.bincount(index[index >= 0], minlength=NB)
    for i in np.flatnonzero(index >= 0):
        d = np.abs(off - i)
        refs = off[np.lexsort((off, d))[:K]]
        A[index[i], i] += 1.0 / count[index[i]]
        A[index[i], refs] -= 1.0 / (K * count[index[i]])
    return A @ x, A


def test_stage_differences_and_correlation_match_an_explicit_reduction(tmp_path):
    curves, keep, pump_on, index = make_run(tmp_path)
    got = run_stage(tmp_path, "binned.zarr", config())
    diff, A = explicit(curves, keep, pump_on, index)
    # float32 curves, float64 sums: agreement to float32 rounding of the normalized curves (~1e-7)
    np.testing.assert_allclose(got["difference"], diff, rtol=0, atol=2e-6)
    M = A @ A.T  # Cov(D_b, D_c) = s^2 (A A^T)_bc for independent shots of equal variance s^2
    R = M / np.sqrt(np.outer(np.diag(M), np.diag(M)))
    assert got["delay_correlation"].shape == (NB, NB)
    np.testing.assert_allclose(got["delay_correlation"], R, rtol=1e-10, atol=1e-12)
    assert np.all(np.diag(R, 1) > 0.05)  # the jitter spreads positions over neighbouring bins
    g = store.open_group(tmp_path / "binned.zarr")
    assert list(g["delay_correlation"].metadata.dimension_names) == ["delay", "delay_other"]
    assert "shared pump-off references" in g["delay_correlation"].attrs["long_name"]
    assert "difference_replicates" not in got


def test_chunking_and_workers_change_nothing(tmp_path):
    make_run(tmp_path, seed=1)
    a = run_stage(tmp_path, "a.zarr", config(bootstrap=4, chunk=16, workers=1))
    b = run_stage(tmp_path, "b.zarr", config(bootstrap=4, chunk=2000, workers=2))
    for name in ("difference", "difference_error", "pump_on_mean", "pump_off_mean", "delay_correlation", "reference_sharing"):
        np.testing.assert_allclose(a[name], b[name], rtol=1e-6, atol=1e-9, err_msg=name)
    # bootstrap sums are float64 over float32 products of centred curves: equal to float32 rounding
    np.testing.assert_allclose(a["difference_replicates"], b["difference_replicates"], rtol=0, atol=1e-6)


def test_stage_bootstrap_covariance_matches_the_correlation(tmp_path):
    make_run(tmp_path, seed=2, jitter=1.5)
    got = run_stage(tmp_path, "boot.zarr", config(bootstrap=300, chunk=128, workers=2))
    reps = got["difference_replicates"].astype(np.float64)
    assert reps.shape == (300, NB, NQ) and np.all(np.isfinite(reps))
    # replicates scatter about diff by its standard error (the bootstrap of a mean reproduces the
    # standard error, Efron & Tibshirani 1993, ch. 6, from memory); 300 replicates fix a standard
    # deviation to 4 %, averaged over 24 q points: a 0.85-1.15 band is several sigma wide
    ratio = reps.std(axis=0, ddof=1) / got["difference_error"]
    assert 0.85 < np.median(ratio) < 1.15, np.median(ratio)
    # the first off-diagonal of the replicates' correlation against R (sampling error ~0.06/sqrt(24))
    R, R_boot = got["delay_correlation"], C.replicate_correlation(reps)
    np.testing.assert_allclose(np.diag(R_boot, 1), np.diag(R, 1), rtol=0, atol=0.06)
    assert np.all(np.diag(R, 1) > 0.1)


def test_batches_cover_every_range_once():
    ranges = [(a, a + 10) for a in range(0, 1000, 10)]
    groups = shotstore.batches(ranges, 2)
    assert [r for g in groups for r in g] == ranges
    assert max(len(g) for g in groups) == shotstore.CHUNKS_PER_WORKER * 2


def test_shot_table_reads_fields_on_first_use(tmp_path):
    curves, keep, pump_on, index = make_run(tmp_path, seed=4)
    shots = shotstore.open_shots(tmp_path / "shots.zarr")
    table = shots.table
    assert shots.n_shots == N and len(table) == 5 and "pulse_id" in table and "photon_energy" not in table
    assert table.get("photon_energy") is None
    np.testing.assert_array_equal(table["pump_on"], pump_on)
    table.drop("pump_on")  # read again on the next use, with the same values
    np.testing.assert_array_equal(table["pump_on"], pump_on)
    assert dict(table.items()).keys() == {"pulse_id", "pump_on", "stage_delay", "pulse_energy", "timing_edge"}
