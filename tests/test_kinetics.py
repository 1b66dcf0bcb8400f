"""Tests of movieproc.fitting.irf and movieproc.fitting.kinetics against outside references."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import integrate, signal

from movieproc.errors import InputError
from movieproc.fitting import irf, kinetics


def gauss(u, sigma):
    return np.exp(-0.5 * (u / sigma) ** 2) / (sigma * np.sqrt(2 * np.pi))


def quad_exp_gauss(x, k, sigma):
    """Reference: int_0^inf exp(-k u) g(x - u) du by scipy.integrate.quad (adaptive QAGS).

    The exponent is combined before exponentiation so the integrand neither over- nor
    underflows where the result itself is representable; the interval is cut at
    max(x, 0) + 40 sigma (the Gaussian factor is < exp(-800) beyond it)."""
    def f(u):
        return np.exp(-k * u - 0.5 * ((x - u) / sigma) ** 2) / (sigma * np.sqrt(2 * np.pi))
    top = max(x, 0.0) + 40 * sigma
    peak = min(max(x - k * sigma**2, 0.0), top)  # maximum of the integrand
    val, err = integrate.quad(f, 0.0, top, points=[peak], epsabs=0.0, epsrel=1e-12, limit=400)
    return val


# ---------------------------------------------------------------- irf: closed forms

@pytest.mark.parametrize("k, sigma", [(0.5, 0.1), (2.0, 0.3), (10.0, 1.0), (50.0, 1.0), (5.0, 10.0)])
def test_exp_gauss_matches_quad(k, sigma):
    # k*sigma from 0.05 to 50; x from -8 sigma to +60 sigma (result down to ~1e-250).
    x = sigma * np.array([-8.0, -3.0, -1.0, 0.0, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 60.0])
    got = irf.exp_gauss(x, k, 0.0, sigma)
    ref = np.array([quad_exp_gauss(xi, k, sigma) for xi in x])
    keep = ref > 1e-250
    # rtol 1e-9: quad asked for 1e-12; erfc/erfcx are accurate to a few ulp, and the
    # exponent k^2 sigma^2/2 - k x (~1e3) carries ~1e-13 relative rounding.
    np.testing.assert_allclose(got[keep], ref[keep], rtol=1e-9, atol=0)


def test_exp_gauss_matches_fftconvolve():
    # Independent numerical reference: scipy.signal.fftconvolve of the sampled decay and
    # Gaussian on a 1e-3 ps grid (midpoint-like sampling of a function with a jump at 0:
    # the discretization error is ~ h * max g = 1e-3 * 0.4 / 0.2 = 2e-3 at the jump, far
    # less elsewhere; tolerance 3e-3 absolute).
    h, k, sigma, t0 = 1e-3, 1.3, 0.2, 0.4
    u = np.arange(-5, 15, h)
    y = np.where(u >= 0, np.exp(-k * np.clip(u, 0, None)), 0.0)
    y[u == 0] = 0.5
    gk = gauss(np.arange(-2, 2 + h / 2, h), sigma) * h
    conv = signal.fftconvolve(y, gk, mode="same")
    sel = (u > -3) & (u < 12)
    got = irf.exp_gauss(u[sel] + t0, k, t0, sigma)
    np.testing.assert_allclose(got, conv[sel], atol=3e-3)


def test_exp_gauss_extremes_finite_and_bounded():
    # No overflow or NaN for k sigma up to 50 and |x| up to 1e4 sigma; the result of a
    # decay (<= 1) convolved with a normalized kernel lies in [0, 1].
    x = np.concatenate([-np.logspace(-3, 4, 40), [0.0], np.logspace(-3, 4, 40)])
    for k in [0.0, 1e-3, 1.0, 50.0, 1e3]:
        with np.errstate(over="raise", invalid="raise", divide="raise", under="ignore"):
            e = irf.exp_gauss(x, k, 0.0, 1.0)
        assert np.all(np.isfinite(e))
        assert np.all((e >= 0) & (e <= 1))
    # Far after time zero it equals the bare decay times exp(k^2 s^2/2) (closed form with
    # erfc -> 2): x = 1e4, k = 0.01, sigma = 1 -> exp(5e-5 - 100).
    ref = np.exp(0.5 * 0.01**2 - 0.01 * 1e4)
    assert irf.exp_gauss(1e4, 0.01, 0.0, 1.0) == pytest.approx(ref, rel=1e-12)


def test_exp_gauss_k_zero_is_step_and_step_closed_form():
    # k = 0: the closed form reduces to 1/2 erfc(-x/(sqrt 2 sigma)) = Phi(x/sigma),
    # checked against scipy.stats.norm.cdf (independent implementation).
    from scipy.stats import norm
    x = np.linspace(-3, 3, 25)
    np.testing.assert_allclose(irf.exp_gauss(x, 0.0, 0.0, 0.7), norm.cdf(x / 0.7), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(irf.step_gauss(x, 0.0, 0.7), norm.cdf(x / 0.7), rtol=1e-12, atol=1e-15)


def test_sigma_to_zero_limit():
    x = np.array([-1.0, -1e-3, 1e-3, 0.5, 3.0])
    bare = np.where(x > 0, np.exp(-2.0 * np.clip(x, 0, None)), 0.0)
    # sigma = 0 exactly: the bare decay, 1/2 at the jump (limit of the convolution).
    np.testing.assert_array_equal(irf.exp_gauss(x, 2.0, 0.0, 0.0), bare)
    assert irf.exp_gauss(0.0, 2.0, 0.0, 0.0) == 0.5
    # sigma = 1e-7 ps: differs from the bare decay by O(k sigma) and exp(-x^2/2 sigma^2)
    # terms, both < 1e-6 at |x| >= 1e-3.
    np.testing.assert_allclose(irf.exp_gauss(x, 2.0, 0.0, 1e-7), bare, atol=1e-6)
    with pytest.raises(InputError):
        irf.exp_gauss(x, 1.0, 0.0, -0.1)


@pytest.mark.parametrize("tau, omega, sigma", [(0.5, 20.0, 0.05), (2.0, 6.0, 0.3), (1.0, 50.0, 1.0)])
def test_damped_oscillation_matches_quad(tau, omega, sigma):
    # Reference: scipy.integrate.quad with weight='cos' (QUADPACK QAWO, made for
    # oscillatory integrands): int_0^U exp(-u/tau) g(x - u) cos(omega u) du.
    # omega * sigma up to 50: the convolved oscillation is then ~exp(-1250), ~0.
    def ref(x):
        f = lambda u: np.exp(-u / tau) * gauss(x - u, sigma)
        top = max(x, 0.0) + 40 * sigma
        return integrate.quad(f, 0.0, top, weight="cos", wvar=omega, epsabs=1e-14, limit=400)[0]
    x = np.array([-4, -1, 0, 0.5, 1, 2, 4, 8]) * sigma + np.array([0, 0, 0, 0, 0, 0, 0.3, 1.0])
    got = irf.damped_oscillation_gauss(x + 0.2, tau, omega, 0.2, sigma)
    want = np.array([ref(xi) for xi in x])
    # atol 1e-10: the QAWO absolute tolerance is 1e-14 and wofz is accurate to ~1e-13
    # relative; results are O(1) at most.
    np.testing.assert_allclose(got, want, atol=1e-10, rtol=1e-9)


def test_damped_oscillation_phase_and_no_overflow():
    # phase = -pi/2 gives the sine-type oscillation: compare with quad weight='sin'.
    tau, omega, sigma = 1.5, 8.0, 0.2
    f = lambda u, x: np.exp(-u / tau) * gauss(x - u, sigma)
    for x in [-0.3, 0.1, 0.7, 2.0]:
        want = integrate.quad(f, 0, x + 8, args=(x,), weight="sin", wvar=omega, epsabs=1e-14, limit=400)[0]
        got = irf.damped_oscillation_gauss(x, tau, omega, 0.0, sigma, phase=-np.pi / 2)
        assert got == pytest.approx(want, abs=1e-10)  # same reasoning as above
    # Extreme omega*sigma and |x|: finite, |value| <= 1.
    x = np.linspace(-1e4, 1e4, 2001)
    with np.errstate(over="raise", invalid="raise", divide="raise", under="ignore"):
        v = irf.damped_oscillation_gauss(x, 0.3, 300.0, 0.0, 2.0)
    assert np.all(np.isfinite(v)) and np.all(np.abs(v) <= 1)


# ---------------------------------------------------------------- irf: tabulated

def test_convolve_tabulated_exact_for_piecewise_linear():
    # Reference: quad of np.interp(piecewise-linear y) times the Gaussian, with the node
    # times as break points (the integrand is smooth between them).
    rng = np.random.default_rng(1)
    tm = np.sort(rng.uniform(0, 3, 12))
    tm[0] = 0.0
    y = rng.normal(size=(12, 3))
    t0, sigma = 0.25, 0.15
    t = np.array([-1.0, 0.0, 0.2, 0.5, 1.3, 2.9, 3.1, 3.5, 6.0])
    got = irf.convolve_tabulated(tm, y, t, t0, sigma)  # holds the last value

    def ref(ti, col):
        x = ti - t0
        def f(u):
            val = np.interp(u, tm, y[:, col]) if u <= tm[-1] else y[-1, col]
            return val * gauss(x - u, sigma)
        lo, hi = 0.0, max(tm[-1], x) + 12 * sigma
        pts = [p for p in tm if lo < p < hi]
        return integrate.quad(f, lo, hi, points=pts, epsabs=1e-13, limit=400)[0]
    want = np.array([[ref(ti, c) for c in range(3)] for ti in t])
    # atol 1e-9: quad with break points reaches ~1e-13; Gaussian mass beyond 12 sigma
    # from the last node is < 1e-32; values are O(1).
    np.testing.assert_allclose(got, want, atol=1e-9)


def test_convolve_tabulated_tail_rate_and_zero_tail():
    # A response sampled from exp(-k tau) at 0 <= tau <= 4 with an exponential tail must
    # equal the closed form exp_gauss; the piecewise-linear interpolation error on a grid
    # h = 2e-3 ps is <= h^2 k^2 / 8 = 2e-6 (k = 2 1/ps): tolerance 3e-6.
    k, t0, sigma = 2.0, -0.1, 0.08
    tm = np.arange(0, 4 + 1e-9, 2e-3)
    y = np.exp(-k * tm)
    t = np.linspace(-1, 8, 37)
    got = irf.convolve_tabulated(tm, y, t, t0, sigma, tail_rate=k)
    np.testing.assert_allclose(got, irf.exp_gauss(t, k, t0, sigma), atol=3e-6)
    # Tail None: the response is zero after the last node -> far after it, zero.
    z = irf.convolve_tabulated(tm, y, np.array([10.0]), t0, sigma, tail_rate=None)
    assert abs(z[0]) < 1e-300
    # sigma = 0: linear interpolation (np.interp) inside the table.
    ti = np.array([0.5, 1.2345, 3.9])
    np.testing.assert_allclose(irf.convolve_tabulated(tm, y, ti, 0.0, 0.0), np.interp(ti, tm, y), rtol=1e-12)
    with pytest.raises(InputError):
        irf.convolve_tabulated(tm[::-1], y, t, t0, sigma)
    with pytest.raises(InputError):
        irf.convolve_tabulated(tm, y[:-1], t, t0, sigma)


# ---------------------------------------------------------------- kinetics

def test_sequential_matches_textbook():
    # Textbook closed form for consecutive first-order reactions A -> B -> C (e.g. Atkins'
    # Physical Chemistry; citation from memory, the formula is re-derivable in two lines):
    # A = exp(-k1 t), B = k1/(k2 - k1) (exp(-k1 t) - exp(-k2 t)), C = 1 - A - B.
    k1, k2 = 0.8, 0.15
    t = np.linspace(0, 40, 81)
    c = kinetics.sequential([k1, k2], t)
    A = np.exp(-k1 * t)
    B = k1 / (k2 - k1) * (np.exp(-k1 * t) - np.exp(-k2 * t))
    # expm (Pade, scaling and squaring) is accurate to ~1e-15 relative to ||K t||.
    np.testing.assert_allclose(c[:, 0], A, atol=1e-12)
    np.testing.assert_allclose(c[:, 1], B, atol=1e-12)
    np.testing.assert_allclose(c[:, 2], 1 - A - B, atol=1e-12)
    # Before time zero nothing is excited.
    assert np.all(kinetics.sequential([k1, k2], np.array([-2.0, -0.1])) == 0)


def test_sequential_irf_matches_numerical_convolution():
    # Reference: quad of the textbook B(t) (above) times the Gaussian.
    k1, k2, t0, sigma = 2.0, 0.3, 0.5, 0.25
    def B(u):
        return k1 / (k2 - k1) * (np.exp(-k1 * u) - np.exp(-k2 * u)) if u > 0 else 0.0
    t = np.array([-0.5, 0.3, 0.5, 0.8, 1.5, 4.0, 12.0])
    want = np.array([integrate.quad(lambda u: B(u) * gauss(ti - t0 - u, sigma), 0, ti - t0 + 12 * sigma,
                                    epsabs=1e-13, limit=200)[0] if ti - t0 + 12 * sigma > 0 else 0.0
                     for ti in t])
    got = kinetics.sequential([k1, k2], t, t0=t0, sigma=sigma)
    np.testing.assert_allclose(got[:, 1], want, atol=1e-10)  # quad abs tol 1e-13, O(1) values
    # populations_irf with the generic matrix agrees with the sequential helper.
    K = kinetics.sequential_rate_matrix([k1, k2])
    np.testing.assert_allclose(kinetics.populations_irf(K, [1, 0, 0], t, t0, sigma), got, atol=1e-14)


def test_parallel_closed_form():
    # Independent decays: A_i = c0_i exp(-k_i t), P = 1 - sum A_i (conservation).
    k = np.array([1.0, 0.1, 0.01])
    c0 = np.array([0.5, 0.3, 0.2])
    t = np.linspace(0, 100, 11)
    c = kinetics.parallel(k, t, c0=c0)
    np.testing.assert_allclose(c[:, :3], c0 * np.exp(-np.outer(t, k)), atol=1e-12)
    np.testing.assert_allclose(c[:, 3], 1 - c[:, :3].sum(1), atol=1e-12)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(1e-3, 50.0), min_size=1, max_size=4, unique=True),
       st.floats(0.01, 2.0), st.floats(-1.0, 1.0))
def test_irf_populations_conserve_total(rates, sigma, t0):
    # Property: for a conservative network, sum_i c_i(t) = 1 for t >= t0, so the convolved
    # sum must be the convolved step 1/2 erfc(-(t - t0)/(sqrt 2 sigma)) (closed form).
    rates = np.array(rates)
    if np.min(np.abs(np.subtract.outer(rates, rates)) + np.eye(rates.size) * 1e9) < 1e-2 * rates.max():
        return  # nearly repeated rates: closed form is ill-conditioned (tested separately)
    t = np.linspace(-3, 20, 40) + t0
    c = kinetics.sequential(rates, t, t0=t0, sigma=sigma)
    # Tolerance: rounding amplified by the eigenvector condition (rates >= 1% apart).
    np.testing.assert_allclose(c.sum(1), irf.step_gauss(t, t0, sigma), atol=1e-8)


def test_rate_matrix_validation_names_key():
    bad = [
        np.array([[-1.0, 0.0], [1.0, 0.0], [0.0, 0.0]]),      # not square
        np.array([[-1.0, -0.5], [1.0, 0.5]]),                 # negative off-diagonal
        np.array([[-1.0, 0.0], [0.9, 0.0]]),                  # column 0 sums to -0.1
        np.array([[-1.0, 0.0], [np.nan, 0.0]]),               # not finite
    ]
    for K in bad:
        with pytest.raises(ValueError) as e:
            kinetics.populations(K, [1.0, 0.0], np.array([0.0, 1.0]))
        assert e.value.parameter == "rates"
    with pytest.raises(ValueError) as e:
        kinetics.sequential_rate_matrix([1.0, -0.2])
    assert e.value.parameter == "rates"
    # Repeated rates have no closed-form IRF convolution here: refused, not garbage.
    with pytest.raises(ValueError) as e:
        kinetics.sequential([0.5, 0.5], np.array([0.0, 1.0]), sigma=0.1)
    assert e.value.parameter == "rates"
    # Repeated rates are fine without IRF (expm has no such restriction): A -> B with
    # k1 = k2 = k gives B = k t exp(-k t) (limit of the textbook form).
    t = np.linspace(0, 5, 6)
    c = kinetics.sequential([0.5, 0.5], t)
    np.testing.assert_allclose(c[:, 1], 0.5 * t * np.exp(-0.5 * t), atol=1e-12)
