"""Tests of movieproc.fitting.{models, varpro, structure} on seeded synthetic data.

Ground truth is what the data were built from. Where the synthetic data are built
with the code under test's own pieces, the independent route is named.
"""

import numpy as np
import pytest
from scipy import linalg

from movieproc.errors import DataError
from movieproc.fitting import models, structure, varpro

Q = np.linspace(0.5, 4.0, 70)  # 1/Å


def sinc(x):
    return np.sinc(x / np.pi)


def diatomic(r):
    """Debye intensity of two unit scatterers at distance r (Å): 2 + 2 sin(qr)/(qr)."""
    return 2 + 2 * sinc(np.multiply.outer(r, Q))


R0 = 2.9  # ground-state distance, Å
SPECIES_B = np.stack([diatomic(2.6) - diatomic(R0), 0.6 * (diatomic(3.05) - diatomic(R0))])
DSDT = 0.5 * (-np.exp(-((Q - 2.0) / 0.3) ** 2) + 0.7 * np.exp(-((Q - 1.7) / 0.35) ** 2))  # per K
DELAY = np.concatenate([np.linspace(-1.0, 2.0, 31), np.logspace(0.4, 2.4, 18)])  # ps


def sequential_data(rng, truth, heat=0.03, noise=0.01):
    """A -> B -> (ground) with species curves SPECIES_B, solvent heating dT ~ population of
    the ground state reached (heat released on decay), Gaussian noise of sd ``noise``.

    Populations from the textbook closed form (A = e^{-k1 t}, B = k1/(k2-k1)(...)) on a
    fine grid, convolved with the Gaussian IRF by trapezoid quadrature: an independent
    route from the closed-form IRF convolution inside the fit."""
    k1, k2 = 1 / truth["lifetime_1"], 1 / truth["lifetime_2"]
    u = np.arange(0, 400, 0.002)
    A = np.exp(-k1 * u)
    Bp = k1 / (k2 - k1) * (np.exp(-k1 * u) - np.exp(-k2 * u))
    C = 1 - A - Bp
    x = DELAY - truth["t0"]
    g = np.exp(-0.5 * ((x[:, None] - u[None, :]) / truth["sigma"]) ** 2) / (truth["sigma"] * np.sqrt(2 * np.pi))
    wts = np.full(u.size, 0.002)
    wts[[0, -1]] = 0.001
    pops = (g * wts) @ np.column_stack([A, Bp, C])
    clean = pops[:, :2] @ SPECIES_B + heat * np.outer(pops[:, 2], DSDT)
    err = np.full(clean.shape, noise)
    return clean + rng.normal(size=clean.shape) * err, err, pops


TRUTH_SEQ = dict(t0=0.15, sigma=0.12, lifetime_1=2.0, lifetime_2=25.0)
START_SEQ = dict(t0=0.0, sigma=0.2, lifetime_1=1.5, lifetime_2=15.0)


# --------------------------------------------------------------------- linear solve

def test_solve_linear_matches_dense_lstsq():
    # Reference: scipy.linalg.lstsq on the explicitly assembled weighted design, for free
    # curves + per-delay solvent + a global map. The model (and so the residual) is unique
    # even though the split between curves and solvent is not.
    rng = np.random.default_rng(0)
    nt, nq, K, J = 9, 12, 2, 2
    C = rng.uniform(size=(nt, K))
    G = rng.normal(size=(J, nq))
    X = rng.normal(size=(1, nt, nq))
    D = rng.normal(size=(nt, nq))
    w = rng.uniform(0.5, 2.0, size=(nt, nq))
    des = models.LinearDesign(profiles=C, maps=X, curves=G, populations=C)
    sol = varpro.solve_linear(des, D, w)
    cols = []
    for k in range(K):
        for q in range(nq):
            m = np.zeros((nt, nq)); m[:, q] = C[:, k]; cols.append(m.ravel())
    for t in range(nt):
        for j in range(J):
            m = np.zeros((nt, nq)); m[t] = G[j]; cols.append(m.ravel())
    cols.append(X[0].ravel())
    A = np.array(cols).T * w.ravel()[:, None]
    coef = linalg.lstsq(A, (D * w).ravel())[0]
    ref_model = (A @ coef).reshape(nt, nq) / w
    np.testing.assert_allclose(sol.model, ref_model, atol=1e-9)  # rounding of a ~50-column solve
    # Convention: free curves carry no component along the solvent curves.
    np.testing.assert_allclose(sol.curves @ G.T, 0, atol=1e-9)
    assert sol.n_linear == K * nq + nt * J + 1 - K * J  # = rank of the dense design
    assert np.linalg.matrix_rank(A) == sol.n_linear


# --------------------------------------------------------------------- species model

@pytest.mark.slow
def test_species_fit_recovers_parameters_with_honest_errors():
    # Six seeded noise realizations; every fitted parameter within 4 reported standard
    # errors and at least 90 % of the 2-sigma intervals containing the truth (expected
    # 95 %; with 24 intervals, P(coverage < 90 %) ~ 3 %... tightened by also requiring the
    # mean of z^2 in [0.3, 2.2], expectation 1, sd sqrt(2/24) = 0.29 -> ~4 sd margins).
    G = DSDT[None]
    model = models.SpeciesModel(2, species=[0, 1], solvent=G)
    zs = []
    for seed in range(6):
        D, err, _ = sequential_data(np.random.default_rng(seed), TRUTH_SEQ)
        r = varpro.fit(model, D, err, DELAY, START_SEQ, bounds={"sigma": (0.01, 1.0)})
        assert r.converged and r.at_bound == [] and r.warnings == [], r.warnings
        zs.append([(r.params[n] - TRUTH_SEQ[n]) / r.stderr[n] for n in r.free])
        assert r.n_data == D.size and r.dof == D.size - r.n_params
    z = np.array(zs)
    assert np.all(np.abs(z) < 4), z
    assert np.mean(np.abs(z) < 2) >= 0.9, z
    assert 0.3 < np.mean(z**2) < 2.2, z
    # Species curves recovered (component orthogonal to the solvent curve) within errors.
    Bt = SPECIES_B - (SPECIES_B @ G.T) / (G @ G.T) * G
    zc = (r.species_curves - Bt) / r.species_curves_err
    assert np.mean(zc**2) == pytest.approx(1.0, abs=5 * np.sqrt(2 / zc.size))
    # Populations are reported on the delay axis.
    assert r.populations.shape == (DELAY.size, 3) and r.red_chi2 == pytest.approx(1.0, abs=0.1)


def test_species_fit_with_given_curves_recovers_alpha():
    # Given curves (as from the scattering engine) scaled by alpha = 0.2.
    D, err, _ = sequential_data(np.random.default_rng(10), TRUTH_SEQ)
    model = models.SpeciesModel(2, species=[0, 1], curves=SPECIES_B / 0.2, solvent=DSDT[None])
    r = varpro.fit(model, D, err, DELAY, START_SEQ)
    assert r.converged
    assert abs(r.amplitudes["alpha"] - 0.2) < 3 * r.amplitudes_err["alpha"]
    for n in r.free:
        assert abs(r.params[n] - TRUTH_SEQ[n]) < 3 * r.stderr[n], (n, r.params[n], r.stderr[n])
    assert r.corr_names == ["t0", "sigma", "lifetime_1", "lifetime_2", "alpha"]
    np.testing.assert_allclose(np.diag(r.correlation), 1.0, atol=1e-12)
    # Solvent coefficient per delay: true dT = 0.03 * population of the ground state.
    _, _, pops = sequential_data(np.random.default_rng(10), TRUTH_SEQ)
    z = (r.solvent_coef[:, 0] - 0.03 * pops[:, 2]) / r.solvent_coef_err[:, 0]
    assert np.all(np.abs(z) < 4.5)  # 49 delays: P(any |z| > 4.5) ~ 3e-4


@pytest.mark.slow
def test_species_fit_with_damped_oscillation():
    # A -> ground with a damped 0.4-ps vibration (free cos/sin curves). Data from the
    # closed-form IRF convolutions (validated against quad in test_kinetics.py).
    from movieproc.fitting import irf
    delay = np.concatenate([np.linspace(-0.5, 2.0, 60), np.logspace(0.4, 2, 12)])
    tr = dict(t0=0.05, sigma=0.06, lifetime_1=8.0, osc_period=0.4, osc_damping=0.5)
    model = models.SpeciesModel(1, species=[0], oscillation=True, solvent=DSDT[None])
    pop = irf.exp_gauss(delay, 1 / tr["lifetime_1"], tr["t0"], tr["sigma"])
    osc = irf.damped_oscillation_gauss(delay, tr["osc_damping"], 2 * np.pi / tr["osc_period"], tr["t0"], tr["sigma"])
    D0 = np.outer(pop, SPECIES_B[0]) + np.outer(osc, SPECIES_B[1])
    err = np.full(D0.shape, 0.01)
    D = D0 + np.random.default_rng(80).normal(size=D0.shape) * err
    r = varpro.fit(model, D, err, delay, dict(t0=0.0, sigma=0.1, lifetime_1=5.0, osc_period=0.38, osc_damping=0.8))
    assert r.converged and r.warnings == []
    for n, v in tr.items():
        assert abs(r.params[n] - v) < 3 * r.stderr[n], (n, r.params[n], r.stderr[n])
    assert r.profile_names == ["A1", "osc_cos", "osc_sin"]
    # Everything fixed: a pure linear fit, no non-linear errors.
    rf = varpro.fit(model, D, err, delay, tr, fixed=list(tr))
    assert rf.free == [] and np.isnan(rf.stderr["t0"]) and rf.chi2 >= r.chi2


def test_switching_off_solvent_raises_chi2_and_biases():
    # Heat of 0.2 K per unit population: late curves of ~0.07 peak, 7x the noise, as
    # usual for late delays where heat dominates.
    D, err, _ = sequential_data(np.random.default_rng(20), TRUTH_SEQ, heat=0.2)
    with_s = varpro.fit(models.SpeciesModel(2, species=[0, 1], solvent=DSDT[None]), D, err, DELAY, START_SEQ)
    without = varpro.fit(models.SpeciesModel(2, species=[0, 1]), D, err, DELAY, START_SEQ)
    # chi2 rises by far more than its sampling sd sqrt(2 dof) (5 sd).
    assert without.chi2 - with_s.chi2 > 5 * np.sqrt(2 * without.dof)
    assert any("reduced chi2" in w for w in without.warnings)
    # Biased: with solvent terms every parameter is within 3 standard errors of the truth;
    # without, some parameter misses it by more than 4 of its own standard errors (chance
    # probability ~6e-5 per parameter for an unbiased estimate).
    z_with = [abs(with_s.params[n] - TRUTH_SEQ[n]) / with_s.stderr[n] for n in with_s.free]
    z = [abs(without.params[n] - TRUTH_SEQ[n]) / without.stderr[n] for n in without.free]
    assert max(z_with) < 3 and max(z) > 4, (z_with, z)
    # The late delays, where only the heat differs, carry the excess chi2.
    late = DELAY > 50
    assert without.chi2_delay[late].mean() > 3 * with_s.chi2_delay[late].mean()


@pytest.mark.slow
def test_nonconvergence_and_bounds_are_flagged():
    D, err, _ = sequential_data(np.random.default_rng(30), TRUTH_SEQ)
    model = models.SpeciesModel(2, species=[0, 1], solvent=DSDT[None])
    r = varpro.fit(model, D, err, DELAY, START_SEQ, max_nfev=2)
    assert not r.converged and any("not converged" in w for w in r.warnings)
    r = varpro.fit(model, D, err, DELAY, dict(START_SEQ, sigma=0.05), bounds={"sigma": (0.01, 0.08)})  # truth 0.12
    assert "sigma" in r.at_bound and any("at a bound" in w for w in r.warnings)


def test_fit_refuses_bad_setups():
    D, err, _ = sequential_data(np.random.default_rng(40), TRUTH_SEQ)
    model = models.SpeciesModel(2, species=[0, 1], solvent=DSDT[None])
    # 4 free parameters + 2 free-curve profiles need more than 6 delays.
    with pytest.raises(DataError, match="too few delays"):
        varpro.fit(model, D[:6], err[:6], DELAY[:6], START_SEQ)
    with pytest.raises(ValueError) as e:
        varpro.fit(model, D, err, DELAY, dict(START_SEQ, sigma=-1.0))
    assert e.value.parameter == "p0.sigma"
    with pytest.raises(ValueError) as e:
        varpro.fit(model, D, err, DELAY, {"t0": 0.0})
    assert e.value.parameter == "p0.sigma"

    class Broken:  # a model whose curves are not finite at the start
        param_names = ("t0",)
        default_bounds = {"t0": (-1.0, 1.0)}
        map_names = ["alpha"]

        def design(self, p, t):
            X = np.ones((1, t.size, Q.size))
            X[0, 3, 5] = np.nan
            return models.LinearDesign(None, X, None, np.ones((t.size, 1)))
    with pytest.raises(DataError, match="not finite at the initial guess"):
        varpro.fit(Broken(), D, err, DELAY, {"t0": 0.0})


# --------------------------------------------------------------------- trajectory model

def toy_trajectory():
    """Metal-metal distance contracting 2.9 -> 2.6 Å in ~0.15 ps with a damped 0.35-ps
    vibration; frames every 10 fs to 3 ps."""
    tau = np.arange(0, 3.0 + 1e-9, 0.01)
    r = R0 - 0.3 * (1 - np.exp(-tau / 0.15)) + 0.04 * np.exp(-tau / 0.6) * np.sin(2 * np.pi * tau / 0.35)
    return tau, r, diatomic(r) - diatomic(R0)


TRUTH_TR = dict(t0=0.1, sigma=0.1, lifetime=30.0)


def trajectory_data(rng, alpha=0.15, heat=0.04, noise=0.004):
    """Data by direct quadrature (trapezoid) of frames x survival against the Gaussian:
    frames linearly interpolated on a 2-fs grid up to 3 ps, then the last frame held on a
    20-fs grid to 400 ps - independent of the closed-form piecewise integrals."""
    tau, r, Y = toy_trajectory()
    u = np.concatenate([np.arange(0, 3.0, 0.002), np.arange(3.0, 400.0, 0.02)])
    yu = np.array([np.interp(u, tau, Y[:, j]) for j in range(Q.size)]).T  # holds last value
    yu *= np.exp(-u / TRUTH_TR["lifetime"])[:, None]
    wts = np.gradient(u) * 1.0
    wts[[0, -1]] /= 2  # trapezoid weights on the non-uniform grid (within 1e-4 of exact)
    x = DELAY - TRUTH_TR["t0"]
    s = TRUTH_TR["sigma"]
    g = np.exp(-0.5 * ((x[:, None] - u[None, :]) / s) ** 2) / (s * np.sqrt(2 * np.pi))
    signal = (g * wts) @ yu
    excited = (g * wts) @ np.exp(-u / TRUTH_TR["lifetime"])
    step = (g * wts) @ np.ones_like(u)
    dT = heat * (step - excited)  # heat released as the excited state decays
    clean = alpha * signal + np.outer(dT, DSDT)
    err = np.full(clean.shape, noise)
    return clean + rng.normal(size=clean.shape) * err, err, dT


def test_trajectory_fit_recovers_t0_sigma_lifetime_alpha():
    tau, r, Y = toy_trajectory()
    model = models.TrajectoryModel(tau, Y, solvent=DSDT[None], solvent_names=["dS/dT"])
    D, err, dT = trajectory_data(np.random.default_rng(50))
    res = varpro.fit(model, D, err, DELAY, dict(t0=0.0, sigma=0.2, lifetime=15.0))
    assert res.converged and res.warnings == [], res.warnings
    for n, v in TRUTH_TR.items():
        assert abs(res.params[n] - v) < 3 * res.stderr[n], (n, res.params[n], res.stderr[n])
    assert abs(res.amplitudes["alpha"] - 0.15) < 3 * res.amplitudes_err["alpha"]
    assert np.all(np.abs(res.solvent_coef[:, 0] - dT) < 4.5 * res.solvent_coef_err[:, 0])
    # The quadrature-built data and the closed-form model agree: reduced chi2 ~ 1
    # (dof ~ 3300, sd 0.025).
    assert res.red_chi2 == pytest.approx(1.0, abs=0.1)
    # Without solvent terms: worse chi2, biased lifetime or alpha.
    bare = varpro.fit(models.TrajectoryModel(tau, Y), D, err, DELAY, dict(t0=0.0, sigma=0.2, lifetime=15.0))
    assert bare.chi2 - res.chi2 > 5 * np.sqrt(2 * bare.dof)  # 5 sd of chi2's sampling spread
    zb = max(abs(bare.params["lifetime"] - 30.0) / bare.stderr["lifetime"],
             abs(bare.amplitudes["alpha"] - 0.15) / bare.amplitudes_err["alpha"])
    assert zb > 5


@pytest.mark.slow
def test_trajectory_fit_errors_match_monte_carlo_scatter():
    # Reference: the scatter of the estimates over 20 seeded noise realizations. The
    # reported (Jacobian) errors, including alpha's from the full covariance, must match
    # it: the sample sd of 20 draws has relative sd 1/sqrt(38) = 16 %, so [0.55, 1.5]
    # is a ~3-sd band. Also with linear_errors=False the non-linear errors are the same
    # Gauss-Newton quantity by another route (projected Jacobian): agree within 2 %
    # (finite-difference Jacobians, steps ~1e-5 relative).
    tau, r, Y = toy_trajectory()
    model = models.TrajectoryModel(tau, Y, solvent=DSDT[None])
    est, errs = [], []
    for seed in range(20):
        D, err, _ = trajectory_data(np.random.default_rng(1000 + seed))
        res = varpro.fit(model, D, err, DELAY, dict(t0=0.0, sigma=0.2, lifetime=15.0))
        est.append([res.params[n] for n in res.free] + [res.amplitudes["alpha"]])
        errs.append([res.stderr[n] for n in res.free] + [res.amplitudes_err["alpha"]])
    ratio = np.std(est, axis=0, ddof=1) / np.mean(errs, axis=0)
    assert np.all((ratio > 0.55) & (ratio < 1.5)), ratio
    proj = varpro.fit(model, D, err, DELAY, dict(t0=0.0, sigma=0.2, lifetime=15.0), linear_errors=False)
    for n in res.free:
        assert proj.stderr[n] == pytest.approx(res.stderr[n], rel=0.02)
    assert np.isnan(proj.amplitudes_err["alpha"])


@pytest.mark.slow
def test_bootstrap_over_delays():
    tau, r, Y = toy_trajectory()
    model = models.TrajectoryModel(tau, Y, solvent=DSDT[None])
    D, err, _ = trajectory_data(np.random.default_rng(60))
    p0 = dict(t0=0.0, sigma=0.2, lifetime=15.0)

    def fun(d, e, t):
        res = varpro.fit(model, d, e, t, p0, linear_errors=False)
        return [res.params["lifetime"]] if res.converged else None

    b1 = varpro.bootstrap(fun, (D, err, DELAY), 12, np.random.default_rng(1))
    b2 = varpro.bootstrap(fun, (D, err, DELAY), 12, np.random.default_rng(1))
    np.testing.assert_array_equal(b1.samples, b2.samples)  # same Generator seed, same result
    ref = varpro.fit(model, D, err, DELAY, p0)
    # Bootstrap spread vs the Jacobian error: 12 replicates give the sd to ~20 % (1 sd);
    # case resampling of delays is not identical to the noise model: accept a factor 2.5.
    assert 1 / 2.5 < b1.std[0] / ref.stderr["lifetime"] < 2.5
    assert b1.low[0] < ref.params["lifetime"] < b1.high[0]


# --------------------------------------------------------------------- per-delay structure

def test_fit_frames_picks_right_frame_noise_free():
    tau, r, Y = toy_trajectory()
    truth = np.array([5, 40, 120, 300])
    a = np.array([0.1, 0.2, 0.15, 0.05])
    D = a[:, None] * Y[truth] + np.outer([0.01, 0.02, 0.0, 0.03], DSDT)
    err = np.full(D.shape, 1e-3)
    res = structure.fit_frames(D, err, Y, solvent=DSDT[None], params={"M-M": r})
    np.testing.assert_array_equal(res.best_frame, truth)
    np.testing.assert_allclose(res.value["M-M"], r[truth])
    np.testing.assert_allclose(res.amplitude, a, rtol=1e-9)            # exact data, rounding only
    np.testing.assert_allclose(res.solvent_coef[:, 0], [0.01, 0.02, 0.0, 0.03], atol=1e-9)
    assert np.all(res.chi2_best < 1e-12)  # residuals are rounding (~1e-16 x 200 per point)
    assert list(res.at_end) == [False, False, False, True] and res.significant.all()


def test_fit_frames_interval_contains_truth_on_noisy_data():
    # 90 seeded noisy curves at random frames (solute signal ~0.03 peak, noise 0.01 per
    # point). The delta-chi2 interval of the distance is a ~68 % interval (a little more:
    # the range over accepted frames covers revisited distances too), so require coverage
    # >= 55 % (binomial sd ~5 % around ~70-75 %: 3-4 sd margin) and <= 97 % with a median
    # width below 0.15 Å (of the 0.35 Å the trajectory spans): informative, not trivially
    # wide.
    tau, r, Y = toy_trajectory()
    rng = np.random.default_rng(70)
    frames = rng.integers(20, 280, size=90)
    D = 0.1 * Y[frames] + np.outer(rng.uniform(0, 0.03, 90), DSDT)
    err = np.full(D.shape, 0.01)
    noisy = D + rng.normal(size=D.shape) * err
    res = structure.fit_frames(noisy, err, Y, solvent=DSDT[None], params={"M-M": r})
    lo, hi = res.lower["M-M"], res.upper["M-M"]
    cover = np.mean((lo <= r[frames]) & (r[frames] <= hi))
    assert 0.55 <= cover <= 0.97, cover
    assert np.median(hi - lo) < 0.15
    assert np.all((lo <= res.value["M-M"]) & (res.value["M-M"] <= hi))
    assert np.all(res.significant)
    # No signal at all: the best frame's amplitude passes the one-sided 2-sigma test with
    # probability ~2.3 % for a single frame (normal tail); picking the best of many strongly
    # correlated frames raises it only a little. Over 200 blank delays require <= 6 %
    # flagged significant (binomial sd ~1.1 % at 2.3 %: >3 sd margin).
    blank = rng.normal(size=(200, Q.size)) * 0.01
    rb = structure.fit_frames(blank, np.full(blank.shape, 0.01), Y, solvent=DSDT[None], params={"M-M": r})
    assert rb.significant.mean() <= 0.06, rb.significant.mean()
    assert any("no significant solute amplitude" in w for w in rb.warnings)


def test_species_with_signal_by_scheme():
    # sequential A1 -> A2 -> P: the product (the recovered ground state) has no signal
    assert models.species_with_signal(2) == ([0, 1], 3)
    assert models.species_with_signal(2, product_signal=True) == ([0, 1, 2], 3)
    # network S0 -> S1, S0 -> S2, S1 -> S3: the species nothing leaves (S2, S3) are final
    assert models.species_with_signal(3, "network", [[0, 1], [0, 2], [1, 3]]) == ([0, 1], 4)
    with pytest.raises(ValueError) as err:
        models.species_with_signal(2, "network", [[0, 1]])
    assert err.value.parameter == "transitions"


def test_full_jacobian_matches_the_normal_matrix_and_the_sandwich():
    """The sparse Jacobian of (theta, free curves, solvent coefficients) gives the fit's normal matrix;
    its sandwich under a bin correlation equals the dense formula M^-1 J^T (R kron I) J M^-1."""
    rng = np.random.default_rng(5)
    D, err, _ = sequential_data(rng, TRUTH_SEQ)
    model = models.SpeciesModel(2, species=[0, 1], solvent=DSDT[None], solvent_names=["dT"])
    prob = varpro.validate(model, D, err, DELAY, START_SEQ)
    opt = varpro.optimize_parameters(prob)
    Jt = varpro._theta_jacobian(model, opt.params, prob.free, prob.low, prob.high, prob.delay, prob.D, prob.w,
                                prob.valid, opt.solution)
    N = varpro._normal_matrix(Jt, opt.design, prob.w, prob.valid)
    Jf = varpro._full_jacobian(Jt, opt.design, prob.w, prob.valid).toarray()
    np.testing.assert_allclose(Jf.T @ Jf, N, rtol=1e-10, atol=1e-10 * np.abs(N).max())
    # an AR(1)-like correlation of the delays: R_bc = 0.5^|b - c|
    n = DELAY.size
    R = 0.5 ** np.abs(np.subtract.outer(np.arange(n), np.arange(n)))
    res = varpro.fit(model, D, err, DELAY, START_SEQ, correlation=R)
    Minv, _ = varpro._constrained_inverse(N, len(prob.free), opt.design.curves, 2, Q.size)
    C = np.kron(R, np.eye(Q.size))  # all points valid here
    cov = Minv @ (Jf.T @ C @ Jf) @ Minv * res.error_scale
    for i, name in enumerate(prob.free):
        np.testing.assert_allclose(res.stderr[name], np.sqrt(cov[i, i]), rtol=1e-6)
