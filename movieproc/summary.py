"""Plain-text summaries of a run and of a movie, for a quick look at the beamline."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .io import movie, runfile, store
from .shots.timing import timing_correction
from .warning_groups import summary_lines


def summarize_run(files, timing: dict | None = None) -> str:
    """Shots, delays, timing-tool coverage and pump on/off counts of a run.

    Parameters
    ----------
    files : list of path
        Run files.
    timing : dict, optional
        The ``timing`` config section; with it the timing-correction spread is
        given in fs, without it the edge spread in px.
    """
    info = runfile.inspect_run(files)
    t = runfile.read_table(info)
    n = info.n_shots
    on = t["pump_on"]
    edge = t["timing_edge"]
    ok = np.isfinite(edge)
    stage = t["stage_delay"]
    lines = [
        f"run: {len(info.files)} file(s): " + ", ".join(str(f) for f in info.files),
        f"shots: {n} ({', '.join(f'{c} in {Path(f).name}' for f, c in zip(info.files, info.counts, strict=True))})",
        f"detector data: {info.mode}" + (f", {info.q.size} q points {info.q[0]:.3g}-{info.q[-1]:.3g} 1/Å"
                                         if info.mode == "curves" and info.q is not None
                                         else f", frames {info.frame_shape} {info.data_dtype}"),
        f"pump on: {int(on.sum())}, pump off: {int((~on).sum())}",
        f"stage delays: {np.unique(stage).size} positions from {stage.min():.4g} to {stage.max():.4g} ps",
        f"timing tool: edge found on {int(ok.sum())} shots, missing on {int((~ok).sum())} "
        f"({100 * (~ok).mean():.1f} %)",
    ]
    if ok.any():
        if timing is not None:
            corr = timing_correction(edge[ok], timing["calibration_fs"], timing["edge_at_time_zero_px"])
            lines.append(f"timing jitter (spread of the corrections): {np.std(corr):.1f} fs rms, "
                         f"5-95 % range {np.percentile(corr, 5):.0f} to {np.percentile(corr, 95):.0f} fs")
        else:
            lines.append(f"timing edge spread: {np.std(edge[ok]):.1f} px rms "
                         "(give --config with the timing calibration to see the jitter in fs)")
    pe = t["pulse_energy"]
    lines.append(f"pulse energy: median {np.median(pe):.4g}, relative rms {np.std(pe) / np.mean(pe):.2f}, "
                 f"{int(np.sum(pe < 0.3 * np.median(pe)))} shots below 30 % of the median")
    if "photon_energy" in t:
        e = t["photon_energy"]
        lines.append(f"photon energy: {np.nanmean(e):.4f} keV, relative rms {np.nanstd(e) / np.nanmean(e):.2e}")
    return "\n".join(lines)


def summarize_movie(path) -> str:
    """Delays, shots per bin, signal size, fit quality and warnings of a movie store."""
    m = store.open_group(path, "movie")
    delay = store.read(m, "delay")
    n = store.read(m, "shot_count")
    q = store.read(m, "q")
    diff = store.read(m, "difference")
    err = store.read(m, "difference_error")
    low = store.read(m, "too_few_shots")
    a = m.attrs
    version = (store.yaml_value(a, "software_versions", {}) or {}).get("movieproc")
    lines = [
        f"movie: {path}",
        f"written {a.get('written')} by movieproc {version}",
        f"inputs: {', '.join(movie.input_files(m))}",
        f"delays: {delay.size} bins from {np.nanmin(delay):.4g} to {np.nanmax(delay):.4g} ps; "
        f"pump-on shots per bin {int(n.min())}-{int(n.max())} (median {int(np.median(n))})",
        f"q: {q.size} points {q[0]:.3g}-{q[-1]:.3g} 1/Å",
        f"difference: max |dS| {np.nanmax(np.abs(diff)):.3g}, median standard error {np.nanmedian(err):.3g} "
        f"({movie.display_units(m['difference'])})",
    ]
    lines += _selection_lines(movie.selection_counts(m))
    if low.any():
        few = ", ".join(f"{d:.3g} ps ({c})" for d, c in zip(delay[low], n[low], strict=True))
        lines.append(f"bins with too few shots: {few}")
    lines += _fit_lines(m)
    lines += summary_lines(movie.warnings(m))
    return "\n".join(lines)


def _selection_lines(sc):
    """Shots kept and dropped per reason."""
    if not sc:
        return []
    summed = ("total", "kept", "dropped", "kept_pump_on", "kept_pump_off", "outlier_pump_on", "outlier_pump_off")
    lines = [f"selection: kept {sc.get('kept')} of {sc.get('total')} shots; dropped per reason: "
             + ", ".join(f"{k} {v}" for k, v in sc.items() if k not in summed)]
    if "outlier_pump_on" in sc:
        lines.append(f"outliers: {sc['outlier_pump_on']} pump-on, {sc['outlier_pump_off']} pump-off")
    return lines


def _fit_lines(m):
    """Reduced chi2 per delay and the fitted parameters, saying plainly when the fit did not converge."""
    lines = []
    if "reduced_chi_squared" in m:
        chi2 = store.read(m, "reduced_chi_squared")
        lines.append(f"fit: reduced chi2 per delay median {np.nanmedian(chi2):.2f}, max {np.nanmax(chi2):.2f}")
    params = movie.fit_parameters(m)
    if params:
        lines.append("fitted parameters: " + ", ".join(
            f"{k} = {v['value']:.4g} ± {v['error']:.2g}"
            + (f" {v['units']}" if v.get("units") not in (None, "", "1") else "")
            + (f" (bootstrap ± {v['bootstrap_error']:.2g})" if "bootstrap_error" in v else "")
            for k, v in params.items()))
        if not movie.fit_converged(m):
            lines.append("FIT DID NOT CONVERGE: the parameters above are not reliable")
    return lines
