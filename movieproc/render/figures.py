"""Figures of a movie: the difference map and curves at chosen delays.

Plain matplotlib on arrays; the render stage reads the movie and calls these.
"""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import TwoSlopeNorm  # noqa: E402


def _robust_limit(values, pct=99.0):
    v = np.abs(np.asarray(values)[np.isfinite(values)])
    lim = np.percentile(v, pct) if v.size else 1.0
    return lim if lim > 0 else 1.0


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
    fig, ax = plt.subplots(figsize=(7.5, 6.0), layout="constrained")
    rows = np.arange(len(delay) + 1) - 0.5
    qe = np.concatenate([[q[0] - (q[1] - q[0]) / 2], (q[1:] + q[:-1]) / 2, [q[-1] + (q[-1] - q[-2]) / 2]])
    mesh = ax.pcolormesh(qe, rows, data, cmap="RdBu_r", norm=TwoSlopeNorm(0.0, -lim, lim), shading="flat")
    step = max(1, len(delay) // 18)
    ticks = np.arange(0, len(delay), step)
    ax.set_yticks(ticks, [f"{delay[i]:.3g}" for i in ticks])
    ax.set_ylim(rows[-1], rows[0])
    ax.set_xlabel("q (1/Å)")
    ax.set_ylabel("delay (ps), one row per bin")
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
