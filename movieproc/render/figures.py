"""Figures of a movie: the difference map and curves at chosen delays.

Plain matplotlib on arrays; the render stage reads the movie and calls these.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import TwoSlopeNorm  # noqa: E402
from matplotlib.layout_engine import ConstrainedLayoutEngine  # noqa: E402


def _robust_limit(values, pct=99.0):
    v = np.abs(np.asarray(values)[np.isfinite(values)])
    lim = np.percentile(v, pct) if v.size else 1.0
    return lim if lim > 0 else 1.0


def _map(q, delay, values, lim, size):
    """A (delay, q) map, one row per bin, diverging colours centred on zero within +-lim."""
    fig, ax = plt.subplots(figsize=size, layout="constrained")
    rows = np.arange(len(delay) + 1) - 0.5
    qe = np.concatenate([[q[0] - (q[1] - q[0]) / 2], (q[1:] + q[:-1]) / 2, [q[-1] + (q[-1] - q[-2]) / 2]])
    mesh = ax.pcolormesh(qe, rows, values, cmap="RdBu_r", norm=TwoSlopeNorm(0.0, -lim, lim), shading="flat")
    step = max(1, len(delay) // 18)
    ticks = np.arange(0, len(delay), step)
    ax.set_yticks(ticks, [f"{delay[i]:.3g}" for i in ticks])
    ax.set_ylim(rows[-1], rows[0])
    ax.set_xlabel("q (1/Å)")
    ax.set_ylabel("delay (ps), one row per bin")
    return fig, ax, mesh


def difference_map(q, delay, diff, edges=None, q_weighted=True, low_count=None, title="", units=""):
    """Difference map: q across, delay bins down, diverging colours centred on zero.

    Delays are shown one row per bin (labelled with the bin's delay), so that
    fine bins near time zero and sparse late delays are equally visible.

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    diff : ndarray (nd, nq)
    q_weighted : bool
        Plot q * dS (1/Å times the data units).
    low_count : ndarray (nd,) bool, optional
        Rows to hatch as having too few shots.

    Returns
    -------
    matplotlib.figure.Figure
    """
    data = np.asarray(diff, float) * (q[None, :] if q_weighted else 1.0)
    lim = _robust_limit(data)
    fig, ax, mesh = _map(q, delay, data, lim, (7.5, 6.0))
    if low_count is not None:
        for i in np.flatnonzero(low_count):
            ax.axhspan(i - 0.5, i + 0.5, facecolor="none", edgecolor="0.4", hatch="///", lw=0)
    cb = fig.colorbar(mesh, ax=ax)
    cb.set_label(("q·ΔS" if q_weighted else "ΔS") + (f" ({units})" if units else ""))
    ax.set_title(title or "pump-probe difference map")
    return fig


def difference_curves(q, delay, diff, diff_err, delays=None, q_weighted=True, model=None, title="", units=""):
    """Difference curves at chosen delays, offset vertically, with error bands.

    Parameters
    ----------
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    diff, diff_err : ndarray (nd, nq)
    delays : sequence of float, optional
        Delays to show (nearest bin each); default up to 8 bins spread over the run.
    model : ndarray (nd, nq), optional
        A fitted model drawn over the data.
    """
    if delays is None:
        pick = np.unique(np.linspace(0, len(delay) - 1, min(8, len(delay))).round().astype(int))
    else:
        pick = np.unique([int(np.nanargmin(np.abs(delay - d))) for d in delays])
    w = q if q_weighted else np.ones_like(q)
    data = diff * w[None, :]
    err = diff_err * w[None, :]
    step = 1.2 * _robust_limit(data[pick], 99.5) * 2
    fig, ax = plt.subplots(figsize=(6.5, 1.0 + 0.9 * len(pick)), layout="constrained")
    for j, i in enumerate(pick):
        off = -j * step
        ax.fill_between(q, data[i] - err[i] + off, data[i] + err[i] + off, color="C0", alpha=0.3, lw=0)
        ax.plot(q, data[i] + off, color="C0", lw=1.0)
        if model is not None:
            ax.plot(q, model[i] * w + off, color="C3", lw=1.0)
        ax.axhline(off, color="0.7", lw=0.5)
        ax.text(q[-1], off + 0.3 * step, f"{delay[i]:.3g} ps", ha="right", va="bottom", fontsize=8)
    ax.set_yticks([])
    ax.set_xlabel("q (1/Å)")
    ax.set_ylabel(("q·ΔS" if q_weighted else "ΔS") + (f" ({units})" if units else "") + ", offset")
    ax.set_title(title or "difference curves (band: ±1 standard error)")
    return fig


def save(fig, path, dpi=130):
    """Save a figure atomically (temporary file, then rename) and close it."""
    from ..io.store import atomic_path

    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png")
    plt.close(fig)


def _delay_axis(ax, delay):
    """Symmetric-log delay axis: linear within +-1 ps, logarithmic beyond."""
    if np.nanmax(np.abs(delay)) > 5:
        ax.set_xscale("symlog", linthresh=1.0, linscale=1.5)
    ax.axvline(0, color="0.8", lw=0.8, zorder=0)
    ax.set_xlabel("delay (ps)")


def _population_panel(ax, curves, delay):
    """Fitted populations: the model on a fine grid (lines) and at the bins (markers)."""
    for j, name in enumerate(curves.names):
        ax.plot(curves.delay, curves.values[:, j], "-", color=f"C{j}", lw=1.2, label=name)
        ax.plot(delay, curves.at_bins[:, j], "o", ms=3, mfc="none", color=f"C{j}")
    ax.plot([], [], "o", ms=3, mfc="none", color="0.4", label="model at the bins (bin width included)")
    ax.axhline(0, color="0.7", lw=0.5)
    ax.set_ylabel(curves.ylabel, fontsize=8)
    ax.legend(fontsize=7, loc="center left")


#: Per-delay coefficients that are nuisance terms of the fit, not solvent physics: not drawn.
NUISANCE_TERMS = ("normalization", "energy")


def _solvent_panel(ax, delay, solvent_coef, solvent_err, terms, coef_units):
    for j, name in enumerate(terms):
        if name in NUISANCE_TERMS:
            continue
        e = None if solvent_err is None else solvent_err[:, j]
        ax.errorbar(delay, solvent_coef[:, j], yerr=e, fmt="o", ms=3, lw=0.8, label=f"{name} (bars: ±1 s.e.)")
    ax.axhline(0, color="0.7", lw=0.5)
    ax.set_ylabel(f"solvent term ({coef_units})" if coef_units else "solvent term")
    ax.legend(fontsize=8)


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
    fig, axes = plt.subplots(rows, 1, figsize=(7, 2.4 * rows + 0.8), sharex=True, layout="constrained")
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
                ax.text(0.6, 0.05, params_text, transform=ax.transAxes, va="bottom", ha="center", fontsize=7,
                        family="monospace", bbox=dict(facecolor="white", alpha=0.8, lw=0))
        elif kind == "solvent":
            _solvent_panel(ax, delay, solvent_coef, solvent_err, terms, coef_units)
        else:
            ax.plot(delay, chi2, "o-", ms=3, lw=0.8, color="C3")
            ax.axhline(1, color="0.6", lw=0.8, ls="--")
            ax.set_ylabel("reduced χ² per delay")
        _delay_axis(ax, delay)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    fig.suptitle((title or "kinetics") + (f"\n{note}" if note else ""), fontsize=11)
    return fig


def structure_parameters(delay, values, lower, upper, units=None, title=""):
    """Geometric parameters of the best-fitting structure per delay, with their intervals.

    Parameters
    ----------
    delay : ndarray (nd,), ps
    values, lower, upper : dict of name -> ndarray (nd,)
        Value at the best frame and its interval (Å or degrees).
    units : dict of name -> str, optional
    """
    n = max(1, len(values))
    fig, axes = plt.subplots(n, 1, figsize=(7, 2.6 * n + 0.6), sharex=True, layout="constrained")
    axes = np.atleast_1d(axes)
    for ax, name in zip(axes, values, strict=False):
        v, lo, hi = values[name], lower[name], upper[name]
        ok = np.isfinite(v)
        ax.errorbar(delay[ok], v[ok], yerr=[v[ok] - lo[ok], hi[ok] - v[ok]], fmt="o", ms=3, lw=0.8, capsize=2)
        ax.set_ylabel(f"{name} ({(units or {}).get(name, '')})")
        _delay_axis(ax, delay)
    for ax in axes[:-1]:
        ax.set_xlabel("")
    axes[0].set_title(title or "structure per delay (bars: Δχ² interval)")
    return fig


def residual_map(q, delay, residual, err, title=""):
    """Normalized residuals (data - model) / error as a map; should look like noise."""
    fig, ax, mesh = _map(q, delay, residual / err, 4.0, (7.5, 5.5))
    fig.colorbar(mesh, ax=ax).set_label("(data − model) / error")
    ax.set_title(title or "fit residuals")
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


def animation(path, q, delay, data, err, model, positions, element, label=None, q_weighted=True, units="",
              fps=4, dpi=90, title=""):
    """Animated GIF of the movie: the curve (with its fit) and the best structure at each delay.

    Parameters
    ----------
    path : path
        GIF file to write (atomically).
    q : ndarray (nq,), 1/Å
    delay : ndarray (nd,), ps
    data, err : ndarray (nd, nq)
        Difference curves and errors (rows with NaN are skipped).
    model : ndarray (nd, nq) or None
    positions : ndarray (nd, natom, 3) or None
        Best structure per delay, Å (NaN where none is reported).
    element : sequence of str (natom,) or None
    label : dict of name -> ndarray (nd,), optional
        Geometric parameters printed under the structure.
    """
    from matplotlib.animation import FuncAnimation, PillowWriter

    from ..io.store import atomic_path

    rows = np.flatnonzero(np.isfinite(data).all(axis=1))
    w = q if q_weighted else np.ones_like(q)
    lim = 1.15 * np.nanmax(np.abs((data[rows] + err[rows]) * w))
    has_structure = positions is not None and element is not None
    fig, axes = plt.subplots(1, 2 if has_structure else 1, figsize=(9 if has_structure else 6, 4),
                             layout="constrained", gridspec_kw={"width_ratios": [3, 2]} if has_structure else None)
    axes = np.atleast_1d(axes)
    ax = axes[0]
    band = [ax.fill_between(q, 0 * q, 0 * q, color="C0", alpha=0.3, lw=0)]
    (line,) = ax.plot(q, 0 * q, color="C0", lw=1, label="data")
    (fit,) = ax.plot(q, 0 * q, color="C3", lw=1, label="fit") if model is not None else (None,)
    ax.axhline(0, color="0.7", lw=0.5)
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("q (1/Å)")
    ax.set_ylabel(("q·ΔS" if q_weighted else "ΔS") + (f" ({units})" if units else ""))
    ax.legend(loc="upper right", fontsize=8)
    text = ax.text(0.02, 0.95, "", transform=ax.transAxes, va="top")
    if has_structure:
        sax = axes[1]
        kinds = list(dict.fromkeys(element))
        colors = {e: f"C{i}" for i, e in enumerate(kinds)}
        finite = positions[np.isfinite(positions).all(axis=(1, 2))]
        span = np.nanmax(np.abs(finite[..., [0, 2]])) * 1.15 if finite.size else 5.0
        sax.set_xlim(-span, span)
        sax.set_ylim(-span, span)
        sax.set_aspect("equal")
        sax.set_xlabel("x (Å)")
        sax.set_ylabel("z (Å)")
        dots = sax.scatter(np.zeros(len(element)), np.zeros(len(element)),
                           c=[colors[e] for e in element], s=[120 if e == kinds[0] else 50 for e in element])
        for e in kinds:
            sax.scatter([], [], c=colors[e], label=e)
        sax.legend(fontsize=8, loc="upper right")
        stext = sax.text(0.02, 0.02, "", transform=sax.transAxes, fontsize=9)

    def draw(k):
        i = rows[k]
        band[0].remove()
        band[0] = ax.fill_between(q, (data[i] - err[i]) * w, (data[i] + err[i]) * w, color="C0", alpha=0.3, lw=0)
        line.set_ydata(data[i] * w)
        if fit is not None:
            fit.set_ydata(model[i] * w)
        text.set_text(f"{delay[i]:.3g} ps")
        if has_structure:
            p = positions[i]
            ok = np.isfinite(p).all()
            dots.set_offsets(p[:, [0, 2]] if ok else np.full((len(element), 2), np.nan))
            parts = [f"{n} = {v[i]:.3f}" for n, v in (label or {}).items() if np.isfinite(v[i])]
            stext.set_text(", ".join(parts) if ok else "no structure determined")
        return ()

    fig.suptitle(title or "movie")
    anim = FuncAnimation(fig, draw, frames=len(rows), blit=False)
    with atomic_path(path) as tmp:
        anim.save(str(tmp) + ".gif", writer=PillowWriter(fps=fps), dpi=dpi)
        import os

        os.replace(str(tmp) + ".gif", tmp)
    plt.close(fig)
