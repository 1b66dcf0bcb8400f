"""Tests of movieproc.shots.binning against numpy: np.histogram and np.digitize for bins,
a float64 np.add.at group-by and np.var / scipy.stats.sem for the streamed sums."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from movieproc.errors import DataError
from movieproc.shots import binning as B


def digitize_index(delay, edges):
    """Reference bin index from np.digitize, with np.histogram's closed last bin; -1 outside/NaN."""
    nb = len(edges) - 1
    idx = np.digitize(delay, edges) - 1  # edges[i] <= x < edges[i+1] -> i
    idx = np.where(delay == edges[-1], nb - 1, idx)  # np.histogram: last bin includes its right edge
    return np.where(np.isfinite(delay) & (idx >= 0) & (idx < nb), idx, -1)


def check_against_numpy(delay, edges):
    delay = np.asarray(delay, float)
    edges = np.asarray(edges, float)
    idx = B.assign_bins(delay, edges)
    assert idx.dtype == np.int32  # compact bin indices
    np.testing.assert_array_equal(idx, digitize_index(delay, edges))
    bins = B.bin_delays(delay, edges)
    finite = delay[~np.isnan(delay)]
    hist, _ = np.histogram(finite, edges)
    np.testing.assert_array_equal(bins.count, hist)
    assert bins.n_nan == int(np.isnan(delay).sum())
    assert bins.n_outside == int(np.sum((finite < edges[0]) | (finite > edges[-1])))
    assert bins.count.sum() + bins.n_nan + bins.n_outside == delay.size  # no shot silently lost
    for k in range(edges.size - 1):
        members = delay[idx == k]
        if members.size:
            assert bins.mean[k] == pytest.approx(np.mean(members), rel=1e-12, abs=1e-12)
            assert bins.std[k] == pytest.approx(np.std(members), rel=1e-9, abs=1e-12)  # ddof=0 spread
        else:
            assert np.isnan(bins.mean[k]) and np.isnan(bins.std[k])
    return bins


# ------------------------------------------------------------------ bins vs numpy

def test_hand_picked_edge_cases():
    edges = np.array([0.0, 1.0, 2.0, 5.0, 6.0])
    delay = np.array([0.0, 0.5, 1.0, 1.999, 2.0, 4.99, 6.0, 6.0000001, -1e-12, np.nan, 3.0, np.nan])
    # by hand: [e0, e1) -> 0, [1, 2) -> 1, [2, 5) -> 2, [5, 6] -> 3 (last bin closed); bin 3 empty
    # except the right edge 6.0 itself
    expect = [0, 0, 1, 1, 2, 2, 3, -1, -1, -1, 2, -1]
    np.testing.assert_array_equal(B.assign_bins(delay, edges), expect)
    bins = check_against_numpy(delay, edges)
    assert list(bins.count) == [2, 2, 3, 1]  # np.histogram puts 6.0 into the last bin
    assert (bins.n_nan, bins.n_outside) == (2, 2)


def test_empty_bins_and_all_outside():
    edges = np.linspace(0, 10, 11)
    bins = check_against_numpy([0.5, 0.6, 9.5, 10.0], edges)
    assert list(bins.count) == [2] + [0] * 8 + [2]
    bins = check_against_numpy([-3.0, 11.0, np.nan], edges)
    assert bins.count.sum() == 0 and bins.n_outside == 2 and bins.n_nan == 1


def test_infinite_delays_are_not_binned():
    idx = B.assign_bins([np.inf, -np.inf, 0.5], [0.0, 1.0])
    np.testing.assert_array_equal(idx, [-1, -1, 0])
    bins = B.bin_delays([np.inf, -np.inf, 0.5], [0.0, 1.0])
    assert bins.count.sum() + bins.n_nan + bins.n_outside == 3


@st.composite
def delays_and_edges(draw):
    n_edges = draw(st.integers(2, 12))
    edges = np.unique(np.round(np.array(draw(st.lists(st.floats(-5, 5), min_size=n_edges, max_size=n_edges))), 3))
    if edges.size < 2:
        edges = np.array([-1.0, 1.0])
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    n = draw(st.integers(0, 300))
    kind = rng.integers(0, 4, n)
    delay = np.where(kind == 0, rng.choice(edges, n),  # exactly on an edge (the last one too)
                     np.where(kind == 1, rng.uniform(-6, 6, n),  # inside and outside
                              np.where(kind == 2, np.round(rng.uniform(-6, 6, n), 3), np.nan)))
    return delay, edges


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(delays_and_edges())
def test_random_delays_match_histogram_and_digitize(case):
    delay, edges = case
    check_against_numpy(delay, edges)


# ------------------------------------------------------------------ edges

def test_fixed_width_edges():
    edges = B.fixed_width_edges([], 0.1, -1.0, 2.0)
    np.testing.assert_allclose(edges, np.linspace(-1.0, 2.0, 31), atol=1e-12)  # 30 bins of 0.1 ps
    # stop not on the grid: extended to a whole number of bins (ceil(1.05 / 0.1) = 11)
    edges = B.fixed_width_edges([], 0.1, 0.0, 1.05)
    assert edges.size == 12 and edges[-1] == pytest.approx(1.1)
    np.testing.assert_allclose(np.diff(edges), 0.1, rtol=1e-9)
    # default range from the finite delays
    d = np.array([0.3, np.nan, -0.2, 0.71])
    edges = B.fixed_width_edges(d, 0.25)
    assert edges[0] == -0.2 and edges[-1] >= 0.71 and edges.size == 5  # ceil(0.91 / 0.25) = 4 bins
    assert np.all(B.assign_bins(d[np.isfinite(d)], edges) >= 0)


def test_fixed_width_errors():
    # the core names its own parameters; the bin stage maps them to binning.width_ps, stop_ps
    with pytest.raises(ValueError, match="^width must be a positive bin width in ps, got 0.0"):
        B.fixed_width_edges([0.0, 1.0], 0.0)
    with pytest.raises(ValueError, match="^stop must lie above start = 1.0 ps, got 0.5"):
        B.fixed_width_edges([0.0, 1.0], 0.1, 1.0, 0.5)
    with pytest.raises(DataError, match="finite"):
        B.fixed_width_edges([np.nan, np.nan], 0.1)


@pytest.mark.parametrize("n, count", [(1000, 10), (998, 2), (994, 7), (50, 50), (12360, 40)])
def test_population_edges_equal_counts_on_distinct_data(n, count):
    rng = np.random.default_rng(n)
    d = rng.standard_normal(n) * rng.choice([0.05, 3.0], n)  # distinct, dense near 0 and wide tails
    d = np.r_[d, np.nan, np.nan]
    edges = B.population_edges(d, count)
    assert edges.size == count + 1
    hist, _ = np.histogram(d[np.isfinite(d)], edges)
    assert hist.sum() == n  # outer edges are the extreme delays
    np.testing.assert_array_equal(hist, n // count)  # n divisible by count: exactly equal
    np.testing.assert_array_equal(B.bin_delays(d, edges).count, hist)


@pytest.mark.parametrize("n, count", [(41, 40), (1001, 10), (111, 5)])
def test_population_edges_nearly_equal_when_not_divisible(n, count):
    # n distinct values in `count` bins: counts floor(n / count) or one more (pigeonhole)
    d = np.random.default_rng(n).standard_normal(n)
    hist, _ = np.histogram(d, B.population_edges(d, count))
    assert hist.sum() == n
    assert hist.min() >= n // count and hist.max() <= -(-n // count)


def test_population_edges_errors():
    with pytest.raises(DataError):
        B.population_edges([1.0, 2.0, np.nan], 3)
    with pytest.raises(DataError, match="equal"):
        B.population_edges([1.0] * 10, 3)


def test_make_edges_modes():
    d = np.linspace(-1, 2, 301)
    np.testing.assert_allclose(B.make_edges(d, "width", width=0.5, start=-1, stop=2),
                               np.linspace(-1, 2, 7), atol=1e-12)
    assert B.make_edges(d, "population", count=3).size == 4
    np.testing.assert_array_equal(B.make_edges(d, "edges", edges=[-1, 0, 0.5]), [-1, 0, 0.5])
    with pytest.raises(ValueError, match="^edges must be at least two strictly increasing"):
        B.make_edges(d, "edges", edges=[0, 0])
    with pytest.raises(ValueError, match="^mode must be one of width, population, edges, got 'log'"):
        B.make_edges(d, "log")


# ------------------------------------------------------------------ streamed sums

def groupby_reference(index, values, nbins):
    """Plain float64 group-by with np.add.at (negative index: skipped)."""
    ok = index >= 0
    v = values[ok].astype(np.float64)
    s = np.zeros((nbins, values.shape[1]))
    s2 = np.zeros((nbins, values.shape[1]))
    np.add.at(s, index[ok], v)
    np.add.at(s2, index[ok], v * v)
    return np.bincount(index[ok], minlength=nbins), s, s2


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_accumulate_matches_add_at_in_chunks(dtype):
    rng = np.random.default_rng(1)
    n, m, nb = 5003, 37, 9
    index = rng.integers(-1, nb, n)
    index[index == 4] = -1  # an empty bin
    index[np.flatnonzero(index == 6)[1:]] = -1  # a bin with one shot
    values = (1.0 + 0.01 * rng.standard_normal((n, m))).astype(dtype)
    values[::97] *= 50  # some large values
    v0, i0 = values.copy(), index.copy()
    sums = B.BinSums.zeros(nb, m)
    for a in range(0, n, 700):  # streamed in chunks, the last one short
        B.accumulate(index[a:a + 700], values[a:a + 700], nb, into=sums)
    np.testing.assert_array_equal(values, v0)
    np.testing.assert_array_equal(index, i0)
    count, s, s2 = groupby_reference(index, values, nb)
    np.testing.assert_array_equal(sums.count, count)
    assert sums.sum.dtype == np.float64 and sums.sumsq.dtype == np.float64
    np.testing.assert_allclose(sums.sum, s, rtol=1e-12)
    np.testing.assert_allclose(sums.sumsq, s2, rtol=1e-12)
    # reductions against numpy / scipy on the members of each bin (float64 copies)
    mean, var, sem = sums.mean(), sums.variance(), sums.sem()
    for k in range(nb):
        members = values[index == k].astype(np.float64)
        if members.shape[0] == 0:
            assert np.all(np.isnan(mean[k])) and np.all(np.isnan(var[k]))
            continue
        np.testing.assert_allclose(mean[k], members.mean(axis=0), rtol=1e-12)
        if members.shape[0] == 1:
            assert np.all(np.isnan(var[k])) and np.all(np.isnan(sem[k]))
            continue
        np.testing.assert_allclose(var[k], np.var(members, axis=0, ddof=1), rtol=1e-6)
        np.testing.assert_allclose(sem[k], stats.sem(members, axis=0, ddof=1), rtol=1e-6)
    assert sums.count[4] == 0 and sums.count[6] == 1


def test_chunked_equals_whole_and_sums_add():
    rng = np.random.default_rng(2)
    index = rng.integers(-3, 5, 1000)
    values = rng.standard_normal((1000, 8)).astype(np.float32)
    whole = B.accumulate(index, values, 5)
    a = B.accumulate(index[:400], values[:400], 5)
    b = B.accumulate(index[400:], values[400:], 5)
    both = a + b
    np.testing.assert_array_equal(both.count, whole.count)
    np.testing.assert_allclose(both.sum, whole.sum, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(both.sumsq, whole.sumsq, rtol=1e-12)


def test_variance_precision_for_small_spread_around_one():
    # normalized curves: mean 1, relative noise 1e-3, float32 input; float64 accumulation keeps the
    # sample variance to better than 1e-6 relative (reference: np.var(ddof=1) in float64)
    rng = np.random.default_rng(3)
    values = (1.0 + 1e-3 * rng.standard_normal((20000, 4))).astype(np.float32)
    sums = B.accumulate(np.zeros(20000, np.int64), values, 1)
    np.testing.assert_allclose(sums.variance()[0], np.var(values.astype(np.float64), axis=0, ddof=1), rtol=1e-6)


def test_non_contiguous_input():
    rng = np.random.default_rng(4)
    base = rng.standard_normal((300, 20))
    values = base[::2, ::3]  # strided view
    index = rng.integers(0, 3, values.shape[0])
    count, s, _ = groupby_reference(index, np.ascontiguousarray(values), 3)
    got = B.accumulate(index, values, 3)
    np.testing.assert_allclose(got.sum, s, rtol=1e-12)


def test_accumulate_errors():
    with pytest.raises(ValueError):
        B.accumulate([0, 3], np.ones((2, 2)), 3)  # index beyond nbins
    with pytest.raises(ValueError):
        B.accumulate([0], np.ones((2, 2)), 3)  # lengths differ
    with pytest.raises(ValueError):
        B.accumulate([0, 1], np.ones(2), 3)  # not (n, m)


def test_accumulate_weighted_matches_numpy():
    # reference: weighted sums per bin with np.add.at, written independently here
    rng = np.random.default_rng(8)
    idx = rng.integers(-1, 6, 500)
    w = rng.poisson(1.0, 500)
    x = rng.standard_normal((500, 7)).astype(np.float32)
    wsum, sums = B.accumulate_weighted(idx, w, x, 6)
    ref_w = np.zeros(6)
    ref_s = np.zeros((6, 7))
    ok = idx >= 0
    np.add.at(ref_w, idx[ok], w[ok])
    np.add.at(ref_s, idx[ok], w[ok, None] * x[ok].astype(np.float64))
    np.testing.assert_allclose(wsum, ref_w)
    np.testing.assert_allclose(sums, ref_s, rtol=1e-12, atol=1e-12)
