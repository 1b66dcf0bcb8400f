"""Tests of movieproc.signals.svd: decomposition and component counting on seeded synthetic maps."""

import numpy as np
import pytest

from movieproc.errors import InputError
from movieproc.signals import svd as msvd

DELAY = np.concatenate([np.linspace(-1.0, 2.0, 16), np.logspace(0.4, 2.5, 28)])  # ps
Q = np.linspace(0.5, 4.0, 150)  # 1/Å


def profiles():
    """Three smooth, linearly independent temporal profiles (sequential-like) and q curves."""
    t = np.clip(DELAY, 0, None)
    on = (DELAY > 0).astype(float)
    c = np.stack([np.exp(-t / 3.0) * on,
                  (np.exp(-t / 40.0) - np.exp(-t / 3.0)) * on,
                  (1 - np.exp(-t / 40.0)) * on], axis=1)
    b = np.stack([np.sinc(Q * 2.8 / np.pi) - np.sinc(Q * 3.0 / np.pi),
                  np.exp(-((Q - 2.0) / 0.4) ** 2) - 0.5 * np.exp(-((Q - 3.0) / 0.3) ** 2),
                  np.cos(1.3 * Q) * np.exp(-Q / 3.0)], axis=0)
    return c, b


def synthetic(n_true, noise_sd, rng, amp=(100.0, 80.0, 60.0)):
    c, b = profiles()
    # Scale each rank-1 term to Frobenius norm amp_k * (noise units): 3-5 times the noise
    # edge sqrt(n_delay) + sqrt(n_q) ~ 19 (Marchenko-Pastur largest singular value). Both
    # criteria need this margin: a singular vector carries noise ~1/s per entry against
    # signal entries ~1/sqrt(150), so at s ~ 30 the q-space vectors' autocorrelation
    # falls to ~0.78 (measured on these profiles) and the component is rightly not
    # counted as resolved.
    D = np.zeros((DELAY.size, Q.size))
    for k in range(n_true):
        term = np.outer(c[:, k], b[k])
        D += amp[k] * term / np.linalg.norm(term)
    sd = np.broadcast_to(noise_sd, D.shape)
    return D * sd + rng.standard_normal(D.shape) * sd, sd


def test_svd_reconstructs_and_orthonormal():
    rng = np.random.default_rng(0)
    D = rng.normal(size=(12, 30))
    w = rng.uniform(0.5, 2, size=D.shape)
    u, s, vt = msvd.svd(D, w)
    np.testing.assert_allclose(u.T @ u, np.eye(12), atol=1e-12)
    np.testing.assert_allclose(vt @ vt.T, np.eye(12), atol=1e-12)
    # Full reconstruction returns the data (numpy's SVD to rounding).
    np.testing.assert_allclose(msvd.reconstruct(u, s, vt, 12, w), D, atol=1e-12)
    # Singular values agree with an independent routine: scipy.linalg.svdvals.
    from scipy.linalg import svdvals
    np.testing.assert_allclose(s, svdvals(D * w), rtol=1e-12)
    assert not np.shares_memory(u, D)


def test_lag1_autocorrelation_closed_form():
    # For x_j = sin(omega j + phi) over many periods, sum x_j x_{j+1} / sum x_j^2 -> cos(omega)
    # (product-to-sum identity); with N = 20000 samples the end effects are O(1/N).
    j = np.arange(20000)
    for omega in [0.05, 0.5, 2.0]:
        x = np.sin(omega * j + 0.3)
        assert msvd.lag1_autocorrelation(x) == pytest.approx(np.cos(omega), abs=1e-3)
    # White noise: expectation 0, standard deviation 1/sqrt(N) = 0.007 -> |r| < 0.04 (5.6 sd).
    rng = np.random.default_rng(3)
    assert abs(msvd.lag1_autocorrelation(rng.normal(size=20000))) < 0.04


@pytest.mark.parametrize("n_true", [1, 2, 3])
def test_count_from_errors(n_true):
    rng = np.random.default_rng(100 + n_true)
    # Errors varying 10-fold across q: with weights 1/err the noise is white again.
    err = 0.2 + 1.8 * (Q / Q.max()) ** 2
    D, sd = synthetic(n_true, err, rng)
    res = msvd.count_components(D, err=sd, rng=np.random.default_rng(7))
    assert res.n == n_true, (res.s[:5], res.threshold, res.autocorr_u[:5], res.autocorr_v[:5])
    assert np.all(res.significant[:n_true]) and not res.significant[n_true]
    assert res.warnings == []


@pytest.mark.parametrize("n_true", [1, 2, 3])
def test_count_from_noise_maps(n_true):
    rng = np.random.default_rng(200 + n_true)
    D, sd = synthetic(n_true, 1.0, rng)
    # Off-minus-off map of the same shape: used directly.
    off = rng.standard_normal(D.shape)
    assert msvd.count_components(D, noise=off).n == n_true
    # Eight negative-delay rows: per-q spread, synthesised maps.
    neg = rng.standard_normal((8, Q.size))
    res = msvd.count_components(D, noise=neg, rng=np.random.default_rng(1))
    assert res.n == n_true
    assert "8-row" in res.noise_source


def test_weak_component_not_counted_and_smoothness_required():
    rng = np.random.default_rng(5)
    # Third component at Frobenius norm 8 < noise edge ~19: it cannot be resolved.
    D, sd = synthetic(3, 1.0, rng, amp=(60.0, 40.0, 8.0))
    assert msvd.count_components(D, err=sd, rng=np.random.default_rng(2)).n == 2
    # A strong but rough component (white q-space vector) fails the smoothness test.
    c, _ = profiles()
    rough = np.outer(c[:, 0], rng.standard_normal(Q.size))
    D2 = 60 * rough / np.linalg.norm(rough) + rng.standard_normal(rough.shape)
    res = msvd.count_components(D2, err=np.ones_like(D2), rng=np.random.default_rng(2))
    assert res.significant[0] and not res.smooth[0] and res.n == 0
    assert any("not smooth" in w for w in res.warnings)


def test_count_input_errors():
    D = np.ones((5, 6))
    with pytest.raises(InputError):
        msvd.count_components(D)                       # no noise reference
    with pytest.raises(InputError):
        msvd.count_components(D, err=np.ones((5, 6)))  # synthesis needs a Generator
    with pytest.raises(InputError):
        msvd.count_components(D, noise=np.ones((3, 4)))


def test_noise_rows_with_unequal_errors_are_measured_in_their_own_units():
    # 40 delays: 20 with errors 1, 20 with errors 0.3 (bins with ~11x the shots). A smooth
    # rank-1 signal with weighted singular value ~54 sits well above the weighted noise
    # (~sqrt(n_delay) + sqrt(n_q) ~ 20 for unit-variance noise: Marchenko-Pastur edge,
    # from memory). Noise rows drawn with their own errors must give a threshold near
    # that level, not the one of the noisiest rows applied to all.
    rng = np.random.default_rng(12)
    nd, nq = 40, 150
    err = np.where(np.arange(nd)[:, None] < 20, 1.0, 0.3) * np.ones((1, nq))
    t = np.linspace(0, 1, nd)
    q = np.linspace(0, 1, nq)
    signal = np.outer(np.sin(np.pi * t), np.sin(2 * np.pi * q))
    w_signal = np.linalg.svd(signal / err, compute_uv=False)[0]
    D = signal * (54.0 / w_signal) + rng.standard_normal((nd, nq)) * err
    noise_err = err[:12]
    noise = rng.standard_normal((12, nq)) * noise_err
    noise[6:] *= 0.3
    noise_err = noise_err.copy()
    noise_err[6:] *= 0.3
    res = msvd.count_components(D, noise, err=err, rng=np.random.default_rng(1), noise_err=noise_err)
    assert res.threshold < 30, res.threshold
    assert res.n == 1


def test_noise_rows_inside_the_window_among_usable_bins():
    delay = np.array([-2.0, -1.0, -0.5, 0.0, 1.0, 2.0])
    usable = np.array([True, False, True, True, True, True])
    rows, notes = msvd.noise_rows(delay, usable, (-3.0, -0.2))
    np.testing.assert_array_equal(rows, [True, False, True, False, False, False])
    assert notes == []
    # one usable bin cannot give a spread: the caller is told, and noise comes from the errors
    rows, notes = msvd.noise_rows(delay, usable, (-1.5, -0.8))
    assert rows is None and "0 usable bins" in notes[0]
    assert msvd.noise_rows(delay, usable, None) == (None, [])


# Delay grid of the demo run (config/config.yaml binning.edges_ps, bin centres): 0.05 ps steps from -0.4
# to 1 ps, coarser later.
FINE = np.concatenate([[-1.1, -0.55], np.arange(-0.375, 1.0, 0.05), [1.5, 2.5, 4.0, 7.0, 15.0, 30.0, 60.0]])


def _errors(rng, shape):
    """Errors sigma(q) / sqrt(n_shots(delay)) with a 5 % point-to-point scatter (errors estimated per bin)."""
    n_shots = rng.integers(150, 400, shape[0])
    sigma_q = 0.5 + (np.linspace(0, 1, shape[1])) ** 2
    return np.outer(1 / np.sqrt(n_shots), sigma_q) * (1 + 0.05 * rng.standard_normal(shape))


def test_damped_vibration_is_a_second_component():
    rng = np.random.default_rng(21)
    t = np.clip(FINE, 0, None)
    on = (FINE > 0).astype(float)
    population = np.exp(-t / 20.0) * on
    vibration = np.cos(2 * np.pi * t / 0.4) * np.exp(-t / 0.8) * on  # 0.4 ps period, 0.8 ps damping time
    b1 = np.sinc(Q * 2.8 / np.pi) - np.sinc(Q * 3.0 / np.pi)
    b2 = np.exp(-((Q - 2.0) / 0.4) ** 2) - 0.5 * np.exp(-((Q - 3.0) / 0.3) ** 2)
    err = _errors(rng, (FINE.size, Q.size))
    w = msvd.separable_weights(err)
    # weighted Frobenius norms 150 and 60: 4-10 times the noise edge sqrt(41) + sqrt(150) ~ 19
    # (Marchenko-Pastur, from memory)
    D = np.zeros(err.shape)
    for c, b, amp in ((population, b1, 150.0), (vibration, b2, 60.0)):
        term = np.outer(c, b)
        D += amp * term / np.linalg.norm(term * w)
    D += rng.standard_normal(D.shape) * err
    res = msvd.count_components(D, err=err, rng=np.random.default_rng(3))
    assert res.n == 2, res.decision
    assert res.significant[1] and not res.significant[2]
    # sampled at 8 points per period its temporal vector has autocorrelation near cos(2 pi / 8) = 0.71: a
    # fixed smoothness level of 0.8 would have rejected it; the noise-relative level 3 / sqrt(41) = 0.47 does not
    assert res.autocorr_u[1] < 0.8 and res.autocorr_u[1] > res.autocorr_min_u
    assert "magnitude test decided" in res.decision


def test_noise_free_rank_one_map_counts_one_with_the_noise_line_consistent():
    rng = np.random.default_rng(22)
    t = np.clip(FINE, 0, None)
    c = np.exp(-t / 20.0) * (FINE > 0)
    b = np.sinc(Q * 2.8 / np.pi) - np.sinc(Q * 3.0 / np.pi)
    err = _errors(rng, (FINE.size, Q.size))
    D = np.outer(c, b)
    D *= 3000.0 / np.linalg.norm(D * msvd.separable_weights(err))  # exactly rank 1, no noise, strong
    res = msvd.count_components(D, err=err, rng=np.random.default_rng(4))
    assert res.n == 1, res.decision
    # the singular values and the threshold are of the same weighted map: rank 1 stays rank 1
    assert res.s[0] > res.threshold and res.s[1] < 1e-9 * res.s[0]
    assert np.all(res.s[1:] < res.s_noise[1:])
    # per-point weights 1 / err give the same noise-free map components of its own above the noise (the
    # error scatter times the signal): the figure's "1 significant" beside values far above the line
    per_point = msvd.count_components(D, err=err, weights=1 / err, rng=np.random.default_rng(4))
    assert per_point.s[1] > per_point.threshold


def test_separable_weights_are_exact_for_separable_errors():
    a, b = np.array([1.0, 2.0, 4.0]), np.array([0.5, 1.0, 3.0, 7.0])
    np.testing.assert_allclose(msvd.separable_weights(np.outer(a, b)), 1 / np.outer(a, b), rtol=1e-12)
