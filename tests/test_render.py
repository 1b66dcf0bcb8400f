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


# ------------------------------------------------------------------ a small movie, the render stage, the report

def write_movie(path, n_delay=12, n_q=60, warnings=None):
    """A small movie store like the assemble stage writes (log-spaced bins, one empty, one with few shots)."""
    from movieproc.io import store

    rng = np.random.default_rng(3)
    edges = np.concatenate([[-1.0, -0.5, 0.0], np.geomspace(0.1, 100.0, n_delay - 2)])
    delay = 0.5 * (edges[1:] + edges[:-1]) + 0.01
    q = np.linspace(0.5, 5.0, n_q)
    signal = np.sin(3 * q)[None, :] * (delay > 0)[:, None] * 1e-3
    diff = signal + 1e-4 * rng.standard_normal((n_delay, n_q))
    n_shots = np.full(n_delay, 200)
    n_shots[4], n_shots[6] = 3, 0
    diff[6] = np.nan  # an empty bin
    attrs = {"title": "movie of run 'small'", "config_yaml": "run:\n  name: small\n",
             "input_files": ["run_000.h5"], "input_checksums": {"run_000.h5": "sha256:00"}, "input_mode": "curves",
             "selection_counts": {"pulse_energy": 5, "timing_missing": 7, "total": 500, "kept": 488, "dropped": 12,
                                  "kept_pump_on": 320, "kept_pump_off": 168},
             "versions": {"movieproc": "test"}, "written": "2026-01-01T00:00:00",
             "conventions": {"delay": "ps"}, "safety": "read the safety notice",
             "warnings": warnings if warnings is not None else
             [f"[bins] bin {b} [{b}.5, {b}.7) ps has {b} pump-on shots (< binning.min_shots = 10)" for b in range(5)]
             + ["[analyze] <fit> & did not converge"],
             "fit_mode": "none", "fit_parameters": {"lifetime": {"value": 15.0, "error": 1.0, "units": "ps"},
                                                    "alpha": {"value": 0.1, "error": 0.01, "units": "1"}},
             "fit_correlation_names": ["lifetime", "alpha"]}
    g = store.new_group(path, attrs)
    store.write_array(g, "delay", delay, ["delay"], units="ps")
    store.write_array(g, "q", q, ["q"], units="1/Å")
    store.write_array(g, "delay_edges", edges, ["edge"], units="ps")
    store.write_array(g, "diff", diff, ["delay", "q"], units="fraction of the normalization-window mean")
    store.write_array(g, "diff_err", np.full_like(diff, 1e-4), ["delay", "q"],
                      units="fraction of the normalization-window mean")
    store.write_array(g, "n_shots", n_shots, ["delay"])
    store.write_array(g, "low_count", n_shots < 10, ["delay"])
    store.write_array(g, "delay_spread", np.full(n_delay, 0.05), ["delay"], units="ps")
    store.write_array(g, "correlation", np.array([[1.0, -0.4], [-0.4, 1.0]]), ["param", "param_b"])
    return path


RCFG = {"delays_ps": [0.3, 5.0], "q_weighted": True, "dpi": 60, "formats": ["png"], "animation": True}


def render_small(tmp_path, **change):
    from movieproc.stages import render

    movie = write_movie(tmp_path / "movie.zarr") if not (tmp_path / "movie.zarr").exists() else tmp_path / "movie.zarr"
    marker = tmp_path / "figures" / ".done"
    render.run({"movie": movie}, marker, {"render": dict(RCFG, **change), "run": {"name": "small <run>"}})
    return marker


def test_warnings_grouped_by_kind_with_counts():
    from movieproc.warning_groups import group_warnings, summary_lines

    warns = [f"[bins] bin {b} [{-1 + 0.1 * b:.4g}, {-0.9 + 0.1 * b:.4g}) ps has {b % 4} pump-on shots "
             "(< binning.min_shots = 10)" for b in range(962)] + ["[analyze] the Ir2 fit did not converge"]
    groups = group_warnings(warns)
    assert [g.count for g in groups] == [962, 1]
    assert groups[1].kind == "[analyze] the Ir2 fit did not converge"  # digits inside words are not numbers
    lines = summary_lines(warns)
    assert lines[0] == "warnings: 963 (2 kinds)" and len(lines) == 3
    assert lines[1].startswith("  962 x [bins] bin 0 ")


def test_render_writes_report_and_removes_only_its_own_switched_off_outputs(tmp_path):
    marker = render_small(tmp_path, formats=["png", "pdf"])
    folder = marker.parent
    assert (folder / "movie.gif").is_file() and (folder / "difference_map.pdf").read_bytes()[:5] == b"%PDF-"
    mine = folder / "notes.txt"
    mine.write_text("a file render did not write")
    render_small(tmp_path, formats=["svg"], animation=False)
    names = {p.name for p in folder.iterdir()}
    assert "movie.gif" not in names and not any(n.endswith((".pdf", ".png")) for n in names)
    assert {"difference_map.svg", "difference_curves.svg", "timing.svg", "report.html", "notes.txt"} <= names
    text = (folder / "report.html").read_text()
    # self-contained: figures inline, nothing fetched
    assert text.count("data:image/png;base64,") >= 3
    assert "http://" not in text and "https://" not in text and "<script" not in text
    assert "small &lt;run&gt;" in text and "&lt;fit&gt; &amp; did not converge" in text  # escaped
    assert "<summary><b>5 ×</b>" in text  # the five per-bin warnings folded into one line
    assert "read the safety notice" in text
    assert "per-shot corrections are missing" in text  # no delays/shots store given


def test_render_command_redraws_a_copy_and_leaves_every_store_untouched(tmp_path, capsys):
    import hashlib

    from movieproc import cli

    movie = write_movie(tmp_path / "movie.zarr")
    before = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in movie.rglob("*") if p.is_file()}
    assert cli.main(["render", str(movie), "--set", "render.animation=false", "render.dpi=60"]) == 0
    assert "report:" in capsys.readouterr().out
    after = {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in movie.rglob("*") if p.is_file()}
    assert after == before
    assert (tmp_path / "figures" / "report.html").is_file()
    assert "<title>small: " in (tmp_path / "figures" / "report.html").read_text()  # the movie's run name
    assert not (tmp_path / "figures" / "movie.gif").exists()
    # only render settings may be changed: the movie is not re-made
    assert cli.main(["render", str(movie), "--set", "binning.width_ps=0.1"]) == 2


def test_difference_map_on_a_true_delay_axis_with_bins_at_their_widths():
    import matplotlib.pyplot as plt

    from movieproc.render import style

    edges = np.array([-1.0, -0.5, 0.0, 0.5, 1.0, 10.0, 100.0])
    delay = 0.5 * (edges[1:] + edges[:-1])
    q = np.linspace(1, 4, 10)
    fig = figures.difference_map(q, delay, np.ones((6, 10)), edges, units="e.u.", n_shots=np.full(6, 50))
    ax = fig.axes[0]
    assert ax.get_yscale() == "symlog"
    assert ax.yaxis.get_transform().linthresh == style.DELAY_LINTHRESH_PS
    mesh = ax.collections[0]
    # the mesh's row edges are the bin edges themselves (not one row per bin)
    np.testing.assert_allclose(np.unique(mesh.get_coordinates()[:, 0, 1]), edges)
    assert fig.axes[-1].get_ylabel() == "q·ΔS (1/Å × e.u.)"
    fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_yticklabels() if t.get_text()]
    assert "-1" in labels and "100" in labels and not any("^" in t or "10⁰" in t for t in labels)
    plt.close(fig)
