"""Timing diagnostics of a run: timing-tool jitter, corrected against nominal delay, shots per bin.

The movie holds per-bin timing (bin bounds, shots, mean and spread of the corrected delays);
the per-shot corrections live in the ``delays`` and ``shots`` stores. With them the figure
shows the jitter histogram and each shot's correction; without them it draws what the
movie holds and says what is missing.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass

import matplotlib.pyplot as plt
import numpy as np
from matplotlib.ticker import MaxNLocator

from . import style

#: Bin spreads over more than this ratio are drawn on a logarithmic axis.
SPREAD_LOG_RATIO = 20

__all__ = ["CAPTION", "ShotTiming", "diagnostics"]

#: Most shots drawn as points in the corrected-minus-nominal panel (every k-th shot beyond): keeps files small.
MAX_POINTS = 20000

CAPTION = ("Timing diagnostics: the timing-tool correction of each shot (the jitter the correction removes), "
           "the corrected minus the nominal (stage) delay, and the pump-on shots per bin at the bins' true widths "
           "(red: too few shots) with the spread of the corrected delays in each bin.")


@dataclass
class ShotTiming:
    """Per-shot timing of a run (from the ``shots`` and ``delays`` stores).

    Attributes
    ----------
    stage_delay : ndarray (n,)
        Nominal (stage) delay, ps.
    delay : ndarray (n,)
        Corrected delay, ps (NaN without a timing-tool edge).
    correction : ndarray (n,)
        Timing-tool correction, fs.
    pump_on : ndarray (n,) bool
    """

    stage_delay: np.ndarray
    delay: np.ndarray
    correction: np.ndarray
    pump_on: np.ndarray


def _missing(ax, text):
    ax.text(0.5, 0.5, "\n".join(textwrap.wrap(text, 34)), transform=ax.transAxes, ha="center", va="center",
            fontsize=7.5, color="0.3")
    ax.set_xticks([])
    ax.set_yticks([])


def _jitter(ax, shots):
    if shots is None:
        _missing(ax, "per-shot timing corrections are not in the movie (the delays and shots stores were not "
                 "given): no jitter histogram")
        ax.set_title("timing-tool correction")
        return
    c = shots.correction[shots.pump_on & np.isfinite(shots.correction)]
    if c.size == 0:
        _missing(ax, "no pump-on shot has a timing correction")
        return
    ax.hist(c, bins=60, color=style.DATA, alpha=0.8)
    ax.xaxis.set_major_locator(MaxNLocator(5))
    ax.set_xlabel("timing correction (fs)")
    ax.set_ylabel("pump-on shots")
    ax.set_title(f"jitter: {np.std(c):.0f} fs rms ({c.size} shots)")


def _offset(ax, shots, bounds, delay):
    if shots is not None:
        ok = shots.pump_on & np.isfinite(shots.delay)
        x, y = shots.stage_delay[ok], 1000 * (shots.delay[ok] - shots.stage_delay[ok])
        step = max(1, x.size // MAX_POINTS)
        ax.plot(x[::step], y[::step], ".", ms=1.5, alpha=0.3, color=style.DATA, rasterized=True,
                label="one pump-on shot" + (f" (every {step}th)" if step > 1 else ""))
        ax.set_ylabel("corrected − nominal delay (fs)")
        ax.set_title("correction per shot")
        style.delay_axis(ax, x, label="nominal (stage) delay (ps)")
    else:
        centre = bounds.mean(axis=1)
        ax.plot(centre, 1000 * (delay - centre), "o", ms=3, color=style.DATA, label="bin mean − bin centre")
        ax.set_ylabel("bin mean − bin centre (fs)")
        ax.set_title("corrected delays within their bins\n(per-shot nominal delays not in the movie)", fontsize=8)
        style.delay_axis(ax, centre, label="bin centre (ps)")
    ax.axhline(0, color=style.GUIDE, lw=0.6)
    ax.legend(fontsize=6.5, loc="best")


def _shots(ax, bounds, n_shots, low_count, spread):
    low = np.zeros(len(n_shots), bool) if low_count is None else np.asarray(low_count, bool)
    ax.bar(bounds[:, 0], np.asarray(n_shots, float), width=bounds[:, 1] - bounds[:, 0], align="edge",
           color=np.where(low, style.FIT, "0.55"), edgecolor="white", lw=0.4)  # white lines between bins
    ax.set_ylabel("pump-on shots per bin")
    ax.set_title(f"{len(n_shots)} bins" + (f", {int(low.sum())} with too few shots (red)" if low.any() else ""))
    style.delay_axis(ax, bounds.ravel())
    if spread is not None:
        tw = ax.twinx()
        tw.plot(bounds.mean(axis=1), 1000 * np.asarray(spread, float), "o", ms=2.5, color=style.DATA)
        tw.set_ylabel("spread of corrected delays\nin the bin (fs, rms; blue dots)", fontsize=7, color=style.DATA)
        values = 1000 * np.asarray(spread, float)
        values = values[np.isfinite(values) & (values > 0)]
        if values.size and values.max() > SPREAD_LOG_RATIO * values.min():
            tw.set_yscale("log")  # wide late bins spread over ps, narrow early ones over tens of fs
        else:
            tw.set_ylim(bottom=0)


def diagnostics(bounds, delay, n_shots, low_count=None, spread=None, shots: ShotTiming | None = None, title=""):
    """The timing-diagnostics figure (three panels).

    Parameters
    ----------
    bounds : ndarray (nd, 2)
        Bin bounds, ps.
    delay : ndarray (nd,)
        Bin mean delays, ps.
    n_shots : ndarray (nd,)
        Pump-on shots per bin.
    low_count : ndarray (nd,) bool, optional
    spread : ndarray (nd,), optional
        Standard deviation of the corrected delays in each bin, ps.
    shots : ShotTiming, optional
        Per-shot timing; without it the first two panels say what is missing.
    """
    fig, axes = plt.subplots(1, 3, figsize=(style.PAGE * 1.25, 3.0), layout="constrained")
    _jitter(axes[0], shots)
    _offset(axes[1], shots, np.asarray(bounds, float), np.asarray(delay, float))
    _shots(axes[2], np.asarray(bounds, float), n_shots, low_count, spread)
    fig.suptitle(title or "timing diagnostics")
    return fig
