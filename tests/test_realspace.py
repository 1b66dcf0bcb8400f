"""Sharpened real-space transform: peaks at the distances that change (movieproc.scattering.realspace)."""

import numpy as np
import pytest
import yaml

from movieproc.config import SCHEMA_DIR
from movieproc.errors import ConfigError, ParameterError
from movieproc.scattering import debye, formfactors, realspace
from movieproc.stages import analyze
from movieproc.stages.keys import config_keys

#: q window of the triatomic tests: 0.5-8 1/Å (a wide-angle detector at ~18 keV); default damping.
Q = np.linspace(0.5, 8.0, 600)
R = np.arange(0.01, 10.0, 0.005)


def bridged(metal_distance, bond=2.45):
    """Pt-Cl-Pt, Cl bridging two Pt at Pt-Cl = ``bond`` Å: only the Pt-Pt distance changes with the angle."""
    h = np.sqrt(bond**2 - (metal_distance / 2) ** 2)
    return np.array([[-metal_distance / 2, 0, 0], [metal_distance / 2, 0, 0], [0, h, 0]])


ELEMENTS = ["Pt", "Pt", "Cl"]


def test_single_distance_closed_form():
    # dS = 2 f_a f_b sin(q d) / (q d) (one a-b pair in the Debye equation); with F = f_a f_b:
    # (r / pi) int_0^inf 2 sin(q d) / d sin(q r) exp(-k q^2) dq
    #   = (r / (2 d)) sqrt(1 / (pi k)) [exp(-(r - d)^2 / (4k)) - exp(-(r + d)^2 / (4k))]
    # (sin a sin b = [cos(a - b) - cos(a + b)] / 2 and int_0^inf exp(-k x^2) cos(b x) dx = sqrt(pi / k) / 2
    # exp(-b^2 / (4k)), Gradshteyn-Ryzhik 3.896.4, from memory): one pair per Å, a Gaussian of sigma sqrt(2k).
    d, k = 2.9, 0.03
    q = np.linspace(1e-6, 40.0, 8001)  # exp(-k q^2) = 1e-21 at the end: no truncation
    f = formfactors.form_factor(q, "Pt") * formfactors.form_factor(q, "Cl")
    dS = 2 * f * np.sin(q * d) / (q * d)
    got, kappa = realspace.sharpened_transform(q, dS, R, f, damping=k)
    ref = R / (2 * d) * np.sqrt(1 / (np.pi * k)) * (
        np.exp(-((R - d) ** 2) / (4 * k)) - np.exp(-((R + d) ** 2) / (4 * k)))
    assert kappa == k
    np.testing.assert_allclose(got, ref, atol=1e-6 * ref.max())
    assert np.trapezoid(got, R) == pytest.approx(1.0, abs=1e-4)  # one pair
    assert realspace.peak_width(k) == pytest.approx(np.sqrt(0.06))


def test_changing_pair_peaks_at_the_true_distances():
    before, after = 4.2, 3.2  # Pt-Pt, Å; Pt-Cl stays 2.45 Å
    dS = debye.debye(Q, bridged(after), ELEMENTS) - debye.debye(Q, bridged(before), ELEMENTS)
    F, label = realspace.sharpening(Q, ("Pt", "Pt"), ELEMENTS)
    values, kappa = realspace.sharpened_transform(Q, dS, R, F)
    sigma = realspace.peak_width(kappa)
    assert np.exp(-kappa * Q[-1] ** 2) == pytest.approx(realspace.DAMPING_AT_Q_HIGH)
    lost, gained = R[np.argmin(values)], R[np.argmax(values)]
    assert abs(lost - before) < 0.05 and abs(gained - after) < 0.05, (lost, gained, sigma)
    # one Pt-Pt pair lost and one gained: each peak holds about one pair (Gaussian height 1 / (sqrt(2 pi) sigma))
    assert values.max() * np.sqrt(2 * np.pi) * sigma == pytest.approx(1.0, abs=0.15)
    # beyond the molecule's largest distance (plus 4 peak widths) only ripples of the cut-off remain
    beyond = R > before + 4 * sigma
    assert np.abs(values[beyond]).max() < 0.05 * values.max()
    # the unsharpened transform of the same curves puts the peaks further off (the form factors' fall
    # with q weights low q), the reason for the sharpening
    plain = realspace.sine_transform(Q, dS, R, kappa)
    assert abs(R[np.argmin(plain)] - before) > 0.05 or abs(R[np.argmax(plain)] - after) > 0.05
    assert label == "f_Pt(q) f_Pt(q)"


def test_default_sharpening_is_the_squared_mean_form_factor():
    F, _ = realspace.sharpening(Q, None, ELEMENTS)
    mean = (2 * formfactors.form_factor(Q, "Pt") + formfactors.form_factor(Q, "Cl")) / 3
    np.testing.assert_allclose(F, mean**2, rtol=1e-12)
    ones, label = realspace.sharpening(Q, None, None)
    assert np.all(ones == 1) and label.startswith("none")


def test_pair_not_in_structure_names_the_config_key():
    with pytest.raises(ParameterError, match="'pair'.*Au"):
        realspace.sharpening(Q, ("Au", "Pt"), ELEMENTS)
    with pytest.raises(ConfigError, match="realspace.sharpen_pair"), config_keys(analyze.CONFIG_KEYS):
        realspace.sharpening(Q, ("Au", "Pt"), ELEMENTS)
    with pytest.raises(ConfigError, match="realspace.q_range_invA"), config_keys(analyze.CONFIG_KEYS):
        realspace.sharpened_transform(Q, np.zeros(Q.size), R, np.ones(Q.size), q_range=(9.0, 12.0))
    # every key named in those errors is in the schema
    schema = yaml.safe_load((SCHEMA_DIR / "analysis.schema.yaml").read_text())["properties"]["realspace"]
    for key in ("sharpen_pair", "q_range_invA", "damping_A2", "r_max_A"):
        assert "description" in schema["properties"][key]
