"""Tests of movieproc.shots.timing: the calibration polynomial, corrected delays, and the
onset-width check that the timing-tool correction (and its sign) sharpen a prompt onset."""

import numpy as np
import pytest
from numpy.polynomial import polynomial as P
from scipy import special

from movieproc.shots import timing

CAL = [-1375.0, 2.75, 0.0005]  # fs, fs/px, fs/px^2
EDGE0 = 480.0  # px
Z90 = special.ndtri(0.9)  # Phi^-1(0.9) = 1.2815515655446004 (scipy.special)


def test_correction_matches_numpy_polyval():
    edge = np.array([80.0, 300.0, 480.0, 655.5, 880.0, np.nan])
    got = timing.timing_correction(edge, CAL, EDGE0)
    # numpy.polynomial.polynomial.polyval takes coefficients lowest order first, like the config
    expect = P.polyval(edge, CAL) - P.polyval(EDGE0, CAL)
    np.testing.assert_allclose(got[:-1], expect[:-1], rtol=1e-13)
    assert got[2] == 0.0  # zero correction at the time-zero edge
    assert np.isnan(got[-1])


def test_corrected_delay_hand_value():
    # hand: P(500) = -1375 + 2.75*500 + 0.0005*500^2 = 125 fs; P(480) = -1375 + 1320 + 115.2 = 60.2 fs;
    # corrected = 1.0 - 0.1 + (-1) * (125 - 60.2) / 1000 = 0.8352 ps
    d = timing.corrected_delay([1.0], [500.0], CAL, time_zero=0.1, sign=-1, edge_at_time_zero=EDGE0)
    assert d[0] == pytest.approx(0.8352, abs=1e-12)
    d = timing.corrected_delay([1.0], [500.0], CAL, time_zero=0.1, sign=1, edge_at_time_zero=EDGE0)
    assert d[0] == pytest.approx(0.9648, abs=1e-12)


def test_without_timing_tool_nominal_delay_and_nan_edges():
    stage = np.array([-1.0, 0.0, 0.25, 3.0])
    edge = np.array([500.0, np.nan, 300.0, 480.0])
    np.testing.assert_array_equal(timing.corrected_delay(stage, edge, CAL, 0.04, -1, EDGE0, use_timing_tool=False),
                                  stage - 0.04)
    np.testing.assert_array_equal(timing.corrected_delay(stage, None, CAL, 0.04), stage - 0.04)
    d = timing.corrected_delay(stage, edge, CAL, 0.04, -1, EDGE0)
    assert np.isnan(d[1]) and np.all(np.isfinite(d[[0, 2, 3]]))
    assert d[3] == pytest.approx(3.0 - 0.04, abs=1e-15)  # edge at time zero: no correction


def test_inputs_are_not_modified():
    stage = np.array([0.0, 1.0])
    edge = np.array([400.0, 500.0])
    s0, e0 = stage.copy(), edge.copy()
    timing.corrected_delay(stage, edge, CAL, 0.1, -1, EDGE0)
    np.testing.assert_array_equal(stage, s0)
    np.testing.assert_array_equal(edge, e0)


def test_bad_sign_raises():
    with pytest.raises(ValueError, match="sign"):
        timing.corrected_delay([0.0], [480.0], CAL, sign=0)


def test_onset_width_of_a_noise_free_normal_step():
    # values = 0.2 + 1.5 * Phi((t - 0.05) / 0.08): 10-90 % width = 2 * Phi^-1(0.9) * sigma (closed form)
    t = np.linspace(-1.0, 1.0, 2001)
    y = 0.2 + 1.5 * special.ndtr((t - 0.05) / 0.08)
    width, t0 = timing.onset_width(t, y)
    assert width == pytest.approx(2 * Z90 * 0.08, rel=1e-4)
    assert t0 == pytest.approx(0.05, abs=1e-5)
    # 20-80 % levels: 2 * Phi^-1(0.8) * sigma
    assert timing.onset_width(t, y, (0.2, 0.8))[0] == pytest.approx(2 * special.ndtri(0.8) * 0.08, rel=1e-4)


def test_onset_width_needs_ten_finite_shots():
    with pytest.raises(ValueError, match="at least 10"):
        timing.onset_width(np.r_[np.arange(9.0), np.nan], np.arange(10.0))


def _edges_for(measured_fs, cal, edge0, sign):
    """Edge positions (px) whose correction sign * (P(edge) - P(edge0)) equals measured_fs
    (quadratic formula, root on the increasing branch)."""
    c0, c1, c2 = cal
    target = c0 + c1 * edge0 + c2 * edge0 ** 2 + sign * measured_fs
    return (-c1 + np.sqrt(c1 * c1 - 4 * c2 * (c0 - target))) / (2 * c2)


def test_jitter_correction_sharpens_the_onset_and_wrong_sign_broadens_it():
    rng = np.random.default_rng(7)
    n = 20000
    sigma_j, sigma_tool = 0.150, 0.015  # ps: arrival-time jitter, timing-tool noise
    nominal = np.round(rng.uniform(-1.5, 1.5, n) / 0.02) * 0.02  # stage positions on a 20 fs grid
    jitter = sigma_j * rng.standard_normal(n)
    true = nominal + jitter
    values = (true > 0).astype(float) + 0.3 * rng.standard_normal(n)  # prompt step, smeared only by noise
    measured_fs = 1000 * jitter + 1000 * sigma_tool * rng.standard_normal(n)
    sign = -1
    edge = _edges_for(measured_fs, CAL, EDGE0, sign)
    edge[rng.random(n) < 0.03] = np.nan  # failed edges: dropped (NaN delay)

    right = timing.corrected_delay(nominal, edge, CAL, 0.0, sign, EDGE0)
    wrong = timing.corrected_delay(nominal, edge, CAL, 0.0, -sign, EDGE0)
    # the test's own inversion is consistent: the corrected delay errs by the tool noise only
    ok = np.isfinite(right)
    assert np.std(right[ok] - true[ok]) == pytest.approx(sigma_tool, rel=0.05)

    w_nom, t_nom = timing.onset_width(nominal, values)
    w_right, t_right = timing.onset_width(right, values)
    w_wrong, _ = timing.onset_width(wrong, values)

    assert w_right <= 0.5 * w_nom
    assert w_wrong > w_nom
    # closed forms: nominal -> 2 Z90 sigma_j (0.385 ps); corrected -> 2 Z90 sigma_tool (0.038 ps);
    # wrong sign -> 2 Z90 sqrt((2 sigma_j)^2 + sigma_tool^2) (0.77 ps)
    assert w_nom == pytest.approx(2 * Z90 * sigma_j, rel=0.1)
    assert w_right == pytest.approx(2 * Z90 * sigma_tool, rel=0.3)
    assert w_wrong == pytest.approx(2 * Z90 * np.hypot(2 * sigma_j, sigma_tool), rel=0.1)
    assert abs(t_right) < 0.005 and abs(t_nom) < 0.02  # ps: the step is at time zero
