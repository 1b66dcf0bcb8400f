"""Tests of movieproc.signals.solvent on seeded synthetic difference curves."""

import numpy as np
import pytest
from scipy import linalg

from movieproc.errors import DataError, InputError
from movieproc.signals import solvent

Q = np.linspace(0.6, 4.0, 120)  # 1/Å
# Invented smooth curves standing in for solvent differentials (data units per K, per
# unit density change) and a solute difference curve.
DSDT = -np.exp(-((Q - 2.0) / 0.3) ** 2) + 0.7 * np.exp(-((Q - 1.7) / 0.35) ** 2)
DSDRHO = np.exp(-((Q - 2.05) / 0.45) ** 2) - 0.3 * np.exp(-((Q - 3.0) / 0.4) ** 2)
SOLUTE = np.sinc(Q * 2.6 / np.pi) - np.sinc(Q * 2.9 / np.pi)
ERR = 0.01 * (1 + Q)  # standard errors, varying with q


def test_single_term_closed_form():
    # Weighted least squares with one basis curve (Bevington & Robinson, Data Reduction and
    # Error Analysis for the Physical Sciences; chapter numbers from memory, ch. 6-7):
    # c = sum(w b d) / sum(w b^2), sigma_c = 1 / sqrt(sum(w b^2)).
    rng = np.random.default_rng(0)
    d = 0.4 * DSDT + rng.normal(0, ERR)
    w = 1 / ERR**2
    res = solvent.fit_solvent(d, ERR, DSDT[None])
    assert res.coef[0, 0] == pytest.approx(np.sum(w * DSDT * d) / np.sum(w * DSDT**2), rel=1e-12)
    assert res.coef_err[0, 0] == pytest.approx(1 / np.sqrt(np.sum(w * DSDT**2)), rel=1e-12)
    assert res.chi2[0] == pytest.approx(np.sum(w * (d - res.coef[0, 0] * DSDT) ** 2), rel=1e-10)
    assert res.dof[0] == Q.size - 1


def test_coefficients_recovered_and_errors_honest():
    # 400 seeded noise realizations of one delay (dT = 0.8, drho = -0.05, solute 0.3,
    # energy-mismatch nuisance 0.02). Reference: the Monte Carlo scatter of the estimates.
    rng = np.random.default_rng(42)
    nuis = solvent.dS_dlnq(Q, DSDT + 3.0)  # any smooth reference curve will do
    basis = np.stack([DSDT, DSDRHO, SOLUTE, nuis])
    truth = np.array([0.8, -0.05, 0.3, 0.02])
    n = 400
    clean = truth @ basis
    d = clean + rng.normal(size=(n, Q.size)) * ERR
    res = solvent.fit_solvent(d, np.broadcast_to(ERR, d.shape), basis, remove=[True, True, False, True])
    z = (res.coef - truth) / res.coef_err
    # Within 3 reported standard errors: with 1600 Gaussian z's, P(any |z| > 4.5) ~ 1e-2;
    # require 3 sigma for 99 % of them (expected 0.27 % beyond 3 sigma).
    assert np.mean(np.abs(z) < 3) > 0.99 and np.all(np.abs(z) < 5)
    # Honest errors: scatter / reported within 20 %. The sample sd of 400 draws has
    # relative sd 1/sqrt(2*399) = 3.5 %, so 20 % is a 5.7-sigma bound.
    ratio = res.coef.std(axis=0, ddof=1) / res.coef_err.mean(axis=0)
    np.testing.assert_allclose(ratio, 1.0, atol=0.2)
    # Reduced chi2 averages to 1 (dof = 116 per delay; mean over 400 has sd 0.0066).
    assert res.red_chi2.mean() == pytest.approx(1.0, abs=0.03)
    # Solute-only signal: data minus fitted solvent and nuisance terms ~ 0.3 * SOLUTE.
    resid_sd = np.std(res.solute - 0.3 * SOLUTE, axis=0)
    assert np.all(resid_sd < 3 * ERR)  # fitted terms add less noise than the data's own


def test_scaled_errors_follow_underestimated_errors():
    # Errors given 2x too small: unscaled standard errors are then 2x too small; scaled by
    # sqrt(chi2/dof) they match the Monte Carlo scatter (within 20 %, as above).
    rng = np.random.default_rng(7)
    basis = np.stack([DSDT, DSDRHO])
    n = 400
    d = np.array([0.5, 0.1]) @ basis + rng.normal(size=(n, Q.size)) * 2 * ERR
    e = np.broadcast_to(ERR, d.shape)
    raw = solvent.fit_solvent(d, e, basis)
    scaled = solvent.fit_solvent(d, e, basis, scale_errors=True)
    sd = raw.coef.std(axis=0, ddof=1)
    np.testing.assert_allclose(sd / raw.coef_err.mean(0), 2.0, rtol=0.2)
    np.testing.assert_allclose(sd / scaled.coef_err.mean(0), 1.0, atol=0.2)
    assert scaled.errors_scaled and not raw.errors_scaled


def test_invalid_points_skipped_and_underdetermined_flagged():
    d = np.stack([0.3 * DSDT, 0.2 * DSDT])
    e = np.stack([ERR, ERR]).copy()
    e[0, :10] = np.nan          # left out
    e[1, 2:] = np.inf           # only 2 valid points for 3 curves
    d_in = d.copy()
    res = solvent.fit_solvent(d, e, np.stack([DSDT, DSDRHO, SOLUTE]))
    np.testing.assert_array_equal(d, d_in)  # input untouched
    assert res.coef[0, 0] == pytest.approx(0.3, abs=1e-12)
    assert np.all(np.isnan(res.coef[1])) and any("delay index 1" in w for w in res.warnings)
    assert np.all(np.isnan(res.solute[0, :10]))
    with pytest.raises(InputError):
        solvent.fit_solvent(d, e, DSDT[None, :50])


def test_dS_dlnq_power_law():
    # q d(q^n)/dq = n q^n (calculus); second-order differences on a grid of 120 points:
    # error ~ h^2 n (n-1)(n-2) q^(n-2) / 6 relative ~1e-3 here.
    for n in [1, 2, 3]:
        np.testing.assert_allclose(solvent.dS_dlnq(Q, Q**n), n * Q**n, rtol=2e-3)


def test_project_out_matches_lstsq():
    # Reference: scipy.linalg.lstsq residual of the weighted problem, unweighted back.
    rng = np.random.default_rng(3)
    d = rng.normal(size=(5, Q.size)) + 2 * DSDT
    e = rng.uniform(0.5, 2.0, size=d.shape)
    basis = np.stack([DSDT, DSDRHO])
    p = solvent.project_out(d, basis, e)
    for i in range(5):
        w = 1 / e[i]
        c = linalg.lstsq((basis * w).T, d[i] * w)[0]
        np.testing.assert_allclose(p[i], d[i] - c @ basis, atol=1e-12)
        # Weighted orthogonality A^T W r = 0 and idempotence.
        np.testing.assert_allclose(basis @ (p[i] / e[i] ** 2), 0, atol=1e-9)
    np.testing.assert_allclose(solvent.project_out(p, basis, e), p, atol=1e-12)


def heating_map(rng, solute_left=0.0):
    delays = np.array([-2.0, 1.0, 10.0, 100.0, 300.0, 500.0, 700.0, 1000.0])
    amp = np.array([0.0, 0.1, 0.5, 1.0, 1.1, 1.15, 1.2, 1.2])  # dT-like, K
    lasting = np.where(delays > 0, solute_left, 0.0)
    clean = np.outer(amp, DSDT) + np.outer(lasting, SOLUTE)
    err = np.broadcast_to(ERR, clean.shape)
    return delays, clean + rng.normal(size=clean.shape) * err, err


def test_heating_curve_recovered_from_late_delays():
    rng = np.random.default_rng(11)
    delays, d, e = heating_map(rng)
    hc = solvent.estimate_heating_curve(d, e, delays, (250.0, 1500.0))
    np.testing.assert_array_equal(hc.delay_used, [300.0, 500.0, 700.0, 1000.0])
    truth = DSDT / np.abs(DSDT).max()
    # The normalization divides by the noisy max|h| (relative error ~ ERR/(A sqrt(4)) ~
    # 1 %), a common factor: compare shapes after a least-squares rescale, then demand
    # residuals consistent with the reported errors (chi2/n within 5 sd of 1).
    s = np.sum(hc.curve * truth / hc.curve_err**2) / np.sum(truth**2 / hc.curve_err**2)
    chi = (hc.curve - s * truth) / hc.curve_err
    assert abs(s - 1) < 0.05
    assert np.mean(chi**2) == pytest.approx(1.0, abs=5 * np.sqrt(2 / Q.size))
    # Amplitudes: data = A h with h's max normalized to 1 -> A = amp * max|DSDT| / s.
    np.testing.assert_allclose(hc.amplitudes * s, np.array([1.1, 1.15, 1.2, 1.2]) * np.abs(DSDT).max(),
                               atol=4 * hc.amplitude_err.max())
    assert hc.warnings == [] and "heating alone" in hc.assumption


def test_heating_curve_warns_when_solute_remains():
    # A lasting solute signal that does not scale with the heat breaks the one-shape
    # assumption; the rank-1 fit shows it through its chi2 and says so.
    rng = np.random.default_rng(12)
    delays, d, e = heating_map(rng, solute_left=0.3)
    d = d.copy()
    # Solute changing across the window by up to 1.5 x 0.116 (max |SOLUTE|) = 0.17, i.e.
    # 4-17 times the errors: far beyond the 5-sigma threshold of the warning.
    d[4:] += np.outer([0.0, 0.5, 1.0, 1.5], SOLUTE)
    hc = solvent.estimate_heating_curve(d, e, delays, (250.0, 1500.0))
    assert any("do not share one shape" in w for w in hc.warnings)
    with pytest.raises(DataError):
        solvent.estimate_heating_curve(d, e, delays, (2000.0, 3000.0))


def test_solvent_basis_collects_the_configured_terms():
    q = np.linspace(0.5, 4.0, 50)
    reference = 100.0 * np.exp(-0.1 * q**2)
    diffs = {"dT": np.sin(q), "drho": np.cos(q)}
    b = solvent.solvent_basis(q, reference, differentials=diffs, terms=["dT", "drho"], energy_term=True)
    assert b.names == ["dT", "drho", "normalization", "energy"] and not b.estimated
    np.testing.assert_array_equal(b.curves[0], diffs["dT"])
    np.testing.assert_array_equal(b.curves[2], reference)
    # the energy term is -d S / d ln q of the reference: for S = 100 exp(-0.1 q^2),
    # q dS/dq = -20 q^2 exp(-0.1 q^2) (derivative by hand); dS_dlnq is its numerical form
    np.testing.assert_allclose(b.curves[3], solvent.dS_dlnq(q, reference))
    np.testing.assert_allclose(b.curves[3][5:-5], -20 * q[5:-5] ** 2 * np.exp(-0.1 * q[5:-5] ** 2), rtol=2e-3)
    # heating switched off and no normalization: no curves at all
    none = solvent.solvent_basis(q, reference, differentials=diffs, heating=False, normalization=False)
    assert none.names == [] and none.curves is None


def test_solvent_basis_names_its_parameter_for_a_missing_term():
    q = np.linspace(0.5, 4.0, 20)
    with pytest.raises(ValueError) as err:
        solvent.solvent_basis(q, np.ones(20), differentials={"dT": np.ones(20)}, terms=["dT", "drho"])
    assert err.value.parameter == "terms"
    assert "drho" in str(err.value)
