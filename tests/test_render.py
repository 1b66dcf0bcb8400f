"""Figures say what they show: population curves named and scaled from the fit, no empty panels."""

import numpy as np
from scipy import special

from movieproc.render import figures, kinetics

DELAY = np.concatenate([np.arange(-0.5, 1.0, 0.05), [2.0, 5.0, 20.0, 100.0]])


def _attrs(mode="trajectory", scaling="solute", **fit):
    params = {"t0": {"value": 0.02, "error": 0.003, "units": "ps"},
              "sigma": {"value": 0.08, "error": 0.004, "units": "ps"},
              "alpha": {"value": 0.12, "error": 0.01, "units": "1"}}
    if mode == "trajectory":
        params["lifetime"] = {"value": 15.0, "error": 1.0, "units": "ps"}
        species = ["excited"]
    else:
        params["lifetime_1"] = {"value": 15.0, "error": 1.0, "units": "ps"}
        species = ["A1", "P"]
    cfg_fit = {"mode": mode, "kinetics": "sequential", "lifetimes_ps": [15.0], "network": None,
               "signal_species": None, "product_signal": False, "species_curves": "model", **fit}
    return {"fit_mode": mode, "fit_parameters": params, "fit_species": species,
            "config": {"fit": cfg_fit, "model": {"species": {"bridged": "b.xyz"}}, "scaling": {"mode": scaling}}}


def test_trajectory_population_on_a_fine_grid_through_the_irf():
    curves = kinetics.population_curves(_attrs(), DELAY, np.ones((DELAY.size, 1)))
    assert np.all(np.diff(curves.delay) > 0) and np.max(np.diff(curves.delay[curves.delay < 1.0])) <= 0.0041
    # exponential decay from t0 convolved with a Gaussian of sigma s:
    # 1/2 exp(-k x + k^2 s^2 / 2) erfc((k s^2 - x) / (sqrt(2) s)), x = t - t0 (from memory; standard result)
    k, s, t0 = 1 / 15.0, 0.08, 0.02
    x = curves.delay - t0
    ref = 0.5 * np.exp(-k * x + k**2 * s**2 / 2) * special.erfc((k * s**2 - x) / (np.sqrt(2) * s))
    np.testing.assert_allclose(curves.values[:, 0], 0.12 * ref, atol=1e-9)
    assert curves.names == ["excited state"]
    assert curves.ylabel.startswith("fraction of solute molecules")
    # on the relative scale the axis says the fit's units
    rel = kinetics.population_curves(_attrs(scaling="relative"), DELAY, np.ones((DELAY.size, 1)))
    assert "model units" in rel.ylabel


def test_species_named_from_the_config_and_the_product_is_the_recovered_ground_state():
    curves = kinetics.population_curves(_attrs("species"), DELAY, np.ones((DELAY.size, 2)))
    assert curves.names == ["bridged (A1)", "P: recovered ground state"]
    # populations of a two-state sequential scheme sum to the excited amount after the IRF
    late = curves.delay > 1.0
    np.testing.assert_allclose(curves.values[late].sum(axis=1), 0.12, rtol=1e-9)


def test_no_fit_no_population_curves():
    attrs = _attrs()
    attrs["fit_parameters"] = {}
    assert kinetics.population_curves(attrs, DELAY, None) is None


def test_kinetics_without_a_fit_says_so_and_draws_no_empty_panel():
    fig = figures.kinetics(DELAY, None, note="no fit configured (fit.mode: none): no populations drawn")
    axes = fig.get_axes()
    assert len(axes) == 1 and not axes[0].axison
    assert any("no fit configured" in t.get_text() for t in axes[0].texts)
    coef = np.ones((DELAY.size, 1))
    fig = figures.kinetics(DELAY, None, coef, 0.1 * coef, ["dT"], note="no fit configured")
    assert len(fig.get_axes()) == 1 and "no fit configured" in fig.get_suptitle()


def test_svd_figure_marks_the_components_it_did_not_count():
    values = np.array([100.0, 40.0, 25.0, 12.0])
    fig = figures.svd_summary(np.linspace(1, 4, 20), DELAY, values, np.array([15.0, 14.0, 13.0, 12.0]),
                              np.ones((DELAY.size, 4)), np.ones((4, 20)), 2, threshold=18.0,
                              structured=[True, True, False, True], decision="the smoothness test decided")
    labels = fig.get_axes()[0].get_legend_handles_labels()[1]
    assert "above threshold, vectors like noise: not counted" in labels
    assert "threshold: largest noise value" in labels
    assert fig.get_axes()[0].get_title() == "2 component(s) counted"
