"""Coverage of the fit's error bars on shot-level synthetic runs with shared references.

Each run is built shot by shot in memory: contiguous stage positions, a timing
jitter wider than the delay bins near time zero (so the pump-on shots of one
position spread over several bins), a pump-off shot interleaved every
``OFF_EVERY`` shots and ``K = 2`` references per pump-on shot. The kinetic signal
is an exponential decay convolved with a Gaussian instrument response times one
fixed difference-curve shape on 50 q points; every shot gets its own Gaussian
noise. The run is reduced with the project's cores (nearest references, per-bin
means, ``bin_errors`` with the shared-reference factor, ``bin_coefficient_overlap``
and ``bin_correlation``) and fitted with ``varpro.fit`` and a ``SpeciesModel``
holding the fixed shape; the workflow is not involved.

The truth is the scenario's own parameters; the signal of each shot is computed
at its true delay with ``scipy.stats.exponnorm`` (the exponentially modified
Gaussian density lambda/2 exp(...) erfc(...), scipy documentation: an exponential
decay convolved with a Gaussian is ``lifetime * exponnorm.pdf``), a route
independent of the fit's own IRF convolution (``movieproc.fitting.irf``).

A 2-standard-error interval holds the truth with probability 0.954 for a normal
estimate (standard normal table, e.g. Abramowitz & Stegun 26.2). With 24 runs
the observed fraction for honest errors lies above 0.85 with probability ~0.96
(binomial, n = 24, p = 0.954: P(X <= 20) ~ 0.03, from the binomial formula).
"""

import numpy as np
import pytest
from scipy import stats

from movieproc.fitting import models, varpro
from movieproc.shots.binning import accumulate, assign_bins
from movieproc.signals import covariance as C
from movieproc.signals import differences as D

Q = np.linspace(0.8, 3.5, 50)  # 1/Å
_SHAPE = np.sinc(Q * 2.6 / np.pi) - np.sinc(Q * 2.9 / np.pi)  # a bond change of two unit scatterers
SHAPE = _SHAPE / np.abs(_SHAPE).max()
TRUTH = {"t0": 0.05, "sigma": 0.2, "lifetime_1": 3.0}  # ps, invented for this test
START = {"t0": 0.0, "sigma": 0.1, "lifetime_1": 2.5}
#: Stage positions (ps), in scan order; every position holds PER_POSITION consecutive shots.
POSITIONS = np.r_[np.round(np.arange(-0.6, 0.61, 0.1), 3), 1.0, 1.5, 2.0, 3.0, 5.0, 7.0, 10.0, 15.0, 20.0]
PER_POSITION = 1500
#: Bins of 40 fs around time zero (narrower than the 100 fs jitter), wider later.
EDGES = np.r_[np.arange(-0.8, 0.8001, 0.04), 1.25, 1.75, 2.5, 4.0, 6.0, 8.5, 12.5, 17.5, 25.0]
JITTER = 0.1        # ps rms, measured exactly per shot (the corrected delay)
OFF_EVERY = 10      # every 10th shot is pump-off
K = 2               # references per pump-on shot
NOISE = 0.5         # per-shot noise sd, in units of the full signal
MIN_SHOTS = 20      # bins with fewer pump-on shots are left out (as binning.min_shots does)
RUNS = 24


def reduce_run(seed):
    """One synthetic run reduced to bin means, errors, delays, delay spreads and bin correlation."""
    rng = np.random.default_rng(seed)
    n = PER_POSITION * POSITIONS.size
    delay = np.repeat(POSITIONS, PER_POSITION) + JITTER * rng.standard_normal(n)
    off = np.arange(n) % OFF_EVERY == OFF_EVERY - 1
    T, s = TRUTH["lifetime_1"], TRUTH["sigma"]
    population = T * stats.exponnorm(K=T / s, loc=TRUTH["t0"], scale=s).pdf(delay)
    shots = NOISE * rng.standard_normal((n, Q.size))
    shots[~off] += population[~off, None] * SHAPE
    refs, _ = D.nearest_references(np.arange(n), ~off, off, K)
    on = np.flatnonzero(~off)
    per_shot = shots[on] - shots[refs].mean(axis=1)
    nbins = EDGES.size - 1
    index = assign_bins(delay[on], EDGES)
    sums = accumulate(index, per_shot, nbins)
    times = accumulate(index, delay[on][:, None], nbins)
    err = D.bin_errors(sums.variance(), sums.count, K, D.shared_reference_factor(index, refs, nbins))
    R = C.bin_correlation(C.bin_coefficient_overlap(index, refs, nbins))
    use = sums.count >= MIN_SHOTS
    return (sums.mean()[use], err[use], times.mean()[use, 0], np.sqrt(times.variance()[use, 0]),
            R[np.ix_(use, use)])


def fit_run(seed):
    diff, err, delay, spread, R = reduce_run(seed)
    model = models.SpeciesModel(1, curves=SHAPE[None], species=[0], delay_spread=(delay, spread))
    return varpro.fit(model, diff, err, delay, START, correlation=R)


@pytest.mark.slow
def test_two_sigma_intervals_cover_the_truth():
    z_cor, z_ind = [], []
    for seed in range(RUNS):
        r = fit_run(seed)
        assert r.converged and not r.at_bound, (seed, r.message, r.at_bound)
        assert r.error_model == "correlated bins"
        z_cor.append([(r.params[n] - v) / r.stderr[n] for n, v in TRUTH.items()])
        z_ind.append([(r.params[n] - v) / r.stderr_independent[n] for n, v in TRUTH.items()])
    z_cor, z_ind = np.abs(z_cor), np.abs(z_ind)
    cover_cor, cover_ind = (z_cor <= 2).mean(axis=0), (z_ind <= 2).mean(axis=0)
    names = list(TRUTH)
    print(f"coverage of 2-standard-error intervals over {RUNS} runs:")
    for i, n in enumerate(names):
        print(f"  {n}: correlated {cover_cor[i]:.3f} (rms z {np.sqrt(np.mean(z_cor[:, i] ** 2)):.2f}), "
              f"independent bins {cover_ind[i]:.3f} (rms z {np.sqrt(np.mean(z_ind[:, i] ** 2)):.2f})")
    # honest errors: each parameter's truth inside its 2-sigma interval in 85-100 % of the runs
    for i, n in enumerate(names):
        assert 0.85 <= cover_cor[i] <= 1.0, (n, cover_cor[i])
    # the per-bin-only errors miss the shared references: time zero and the IRF width (whose
    # Jacobian columns are smooth over the bins that share references) undercover
    for i in (names.index("t0"), names.index("sigma")):
        assert cover_ind[i] < cover_cor[i], (names[i], cover_ind[i], cover_cor[i])
    assert cover_ind.mean() < cover_cor.mean()
    # and the scaled deviations: rms |z| of 24 standard normals is 1 +- 0.14 (sd 1/sqrt(2n))
    rms_cor = np.sqrt(np.mean(z_cor ** 2, axis=0))
    assert np.all((rms_cor > 0.7) & (rms_cor < 1.3)), rms_cor


def test_correlation_identity_gives_the_independent_errors():
    """With R = I the sandwich is the fit's own Gauss-Newton covariance (no change)."""
    diff, err, delay, spread, R = reduce_run(101)
    model = models.SpeciesModel(1, curves=SHAPE[None], species=[0], delay_spread=(delay, spread))
    plain = varpro.fit(model, diff, err, delay, START)
    eye = varpro.fit(model, diff, err, delay, START, correlation=np.eye(delay.size))
    cor = varpro.fit(model, diff, err, delay, START, correlation=R)
    assert plain.error_model == "independent bins" and eye.error_model == "correlated bins"
    for n in TRUTH:
        np.testing.assert_allclose(eye.stderr[n], plain.stderr[n], rtol=1e-6)
        np.testing.assert_allclose(cor.stderr_independent[n], plain.stderr[n], rtol=1e-9)
    # positive neighbour correlations widen the error of time zero (a smooth Jacobian column)
    assert cor.stderr["t0"] > 1.2 * plain.stderr["t0"]
