"""Stage ``render``: figures of the movie as PNG files."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..io import store
from ..render import figures

log = logging.getLogger("movieproc.render")

#: Figures every run writes (more are added when the movie holds fit results).
BASIC = ("difference_map.png", "difference_curves.png")


def run(movie_path, out_dir, config: dict):
    """Write the figures of a movie into ``out_dir``; returns the paths written."""
    rcfg = config["render"]
    m = store.open_group(movie_path, "movie")
    q, delay = store.read(m, "q"), store.read(m, "delay")
    diff, err = store.read(m, "diff"), store.read(m, "diff_err")
    units = m["diff"].attrs.get("units", "")
    name = config["run"]["name"]
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []

    def save(fig, fname):
        figures.save(fig, out / fname, rcfg["dpi"])
        written.append(out / fname)

    save(figures.difference_map(q, delay, diff, q_weighted=rcfg["q_weighted"], low_count=store.read(m, "low_count"),
                                title=f"{name}: difference map", units=units), "difference_map.png")
    model = None
    if "model" in m:
        # model and data in the analysis units (absolute scale when configured)
        factor = float(m.attrs.get("absolute_scale_factor", 1.0))
        diff, err, units = diff * factor, err * factor, m.attrs.get("analysis_units", units)
        model = store.read(m, "model")
    save(figures.difference_curves(q, delay, diff, err, rcfg["delays_ps"], rcfg["q_weighted"], model=model,
                                   title=f"{name}: difference curves (band ±1 s.e.{', line: fit' if model is not None else ''})",
                                   units=units), "difference_curves.png")
    if "svd_values" in m:
        save(figures.svd_summary(q, delay, store.read(m, "svd_values"), store.read(m, "svd_noise"),
                                 store.read(m, "svd_u"), store.read(m, "svd_v"), m.attrs.get("svd_components", 0),
                                 title=f"{name}: SVD of the solute difference"), "svd.png")
    if "population" in m or "solvent_coef" in m:
        params = m.attrs.get("fit_parameters", {})
        text = "\n".join(f"{k:>9s} = {v['value']:.4g} ± {v['error']:.2g} {v.get('units', '').strip('1')}"
                         for k, v in params.items())
        pop = store.read(m, "population") if "population" in m else None
        if pop is not None and "alpha" in params:
            pop = pop * params["alpha"]["value"]
        terms = [str(t) for t in m["term"][...]] if "term" in m else []
        save(figures.kinetics(delay, pop, None,
                              store.read(m, "solvent_coef") if "solvent_coef" in m else None,
                              store.read(m, "solvent_coef_err") if "solvent_coef_err" in m else None, terms,
                              store.read(m, "chi2") if "chi2" in m else None, text,
                              title=f"{name}: kinetics",
                              coef_units=m["solvent_coef"].attrs.get("units", "") if "solvent_coef" in m else ""),
             "kinetics.png")
    if model is not None:
        save(figures.residual_map(q, delay, store.read(m, "residual"), err, title=f"{name}: fit residuals"),
             "residual_map.png")
    if "solute_realspace" in m:
        save(figures.realspace(store.read(m, "r"), delay, store.read(m, "solute_realspace"), rcfg["delays_ps"],
                               title=f"{name}: real-space difference (solute)",
                               units=m["solute_realspace"].attrs.get("units", "")), "realspace.png")
    geo = sorted(k[len("geometry_"):] for k in m.array_keys()
                 if k.startswith("geometry_") and not k.endswith(("_lower", "_upper")))
    if geo:
        vals = {g: store.read(m, f"geometry_{g}") for g in geo}
        lo = {g: store.read(m, f"geometry_{g}_lower") for g in geo}
        hi = {g: store.read(m, f"geometry_{g}_upper") for g in geo}
        if any(np.isfinite(v).any() for v in vals.values()):
            geo_units = {g: m[f"geometry_{g}"].attrs.get("units", "") for g in geo}
            save(figures.structure_parameters(delay, vals, lo, hi, geo_units, title=f"{name}: structure per delay"),
                 "structure.png")
    if rcfg["animation"]:
        pos = store.read(m, "positions") if "positions" in m else None
        els = [str(e) for e in m["element"][...]] if "element" in m else None
        labels = {g: store.read(m, f"geometry_{g}") for g in geo}
        figures.animation(out / "movie.gif", q, delay, diff, err, model, pos, els, labels, rcfg["q_weighted"], units,
                          title=f"{name}: difference and structure per delay")
        written.append(out / "movie.gif")
    log.info("figures: %s", ", ".join(str(p) for p in written))
    return written
