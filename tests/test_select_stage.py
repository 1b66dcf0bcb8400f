"""The select stage: outliers are judged against shots of the same pump state."""

import h5py
import numpy as np

from movieproc import config as mpconfig
from movieproc.io import store
from movieproc.stages import ingest, select


def _run(path, n=1200, nq=60, seed=4):
    rng = np.random.default_rng(seed)
    q = np.linspace(0.5, 5.0, nq)
    base = 1e4 * (1 + np.exp(-((q - 2.0) / 0.4) ** 2))
    on = np.arange(n) % 5 != 4  # one pump-off shot in five
    # a strong pump signal: 5 % of the curve, ~25x the per-point noise (0.2 %), in every on shot
    signal = 0.05 * base * np.sin(2.5 * q)
    curves = base + on[:, None] * signal + rng.standard_normal((n, nq)) * 0.002 * base
    bad = rng.choice(n, 12, replace=False)
    curves[bad] *= 1 + 0.05 * np.cos(4.0 * q)  # distorted shots
    with h5py.File(path, "w") as h5:
        g = h5.create_group("shots")
        g["pulse_id"] = np.arange(n, dtype=np.int64)
        g["stage_delay"] = np.zeros(n)
        g["pump_on"] = on
        g["pulse_energy"] = np.ones(n)
        g["timing_edge"] = np.zeros(n)
        h5["q"] = q
        h5["curves"] = curves.astype(np.float32)
    return bad, on


def test_strong_pump_signal_is_not_an_outlier(tmp_path):
    bad, on = _run(tmp_path / "run.h5")
    cfg = mpconfig.validate({"run": {"files": [str(tmp_path / "run.h5")]}, "compute": {"progress": False},
                             "selection": {"pulse_energy": {"min_fraction_of_median": None},
                                           "outliers": {"window": 400}}})
    ingest.run({"files": [tmp_path / "run.h5"]}, tmp_path / "shots.zarr", cfg)
    select.run({"shots": tmp_path / "shots.zarr"}, tmp_path / "sel.zarr", cfg)
    counts = store.open_group(tmp_path / "sel.zarr").attrs["counts"]
    reasons = store.read(store.open_group(tmp_path / "sel.zarr"), "reasons")
    flagged = np.flatnonzero(reasons & 16)
    # every planted distortion is found, and no clean shot (on or off) is flagged
    assert set(bad) <= set(flagged)
    assert len(set(flagged) - set(bad)) <= 2
    assert counts["outlier_pump_on"] + counts["outlier_pump_off"] == len(flagged)
    # with one median for both states (dominated by the pump-on shots) every pump-off shot
    # would sit ~25 noise units away and be cut: the per-state reference keeps them
    assert counts["kept_pump_off"] >= (~on).sum() - len(bad) - 2
    assert counts["kept_pump_on"] >= on.sum() - len(bad) - 2
