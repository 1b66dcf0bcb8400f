"""One look for every figure: fonts, sizes, colour maps and the delay axis, in one place.

Figures are drawn inside :func:`figure_style` (a matplotlib ``rc_context``), so the
settings never leak into a user's own plots when movieproc is used as a library.
"""

from __future__ import annotations

import contextlib
from typing import Any

import numpy as np
from matplotlib import ticker

#: Settings every figure uses: sizes readable in a two-column paper at full width and on a slide.
RC: dict[str, Any] = {
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.labelsize": 9.0,
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "legend.fontsize": 7.5,
    "figure.titlesize": 10.5,
    "lines.linewidth": 1.0,
    "axes.linewidth": 0.8,
    "savefig.bbox": "tight",
    "savefig.pad_inches": 0.03,
    "pdf.fonttype": 42,  # TrueType in PDF: text stays text (editable, searchable)
    "svg.fonttype": "none",  # text as text in SVG
    "image.cmap": "viridis",
}

#: Diverging map for signed differences (centred on zero, white at zero).
DIVERGING = "RdBu_r"
#: Data, fit and reference colours.
DATA, FIT, REFERENCE = "C0", "C3", "0.45"
#: Opacity of the error bands: visible on screen and in print.
BAND_ALPHA = 0.35
#: Grey of zero lines and other guides.
GUIDE = "0.7"

#: Widths (inches): one column and a full page width of a two-column journal (common practice: 3.4 and 7.0).
COLUMN, PAGE = 3.4, 7.0

#: The delay axis is linear within +-DELAY_LINTHRESH_PS of time zero and logarithmic beyond ('symlog'):
#: the rise through the instrument response (tenths of a ps) and decays of tens to hundreds of ps both show.
DELAY_LINTHRESH_PS = 1.0
#: Width of the linear part on the axis, in decades (1: as long as one decade of the log part).
DELAY_LINSCALE = 1.0
#: Below this largest |delay| (ps) the axis stays linear throughout.
DELAY_LINEAR_UP_TO_PS = 5.0

#: Formats a figure may be written in (``render.formats``).
FORMATS = ("png", "pdf", "svg")


@contextlib.contextmanager
def figure_style():
    """Context in which movieproc draws its figures."""
    import matplotlib

    with matplotlib.rc_context(RC):  # type: ignore[arg-type]  # keys checked by matplotlib at run time
        yield


def _plain(value, _pos=None):
    """Tick label as a plain number: 0.5, 1, 10, 100, -1 (never 10⁰ or -10⁰)."""
    if value == 0:
        return "0"
    return f"{value:g}"


def is_symlog(delay) -> bool:
    """Whether a delay axis over these delays (ps) is drawn symmetric-log (else linear)."""
    finite = np.asarray(delay, float)
    finite = finite[np.isfinite(finite)]
    return bool(finite.size) and float(np.max(np.abs(finite))) > DELAY_LINEAR_UP_TO_PS


def delay_axis(ax, delay, which="x", label="delay (ps)"):
    """Put delays (ps) on an axis: linear near zero, logarithmic beyond, plain-number ticks.

    Parameters
    ----------
    ax : matplotlib Axes
    delay : array_like
        Delays the axis shows, ps (decides whether the log part is needed).
    which : {"x", "y"}
    label : str
    """
    axis = ax.xaxis if which == "x" else ax.yaxis
    setscale = ax.set_xscale if which == "x" else ax.set_yscale
    if is_symlog(delay):
        setscale("symlog", linthresh=DELAY_LINTHRESH_PS, linscale=DELAY_LINSCALE)
        axis.set_major_locator(ticker.SymmetricalLogLocator(base=10, linthresh=DELAY_LINTHRESH_PS,
                                                            subs=[1.0]))
        axis.set_minor_locator(ticker.SymmetricalLogLocator(base=10, linthresh=DELAY_LINTHRESH_PS,
                                                            subs=[float(k) for k in range(2, 10)]))
        lin = ticker.FixedLocator([k * DELAY_LINTHRESH_PS for k in (-1.0, -0.5, 0.0, 0.5, 1.0)])
        axis.set_major_locator(_Union(axis.get_major_locator(), lin))
    axis.set_major_formatter(ticker.FuncFormatter(_plain))
    (ax.set_xlabel if which == "x" else ax.set_ylabel)(label)
    (ax.axvline if which == "x" else ax.axhline)(0, color=GUIDE, lw=0.6, zorder=0)


class _Union(ticker.Locator):
    """Ticks of two locators together (log decades and the half-ps marks of the linear part)."""

    def __init__(self, first, second):
        self.first, self.second = first, second

    def set_axis(self, axis):
        super().set_axis(axis)
        self.first.set_axis(axis)
        self.second.set_axis(axis)

    def __call__(self):
        if self.axis is None:
            return np.array([])
        vmin, vmax = self.axis.get_view_interval()
        ticks = np.union1d(self.first(), self.second())
        low, high = min(vmin, vmax), max(vmin, vmax)
        tol = 1e-9 * max(abs(low), abs(high), 1.0)
        return ticks[(ticks >= low - tol) & (ticks <= high + tol)]


def delay_scale_note(delay) -> str:
    """Words for a caption: how the delay axis is scaled."""
    if not is_symlog(delay):
        return "delay axis linear"
    return (f"delay axis linear within ±{DELAY_LINTHRESH_PS:g} ps of time zero, logarithmic beyond (symlog)")


#: Unit strings as the movie stores them (parseable by pint) -> as figures and the report print them.
UNIT_SYMBOLS = {"angstrom": "Å", "1/angstrom": "1/Å", "degree": "°", "deg": "°"}


def unit_label(units) -> str:
    """A stored unit string as printed: 'Å' for 'angstrom', '' for none or dimensionless ('1')."""
    text = "" if units in (None, "", "1") else str(units)
    return UNIT_SYMBOLS.get(text, text)
