"""Tests of movieproc.signals.covariance and movieproc.fitting.correlated.

The between-bin covariance of the binned differences is checked against an
explicit coefficient matrix built shot by shot and against the scatter of many
simulated noise realizations pushed through the same reduction; the fast
bootstrap against a direct evaluation of its formula and against the analytic
covariance; the sandwich and GLS parameter covariances by the coverage of their
intervals over simulated correlated noise.
"""

import numpy as np
import pytest
from scipy import linalg, sparse

from movieproc.fitting import correlated as F
from movieproc.shots.binning import accumulate, assign_bins
from movieproc.signals import covariance as C
from movieproc.signals import differences as D


def stage_scan(seed, n=3000, nbins=10, off_every=4, k=2, jitter=1.2, positions=12):
    """Shot pattern of a stage scan: contiguous stage positions, every ``off_every``-th shot pump-off.

    Delays in units of the bin width: the nominal delay of each position plus a
    Gaussian timing jitter of ``jitter`` bin widths, so the pump-on shots of one
    position spread over several bins (and a few fall outside and stay unbinned).

    Returns
    -------
    on_idx : (n_on,) run indices of pump-on shots; bins : (n_on,) their bins (-1 outside);
    refs : (n_on, k) their k nearest pump-off shots.
    """
    rng = np.random.default_rng(seed)
    pid = 1000 + np.arange(n)
    off = np.arange(n) % off_every == off_every - 1
    position = np.minimum(np.arange(n) * positions // n, positions - 1)
    delay = (position + 0.5) * nbins / positions + jitter * rng.standard_normal(n)
    on_idx = np.flatnonzero(~off)
    refs, _ = D.nearest_references(pid, ~off, off, k)
    bins = assign_bins(delay[on_idx], np.arange(nbins + 1.0))
    return on_idx, bins, refs


def explicit_coefficients(on_idx, bins, refs, nbins, n):
    """Coefficient a_bs of every shot s in every bin mean difference, by loops over shots."""
    k = refs.shape[1]
    A = np.zeros((nbins, n))
    count = np.bincount(bins[bins >= 0], minlength=nbins)
    for i, b, r in zip(on_idx, bins, refs, strict=True):
        if b < 0:
            continue
        A[b, i] += 1.0 / count[b]
        for j in r:
            A[b, j] -= 1.0 / (k * count[b])
    return A


def reduce_bins(x, on_idx, bins, refs, nbins):
    """The reduction of the difference stage: per-shot difference to the mean of the k references,
    then per-bin sums. x: (n_shots, m) values of every shot."""
    d = x[on_idx] - x[refs].mean(axis=1)
    return accumulate(bins, d, nbins)


def band(a, offsets=(0, 1)):
    """Entries of the square matrix a on the diagonal and the given upper off-diagonals."""
    return np.concatenate([np.diag(a, o) for o in offsets])


# ------------------------------------------------------------------ analytic bin covariance

def test_overlap_is_the_coefficient_gram_matrix_and_its_diagonal_the_shared_factor():
    n, nb, k = 3000, 10, 2
    on_idx, bins, refs = stage_scan(0, n=n, nbins=nb, k=k)
    M = C.bin_coefficient_overlap(bins, refs, nb)
    A = explicit_coefficients(on_idx, bins, refs, nb, n)
    np.testing.assert_allclose(M, A @ A.T, rtol=1e-12, atol=1e-15)
    # the stage's reduction is exactly the linear estimator A: bin means of per-shot differences
    x = np.random.default_rng(1).standard_normal((n, 3))
    np.testing.assert_allclose(reduce_bins(x, on_idx, bins, refs, nb).mean(), A @ x, rtol=1e-10, atol=1e-13)
    # diagonal identity with the shared-reference factor: M_bb = (1 + shared_b) / n_b
    shared = D.shared_reference_factor(bins, refs, nb)
    count = np.bincount(bins[bins >= 0], minlength=nb)
    np.testing.assert_allclose(np.diag(M), (1 + shared) / count, rtol=1e-12)
    R = C.bin_correlation(M)
    np.testing.assert_allclose(np.diag(R), 1.0)
    assert np.all(np.diag(R, 1) > 0.1)  # neighbours share references in this scan


@pytest.mark.parametrize("block", [1, 7, 100, 10_000])
def test_streamed_gram_equals_the_use_count_product(block):
    # U U^T from the whole sparse use-count matrix against the block-streamed sums; shuffled
    # bins and a few far references (non-monotone use) exercise the carried uses
    on_idx, bins, refs = stage_scan(4, n=2000, nbins=8, k=3)
    refs = refs.copy()
    refs[::97, 0] = refs[-1, 0]  # some early shots use a late reference
    U, _ = C.reference_use_counts(bins, refs, 8)
    gram, n = C.reference_gram(bins, refs, 8, block=block)
    np.testing.assert_array_equal(gram, (U @ U.T).toarray())
    np.testing.assert_array_equal(n, np.bincount(bins[bins >= 0], minlength=8))
    with pytest.raises(ValueError, match="block"):
        C.reference_gram(bins, refs, 8, block=0)


def test_empty_bin_gets_zero_overlap_and_identity_correlation():
    refs = np.array([[0, 1], [0, 1], [2, 3]])
    bins = np.array([0, 2, 2])
    M = C.bin_coefficient_overlap(bins, refs, 3)
    # hand: bin 0 = on_a - (x0 + x1)/2; bin 2 = (on_b + on_c)/2 - (x0 + x1 + x2 + x3)/4
    # M_00 = 1 + 2 (1/2)^2 = 1.5; M_22 = 2 (1/2)^2 + 4 (1/4)^2 = 0.75; M_02 = 2 (1/2)(1/4) = 0.25
    np.testing.assert_allclose(M, [[1.5, 0, 0.25], [0, 0, 0], [0.25, 0, 0.75]])
    R = C.bin_correlation(M)
    np.testing.assert_allclose(R[1], [0, 1, 0])
    np.testing.assert_allclose(R[0, 2], 0.25 / np.sqrt(1.5 * 0.75))
    with pytest.raises(ValueError, match="refs"):
        C.bin_coefficient_overlap(bins, refs[:2], 3)
    with pytest.raises(ValueError, match="nbins"):
        C.bin_coefficient_overlap(bins, refs, 2)


def test_analytic_covariance_matches_monte_carlo():
    # T independent realizations of unit-variance noise on every shot of one scan, each pushed
    # through the reduction; the empirical between-bin covariance must equal M.
    n, nb, k, T, batch = 3000, 10, 2, 20000, 2500
    on_idx, bins, refs = stage_scan(2, n=n, nbins=nb, k=k)
    M = C.bin_coefficient_overlap(bins, refs, nb)
    rng = np.random.default_rng(3)
    s2 = np.zeros((nb, nb))
    for _ in range(T // batch):
        means = reduce_bins(rng.standard_normal((n, batch)), on_idx, bins, refs, nb).mean()  # (nb, batch)
        s2 += means @ means.T  # true mean is 0
    emp = s2 / T
    # Monte Carlo standard error of an empirical covariance of Gaussian variables:
    # sqrt((M_bb M_cc + M_bc^2) / T): 1.0 % of the diagonal, about 4 % / sqrt(2) = 2.9 % of the
    # first off-diagonals here (correlation near 0.25), well below the 15 % criterion.
    mc_err = np.sqrt((np.outer(np.diag(M), np.diag(M)) + M * M) / T)
    assert np.max(band(mc_err) / np.abs(band(M))) < 0.04
    np.testing.assert_array_less(np.abs(band(emp - M)), 0.15 * np.abs(band(M)))
    # and the agreement is as close as the Monte Carlo allows (exact formula), out to lag 2
    np.testing.assert_array_less(np.abs(band(emp - M, (0, 1, 2))), 4.5 * band(mc_err, (0, 1, 2)))


# ------------------------------------------------------------------ bootstrap

def bootstrap_run(x, on_idx, bins, refs, nb, weights, chunks):
    """Stream the pump-on shots through bootstrap_chunk in ``chunks`` contiguous pieces."""
    sums = C.BootstrapSums.zeros(weights.shape[0], nb, x.shape[1])
    for piece in np.array_split(np.arange(on_idx.size), chunks):
        idx, r = on_idx[piece], refs[piece]
        rows = np.unique(np.concatenate([idx, r.ravel()]))
        sums.add(C.bootstrap_chunk(weights, idx, bins[piece], r, rows, x[rows]))
    return C.bootstrap_replicates(sums)


def direct_ratio_estimator(x, on_idx, bins, refs, nb, w):
    """D_b = sum_i w_i on_i / sum_i w_i - sum_j w_j u_bj off_j / sum_j w_j u_bj, by loops (float64)."""
    out = np.zeros((nb, x.shape[1]))
    for b in range(nb):
        sel = bins == b
        on = on_idx[sel]
        ref, uses = np.unique(refs[sel], return_counts=True)
        wo, wr = w[on].astype(float), w[ref] * uses.astype(float)
        out[b] = (wo @ x[on]) / wo.sum() - (wr @ x[ref]) / wr.sum()
    return out


def test_bootstrap_is_the_ratio_estimator_and_chunking_changes_nothing():
    n, nb, k = 3000, 10, 2
    on_idx, bins, refs = stage_scan(4, n=n, nbins=nb, k=k)
    rng = np.random.default_rng(5)
    q = np.linspace(0.5, 4.0, 16)
    x = (1.0 + 0.3 * np.sin(q) + 0.01 * rng.standard_normal((n, q.size))).astype(np.float32)
    weights = C.ReplicateWeights(6, 5, n).array()
    assert weights.dtype == np.uint8 and weights.shape == (5, n)
    assert abs(weights.mean() - 1.0) < 0.02 and abs(weights.var() - 1.0) < 0.05  # Poisson(1): mean = var = 1
    got = bootstrap_run(x, on_idx, bins, refs, nb, weights, 3)
    x64 = x.astype(np.float64)
    spread = 0.01 / np.sqrt(200)  # order of a bin difference's standard error
    for r in range(5):
        np.testing.assert_allclose(got[r], direct_ratio_estimator(x64, on_idx, bins, refs, nb, weights[r]),
                                   rtol=0, atol=1e-4 * spread)
    np.testing.assert_allclose(bootstrap_run(x, on_idx, bins, refs, nb, weights, 1), got, rtol=0,
                               atol=1e-4 * spread)
    # at unit weights a replicate is the reduction's own bin difference
    ones = np.ones((1, n), np.uint8)
    plain = reduce_bins(x64, on_idx, bins, refs, nb).mean()
    np.testing.assert_allclose(bootstrap_run(x, on_idx, bins, refs, nb, ones, 3)[0], plain, rtol=0,
                               atol=1e-4 * spread)


def test_bootstrap_covariance_matches_analytic_covariance():
    # One noise realization (nq independent q points), 400 replicates: the bootstrap covariance
    # between bins against the separable model err_b err_c R_bc with the per-bin errors of that
    # realization, both averaged over q. Bootstrap sampling error: sqrt(2 / (400 * 64)) = 0.9 % on
    # the diagonal, about 3 % on the first off-diagonals.
    n, nb, k, nq, n_boot = 3000, 10, 2, 64, 400
    on_idx, bins, refs = stage_scan(7, n=n, nbins=nb, k=k)
    rng = np.random.default_rng(8)
    base = 1.0 + 0.2 * np.linspace(0, 1, nq)
    x = (base + 0.01 * rng.standard_normal((n, nq))).astype(np.float32)
    sums = reduce_bins(x.astype(np.float64), on_idx, bins, refs, nb)
    shared = D.shared_reference_factor(bins, refs, nb)
    err = D.bin_errors(sums.variance(), sums.count, k, shared)  # (nb, nq)
    R = C.bin_correlation(C.bin_coefficient_overlap(bins, refs, nb))
    analytic = np.einsum("bq,cq->bc", err, err) * R / nq
    reps = bootstrap_run(x, on_idx, bins, refs, nb, C.ReplicateWeights(9, n_boot, n), 3)
    assert np.all(np.isfinite(reps))
    dev = reps - reps.mean(axis=0)
    boot = np.einsum("rbq,rcq->bc", dev, dev) / ((n_boot - 1) * nq)
    np.testing.assert_array_less(np.abs(band(boot - analytic)), 0.15 * band(analytic))
    # the naive per-bin errors (no between-bin terms) would miss the first off-diagonals entirely
    assert np.all(np.diag(boot, 1) > 0.5 * np.diag(analytic, 1))
    R_boot = C.replicate_correlation(reps)
    np.testing.assert_array_less(np.abs(np.diag(R_boot, 1) - np.diag(R, 1)), 0.15 * np.diag(R, 1))


def test_bootstrap_chunk_refuses_missing_rows():
    weights = np.ones((2, 10), np.uint8)
    with pytest.raises(ValueError, match="rows"):
        C.bootstrap_chunk(weights, [1], [0], [[0, 2]], [0, 1], np.ones((2, 3), np.float32))
    with pytest.raises(ValueError, match="seed"):
        C.ReplicateWeights(-1, 2, 10)
    with pytest.raises(ValueError, match="shots must be run indices"):
        C.ReplicateWeights(0, 2, 10).take([3, 10])


def test_replicate_weights_are_the_same_in_any_chunk_and_drawn_per_block():
    # the same shot gets the same weights whichever chunk asks, across block boundaries;
    # different seeds differ; Poisson(1) moments (mean = var = 1, P(0) = 1/e: any handbook)
    n = 3 * C.WEIGHT_BLOCK_SHOTS + 123
    w = C.ReplicateWeights(3, 4, n)
    whole = w.array()
    assert whole.shape == (4, n) and whole.dtype == np.uint8
    idx = np.random.default_rng(0).permutation(n)[:5000]
    np.testing.assert_array_equal(w.take(idx), whole[:, idx])
    np.testing.assert_array_equal(C.ReplicateWeights(3, 4, n).take(idx[::-1]), whole[:, idx[::-1]])
    assert not np.array_equal(C.ReplicateWeights(4, 4, n).array(), whole)
    assert abs(whole.mean() - 1.0) < 0.01 and abs(whole.var() - 1.0) < 0.02
    assert abs(np.mean(whole == 0) - np.exp(-1.0)) < 0.005


# ------------------------------------------------------------------ whitening

def ar1(nbins, rho):
    """Correlation of a first-order autoregressive sequence: R_bc = rho^|b - c| (Box & Jenkins,
    Time Series Analysis, AR(1) autocorrelation function)."""
    lag = np.abs(np.subtract.outer(np.arange(nbins), np.arange(nbins)))
    return rho ** lag


def test_whiten_inverts_the_correlation_and_skips_masked_points():
    nb, nq = 8, 5
    rng = np.random.default_rng(10)
    R = ar1(nb, 0.6)
    L = np.linalg.cholesky(R)
    z = rng.standard_normal((nb, nq))
    err = rng.uniform(0.5, 2.0, (nb, nq))
    np.testing.assert_allclose(C.whiten(err * (L @ z), err, R), z, rtol=1e-12, atol=1e-12)
    # masked entries: the whitened sum of squares equals r^T R_sub^-1 r on the valid bins of each q
    res = err * (L @ z)
    res[2, 1] = np.nan
    err[5, 3] = 0.0
    res[:, 4] = np.nan  # an all-masked q point
    w = C.whiten(res, err, R)
    for q in range(nq):
        ok = np.isfinite(res[:, q]) & (err[:, q] > 0)
        if not ok.any():
            assert np.all(w[:, q] == 0)
            continue
        r = res[ok, q] / err[ok, q]
        assert np.sum(w[:, q] ** 2) == pytest.approx(r @ np.linalg.solve(R[np.ix_(ok, ok)], r), rel=1e-10)
        assert np.all(w[~ok, q] == 0)


def test_whiten_refuses_singular_or_bad_correlation():
    res, err = np.ones((3, 2)), np.ones((3, 2))
    singular = np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(ValueError, match="R .*(singular|positive definite)"):
        C.whiten(res, err, singular)
    near = np.array([[1.0, 1 - 1e-13, 0.0], [1 - 1e-13, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(ValueError, match="R .*nearly singular.*references"):
        C.whiten(res, err, near)
    indefinite = np.array([[1.0, 0.9, -0.9], [0.9, 1.0, 0.9], [-0.9, 0.9, 1.0]])
    with pytest.raises(ValueError, match="R .*not positive definite"):
        C.whiten(res, err, indefinite)
    with pytest.raises(ValueError, match="unit diagonal"):
        C.whiten(res, err, 2 * np.eye(3))
    with pytest.raises(ValueError, match="R must be"):
        C.whiten(res, err, np.eye(4))


# ------------------------------------------------------------------ parameter covariance

def linear_problem(nb=30, nq=4, seed=12):
    """Design of a weighted linear fit over (delay, q): an offset profile and a slope in delay."""
    rng = np.random.default_rng(seed)
    delay = np.linspace(-1, 1, nb)
    g = 1.0 + 0.5 * np.cos(np.arange(nq))
    h = np.linspace(1.0, 2.0, nq)
    X = np.stack([np.outer(np.ones(nb), g), np.outer(delay, h)], axis=-1)  # (nb, nq, 2)
    err = rng.uniform(0.5, 1.5, (nb, nq))
    return X, err


def test_structured_meat_equals_the_explicit_kronecker_product():
    nb, nq = 7, 3
    rng = np.random.default_rng(13)
    R = C.bin_correlation(C.bin_coefficient_overlap(*stage_scan(14, n=900, nbins=nb)[1:], nb))
    J = rng.standard_normal((nb * nq, 3))
    Cfull = np.kron(R, np.eye(nq))  # row b * nq + q
    np.testing.assert_allclose(F.correlated_meat(J, R), J.T @ Cfull @ J, rtol=1e-12)
    valid = rng.random((nb, nq)) > 0.2
    Jv = J[valid.ravel()]
    expect = Jv.T @ Cfull[np.ix_(valid.ravel(), valid.ravel())] @ Jv
    np.testing.assert_allclose(F.correlated_meat(Jv, R, valid), expect, rtol=1e-12)
    np.testing.assert_allclose(F.correlated_meat(sparse.csr_matrix(Jv), R, valid), expect, rtol=1e-12)
    Binv = np.linalg.inv(Jv.T @ Jv)
    np.testing.assert_allclose(F.sandwich_covariance(Jv, R, valid), Binv @ expect @ Binv, rtol=1e-10)
    # GLS: (J^T C^-1 J)^-1 on the valid points
    Cinv = np.linalg.inv(Cfull[np.ix_(valid.ravel(), valid.ravel())])
    np.testing.assert_allclose(F.gls_covariance(Jv, R, valid), np.linalg.inv(Jv.T @ Cinv @ Jv), rtol=1e-10)
    # expected plain chi2 of the ordinary fit: tr((I - H) C) with the hat matrix H = J B^-1 J^T
    H = Jv @ Binv @ Jv.T
    Csub = Cfull[np.ix_(valid.ravel(), valid.ravel())]
    assert F.correlated_dof(Jv, R, valid) == pytest.approx(np.trace((np.eye(H.shape[0]) - H) @ Csub), rel=1e-12)
    # without correlation both are the ordinary (J^T J)^-1
    np.testing.assert_allclose(F.sandwich_covariance(Jv, np.eye(nb), valid), Binv, rtol=1e-10)
    np.testing.assert_allclose(F.gls_covariance(Jv, np.eye(nb), valid), Binv, rtol=1e-10)
    # reduced chi2: plain as varpro computes it, whitened with R
    r = rng.standard_normal((nb, nq))
    assert F.reduced_chi2(r, 10) == pytest.approx(np.sum(r * r) / 10)
    assert F.reduced_chi2(r, 10, R) == pytest.approx(r.ravel() @ np.linalg.solve(Cfull, r.ravel()) / 10)
    # an undetermined parameter is reported as infinite variance
    J2 = np.column_stack([J[:, 0], J[:, 0]])
    assert np.isinf(F.sandwich_covariance(J2, R)[0, 0])


def coverage(estimates, truth, cov_list):
    """Fraction of replicates whose +-2 standard-error interval holds the truth, per parameter
    (one covariance for all replicates, or one per replicate)."""
    se = np.sqrt(np.array([np.diag(c) for c in cov_list]))
    return np.mean(np.abs(estimates - truth) <= 2 * se, axis=0)


def test_correlated_errors_give_honest_intervals_and_naive_ones_do_not():
    # 1000 replicates of AR(1)-correlated noise (rho = 0.7 along delay, independent between q
    # points) on a known linear model with known errors. A +-2 sigma interval of a Gaussian
    # estimate holds the truth with probability 0.9545 (erf(2 / sqrt 2)); binomial standard
    # error over 1000 replicates sqrt(0.9545 * 0.0455 / 1000) = 0.66 %; accepted band 3 of them.
    nb, nq, T, rho = 30, 4, 1000, 0.7
    X, err = linear_problem(nb, nq)
    beta = np.array([2.0, -1.0])
    R = ar1(nb, rho)
    L = np.linalg.cholesky(R)
    J = (X / err[..., None]).reshape(nb * nq, 2)  # error-weighted Jacobian, delay-major rows
    rng = np.random.default_rng(15)
    Y = X @ beta + err * np.einsum("bc,tcq->tbq", L, rng.standard_normal((T, nb, nq)))  # (T, nb, nq)
    # ordinary weighted fit of every replicate
    ols = np.linalg.lstsq(J, (Y / err).reshape(T, nb * nq).T, rcond=None)[0].T
    # GLS fit: least squares of the whitened data on the whitened Jacobian (all replicates side by side)
    Jw = C.decorrelate(J.reshape(nb, nq * 2), np.ones((nb, nq * 2), bool), R).reshape(nb * nq, 2)
    Yw = C.whiten(Y.transpose(1, 0, 2).reshape(nb, T * nq), np.tile(err, (1, T)), R)
    gls = np.linalg.lstsq(Jw, Yw.reshape(nb, T, nq).transpose(1, 0, 2).reshape(T, nb * nq).T, rcond=None)[0].T
    band3 = 3 * np.sqrt(0.9545 * 0.0455 / T)
    sw, gl, naive = F.sandwich_covariance(J, R), F.gls_covariance(J, R), F.inverse_psd(J.T @ J)
    np.testing.assert_array_less(np.abs(coverage(ols, beta, [sw]) - 0.9545), band3)
    np.testing.assert_array_less(np.abs(coverage(gls, beta, [gl]) - 0.9545), band3)
    assert np.all(coverage(ols, beta, [naive]) < 0.85)
    assert np.all(gls.std(axis=0) < ols.std(axis=0))  # GLS is the efficient estimate

    # reduced-chi2 scaling: with correct errors its mean over replicates must be 1. Plain chi2 of
    # the ordinary fit over correlated_dof; whitened chi2 of the GLS fit over n - p. Their spread
    # is below 0.25 (chi2 of >= 40 effective dof): standard error of the mean below 0.008.
    n, dof = nb * nq, nb * nq - 2
    dof_c = F.correlated_dof(J, R)
    red_ols = np.array([F.reduced_chi2((y - X @ b) / err, 1) for y, b in zip(Y, ols, strict=True)])
    red_gls = np.array([F.reduced_chi2((y - X @ b) / err, dof, R) for y, b in zip(Y, gls, strict=True)])
    assert red_ols.mean() / dof_c == pytest.approx(1.0, abs=0.03)
    assert red_gls.mean() == pytest.approx(1.0, abs=0.03)
    assert n - dof_c > 3 * (n - dof)  # each smooth parameter absorbs several units of chi2 here
    np.testing.assert_allclose(F.sandwich_covariance(J, R, red_chi2=1.7), 1.7 * sw, rtol=1e-12)
    np.testing.assert_allclose(F.gls_covariance(J, R, red_chi2=1.7), 1.7 * gl, rtol=1e-12)
    # with the scaling, intervals keep their coverage up to the scale's own scatter (about 1 %)
    scaled = [sw * r / dof_c for r in red_ols]
    np.testing.assert_array_less(np.abs(coverage(ols, beta, scaled) - 0.9545), band3 + 0.01)


def test_cholesky_of_a_realistic_bin_correlation_is_well_conditioned():
    nb = 10
    _, bins, refs = stage_scan(16, nbins=nb)
    R = C.bin_correlation(C.bin_coefficient_overlap(bins, refs, nb))
    L = C.cholesky_correlation(R)
    np.testing.assert_allclose(L @ L.T, R, rtol=1e-12, atol=1e-14)
    assert linalg.eigvalsh(R).min() > 0.3  # each bin has its own pump-on shots: far from singular
