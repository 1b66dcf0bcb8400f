"""Flat-detector geometry against closed forms of plane trigonometry."""

import numpy as np
import pytest
from scipy import constants

from movieproc.detector import corrections, geometry
from movieproc.errors import ConfigError


def _geo(tilt=(0.0, 0.0), centre=(40.3, 50.7), shape=(90, 100), pixel=(0.2, 0.25), distance=60.0):
    return geometry.Geometry(shape, distance, pixel, centre, tilt)


def test_q_of_untilted_pixels_matches_the_textbook_formula():
    g = _geo()
    rows, cols = np.indices(g.shape, dtype=float)
    # Untilted: a pixel at in-plane radius r sits at 2theta = atan(r / D) (right triangle), and
    # q = 4 pi sin(theta) / lambda with lambda = h c / E (scipy.constants, CODATA).
    r = np.hypot((rows - 40.3) * 0.2, (cols - 50.7) * 0.25)
    lam = constants.h * constants.c / (12.0e3 * constants.e) * 1e10  # Å at 12 keV
    expected = 4 * np.pi * np.sin(np.arctan(r / 60.0) / 2) / lam
    np.testing.assert_allclose(geometry.q_map(g, 12.0), expected, rtol=1e-12, atol=1e-14)  # float64 rounding


def test_azimuth_convention_and_beam_centre():
    g = _geo()
    tt, phi = geometry.scattering_angles(g, rows=[40.3, 40.3, 45.3], cols=[50.7, 60.7, 50.7])
    assert tt[0] == 0.0  # the beam centre scatters at 2theta = 0 by definition
    # +col is phi = 0, +row is phi = +90 deg (documented convention)
    assert phi[1] == pytest.approx(0.0, abs=1e-15)
    assert phi[2] == pytest.approx(np.pi / 2, abs=1e-15)


@pytest.mark.parametrize("a_deg", [-7.0, 4.0])
def test_tilt_about_x_matches_a_tilted_plane(a_deg):
    # Tilt a about x only: a point k pixels along the rows from the centre lies at
    # P = (0, k p cos a, D + k p sin a), so 2theta = atan(k p cos a / (D + k p sin a)).
    g = _geo(tilt=(a_deg, 0.0))
    k = np.array([-30.0, -5.0, 12.0, 40.0])
    tt, _ = geometry.scattering_angles(g, rows=40.3 + k, cols=np.full(4, 50.7))
    a = np.deg2rad(a_deg)
    expected = np.abs(np.arctan2(k * 0.2 * np.cos(a), 60.0 + k * 0.2 * np.sin(a)))
    np.testing.assert_allclose(tt, expected, rtol=1e-12)


def test_tilt_about_y_matches_a_tilted_plane():
    # Tilt b about y only: a point k pixels along the columns lies at P = (x cos b, 0, D - x sin b).
    g = _geo(tilt=(0.0, 6.0))
    x = np.array([-25.0, 10.0, 45.0]) * 0.25
    tt, _ = geometry.scattering_angles(g, rows=np.full(3, 40.3), cols=50.7 + x / 0.25)
    b = np.deg2rad(6.0)
    np.testing.assert_allclose(tt, np.abs(np.arctan2(x * np.cos(b), 60.0 - x * np.sin(b))), rtol=1e-12)


def test_rotation_order_is_x_first_then_y():
    a, b = np.deg2rad(5.0), np.deg2rad(-8.0)
    rx = np.array([[1, 0, 0], [0, np.cos(a), -np.sin(a)], [0, np.sin(a), np.cos(a)]])
    ry = np.array([[np.cos(b), 0, np.sin(b)], [0, 1, 0], [-np.sin(b), 0, np.cos(b)]])
    np.testing.assert_allclose(geometry.rotation((5.0, -8.0)), ry @ rx, atol=1e-15)
    # the two orders differ at this size, so the check can tell them apart
    assert np.abs(geometry.rotation((5.0, -8.0)) - rx @ ry).max() > 1e-3


def test_beam_centre_stays_on_the_beam_under_tilt():
    g = _geo(tilt=(3.0, -4.0))
    pos = geometry.lab_positions(g, rows=40.3, cols=50.7)
    np.testing.assert_allclose(pos, [0.0, 0.0, 60.0], atol=1e-12)


def _rectangle_solid_angle(u1, u2, v1, v2, d):
    # Exact solid angle of the rectangle [u1, u2] x [v1, v2] in a plane at perpendicular
    # distance d, coordinates from the foot of the perpendicular:
    # sum over corners of +-atan(u v / (d sqrt(u^2 + v^2 + d^2)))
    # (A. Khadjavi, J. Opt. Soc. Am. 58, 1417 (1968); from memory, checked below on a
    # case with a known answer).
    def f(u, v):
        return np.arctan(u * v / (d * np.sqrt(u * u + v * v + d * d)))

    return f(u2, v2) - f(u1, v2) - f(u2, v1) + f(u1, v1)


def test_rectangle_formula_gives_one_sixth_of_the_sphere_for_a_cube_face():
    # A cube face seen from the cube's centre subtends 4 pi / 6 (symmetry).
    assert _rectangle_solid_angle(-1, 1, -1, 1, 1) == pytest.approx(4 * np.pi / 6, rel=1e-14)


@pytest.mark.parametrize("tilt", [(0.0, 0.0), (8.0, -5.0)])
def test_pixel_solid_angle_matches_the_exact_rectangle(tilt):
    g = _geo(tilt=tilt)
    rel = corrections.solid_angle_factor(g)
    r = geometry.rotation(tilt)
    n = r[:, 2]
    d = 60.0 * n[2]  # perpendicular distance from the sample to the detector plane
    rows, cols = np.indices(g.shape, dtype=float)
    # in-plane coordinates of the pixel edges, measured from the foot of the perpendicular
    x = (cols - 50.7) * 0.25 + 60.0 * r[2, 0]
    y = (rows - 40.3) * 0.2 + 60.0 * r[2, 1]
    exact = _rectangle_solid_angle(x - 0.125, x + 0.125, y - 0.1, y + 0.1, d)
    # relative factor = Omega / (A / D^2); the point formula differs from the exact one by
    # O((p / D)^2) ~ 2e-5 here, so 1e-4 separates a correct formula from a wrong one
    # (e.g. cos^2 instead of cos^3 would be off by up to ~10 %).
    np.testing.assert_allclose(rel, exact / (0.05 / 60.0 ** 2), rtol=1e-4)


def test_incidence_cosine_untilted_is_cos_two_theta():
    g = _geo()
    tt, _ = geometry.scattering_angles(g)
    np.testing.assert_allclose(geometry.incidence_cosine(g), np.cos(tt), rtol=1e-12)


def test_from_config_defaults_centre_and_rejects_an_off_detector_centre():
    cfg = {"distance_mm": 50.0, "pixel_size_mm": 0.4, "beam_center_px": None, "tilt_deg": [0, 0]}
    g = geometry.from_config(cfg, (64, 80))
    assert g.beam_center_px == (31.5, 39.5)
    assert g.pixel_size_mm == (0.4, 0.4)
    with pytest.raises(ConfigError) as err:
        geometry.from_config(dict(cfg, beam_center_px=[10.0, 95.0]), (64, 80))
    assert "detector.beam_center_px" in str(err.value) and "(64, 80)" in str(err.value)
    with pytest.raises(ConfigError, match="detector"):
        geometry.from_config(dict(cfg, distance_mm=-1.0), (64, 80))
