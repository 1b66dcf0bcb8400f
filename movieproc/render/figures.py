"""Figures of a movie: the difference map and curves at chosen delays.

Plain matplotlib on arrays; the render stage reads the movie and calls these.
"""

from __future__ import annotations

from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import TwoSlopeNorm  # noqa: E402
from matplotlib.layout_engine import ConstrainedLayoutEngine  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.ticker import MaxNLocator  # noqa: E402

from . import style  # noqa: E402


def _robust_limit(values, pct=99.0):
    v = np.abs(np.asarray(values)[np.isfinite(values)])
    lim = np.percentile(v, pct) if v.size else 1.0
    return lim if lim > 0 else 1.0


def bin_edges(delay, bounds=None):
    """Lower and upper delay of each bin, ps, shape (nd, 2).

    Parameters
    ----------
    delay : ndarray (nd,), ps
        Bin delays (their means).
    bounds : ndarray (nd + 1,) or (nd, 2), optional
        Bin edges, or each bin's (lower, upper) bounds; without them each bin reaches
        half-way to its neighbours.
    """
    delay = np.asarray(delay, float)
    if bounds is not None:
        b = np.asarray(bounds, float)
        if b.ndim == 2 and b.shape == (delay.size, 2):
            return b
        if b.ndim == 1 and b.size == delay.size + 1:
            return np.column_stack([b[:-1], b[1:]])
        raise ValueError(f"bounds: shape {b.shape}, expected ({delay.size + 1},) or ({delay.size}, 2)")
    if delay.size == 1:
        return np.array([[delay[0] - 0.5, delay[0] + 0.5]])
    mid = (delay[1:] + delay[:-1]) / 2
    return np.column_stack([np.r_[delay[0] - (mid[0] - delay[0]), mid], np.r_[mid, delay[-1] + (delay[-1] - mid[-1])]])


def _mesh_rows(bounds, values):
    """Edges (n + 1,) and rows (n, nq) for pcolormesh; gaps between bins become empty (NaN) rows."""
    edges, rows = [bounds[0, 0]], []
    gap = np.full(values.shape[1], np.nan)
    for (lo, hi), row in zip(bounds, values, strict=True):
        if lo > edges[-1]:
            rows.append(gap)
            edges.append(lo)
        rows.append(row)
        edges.append(hi)
    return np.asarray(edges), np.asarray(rows)


def _q_edges(q):
    return np.concatenate([[q[0] - (q[1] - q[0]) / 2], (q[1:] + q[:-1]) / 2, [q[-1] + (q[-1] - q[-2]) / 2]])


def signal_label(q_weighted, units, wrap=False):
    """Axis label of a (q-weighted) difference with its units (units on a second line with ``wrap``)."""
    sep = "\n" if wrap else " "
    if q_weighted:
        return "q·ΔS" + sep + "(1/Å × " + (units or "data units") + ")"
    return "ΔS" + sep + "(" + (units or "data units") + ")"


def _map(q, delay, values, lim, bounds, shots=None, low_count=None, size=(style.PAGE, 5.2)):
    """A (delay, q) map on a true delay axis, bins at their widths, with shots per bin beside it."""
    fig = plt.figure(figsize=size, layout="constrained")
    if shots is not None:
        ax, sax = fig.subplots(1, 2, sharey=True, gridspec_kw={"width_ratios": [5, 1]})
    else:
        ax, sax = fig.subplots(1, 1), None
    b = bin_edges(delay, bounds)
    edges, rows = _mesh_rows(b, np.asarray(values, float))
    ax.set_facecolor("0.88")  # no data (empty bins, gaps): grey, not white (white is zero)
    mesh = ax.pcolormesh(_q_edges(q), edges, np.ma.masked_invalid(rows), cmap=style.DIVERGING,
                         norm=TwoSlopeNorm(0.0, -lim, lim), shading="flat", rasterized=True)
    style.delay_axis(ax, edges, which="y")
    ax.set_ylim(edges[0], edges[-1])
    ax.set_xlabel("q (1/Å)")
    if sax is not None:
        _shots_strip(sax, b, np.asarray(shots, float), low_count)
    return fig, ax, mesh


def _shots_strip(ax, bounds, shots, low_count):
    """Pump-on shots per bin as horizontal bars at the bins' true heights; too few shots in red."""
    low = np.zeros(shots.size, bool) if low_count is None else np.asarray(low_count, bool)
    colors = np.where(low, style.FIT, "0.5")
    ax.barh(bounds[:, 0], np.maximum(shots, 0.5), height=bounds[:, 1] - bounds[:, 0], align="edge", color=colors,
            edgecolor="white", lw=0.4)  # a thin white line between neighbouring bins
    ax.xaxis.set_major_locator(MaxNLocator(2, integer=True))
    ax.set_xlabel("pump-on\nshots per bin")
    ax.tick_params(labelleft=False)
    ax.set_ylabel("")
    if low.any():
        # the whole row is tinted: a bin with 2 shots has a bar too short to see
        for lo, hi in bounds[low]:
            ax.axhspan(lo, hi, color=style.FIT, alpha=0.25, lw=0)
        ax.legend(handles=[Patch(color=style.FIT, alpha=0.5, label=f"too few\n({int(low.sum())} bins)")],
                  loc="lower right", fontsize=6.5, frameon=False)


def difference_map(q, delay, diff, bounds=None, q_weighted=True, low_count=None, n_shots=None, title="", units=""):
    """Difference map: q across, delay up on a true delay axis (linear near zero, logarithmic beyond).

    Each bin is drawn at its real width (from its bounds); empty bins and gaps between
    bins are grey. With ``n_shots`` a narrow panel beside the map gives the pump-on
    shots per bin, bins with too few shots in red (instead of hatching the data).

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    diff : ndarray (nd, nq)
        Difference, in ``units``.
    bounds : ndarray (nd, 2) or (nd + 1,), ps, optional
        Bin bounds (see :func:`bin_edges`).
    q_weighted : bool
        Plot q·ΔS (1/Å times ``units``).
    low_count : ndarray (nd,) bool, optional
        Bins with too few shots.
    n_shots : ndarray (nd,), optional
        Pump-on shots per bin.

    Returns
    -------
    matplotlib.figure.Figure
    """
    q = np.asarray(q, float)
    data = np.asarray(diff, float) * (q[None, :] if q_weighted else 1.0)
    lim = _robust_limit(data)
    fig, ax, mesh = _map(q, delay, data, lim, bounds, n_shots, low_count)
    cb = fig.colorbar(mesh, ax=fig.axes, shrink=0.9, pad=0.01, extend="both")
    cb.set_label(signal_label(q_weighted, units))
    ax.set_title(title or "pump-probe difference map")
    fig.supxlabel(style.delay_scale_note(delay) + ";\nbins drawn at their widths; grey: no data; colours saturate "
                  "beyond the 99th percentile of |values|", fontsize=7, color="0.3")
    return fig


def _pick_rows(delay, rows_ok, requested):
    """Bins nearest to each requested delay (among rows with data): list of (requested or None, row)."""
    cand = np.flatnonzero(rows_ok)
    if cand.size == 0:
        return []
    if requested is None:
        picks = cand[np.unique(np.linspace(0, cand.size - 1, min(8, cand.size)).round().astype(int))]
        return [(None, int(i)) for i in picks]
    out, seen = [], set()
    for d in requested:
        i = int(cand[np.argmin(np.abs(delay[cand] - d))])
        if i not in seen:
            seen.add(i)
            out.append((float(d), i))
    return out


def nice_step(value):
    """The 1-2-5 number at or below ``value`` (for a scale bar)."""
    if not np.isfinite(value) or value <= 0:
        return 1.0
    exp = np.floor(np.log10(value))
    for m in (5.0, 2.0, 1.0):
        if m * 10**exp <= value:
            return float(m * 10**exp)
    return float(10**exp)


def _delay_text(requested, actual):
    """Label of a curve: the requested delay, and the bin's mean delay (small text) where it differs visibly."""
    if requested is None:
        return f"{actual:.3g} ps", ""
    if f"{actual:.2g}" != f"{requested:.2g}":
        return f"{requested:g} ps", f"bin mean {actual:.3g} ps"
    return f"{requested:g} ps", ""


def difference_curves(q, delay, diff, diff_err, delays=None, q_weighted=True, model=None, title="", units=""):
    """Difference curves at chosen delays, offset vertically, with ±1 standard error bands and a scale bar.

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    diff, diff_err : ndarray (nd, nq)
        Difference and its standard error, in ``units``.
    delays : sequence of float, optional
        Requested delays (ps); the nearest bin with data is drawn, labelled with the
        requested delay (and the bin's mean delay where it differs). Default: up to 8 bins
        spread over the run.
    model : ndarray (nd, nq), optional
        A fitted model drawn over the data.
    """
    q, delay = np.asarray(q, float), np.asarray(delay, float)
    ok = np.isfinite(diff).all(axis=1)
    pick = _pick_rows(delay, ok, delays)
    w = q if q_weighted else np.ones_like(q)
    data = np.asarray(diff, float) * w[None, :]
    err = np.asarray(diff_err, float) * w[None, :]
    rows = [i for _, i in pick]
    step = 2.4 * _robust_limit(data[rows], 99.5) if rows else 1.0
    fig, ax = plt.subplots(figsize=(style.COLUMN * 1.6, 1.2 + 0.75 * max(3, len(pick))), layout="constrained")
    for j, (req, i) in enumerate(pick):
        off = -j * step
        ax.axhline(off, color=style.GUIDE, lw=0.5)
        ax.fill_between(q, data[i] - err[i] + off, data[i] + err[i] + off, color=style.DATA, alpha=style.BAND_ALPHA,
                        lw=0)
        ax.plot(q, data[i] + off, color=style.DATA, lw=0.9)
        if model is not None:
            ax.plot(q, model[i] * w + off, color=style.FIT, lw=1.0)
        main, mean = _delay_text(req, delay[i])
        ax.text(1.01, off, main, transform=ax.get_yaxis_transform(), ha="left", va="bottom", fontsize=7.5)
        if mean:
            ax.text(1.01, off, mean, transform=ax.get_yaxis_transform(), ha="left", va="top", fontsize=6,
                    color="0.35")
    bar = nice_step(0.8 * step)
    x = q[0] - 0.02 * (q[-1] - q[0])
    ax.plot([x, x], [step * 0.35, step * 0.35 + bar], color="k", lw=2, solid_capstyle="butt", clip_on=False)
    ax.text(x, step * 0.35 + bar / 2, f"{bar:g} ", ha="right", va="center", fontsize=7.5)
    handles = [plt.Line2D([], [], color=style.DATA, label="data"),
               Patch(color=style.DATA, alpha=style.BAND_ALPHA, label="±1 standard error")]
    if model is not None:
        handles.append(plt.Line2D([], [], color=style.FIT, label="fit"))
    handles.append(plt.Line2D([], [], color="k", lw=2, label=f"scale bar: {bar:g} (same units)"))
    ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0, 1.0), ncols=len(handles), fontsize=7,
              frameon=False, borderaxespad=0.2)
    ax.set_yticks([])
    ax.set_ylim(-(len(pick) - 0.4) * step, step * (0.45 + bar / step))
    ax.set_xlabel("q (1/Å)")
    ax.set_ylabel(signal_label(q_weighted, units, wrap=True) + ", curves offset")
    ax.set_title(title or "difference curves", pad=16)
    return fig


def save(fig, path, dpi=130, fmt=None):
    """Save a figure atomically (temporary file, then rename) in the format of its suffix; does not close it.

    Parameters
    ----------
    fig : matplotlib Figure
    path : path
        File to write; its suffix (``.png``, ``.pdf``, ``.svg``) gives the format unless ``fmt`` does.
    dpi : int
        Resolution of raster output (and of the rasterized maps inside vector output).
    """
    from pathlib import Path

    from ..io.store import atomic_path

    fmt = fmt or Path(path).suffix.lstrip(".") or "png"
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format=fmt)


def png_bytes(fig, dpi=110):
    """The figure as PNG bytes (for embedding in the report)."""
    import io

    buf = io.BytesIO()
    fig.savefig(buf, dpi=dpi, format="png")
    return buf.getvalue()


def _delay_axis(ax, delay):
    """Delay axis (see :func:`movieproc.render.style.delay_axis`)."""
    style.delay_axis(ax, delay, which="x")


def _population_panel(ax, curves, delay):
    """Fitted populations: the model on a fine grid (lines) and at the bins (markers)."""
    for j, name in enumerate(curves.names):
        ax.plot(curves.delay, curves.values[:, j], "-", color=f"C{j}", lw=1.2, label=name)
        ax.plot(delay, curves.at_bins[:, j], "o", ms=3, mfc="none", color=f"C{j}")
    ax.plot([], [], "o", ms=3, mfc="none", color="0.4", label="model at the bins (bin width included)")
    ax.axhline(0, color="0.7", lw=0.5)
    ax.set_ylabel(curves.ylabel, fontsize=8)
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0, frameon=False)


#: Per-delay coefficients that are nuisance terms of the fit, not solvent physics: not drawn.
NUISANCE_TERMS = ("normalization", "energy")


def _solvent_panel(ax, delay, solvent_coef, solvent_err, terms, coef_units):
    for j, name in enumerate(terms):
        if name in NUISANCE_TERMS:
            continue
        e = None if solvent_err is None else solvent_err[:, j]
        ax.errorbar(delay, solvent_coef[:, j], yerr=e, fmt="o", ms=3, lw=0.8, label=f"{name} (bars: ±1 s.e.)")
    ax.axhline(0, color="0.7", lw=0.5)
    ax.set_ylabel(f"solvent term ({coef_units})" if coef_units else "solvent term (units not recorded)")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0, frameon=False)


def kinetics(delay, curves=None, solvent_coef=None, solvent_err=None, terms=(), chi2=None, params_text="",
             title="", coef_units="", note=""):
    """Fitted populations, per-delay solvent coefficients and chi2 against delay; only panels with content.

    Parameters
    ----------
    delay : ndarray (nd,), ps
    curves : movieproc.render.kinetics.PopulationCurves, optional
        The fitted model on a fine delay grid (through the IRF) and at the bins,
        named by species, with its y label (units the fit used).
    solvent_coef, solvent_err : ndarray (nd, nterm), optional
    terms : sequence of str
        Names of the solvent coefficients.
    chi2 : ndarray (nd,), optional
        Reduced chi2 per delay.
    params_text : str
        Fitted parameters, printed in the figure.
    note : str
        Said in the figure (e.g. "no fit configured"), above the first panel.
    """
    if solvent_coef is not None and not any(name not in NUISANCE_TERMS for name in terms):
        solvent_coef = None  # only nuisance terms (or none): no solvent panel
    panels = [k for k, v in (("population", curves), ("solvent", solvent_coef), ("chi2", chi2)) if v is not None]
    rows = max(1, len(panels))
    fig, axes = plt.subplots(rows, 1, figsize=(style.PAGE, 2.1 * rows + 0.8), sharex=True, layout="constrained")
    axes = np.atleast_1d(axes)
    if not panels:
        axes[0].axis("off")
        text = "\n".join(filter(None, [note, "no per-delay solvent terms fitted", "no χ² per delay"]))
        axes[0].text(0.5, 0.5, text, ha="center", va="center", fontsize=11)
        fig.suptitle(title or "kinetics")
        return fig
    for ax, kind in zip(axes, panels, strict=True):
        if kind == "population":
            _population_panel(ax, curves, delay)
            if params_text:
                ax.text(1.02, 0.0, params_text, transform=ax.transAxes, va="bottom", ha="left", fontsize=7,
                        family="monospace", bbox=dict(facecolor="0.96", edgecolor="0.8", lw=0.5))
        elif kind == "solvent":
            _solvent_panel(ax, delay, solvent_coef, solvent_err, terms, coef_units)
        else:
            ax.plot(delay, chi2, "o-", ms=3, lw=0.8, color="C3")
            ax.axhline(1, color="0.6", lw=0.8, ls="--")
            ax.set_ylabel("reduced χ² per delay\n(dimensionless)")
        _delay_axis(ax, delay)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    fig.suptitle((title or "kinetics") + (f"\n{note}" if note else ""), fontsize=11)
    return fig


def interval_caption(delta_chi2=None):
    """What the structure figure's bars are (see :mod:`movieproc.fitting.structure`)."""
    level = "Δχ²" if delta_chi2 is None else f"Δχ² ≤ {delta_chi2:g}"
    return (f"bars: range of the parameter over the trajectory frames with {level} × the best frame's reduced χ² "
            "(≈68 % interval for Δχ² = 1; asymmetric; no finer than the trajectory samples it); "
            "no point: structure not determined")


def structure_parameters(delay, values, lower, upper, units=None, title="", ground=None, delta_chi2=None,
                         ground_note=""):
    """Geometric parameters of the best-fitting structure per delay, with their intervals.

    Parameters
    ----------
    delay : ndarray (nd,), ps
    values, lower, upper : dict of name -> ndarray (nd,)
        Value at the best frame and its interval (Å or degrees).
    units : dict of name -> str, optional
    ground : dict of name -> float, optional
        The parameter in the ground-state structure, drawn as a dashed reference line.
    delta_chi2 : float, optional
        The fit's Δχ² threshold (``fit.delta_chi2``), said in the caption.
    ground_note : str
        Said in the caption when there is no ground-state reference (why).
    """
    n = max(1, len(values))
    fig, axes = plt.subplots(n, 1, figsize=(style.PAGE * 0.85, 2.3 * n + 0.9), sharex=True, layout="constrained")
    axes = np.atleast_1d(axes)
    for ax, name in zip(axes, values, strict=False):
        v, lo, hi = values[name], lower[name], upper[name]
        unit = (units or {}).get(name, "") or "units not recorded"
        ok = np.isfinite(v)
        ax.errorbar(delay[ok], v[ok], yerr=[v[ok] - lo[ok], hi[ok] - v[ok]], fmt="o", ms=3, lw=0.8, capsize=2,
                    color=style.DATA, label="best frame per delay")
        g = (ground or {}).get(name)
        if g is not None and np.isfinite(g):
            ax.axhline(g, color=style.REFERENCE, ls="--", lw=0.9, label=f"ground state: {g:.3f} {unit}")
        ax.set_ylabel(f"{name} ({unit})")
        ax.legend(fontsize=7, loc="best")
        _delay_axis(ax, delay)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    axes[0].set_title(title or "structure per delay")
    import textwrap

    caption = interval_caption(delta_chi2) + (f"; {ground_note}" if ground_note else "")
    fig.supxlabel("\n".join(textwrap.wrap(caption, 120)), fontsize=7, color="0.3")
    return fig


def residual_map(q, delay, residual, err, title="", bounds=None):
    """Normalized residuals (data - model) / error as a map on the true delay axis; should look like noise.

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    residual, err : ndarray (nd, nq)
        Data minus model and the data's standard error, same units.
    bounds : ndarray (nd, 2) or (nd + 1,), ps, optional
    """
    fig, ax, mesh = _map(q, delay, residual / err, 4.0, bounds, size=(style.PAGE * 0.8, 4.6))
    fig.colorbar(mesh, ax=ax, extend="both").set_label("(data − model) / standard error (dimensionless)")
    ax.set_title(title or "fit residuals")
    fig.supxlabel(style.delay_scale_note(delay) + "; bins drawn at their widths; grey: no data", fontsize=7,
                  color="0.3")
    return fig


def svd_summary(q, delay, values, noise, u, v, n_significant, threshold=None, structured=None, decision="",
                title=""):
    """Singular values against the noise threshold the count used, and the leading vectors.

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    values, noise : ndarray (k,)
        Singular values of the weighted map and the mean spectrum of noise maps of the same weighting.
    u : ndarray (nd, k); v : ndarray (k, nq)
    n_significant : int
        The count.
    threshold : float, optional
        The magnitude threshold of the count (largest noise singular value), same weighting.
    structured : sequence of bool (k,), optional
        Components whose vectors passed the structure test.
    decision : str
        The count's reasons in words, printed under the panels.
    """
    fig, axes = plt.subplots(1, 3, figsize=(12, 4.4), layout="constrained")
    k = np.arange(1, len(values) + 1)
    ax = axes[0]
    ax.semilogy(k, noise, "s--", color="0.5", ms=4, label="noise maps (mean spectrum)")
    if threshold is not None:
        ax.axhline(threshold, color="C3", lw=1.0, label="threshold: largest noise value")
    counted = np.arange(len(values)) < n_significant
    if structured is not None and threshold is not None:
        structured = np.asarray(structured, bool)[: len(values)]
        counted = (values > threshold) & structured
        rejected = (values > threshold) & ~structured
        if rejected.any():
            ax.semilogy(k[rejected], values[rejected], "x", color="C3", ms=8, mew=1.5,
                        label="above threshold, vectors like noise: not counted")
    ax.semilogy(k, values, "-", color="C0", lw=0.8)
    ax.semilogy(k[counted], values[counted], "o", color="C0", label="counted")
    ax.semilogy(k[~counted], values[~counted], "o", mfc="none", color="C0", label="not counted")
    ax.set_xlabel("component")
    ax.set_ylabel("singular value (weighted map, noise ~ 1)")
    ax.legend(fontsize=7)
    ax.set_title(f"{n_significant} component(s) counted")
    m = max(1, min(3, len(values)))
    for j in range(m):
        axes[1].plot(delay, u[:, j], "o-", ms=2, lw=0.8, label=f"{j + 1}")
        axes[2].plot(q, v[j], lw=0.8, label=f"{j + 1}")
    _delay_axis(axes[1], delay)
    axes[1].set_ylabel("temporal vector (weighted)")
    axes[1].set_title("temporal vectors")
    axes[2].set_xlabel("q (1/Å)")
    axes[2].set_ylabel("q vector (weighted)")
    axes[2].set_title("q vectors")
    axes[2].legend(fontsize=8, title="component", title_fontsize=8)
    if decision:
        import textwrap

        fig.text(0.01, 0.005, "\n".join(textwrap.wrap(decision, 190)), fontsize=7, va="bottom")
        engine = fig.get_layout_engine()
        if not isinstance(engine, ConstrainedLayoutEngine):  # the figure is made with layout="constrained"
            raise RuntimeError(f"SVD figure: expected the constrained layout engine, got {type(engine).__name__}")
        engine.set(rect=(0, 0.1, 1, 0.9))
    fig.suptitle(title or "SVD of the solute difference")
    return fig


def realspace(r, delay, values, delays=None, title="", units="", info=None):
    """Real-space difference at chosen delays: where pair distances are lost (< 0) and gained (> 0).

    Parameters
    ----------
    r : ndarray (nr,), Å
    delay : ndarray (nd,), ps
    values : ndarray (nd, nr)
        Sharpened transform (change of the number of pairs per Å).
    delays : sequence of float, optional
        Delays to show (nearest bins); default up to 6 spread over the run.
    info : dict, optional
        ``sharpening``, ``q_range_invA``, ``damping_A2``, ``peak_sigma_A`` of the transform, printed.
    """
    ok = np.isfinite(values).all(axis=1)
    cand = np.flatnonzero(ok)
    if delays is None:
        pick = cand[np.unique(np.linspace(0, cand.size - 1, min(6, cand.size)).round().astype(int))]
    else:
        pick = np.unique([cand[int(np.argmin(np.abs(delay[cand] - d)))] for d in delays])
    fig, ax = plt.subplots(figsize=(6.5, 4.4), layout="constrained")
    colors = plt.cm.viridis(np.linspace(0, 0.9, len(pick)))
    for c, i in zip(colors, pick, strict=False):
        ax.plot(r, values[i], color=c, lw=1.2, label=f"{delay[i]:.3g} ps")
    ax.axhline(0, color="0.6", lw=0.6)
    ax.set_xlabel("r (Å)")
    ax.set_ylabel("ΔP(r): pairs gained − lost per Å" + (f" ({units})" if units else "")
                  + "\n(an a-b pair weighted f_a f_b / F)", fontsize=9)
    ax.legend(fontsize=8, ncols=2, title="delay", title_fontsize=8)
    sub = ""
    if info:
        lo, hi = info.get("q_range_invA", (np.nan, np.nan))
        sigma = info.get("peak_sigma_A", np.nan)
        sub = (f"\nsharpened by {info.get('sharpening', '?')}; q {lo:.2g}-{hi:.2g} 1/Å; "
               f"damping κ = {info.get('damping_A2', np.nan):.3g} Å²\neach distance a Gaussian of σ = {sigma:.2f} Å: "
               f"a change under ~{3.5 * sigma:.1f} Å is one −/+ pair\nwhose zero crossing (not its extrema) "
               "marks the mean of the two distances")
    ax.set_title((title or "real-space difference") + sub, fontsize=9)
    return fig


#: Most frames an animation draws (delays beyond are thinned evenly): keeps the GIF small and quick.
ANIMATION_MAX_FRAMES = 60
#: Colours of the GIF palette (one palette for all frames, from the first, middle and last frames;
#: octree quantization keeps small areas of a distinct colour, such as one element's atoms).
GIF_COLORS = 128


def _geometry_text(label, i):
    """'Ir-Ir = 2.680 Å (2.671–2.690)' for one delay, from (values, lower, upper, unit) per parameter."""
    parts = []
    for name, (v, lo, hi, unit) in (label or {}).items():
        if np.isfinite(v[i]):
            rng = f" ({lo[i]:.3f}–{hi[i]:.3f})" if np.isfinite(lo[i]) and np.isfinite(hi[i]) else ""
            parts.append(f"{name} = {v[i]:.3f} {unit}{rng}")
    return "\n".join(parts)


def animation(path, q, delay, data, err, model, positions, element, label=None, q_weighted=True, units="",
              fps=4, dpi=80, title=""):
    """Animated GIF of the movie: the curve (with its fit) and the best structure at each delay.

    The static parts are drawn once; each frame restores them and redraws only the
    changing artists (blitting), then the frames go to Pillow with one shared palette.

    Parameters
    ----------
    path : path
        GIF file to write (atomically).
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    data, err : ndarray (nd, nq)
        Difference curves and their standard errors (rows with NaN are skipped).
    model : ndarray (nd, nq) or None
    positions : ndarray (nd, natom, 3) or None
        Best structure per delay, Å (NaN where none is reported).
    element : sequence of str (natom,) or None
    label : dict of name -> (values, lower, upper, unit), optional
        Geometric parameters per delay (ndarray (nd,) each) and their interval, printed under the structure.
    """
    from PIL import Image

    from ..io.store import atomic_path

    rows = np.flatnonzero(np.isfinite(data).all(axis=1))
    if rows.size > ANIMATION_MAX_FRAMES:
        rows = rows[np.unique(np.linspace(0, rows.size - 1, ANIMATION_MAX_FRAMES).round().astype(int))]
    w = q if q_weighted else np.ones_like(q)
    lim = 1.15 * np.nanmax(np.abs((data[rows] + err[rows]) * w)) if rows.size else 1.0
    has_structure = positions is not None and element is not None
    with style.figure_style():
        fig, axes = plt.subplots(1, 2 if has_structure else 1, figsize=(7.5 if has_structure else 5, 3.3),
                                 layout="constrained",
                                 gridspec_kw={"width_ratios": [3, 2]} if has_structure else None)
        axes = np.atleast_1d(axes)
        ax = axes[0]
        band = ax.fill_between(q, -w, w, color=style.DATA, alpha=style.BAND_ALPHA, lw=0, label="±1 standard error",
                               animated=True)
        (line,) = ax.plot(q, 0 * q, color=style.DATA, lw=1, label="data", animated=True)
        fit = ax.plot(q, 0 * q, color=style.FIT, lw=1, label="fit", animated=True)[0] if model is not None else None
        ax.axhline(0, color=style.GUIDE, lw=0.5)
        ax.set_ylim(-lim, lim)
        ax.set_xlabel("q (1/Å)")
        ax.set_ylabel(signal_label(q_weighted, units, wrap=True), fontsize=8)
        ax.legend(loc="upper right", fontsize=7)
        text = ax.text(0.02, 0.95, "", transform=ax.transAxes, va="top", animated=True)
        moving = [band, line, text] + ([fit] if fit is not None else [])
        if has_structure:
            moving += _structure_axes(axes[1], positions, element)
        fig.suptitle(title or "movie")
        fig.canvas.draw()
        fig.set_layout_engine("none")  # the layout is fixed now: no re-layout per frame
        canvas: Any = fig.canvas  # Agg: copy_from_bbox, restore_region, buffer_rgba
        background = canvas.copy_from_bbox(fig.bbox)
        frames = []
        for i in rows:
            canvas.restore_region(background)
            band.set_verts([np.column_stack([np.r_[q, q[::-1]],
                                             np.r_[(data[i] - err[i]) * w, ((data[i] + err[i]) * w)[::-1]]])])
            line.set_ydata(data[i] * w)
            if fit is not None:
                fit.set_ydata(model[i] * w)
            text.set_text(f"delay {delay[i]:.3g} ps")
            if has_structure:
                _structure_frame(moving[-2], moving[-1], positions[i], len(element), _geometry_text(label, i))
            for artist in moving:
                fig.draw_artist(artist)
            rgb = np.asarray(canvas.buffer_rgba())[..., :3]
            frames.append(Image.fromarray(rgb.copy()))
        plt.close(fig)
    if not frames:
        raise ValueError("data: no delay with finite values to animate")
    picks = [frames[0], frames[len(frames) // 2], frames[-1]]
    montage = Image.new("RGB", (picks[0].width, picks[0].height * len(picks)))
    for k, frame in enumerate(picks):
        montage.paste(frame, (0, k * frame.height))
    palette = montage.quantize(colors=GIF_COLORS, method=Image.Quantize.FASTOCTREE)
    first, *rest = [f.quantize(palette=palette, dither=Image.Dither.NONE) for f in frames]
    with atomic_path(path) as tmp:
        first.save(tmp, format="GIF", save_all=True, append_images=rest, duration=int(1000 / fps), loop=0)


def _structure_axes(sax, positions, element):
    """Static parts of the structure panel; returns its moving artists (atoms, text)."""
    kinds = list(dict.fromkeys(element))
    colors = {e: plt.cm.tab10(i % 10) for i, e in enumerate(kinds)}  # one distinct colour per element
    finite = positions[np.isfinite(positions).all(axis=(1, 2))]
    span = np.nanmax(np.abs(finite[..., [0, 2]])) * 1.15 if finite.size else 5.0
    sax.set_xlim(-span, span)
    sax.set_ylim(-span, span)
    sax.set_aspect("equal")
    sax.set_xlabel("x (Å)")
    sax.set_ylabel("z (Å)")
    dots = sax.scatter(np.zeros(len(element)), np.zeros(len(element)), c=[colors[e] for e in element],
                       s=[90 if e == kinds[0] else 35 for e in element], animated=True)
    for e in kinds:
        sax.scatter([], [], color=colors[e], label=e)
    sax.legend(fontsize=7, loc="upper right")
    stext = sax.text(0.02, 0.98, "", transform=sax.transAxes, fontsize=7.5, va="top", animated=True)
    return [dots, stext]


def _structure_frame(dots, stext, p, natom, geometry_text):
    ok = np.isfinite(p).all()
    dots.set_offsets(p[:, [0, 2]] if ok else np.full((natom, 2), np.nan))
    stext.set_text((geometry_text or "best frame") + "\n(range: Δχ² interval)" if ok else
                   "no structure determined")
