"""Tests of movieproc.signals.differences and .normalize: nearest pump-off references against
a brute-force search, the shared-reference factor against explicit weights, and the bin
errors against the scatter of many simulated runs."""

import numpy as np
import pytest

from movieproc.errors import DataError
from movieproc.shots.binning import accumulate
from movieproc.signals import differences as D
from movieproc.signals import normalize as N


# ------------------------------------------------------------------ references

def brute_force_references(pid, on, off, k):
    """For each on shot: distances to every off shot, the k smallest (ties: lower pulse id first)."""
    off_idx = np.flatnonzero(off)
    refs, gaps = [], []
    for i in np.flatnonzero(on):
        dist = np.abs(pid[off_idx] - pid[i])
        order = np.lexsort((pid[off_idx], dist))[:k]
        refs.append(off_idx[order])
        gaps.append(dist[order].max())
    return np.array(refs), np.array(gaps)


@pytest.mark.parametrize("seed", range(5))
def test_nearest_references_match_brute_force(seed):
    rng = np.random.default_rng(seed)
    n = 400
    pid = 1000 + np.cumsum(rng.integers(1, 4, n))  # gaps in the pulse ids
    off = rng.random(n) < 0.3
    off[rng.random(n) < 0.1] = False  # some off shots cut by the selection
    on = ~off & (rng.random(n) < 0.9)
    k = int(rng.integers(1, 6))
    refs, gap = D.nearest_references(pid, on, off, k)
    ref_bf, gap_bf = brute_force_references(pid, on, off, k)
    # compact run indices: int32 for runs below 2^31 shots
    assert refs.shape == (on.sum(), k) and refs.dtype == np.int32
    np.testing.assert_array_equal(gap, gap_bf)
    # the set of distances must agree (ties between equally distant shots may pick either)
    d = np.sort(np.abs(pid[refs] - pid[on][:, None]), axis=1)
    d_bf = np.sort(np.abs(pid[ref_bf] - pid[on][:, None]), axis=1)
    np.testing.assert_array_equal(d, d_bf)
    assert np.all(off[refs])  # only usable off shots
    assert all(len(set(r)) == k for r in refs)  # no shot twice


def test_nearest_references_in_blocks_equal_one_block(monkeypatch):
    rng = np.random.default_rng(11)
    n = 2000
    pid = np.cumsum(rng.integers(1, 5, n))
    off = rng.random(n) < 0.3
    whole = D.nearest_references(pid, ~off, off, 3)
    monkeypatch.setattr(D, "REFERENCE_BLOCK", 37)  # many blocks, one ending inside a run of on shots
    blocked = D.nearest_references(pid, ~off, off, 3)
    np.testing.assert_array_equal(blocked[0], whole[0])
    np.testing.assert_array_equal(blocked[1], whole[1])
    ref_bf, gap_bf = brute_force_references(pid, ~off, off, 3)
    np.testing.assert_array_equal(blocked[1], gap_bf)


def test_references_at_the_run_ends_and_too_few():
    pid = np.arange(10)
    off = np.zeros(10, bool)
    off[[0, 9]] = True
    on = ~off
    refs, gap = D.nearest_references(pid, on, off, 2)
    assert np.all(np.sort(refs, axis=1) == [0, 9])
    # hand: on shot at pulse 1 uses 0 and 9: largest distance 8; shot 8 likewise 8
    assert gap[0] == 8 and gap[-1] == 8
    with pytest.raises(DataError, match="2 usable pump-off shots"):
        D.nearest_references(pid, on, off, 3)
    with pytest.raises(DataError, match="pump-off"):
        D.nearest_references(pid, on, np.zeros(10, bool), 1)


# ------------------------------------------------------------------ shared references and errors

def explicit_sharing(bin_index, refs, nbins):
    """n * sum_j w_j^2 with w_j = (uses of off shot j by the bin's on shots) / (k n), by loops."""
    k = refs.shape[1]
    out = np.full(nbins, np.nan)
    for b in range(nbins):
        rows = refs[bin_index == b]
        n = rows.shape[0]
        if n == 0:
            continue
        _, uses = np.unique(rows, return_counts=True)
        out[b] = n * np.sum((uses / (k * n)) ** 2)
    return out


def test_shared_reference_factor_hand_cases():
    # no sharing within the bin: 1/k; all on shots sharing the same k references: 1
    refs = np.array([[0, 1], [2, 3], [4, 5], [0, 1], [0, 1]])
    bins = np.array([0, 0, 0, 1, 1])
    got = D.shared_reference_factor(bins, refs, 3)
    assert got[0] == pytest.approx(0.5)  # 1/k, k = 2
    assert got[1] == pytest.approx(1.0)
    assert np.isnan(got[2])  # empty bin


def test_shared_reference_factor_matches_explicit_weights():
    rng = np.random.default_rng(3)
    n = 3000
    pid = np.arange(n)
    off = np.arange(n) % 3 == 2
    refs, _ = D.nearest_references(pid, ~off, off, 4)
    bins = rng.integers(-1, 7, (~off).sum())
    np.testing.assert_allclose(D.shared_reference_factor(bins, refs, 7), explicit_sharing(bins, refs, 7),
                               rtol=1e-12)


def test_bin_errors_are_honest_with_shared_references():
    # Monte Carlo: T independent noise realisations of the same shot pattern (every third shot
    # off, k = 4 nearest references, contiguous bins of on shots as a stage scan makes them).
    # The spread of (bin mean difference) / (its standard error) over realisations must be 1.
    rng = np.random.default_rng(11)
    n, k, nb, T = 3000, 4, 6, 600
    pid = np.arange(n)
    off = np.arange(n) % 3 == 2
    on_idx = np.flatnonzero(~off)
    refs, _ = D.nearest_references(pid, ~off, off, k)
    bins = np.minimum(on_idx * nb // n, nb - 1)
    shared = D.shared_reference_factor(bins, refs, nb)
    noise = rng.standard_normal((n, T))  # column t: realisation t of per-shot noise (sd 1)
    d = noise[on_idx] - noise[refs].mean(axis=1)  # per-shot differences (true difference 0)
    sums = accumulate(bins, d, nb)
    err = D.bin_errors(sums.variance(), sums.count, k, shared)
    z = sums.mean() / err
    assert z.shape == (nb, T)
    assert np.std(z) == pytest.approx(1.0, abs=0.05)  # 3600 values: 1.2 % standard error of the sd
    # the naive std/sqrt(n) is too small here by sqrt((1 + shared)/(1 + 1/k)): check it would fail
    naive = np.std(sums.mean() / sums.sem())
    assert naive > 1.3
    # with per-shot variance s^2 = 1 the error is sqrt((1 + shared) / n) (closed form of the docstring)
    np.testing.assert_allclose(np.median(err, axis=1), np.sqrt((1 + shared) / sums.count), rtol=0.05)


# ------------------------------------------------------------------ normalization

def test_normalization_window_total_none():
    q = np.linspace(0.5, 5.0, 10)  # 0.5, 1.0, ..., 5.0
    curves = np.vstack([np.arange(10.0) + 1, 2 * np.ones(10)])
    # window [3.5, 4.5] holds q = 3.5, 4.0, 4.5 -> indices 6, 7, 8: mean (7 + 8 + 9) / 3 = 8 (hand)
    np.testing.assert_allclose(N.normalization_factors(curves, q, "window", (3.5, 4.5)), [8.0, 2.0])
    np.testing.assert_allclose(N.normalization_factors(curves, q, "total"), [5.5, 2.0])
    np.testing.assert_array_equal(N.normalization_factors(curves, q, "none"), [1.0, 1.0])
    out = N.normalize(curves, q, "window", (3.5, 4.5))
    assert out.dtype == np.float32
    np.testing.assert_allclose(out[:, 6:9].mean(axis=1), 1.0, rtol=1e-6)
    assert curves[0, 0] == 1.0  # input untouched


def test_normalization_errors():
    q = np.linspace(0.5, 5.0, 10)
    # the core names its own parameters; the stages map them to config keys
    with pytest.raises(ValueError, match=r"^q_range \[6.0, 7.0\] 1/Å holds no q point"):
        N.normalization_factors(np.ones((2, 10)), q, "window", (6.0, 7.0))
    with pytest.raises(ValueError, match="^mode must be one of window, total, none, got 'median'"):
        N.normalization_factors(np.ones((2, 10)), q, "median")
    with pytest.raises(DataError, match="shot 1"):
        N.normalization_factors(np.vstack([np.ones(10), np.zeros(10)]), q, "total")
