"""Per-pixel factors and automatic masks against closed forms."""

import numpy as np
import pytest

from movieproc.detector import corrections, geometry, masks


def test_polarization_check_values_for_horizontal_polarization():
    # Fully polarized along x (horizontal), 2theta = 30 deg: Pol = 1 - sin^2(2theta) cos^2(phi),
    # = 1 - 0.25 = 0.75 in the polarization plane (phi = 0) and 1 perpendicular to it (phi = 90 deg)
    # (Als-Nielsen & McMorrow, Elements of Modern X-ray Physics, ch. 1, from memory; docs/METHODS.md sec. 1).
    tt = np.deg2rad(30.0)
    assert corrections.polarization_factor(tt, 0.0, 1.0) == pytest.approx(0.75, rel=1e-15)
    assert corrections.polarization_factor(tt, np.pi / 2, 1.0) == pytest.approx(1.0, rel=1e-15)
    # a vertical polarization plane swaps the two azimuths
    assert corrections.polarization_factor(tt, np.pi / 2, 1.0, np.pi / 2) == pytest.approx(0.75, rel=1e-15)


def test_polarization_unpolarized_limit():
    # Equal parts along both directions: (1 + cos^2 2theta) / 2 at every azimuth (same sources).
    tt = np.deg2rad(np.linspace(0, 80, 9))[:, None]
    phi = np.linspace(-np.pi, np.pi, 13)[None, :]
    got = corrections.polarization_factor(tt, phi, 0.5, 0.3)
    np.testing.assert_allclose(got, np.broadcast_to((1 + np.cos(tt) ** 2) / 2, got.shape), rtol=1e-14)
    with pytest.raises(ValueError):
        corrections.polarization_factor(tt, phi, 1.2)


def test_solid_angle_untilted_is_cos_cubed():
    # Without tilt A (P.n)/|P|^3 = (A / D^2) cos^3(2theta) (docs/METHODS.md sec. 1).
    g = geometry.Geometry((40, 50), 30.0, 0.5, (20.2, 10.6))
    tt, _ = geometry.scattering_angles(g)
    np.testing.assert_allclose(corrections.solid_angle_factor(g), np.cos(tt) ** 3, rtol=1e-13)


def test_sensor_factor_closed_form():
    # At cos(alpha) = 1/2: (1 - e^{-2x}) / (1 - e^{-x}) = 1 + e^{-x} (difference of squares).
    x = 0.96  # mu t
    assert corrections.sensor_factor(0.5, 3.0, 0.32) == pytest.approx(1 + np.exp(-x), rel=1e-14)
    assert corrections.sensor_factor(1.0, 3.0, 0.32) == pytest.approx(1.0, rel=1e-15)
    assert np.isnan(corrections.sensor_factor(0.0, 3.0, 0.32))


def test_absorption_factor_matches_the_sheet_formula():
    # [exp(-mu d) - exp(-mu d / cos 2theta)] / [mu (1/cos 2theta - 1)] (docs/METHODS.md sec. 1),
    # divided by its forward limit d exp(-mu d).
    mu, d = 2.0, 0.3
    tt = np.deg2rad(np.array([5.0, 30.0, 60.0, 75.0]))
    c = np.cos(tt)
    sheet = (np.exp(-mu * d) - np.exp(-mu * d / c)) / (mu * (1 / c - 1))
    np.testing.assert_allclose(corrections.absorption_factor(tt, mu, d), sheet / (d * np.exp(-mu * d)), rtol=1e-12)
    assert corrections.absorption_factor(0.0, mu, d) == 1.0  # forward direction, by definition
    assert corrections.absorption_factor(1e-7, mu, d) == pytest.approx(1.0, abs=1e-12)  # continuous at 0


def test_combined_factor_is_the_product_of_the_switched_factors():
    g = geometry.Geometry((30, 40), 40.0, 0.4, (12.0, 25.0), (3.0, -2.0))
    tt, phi = geometry.scattering_angles(g)
    full = corrections.combined_factor(g, solid_angle=True, polarization_fraction=0.9, polarization_plane_deg=20.0,
                                       sensor=(3.0, 0.5), absorption=(0.5, 0.2))
    expected = (corrections.solid_angle_factor(g) * corrections.polarization_factor(tt, phi, 0.9, np.deg2rad(20.0))
                * corrections.sensor_factor(geometry.incidence_cosine(g), 3.0, 0.5)
                * corrections.absorption_factor(tt, 0.5, 0.2))
    np.testing.assert_allclose(full, expected, rtol=1e-14)
    np.testing.assert_array_equal(corrections.combined_factor(g, solid_angle=False), np.ones((30, 40)))
    cfg = {"solid_angle": True, "polarization": False, "polarization_fraction": 0.9,
           "sensor": {"enabled": False}, "absorption": {"enabled": False}}
    np.testing.assert_allclose(corrections.factor_from_config(g, cfg), corrections.solid_angle_factor(g), rtol=1e-15)


def test_hot_pixels_from_a_dark_series():
    rng = np.random.default_rng(3)
    dark = 10 + rng.standard_normal((20, 32, 32))
    dark[:, 5, 7] += 50.0           # high level
    dark[::2, 20, 3] += 40.0        # flickering: normal mean-ish, large noise
    dark[3, 9, 9] = np.nan          # unreadable
    hot = masks.hot_pixels(dark, threshold=10.0)
    assert hot[5, 7] and hot[20, 3] and hot[9, 9]
    # Gaussian noise: a robust z above 10 has probability ~1e-23 per pixel, so no false hits.
    assert hot.sum() == 3
    single = masks.hot_pixels(dark[1], threshold=10.0)  # a frame where the flicker is off
    assert single[5, 7] and single.sum() == 1
    assert dark.shape == (20, 32, 32) and np.isnan(dark[3, 9, 9])  # input untouched


def test_dead_and_saturated_pixels():
    flat = np.full((16, 16), 100.0)
    flat[2, 3] = 5.0
    flat[4, 4] = np.nan
    dead = masks.dead_pixels(flat, fraction=0.2)
    assert dead[2, 3] and dead[4, 4] and dead.sum() == 2
    frames = np.zeros((2, 4, 4), np.uint16)
    frames[1, 2, 2] = 65535
    sat = masks.saturated(frames, 60000)
    assert sat.shape == frames.shape and sat[1, 2, 2] and sat.sum() == 1
