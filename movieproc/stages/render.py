"""Stage ``render``: figures of the movie (PNG, PDF or SVG), an animated GIF and a self-contained report.

Input ``movie`` (store) and, optionally, ``delays`` and ``shots`` (stores: per-shot timing
for the report's diagnostics); ``out`` is the marker file ``figures/.done``, written last,
and everything goes into its folder. Config sections ``render`` and ``run``.

The marker lists what this stage wrote (JSON); a later render removes the files of that
list it no longer writes (a figure switched off, a format dropped) and never anything else.

The movie's variables are read in one place, :func:`read_movie`, which knows their names.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import progress
from ..io import movie as movie_attrs
from ..io import store
from ..render import figures, kinetics, report, style, timing
from ..warning_groups import summary_lines

log = logging.getLogger("movieproc.render")

#: Names of the movie's variables: each entry lists the current name first, then older ones still read.
NAMES = {
    "difference": ("difference", "diff"),
    "difference_error": ("difference_error", "diff_err"),
    "bounds": ("delay_bounds", "delay_edges"),
    "solvent_coef": ("solvent_coefficient", "solvent_coef"),
    "solvent_coef_error": ("solvent_coefficient_error", "solvent_coef_error", "solvent_coef_err"),
    "chi2": ("reduced_chi_squared", "chi2"),
    "svd_noise": ("svd_noise_values", "svd_noise"),
    "svd_u": ("svd_delay_vectors", "svd_u"),
    "svd_v": ("svd_q_vectors", "svd_v"),
    "correlation": ("fit_correlation", "correlation"),
    "n_shots": ("shot_count", "n_shots"),
    "low_count": ("too_few_shots", "low_count"),
}
#: Figures every run writes (more are added when the movie holds fit results).
BASIC = ("difference_map", "difference_curves", "timing")
#: The report's name, beside the figures.
REPORT = "report.html"
#: The animation's name.
ANIMATION = "movie.gif"
#: Resolution of the PNGs embedded in the report (dpi; the files use render.dpi).
REPORT_DPI = 100  # of the report's images when no PNG files are written


@dataclass
class Movie:
    """What the figures and the report use from a movie (see :func:`read_movie`).

    ``bounds`` (nd, 2) ps; ``difference``/``difference_error`` (nd, nq) in ``units``;
    ``arrays`` the optional results by their role; ``geometry`` name -> (value, lower,
    upper, unit), each value ndarray (nd,); ``attrs`` as :func:`movieproc.io.movie.readable_attrs` gives them.
    """

    path: Path
    q: np.ndarray
    delay: np.ndarray
    bounds: np.ndarray
    difference: np.ndarray
    difference_error: np.ndarray
    units: str
    n_shots: np.ndarray
    low_count: np.ndarray
    attrs: dict
    arrays: dict = field(default_factory=dict)
    geometry: dict = field(default_factory=dict)
    coords: dict = field(default_factory=dict)


def _name(m, role):
    for name in NAMES.get(role, (role,)):
        if name in m:
            return name
    return None


def _read(m, role):
    name = _name(m, role)
    return store.read(m, name) if name else None


def read_movie(path) -> Movie:
    """Read the movie store at ``path`` for the figures and the report (only here are its names known)."""
    m = store.open_group(path, "movie")
    delay = store.read(m, "delay")
    diff_name = _name(m, "difference")
    if diff_name is None or _name(m, "difference_error") is None:
        from ..errors import InputError

        raise InputError(path, "no difference or its error", "a movie written by movieproc (movieproc run)")
    attrs = movie_attrs.readable_attrs(m)
    arrays = {role: _read(m, role) for role in (
        "model", "residual", "population", "solvent_coef", "solvent_coef_error", "chi2", "svd_values", "svd_noise",
        "svd_u", "svd_v", "r", "solute_realspace", "positions", "delay_spread", "correlation") if _name(m, role)}
    movie = Movie(Path(path), store.read(m, "q"), delay, figures.bin_edges(delay, _read(m, "bounds")),
                  store.read(m, diff_name), _read(m, "difference_error"), movie_attrs.display_units(m[diff_name]),
                  _read(m, "n_shots"), np.asarray(_read(m, "low_count"), bool), attrs, arrays)
    movie.coords = {k: [str(v) for v in m[k][...]] for k in ("term", "element", "parameter") if k in m}
    for role in ("solvent_coef", "solute_realspace"):
        if role in arrays:
            movie.attrs[f"{role}_attrs"] = dict(m[_name(m, role)].attrs)
    movie.geometry = _read_geometry(m)
    return movie


def _read_geometry(m) -> dict:
    """name -> (value, lower, upper, unit) per delay: one ``geometry`` (delay, parameter) variable or
    ``geometry_<name>`` variables with ``_lower``/``_upper``."""
    if "geometry" in m and "parameter" in m:
        names = [str(v) for v in m["parameter"][...]]
        val = store.read(m, "geometry")
        unit = m["geometry"].attrs.get("units", "")
        units = ([str(u) for u in m["parameter_units"][...]] if "parameter_units" in m
                 else unit if isinstance(unit, list) else [unit] * len(names))
        lo = store.read(m, "geometry_lower") if "geometry_lower" in m else np.full_like(val, np.nan)
        hi = store.read(m, "geometry_upper") if "geometry_upper" in m else np.full_like(val, np.nan)
        return {n: (val[:, j], lo[:, j], hi[:, j], style.unit_label(units[j])) for j, n in enumerate(names)}
    out = {}
    for key in sorted(m.array_keys()):
        if key.startswith("geometry_") and not key.endswith(("_lower", "_upper")):
            v = store.read(m, key)
            lo, hi = (store.read(m, key + s) if key + s in m else np.full_like(v, np.nan) for s in ("_lower", "_upper"))
            out[key[len("geometry_"):]] = (v, lo, hi, m[key].attrs.get("units", ""))
    return out


def read_shot_timing(delays_path, shots_path):
    """Per-shot timing for the diagnostics, or None: (stage delay ps, corrected delay ps, correction fs, pump on)."""
    if delays_path is None or shots_path is None or not Path(delays_path).exists() or not Path(shots_path).exists():
        return None
    d, s = store.open_group(delays_path, "delays store"), store.open_group(shots_path, "shots store")
    if "correction" not in d or "stage_delay" not in s:
        return None
    return timing.ShotTiming(store.read(s, "stage_delay"), store.read(d, "delay"), store.read(d, "correction"),
                             np.asarray(store.read(s, "pump_on"), bool))


class _Figures:
    """Where the figures go, in which formats, and what was written (names relative to the folder)."""

    def __init__(self, folder: Path, dpi: int, formats, counter=None):
        self.folder, self.dpi, self.formats = folder, dpi, list(formats)
        self.written: list[str] = []
        self.embedded: list[report.Figure] = []
        self.counter = counter  # a progress bar, updated once per figure

    def save(self, fig, name, caption=""):
        for fmt in self.formats:
            figures.save(fig, self.folder / f"{name}.{fmt}", self.dpi)
            self.written.append(f"{name}.{fmt}")
        # the report embeds the PNG just written (drawing a figure costs more than reading it back)
        png = (self.folder / f"{name}.png").read_bytes() if "png" in self.formats else figures.png_bytes(fig,
                                                                                                          REPORT_DPI)
        self.embedded.append(report.Figure(name, caption, png))
        figures.plt.close(fig)
        if self.counter is not None:
            self.counter.update(1)


def run(inputs: dict, out: Path, config: dict) -> list:
    """Write the figures and the report of a movie next to the marker ``out``, then the marker.

    Returns the paths written. Files an earlier render wrote there (listed in its marker)
    and this one did not are removed.
    """
    rcfg, name = config["render"], config["run"]["name"]
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    movie = read_movie(inputs["movie"])
    shots = read_shot_timing(inputs.get("delays"), inputs.get("shots"))
    with progress.bar(None, "render", "figures") as counter, style.figure_style():
        figs = _Figures(out.parent, rcfg["dpi"], rcfg.get("formats", ["png"]), counter)
        draw_all(movie, figs, name, rcfg, shots)
        if rcfg["animation"]:
            _animation(movie, figs.folder / ANIMATION, name, rcfg)
            figs.written.append(ANIMATION)
            counter.update(1)
    report.write(figs.folder / REPORT, report.Content(
        name=name, movie=movie, figures=figs.embedded, render_config=rcfg,
        animation=ANIMATION if rcfg["animation"] else None, shot_timing=shots is not None))
    figs.written.append(REPORT)
    removed = _remove_stale(out, figs.written)
    log.info("figures and report in %s: %s%s", figs.folder, ", ".join(figs.written),
             f"; removed from an earlier render: {', '.join(removed)}" if removed else "")
    for line in summary_lines(movie.attrs.get("warnings", [])):
        log.info("%s", line)
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps({"written_by": "movieproc render", "files": figs.written, "render": rcfg}, indent=1)
                   + "\n")
    tmp.replace(out)
    return [figs.folder / f for f in figs.written]


def earlier_settings(marker: Path) -> dict | None:
    """The render settings an earlier render recorded in its marker, or None."""
    try:
        settings = json.loads(Path(marker).read_text()).get("render")
    except (OSError, ValueError, AttributeError):
        return None
    return settings if isinstance(settings, dict) else None


def _remove_stale(marker: Path, written) -> list:
    """Remove the files the earlier render listed in ``marker`` that this one did not write."""
    if not marker.exists():
        return []
    try:
        earlier = json.loads(marker.read_text()).get("files", [])
    except (ValueError, AttributeError):
        return []  # an older marker without a list: remove nothing
    removed = []
    for rel in earlier:
        path = marker.parent / rel
        if rel not in written and Path(rel).name == rel and path.is_file():
            path.unlink()
            removed.append(rel)
    return removed


def draw_all(movie: Movie, figs: _Figures, name: str, rcfg: dict, shots=None):
    """Every figure the movie has content for."""
    q, delay = movie.q, movie.delay
    diff, err, units = _analysis_scale(movie)
    figs.save(figures.difference_map(q, delay, diff, movie.bounds, rcfg["q_weighted"], movie.low_count,
                                     movie.n_shots, title=f"{name}: difference map", units=units),
              "difference_map", "Difference map on a true delay axis, bins at their widths; shots per bin beside it.")
    model = movie.arrays.get("model")
    figs.save(figures.difference_curves(q, delay, diff, err, rcfg["delays_ps"], rcfg["q_weighted"], model=model,
                                        title=f"{name}: difference curves", units=units),
              "difference_curves", "Difference curves at the requested delays (nearest bin), band ±1 standard error.")
    figs.save(timing.diagnostics(movie.bounds, delay, movie.n_shots, movie.low_count,
                                 movie.arrays.get("delay_spread"), shots, title=f"{name}: timing diagnostics"),
              "timing", timing.CAPTION)
    _analysis_figures(movie, figs, name, err, rcfg)
    _structure_figure(movie, figs, name)


def _analysis_scale(movie: Movie):
    """Difference and error in the analysis units (absolute scale) when the movie has them, else as stored."""
    factor = float(movie.attrs.get("absolute_scale_factor", 1.0) or 1.0)
    units = movie.attrs.get("analysis_units") or movie.units
    return movie.difference * factor, movie.difference_error * factor, units


def _analysis_figures(movie: Movie, figs: _Figures, name, err, rcfg):
    """SVD, kinetics, residual and real-space figures, where the movie holds those results."""
    a, arr, q, delay = movie.attrs, movie.arrays, movie.q, movie.delay
    if "svd_values" in arr:
        figs.save(figures.svd_summary(q, delay, arr["svd_values"], arr["svd_noise"], arr["svd_u"], arr["svd_v"],
                                      a.get("svd_components", 0), a.get("svd_threshold"), a.get("svd_structured"),
                                      a.get("svd_decision", ""), title=f"{name}: SVD of the solute difference"),
                  "svd", "Singular values against the noise threshold, and the leading vectors.")
    if "population" in arr or "solvent_coef" in arr:
        _kinetics_figure(movie, figs, name)
    if "residual" in arr:
        figs.save(figures.residual_map(q, delay, arr["residual"], err, title=f"{name}: fit residuals",
                                       bounds=movie.bounds),
                  "residual_map", "Residuals of the fit over the standard errors: should look like noise.")
    if "solute_realspace" in arr:
        info = a.get("solute_realspace_attrs", {})
        figs.save(figures.realspace(arr["r"], delay, arr["solute_realspace"], rcfg["delays_ps"],
                                    title=f"{name}: real-space difference (solute)",
                                    units=info.get("display_units") or info.get("units", ""), info=info),
                  "realspace", info.get("long_name") or info.get("meaning", "Real-space difference."))


def _kinetics_figure(movie: Movie, figs: _Figures, name):
    """Fitted populations on a fine grid (named by species), solvent terms and chi2; says when nothing was fitted."""
    a, arr = movie.attrs, movie.arrays
    text = "\n".join(f"{k:>9s} = {v['value']:.4g} ± {v['error']:.2g} {report.unit_text(v.get('units'))}"
                     for k, v in (a.get("fit_parameters") or {}).items())
    curves = kinetics.population_curves(a, movie.delay, arr.get("population"))
    physical = [t for t in movie.coords.get("term", []) if t not in figures.NUISANCE_TERMS]
    if curves is None and (arr.get("solvent_coef") is None or not physical) and arr.get("chi2") is None:
        log.info("no kinetics figure: no fit, no solvent terms and no chi2 per delay in the movie")
        return
    mode = a.get("fit_mode") or (a.get("config") or {}).get("fit", {}).get("mode", "none")
    note = "" if curves is not None else f"no fit configured (fit.mode: {mode}): no populations drawn"
    if curves is not None and text:
        text = "fitted (± 1 standard error)\n" + text
    coef_units = movie_attrs.term_units_label(store.open_group(movie.path, "movie")) or a.get(
        "solvent_coef_attrs", {}).get("units", "")
    figs.save(figures.kinetics(movie.delay, curves, arr.get("solvent_coef"), arr.get("solvent_coef_error"),
                               movie.coords.get("term", []), arr.get("chi2"), text, title=f"{name}: kinetics",
                               coef_units=coef_units, note=note),
              "kinetics", "Fitted populations (model on a fine delay grid through the IRF), solvent terms, χ².")


def ground_geometry(movie: Movie) -> tuple[dict, str]:
    """The geometric parameters in the ground-state structure (``model.ground``), or ({}, why not)."""
    cfg = movie.attrs.get("config") or {}
    ground, indices = (cfg.get("model") or {}).get("ground"), (cfg.get("fit") or {}).get("geometry") or {}
    if not ground or not indices:
        return {}, "no ground-state structure (model.ground) in the movie's config: no reference line"
    if not Path(ground).exists():
        return {}, f"ground-state structure {ground} not found from here: no reference line"
    from ..io.structures import read_structure
    from ..scattering import geometry

    _elements, pos = read_structure(ground)
    pos = np.asarray(pos, float)[None]
    return {n: float((geometry.distance(pos, *i) if len(i) == 2 else geometry.angle(pos, *i))[0])
            for n, i in indices.items()}, ""


def _structure_figure(movie: Movie, figs: _Figures, name):
    geo = movie.geometry
    if not geo or not any(np.isfinite(v[0]).any() for v in geo.values()):
        return
    ground, why = ground_geometry(movie)
    delta = (movie.attrs.get("config") or {}).get("fit", {}).get("delta_chi2")
    figs.save(figures.structure_parameters(movie.delay, {g: v[0] for g, v in geo.items()},
                                           {g: v[1] for g, v in geo.items()}, {g: v[2] for g, v in geo.items()},
                                           {g: v[3] for g, v in geo.items()}, title=f"{name}: structure per delay",
                                           ground=ground, delta_chi2=delta, ground_note=why),
              "structure", figures.interval_caption(delta))


def _animation(movie: Movie, path: Path, name, rcfg):
    diff, err, units = _analysis_scale(movie)
    els = movie.coords.get("element")
    figures.animation(path, movie.q, movie.delay, diff, err, movie.arrays.get("model"),
                      movie.arrays.get("positions"), els, movie.geometry, rcfg["q_weighted"], units,
                      title=f"{name}: difference and structure per delay")
