"""Tests of movieproc.shots.selection: cuts, reason bits, robust outlier scores, counts;
and the ``select`` stage's refusal of runs it cannot difference."""

import numpy as np
import pytest
import zarr
from scipy import special, stats

from conftest import leftovers
from movieproc import config as C
from movieproc.errors import DataError
from movieproc.shots import selection as S
from movieproc.stages import ingest, select


def test_mad_factor_is_normal_consistency_constant():
    # 1 / Phi^-1(3/4) (scipy.stats.norm.ppf) = 1.482602218505602
    assert S.MAD_TO_SIGMA == pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-4)


def test_pulse_energy_flags():
    e = np.array([0.1, 0.5, 1.0, 1.5, 3.0, np.nan])
    np.testing.assert_array_equal(S.pulse_energy_flags(e), [0, 0, 0, 0, 0, 1])  # NaN always cut
    np.testing.assert_array_equal(S.pulse_energy_flags(e, low=0.5, high=1.5), [1, 0, 0, 0, 1, 1])
    # median of the finite values = 1.0 (hand): below 0.3 cut
    np.testing.assert_array_equal(S.pulse_energy_flags(e, min_fraction_of_median=0.3), [1, 0, 0, 0, 0, 1])


def test_timing_flags_bits():
    edge = np.array([np.nan, 50.0, 500.0, 500.0, 900.0, np.nan])
    amp = np.array([0.1, 0.1, 0.001, 0.1, 0.001, np.nan])
    f = S.timing_flags(edge, amp, require_edge=True, min_amplitude=0.02, edge_range=(80, 880))
    R = S.REASONS
    expect = [R["timing_missing"], R["timing_range"], R["timing_amplitude"], 0,
              R["timing_range"] | R["timing_amplitude"], R["timing_missing"]]
    np.testing.assert_array_equal(f, expect)
    assert f.dtype == np.uint8
    np.testing.assert_array_equal(S.timing_flags(edge, require_edge=False), 0)


def test_reason_bits_are_distinct_powers_of_two():
    bits = list(S.REASONS.values())
    assert len(set(bits)) == len(bits)
    assert all(b > 0 and b & (b - 1) == 0 for b in bits)


def test_reason_counts_by_hand():
    R = S.REASONS
    flags = np.array([0, R["pulse_energy"], R["pulse_energy"] | R["outlier"], 0, R["timing_missing"]], np.uint8)
    c = S.reason_counts(flags)
    assert c["pulse_energy"] == 2 and c["outlier"] == 1 and c["timing_missing"] == 1
    assert c["timing_amplitude"] == 0 and c["timing_range"] == 0
    assert (c["total"], c["kept"], c["dropped"]) == (5, 2, 3)


def test_outlier_scores_near_one_for_noise_and_large_for_a_distorted_shot():
    rng = np.random.default_rng(0)
    n, nq = 400, 300
    q = np.linspace(0.5, 5, nq)
    base = 1 + 0.3 * np.exp(-q)
    curves = base + 0.01 * rng.standard_normal((n, nq))
    curves[17] *= 1 + 0.05 * np.sin(3 * q)  # distorted shot
    scores = S.outlier_scores(curves)
    # rms of robust z over q: for normal noise E[z^2] = 1 (MAD scaled to sigma), so about 1
    normal = np.delete(scores, 17)
    assert np.median(normal) == pytest.approx(1.0, abs=0.05)
    assert scores[17] > 3
    flagged = S.robust_outliers(scores, 6.0)
    np.testing.assert_array_equal(np.flatnonzero(flagged), [17])


def test_robust_outliers_ignores_nan_and_zero_spread():
    s = np.array([1.0, 1.1, 0.9, 1.05, 0.95, np.nan, 50.0])
    np.testing.assert_array_equal(S.robust_outliers(s, 6.0), [0, 0, 0, 0, 0, 0, 1])
    np.testing.assert_array_equal(S.robust_outliers(np.ones(5), 3.0), 0)


# ------------------------------------------------------------------ the select stage on bad runs

def _config(*extra):
    return C.load(overrides=["compute.progress=false", "compute.workers=1", "compute.chunk_shots=64",
                             "selection.outliers.window=60", "selection.timing.edge_range_px=null", *extra])


def _ingest(make_run, tmp_path, **kw):
    f = make_run(**kw)
    shots = tmp_path / "out" / "shots.zarr"
    ingest.run({"files": [str(f)]}, shots, _config())
    return shots


def test_select_counts_reasons(make_run, tmp_path):
    def edit(d):
        d["shots/pulse_energy"][[3, 10, 11]] = 0.01  # below 30 % of the median
        d["shots/timing_edge"][[5, 10]] = np.nan

    shots = _ingest(make_run, tmp_path, edit=edit)
    select.run({"shots": shots}, tmp_path / "out" / "selection.zarr", _config())
    counts = zarr.open_group(str(tmp_path / "out" / "selection.zarr"), mode="r").attrs["counts"]
    assert counts["pulse_energy"] == 3 and counts["timing_missing"] == 2
    assert counts["total"] == 240 and counts["kept"] == 240 - 4 - counts["outlier"]
    assert counts["kept_pump_on"] + counts["kept_pump_off"] == counts["kept"]


def test_select_without_pump_off_shots_is_a_data_error(make_run, tmp_path):
    def edit(d):
        d["shots/pump_on"][:] = True

    shots = _ingest(make_run, tmp_path, edit=edit)
    out = tmp_path / "out" / "selection.zarr"
    with pytest.raises(DataError, match="pump-off"):
        select.run({"shots": shots}, out, _config())
    assert not out.exists() and leftovers(tmp_path / "out") == []


def test_select_with_every_shot_cut_is_a_data_error(make_run, tmp_path):
    shots = _ingest(make_run, tmp_path)
    out = tmp_path / "out" / "selection.zarr"
    with pytest.raises(DataError, match="every one of the 240 shots was cut"):
        select.run({"shots": shots}, out, _config("selection.pulse_energy.min=1000"))
    assert not out.exists() and leftovers(tmp_path / "out") == []


# ------------------------------------------------------------------ outliers do not follow a fast onset

def _onset_run(seed=3):
    """Shots of a run whose signal rises within 30 fs, with 100 fs timing jitter and 1 % distorted shots.

    Stage steps of 120 shots (every third shot pump-off), three passes over the delays.
    Signal: 5 % of the curve (five times the per-point noise) times an erf step of 30 fs rms,
    plus a damped 0.4 ps vibration of another shape.
    """
    rng = np.random.default_rng(seed)
    steps = np.array([-1.0, -0.5, -0.2, -0.1, -0.05, 0.0, 0.05, 0.1, 0.2, 0.3, 0.5, 1.0, 2.0, 5.0, 20.0])
    n, nq = steps.size * 120 * 3, 150
    q = np.linspace(0.5, 5.0, nq)
    stage = steps[(np.arange(n) // 120) % steps.size]
    on = np.arange(n) % 3 != 2
    true = stage + 0.1 * rng.standard_normal(n)  # 100 fs rms jitter
    base = 1 + np.exp(-((q - 2.0) / 0.6) ** 2)
    rise = 0.5 * (1 + special.erf(true / (np.sqrt(2) * 0.03)))
    t = np.clip(true, 0, None)
    vib = np.sin(2 * np.pi * t / 0.4) * np.exp(-t / 0.8)
    signal = 0.05 * base * (np.sin(2.2 * q)[None, :] + 0.5 * vib[:, None] * np.cos(3.1 * q)[None, :])
    curves = base + (on * rise)[:, None] * signal + 0.01 * base * rng.standard_normal((n, nq))
    bad = rng.random(n) < 0.01
    curves[bad] *= 1 + 0.03 * np.cos(4.0 * q)  # distorted shots (jet instability)
    return curves, on, stage, true, bad


def _cut(curves, on, stage, window=1000, threshold=6.0, group=True):
    scores = np.full(on.size, np.nan)
    for start in range(0, on.size, window):
        sl = slice(start, start + window)
        scores[sl] = S.block_scores(curves[sl], on[sl], stage[sl] if group else None)
    return S.robust_outliers(scores, threshold)


def _two_proportion_z(cut, near, elsewhere):
    """Pooled two-proportion z statistic: (p1 - p2) / sqrt(p (1 - p) (1/n1 + 1/n2)) (binomial counting errors)."""
    n1, n2 = near.sum(), elsewhere.sum()
    p1, p2 = cut[near].mean(), cut[elsewhere].mean()
    p = (cut[near].sum() + cut[elsewhere].sum()) / (n1 + n2)
    return (p1 - p2) / np.sqrt(p * (1 - p) * (1 / n1 + 1 / n2)), p1, p2


def test_outlier_cut_does_not_follow_a_fast_onset():
    curves, on, stage, true, bad = _onset_run()
    cut = _cut(curves, on, stage)
    near = on & (true > -0.2) & (true < 0.3)
    elsewhere = on & ~near
    z, p_near, p_else = _two_proportion_z(cut, near, elsewhere)
    # equal cut fractions within counting error: |z| < 3 (two-sided p ~ 0.003 under the binomial null)
    assert abs(z) < 3, (p_near, p_else, z)
    # the cut is the injected distortion: nearly all found, few others (1 % injected)
    assert cut[bad].mean() > 0.9
    assert cut[~bad].mean() < 0.003


def test_pump_on_median_reference_follows_the_onset():
    # the same run scored against the block's pump-on median, the reference the cut above replaces: the
    # signal's spread within a block makes the cut fractions near time zero and elsewhere differ by many
    # counting errors (the statistic above can fail)
    curves, on, stage, true, bad = _onset_run()
    scores = np.full(on.size, np.nan)
    for start in range(0, on.size, 1000):
        sl = slice(start, start + 1000)
        for state in (True, False):
            rows = np.flatnonzero(on[sl] == state) + start
            scores[rows] = S.outlier_scores(curves[rows])
    cut = S.robust_outliers(scores, 6.0)
    near = on & (true > -0.2) & (true < 0.3)
    z, _, _ = _two_proportion_z(cut, near, on & ~near)
    assert abs(z) > 5


def test_signal_directions_hold_a_rare_signal_but_not_a_distorted_shot():
    rng = np.random.default_rng(1)
    q = np.linspace(0.5, 5, 120)
    shape = np.sin(2 * q)
    group = np.repeat([0.0, 1.0, 2.0], 40)
    amp = np.where(group == 0, 0.0, rng.uniform(0, 3, group.size))  # no signal in group 0
    d = amp[:, None] * shape + rng.standard_normal((group.size, q.size))
    d[3] += 3 * shape  # a rare signal in group 0 (a jitter tail): in the span of the other groups' signal
    d[5] += 20 * np.cos(4 * q)  # a distorted shot
    basis = S.signal_directions(d, group)
    np.testing.assert_allclose(basis @ basis.T, np.eye(basis.shape[0]), atol=1e-12)  # orthonormal
    unit = shape / np.linalg.norm(shape)
    assert np.linalg.norm(basis @ unit) > 0.99
    # the distortion's part orthogonal to the signal shape is not in the span (noise-level overlap only)
    other = np.cos(4 * q) - (np.cos(4 * q) @ unit) * unit
    assert np.linalg.norm(basis @ (other / np.linalg.norm(other))) < 0.1
    # noise alone gives no direction (all singular values under the noise edge)
    assert S.signal_directions(rng.standard_normal((120, 120)), group).shape == (0, 120)


@pytest.mark.parametrize("shape, fraction, axis", [((40, 7), 0.1, 0), ((41, 7), 0.25, 0), ((5, 33), 0.2, 1),
                                                  ((3,), 0.3, 0), ((200, 3), 0.0, 0), ((9, 4), 0.45, 0),
                                                  ((6, 5), 0.5, 0), ((7, 6), 0.2, -1)])
@pytest.mark.parametrize("with_nan", [False, True])
def test_trim_mean_is_scipys(shape, fraction, axis, with_nan):
    # reference: scipy.stats.trim_mean (same cut int(fraction * n) from each end), with ties, NaN
    # propagated, and NaN where the cut leaves nothing (fraction 0.5 of an even count)
    import warnings

    rng = np.random.default_rng(sum(shape))
    values = rng.integers(0, 6, shape).astype(float) + rng.standard_normal(shape) * (rng.random(shape) < 0.5)
    if with_nan:
        values.flat[rng.integers(0, values.size, 2)] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # mean of an empty slice, in both
        np.testing.assert_allclose(S.trim_mean(values, fraction, axis=axis),
                                   stats.trim_mean(values, fraction, axis=axis), rtol=1e-12, atol=1e-12)


def test_trim_mean_refuses_overlapping_cuts():
    with pytest.raises(ValueError, match="overlap"):
        S.trim_mean(np.arange(8.0), 0.7)
    with pytest.raises(ValueError):
        stats.trim_mean(np.arange(8.0), 0.7)  # as scipy does
