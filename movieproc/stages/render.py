"""Stage ``render``: figures of the movie as PNG files (and an animated GIF).

Input ``movie`` (store); ``out`` is the marker file ``figures/.done``, written last,
and the figures go into its folder. Config sections ``render`` and ``run``.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..io import movie, store
from ..render import figures, kinetics

log = logging.getLogger("movieproc.render")

#: Figures every run writes (more are added when the movie holds fit results).
BASIC = ("difference_map.png", "difference_curves.png")


class _Figures:
    """Where the figures go, at what resolution, and which were written."""

    def __init__(self, folder: Path, dpi: int):
        self.folder, self.dpi = folder, dpi
        self.written: list[Path] = []

    def save(self, fig, name):
        figures.save(fig, self.folder / name, self.dpi)
        self.written.append(self.folder / name)


def _read(m, name):
    return store.read(m, name) if name in m else None


def run(inputs: dict, out: Path, config: dict) -> list:
    """Write the figures of a movie next to the marker ``out``, then the marker; returns the paths written."""
    rcfg, name = config["render"], config["run"]["name"]
    m = store.open_group(inputs["movie"], "movie")
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    figs = _Figures(out.parent, rcfg["dpi"])
    q, delay = store.read(m, "q"), store.read(m, "delay")
    diff, err = store.read(m, "difference"), store.read(m, "difference_error")
    units = movie.display_units(m["difference"])
    figs.save(figures.difference_map(q, delay, diff, q_weighted=rcfg["q_weighted"],
                                     low_count=store.read(m, "too_few_shots"), title=f"{name}: difference map",
                                     units=units), "difference_map.png")
    model = _read(m, "model")
    if model is not None:
        # model and data in the analysis units (absolute scale when configured)
        factor = float(m.attrs.get("absolute_scale_factor", 1.0))
        diff, err, units = diff * factor, err * factor, m.attrs.get("analysis_units", units)
    band = f"band ±1 s.e.{', line: fit' if model is not None else ''}"
    figs.save(figures.difference_curves(q, delay, diff, err, rcfg["delays_ps"], rcfg["q_weighted"], model=model,
                                        title=f"{name}: difference curves ({band})", units=units),
              "difference_curves.png")
    _analysis_figures(m, figs, name, q, delay, err, model, rcfg)
    geo = _geometry(m, figs, name, delay)
    if rcfg["animation"]:
        els = [str(e) for e in m["element"][...]] if "element" in m else None
        labels = {g: store.read(m, "geometry")[:, i] for i, g in enumerate(geo)}
        figures.animation(figs.folder / "movie.gif", q, delay, diff, err, model, _read(m, "positions"), els, labels,
                          rcfg["q_weighted"], units, title=f"{name}: difference and structure per delay")
        figs.written.append(figs.folder / "movie.gif")
    log.info("figures: %s", ", ".join(str(p) for p in figs.written))
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text("figures written\n")
    tmp.replace(out)
    return figs.written


def _analysis_figures(m, figs, name, q, delay, err, model, rcfg):
    """SVD, kinetics, residual and real-space figures, where the movie holds those results."""
    if "svd_values" in m:
        attrs = m.attrs
        figs.save(figures.svd_summary(q, delay, store.read(m, "svd_values"), store.read(m, "svd_noise_values"),
                                      store.read(m, "svd_delay_vectors"), store.read(m, "svd_q_vectors"),
                                      attrs.get("svd_components", 0),
                                      attrs.get("svd_threshold"), _read(m, "svd_structured"),
                                      attrs.get("svd_decision", ""), title=f"{name}: SVD of the solute difference"),
                  "svd.png")
    if "population" in m or "solvent_coefficient" in m:
        _kinetics_figure(m, figs, name, delay)
    if model is not None:
        figs.save(figures.residual_map(q, delay, store.read(m, "residual"), err, title=f"{name}: fit residuals"),
                  "residual_map.png")
    if "solute_realspace" in m:
        info = dict(m["solute_realspace"].attrs)
        figs.save(figures.realspace(store.read(m, "r"), delay, store.read(m, "solute_realspace"), rcfg["delays_ps"],
                                    title=f"{name}: real-space difference (solute)",
                                    units=info.get("display_units", ""),
                                    info=info), "realspace.png")


def _kinetics_figure(m, figs, name, delay):
    """Fitted populations on a fine grid (named by species), solvent terms and chi2; says when nothing was fitted."""
    params = movie.fit_parameters(m)
    text = "\n".join(f"{k:>9s} = {v['value']:.4g} ± {v['error']:.2g} {v.get('units', '').strip('1')}"
                     for k, v in params.items())
    curves = kinetics.population_curves(movie.fit_summary(m), delay, _read(m, "population"))
    mode = m.attrs.get("fit_mode") or movie.config(m).get("fit", {}).get("mode", "none")
    note = "" if curves is not None else f"no fit configured (fit.mode: {mode}): no populations drawn"
    terms = [str(t) for t in m["term"][...]] if "term" in m else []
    coef_units = movie.term_units_label(m)
    figs.save(figures.kinetics(delay, curves, _read(m, "solvent_coefficient"), _read(m, "solvent_coefficient_error"),
                               terms, _read(m, "reduced_chi_squared"), text, title=f"{name}: kinetics",
                               coef_units=coef_units, note=note),
              "kinetics.png")


def _geometry(m, figs, name, delay):
    """Figure of the geometric parameters per delay; returns their names."""
    geo = [str(g) for g in m["parameter"][...]] if "geometry" in m else []
    if not geo:
        return geo
    table = store.read(m, "geometry")
    vals = {g: table[:, i] for i, g in enumerate(geo)}
    if any(np.isfinite(v).any() for v in vals.values()):
        lower, upper = store.read(m, "geometry_lower"), store.read(m, "geometry_upper")
        lo = {g: lower[:, i] for i, g in enumerate(geo)}
        hi = {g: upper[:, i] for i, g in enumerate(geo)}
        units = {g: m["geometry"].attrs.get("units", "") for g in geo}
        figs.save(figures.structure_parameters(delay, vals, lo, hi, units, title=f"{name}: structure per delay"),
                  "structure.png")
    return geo
