"""Tests of movieproc.xray: wavelength from photon energy, and q from the scattering angle."""

import math

import numpy as np
import pytest
from scipy import constants

from movieproc import xray

# h c in keV Å from the CODATA "inverse meter-electron volt relationship" (scipy.constants):
# 1.2398419843320026e-06 eV m -> * 1e10 Å/m / 1e3 eV/keV. Exact in the 2019 SI (h, c, e fixed).
HC_CODATA = constants.physical_constants["inverse meter-electron volt relationship"][0] * 1e7


def test_hc_constant_matches_codata():
    # scipy.constants (CODATA): 12.398419843320026 keV Å
    assert HC_CODATA == pytest.approx(12.398419843320026, rel=1e-15)
    assert xray.HC_KEV_ANGSTROM == pytest.approx(HC_CODATA, rel=1e-14)


def test_wavelength_at_12_kev():
    # hand value: 12.398419843320026 keV Å / 12 keV = 1.0332016536100022 Å
    assert xray.wavelength(12.0) == pytest.approx(1.0332016536100022, rel=1e-13)
    assert isinstance(xray.wavelength(12.0), float)


def test_wavelength_array_is_inverse_energy():
    e = np.array([6.0, 8.048, 12.0, 17.479, 24.0])  # keV
    lam = xray.wavelength(e)
    assert lam.shape == e.shape
    np.testing.assert_allclose(lam, HC_CODATA / e, rtol=1e-13)  # lambda = h c / E


def test_q_at_30_degrees_12_kev():
    # hand value: sin(15 deg) = (sqrt(6) - sqrt(2)) / 4 (half-angle closed form),
    # q = 4 pi * 0.2588190451025207 / 1.0332016536100022 Å = 3.147900539501548 1/Å
    q = xray.q_from_two_theta(np.deg2rad(30.0), 12.0)
    assert float(q) == pytest.approx(3.147900539501548, rel=1e-12)


def test_q_closed_form_over_angles_and_energies():
    tth = np.deg2rad(np.linspace(0.0, 150.0, 31))
    e = np.array([[8.0], [12.0], [18.0]])  # keV, broadcast against the angles
    q = xray.q_from_two_theta(tth, e)
    assert q.shape == (3, 31)
    expect = 4 * np.pi * np.sin(tth / 2) / (HC_CODATA / e)  # q = 4 pi sin(theta) / lambda
    np.testing.assert_allclose(q, expect, rtol=1e-13, atol=1e-15)
    assert q[0, 0] == 0.0  # forward direction


def test_photon_energy_jitter_scales_q():
    # At a fixed angle q is proportional to E (lambda = hc/E): a 0.1 % SASE energy jitter
    # moves q by exactly 0.1 % (closed form).
    tth = np.deg2rad(np.array([5.0, 20.0, 40.0]))
    ratio = xray.q_from_two_theta(tth, 12.0 * 1.001) / xray.q_from_two_theta(tth, 12.0)
    np.testing.assert_allclose(ratio, 1.001, rtol=1e-13)


def test_two_theta_round_trip_and_backscattering():
    q = np.linspace(0.0, 6.0, 50)
    tth = xray.two_theta_from_q(q, 12.0)
    np.testing.assert_allclose(xray.q_from_two_theta(tth, 12.0), q, rtol=1e-12, atol=1e-14)
    # q_max = 4 pi / lambda is reached at 2 theta = 180 deg (sin(90 deg) = 1)
    q_max = 4 * np.pi / (HC_CODATA / 12.0)
    assert math.degrees(float(xray.two_theta_from_q(q_max, 12.0))) == pytest.approx(180.0, abs=1e-6)


def test_unreachable_q_raises():
    q_max = 4 * np.pi / (HC_CODATA / 12.0)  # 12.16 1/Å at 12 keV
    with pytest.raises(ValueError, match="cannot be reached"):
        xray.two_theta_from_q(q_max * 1.01, 12.0)


@pytest.mark.parametrize("bad", [0.0, -12.0, np.nan, np.inf * -1])
def test_non_positive_energy_raises(bad):
    with pytest.raises(ValueError, match="positive"):
        xray.wavelength(bad)
    with pytest.raises(ValueError):
        xray.wavelength(np.array([12.0, bad]))


def test_infinite_energy_raises():
    with pytest.raises(ValueError, match="positive"):
        xray.wavelength(np.inf)
