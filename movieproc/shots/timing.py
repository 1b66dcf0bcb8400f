"""Per-shot delay correction with a timing-tool reading.

corrected delay (ps) = stage_delay - time_zero + sign * [P(edge) - P(edge_0)] / 1000

with P the calibration polynomial (fs as a function of the edge position in
pixels, coefficients lowest order first) and edge_0 the edge position at time
zero. Positive delay means the probe arrives after the pump. The sign depends on
the set-up; :func:`onset_width` is the check: the right sign sharpens a prompt
onset, the wrong one broadens it to about twice the raw jitter.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, special

#: Femtoseconds per picosecond (calibrations are in fs, delays in ps).
FS_PER_PS = 1000.0
#: Fewest shots with a finite delay for :func:`onset_width` to fit a step.
MIN_ONSET_SHOTS = 10


def timing_correction(edge, calibration_fs, edge_at_time_zero=0.0):
    """Timing-tool correction in fs for edge positions in px.

    Parameters
    ----------
    edge : array_like (N,)
        Edge position per shot, px; NaN where no edge was found.
    calibration_fs : sequence of float
        Polynomial coefficients c0, c1, ... (fs, fs/px, fs/px^2, ...).
    edge_at_time_zero : float
        Edge position (px) that corresponds to zero correction.

    Returns
    -------
    ndarray (N,) float64
        Correction in fs; NaN where ``edge`` is NaN.
    """
    coeffs = np.asarray(calibration_fs, dtype=float)[::-1]
    edge = np.asarray(edge, dtype=float)
    return np.polyval(coeffs, edge) - np.polyval(coeffs, float(edge_at_time_zero))


def corrected_delay(stage_delay, edge=None, calibration_fs=(0.0, 1.0), time_zero=0.0, sign=1,
                    edge_at_time_zero=0.0, use_timing_tool=True):
    """Corrected pump-probe delay per shot, ps.

    Parameters
    ----------
    stage_delay : array_like (N,)
        Nominal delay from the delay stage, ps.
    edge : array_like (N,), optional
        Timing-tool edge position, px (NaN: no edge found).
    calibration_fs : sequence of float
        Calibration polynomial, fs as a function of px (lowest order first).
    time_zero : float
        Stage delay at time zero, ps.
    sign : {+1, -1}
        Sign of the timing-tool correction.
    edge_at_time_zero : float
        Edge position at time zero, px.
    use_timing_tool : bool
        If False, return the nominal delay minus time zero.

    Returns
    -------
    ndarray (N,) float64
        Corrected delay, ps; NaN where the timing tool is used and found no edge.
    """
    if sign not in (1, -1):
        raise ValueError(f"sign must be +1 or -1, got {sign!r}")
    delay = np.asarray(stage_delay, dtype=float) - float(time_zero)
    if not use_timing_tool or edge is None:
        return delay
    return delay + sign * timing_correction(edge, calibration_fs, edge_at_time_zero) / FS_PER_PS


def onset_width(delay, values, fraction=(0.1, 0.9)):
    """Rise width of a step-like onset in per-shot values, ps.

    Fits ``a + b * Phi((delay - t0) / sigma)`` (Phi the normal cumulative
    distribution) to the shots by least squares and returns the delay interval
    between the ``fraction`` levels of the step, e.g. the 10-90 % width
    ``2 * 1.2816 * sigma``.

    Parameters
    ----------
    delay : array_like (N,)
        Delay per shot, ps (NaN entries are ignored).
    values : array_like (N,)
        A scalar signal per shot that steps at time zero.
    fraction : (float, float)
        Lower and upper levels of the step.

    Returns
    -------
    width : float
        Rise width, ps.
    t0 : float
        Fitted mid-point of the step, ps.
    """
    delay = np.asarray(delay, float)
    values = np.asarray(values, float)
    ok = np.isfinite(delay) & np.isfinite(values)
    x, y = delay[ok], values[ok]
    if x.size < MIN_ONSET_SHOTS:
        raise ValueError(f"delay has {x.size} finite values with finite signal: at least {MIN_ONSET_SHOTS} are "
                         "needed to measure an onset")
    lo, hi = np.percentile(y, [5, 95])
    order = np.argsort(x)
    cum = np.cumsum(y[order] - lo) / max(np.sum(y[order] - lo), 1e-300)
    t_guess = x[order][np.searchsorted(cum, 0.5 * cum[-1]) if cum[-1] > 0 else x.size // 2]
    spread = np.std(x) / 4 or 0.1

    def resid(p):
        a, b, t0, log_s = p
        return a + b * special.ndtr((x - t0) / np.exp(log_s)) - y

    fit = optimize.least_squares(resid, [lo, hi - lo, t_guess, np.log(spread)])
    sigma = float(np.exp(fit.x[3]))
    z = special.ndtri(fraction[1]) - special.ndtri(fraction[0])
    return float(z * sigma), float(fit.x[2])


def sign_check(stage_delay, edge, values, calibration_fs, time_zero=0.0, edge_at_time_zero=0.0):
    """Onset widths with the nominal delays and with either sign of the timing correction.

    The right sign sharpens a prompt onset; the wrong one broadens it to about
    twice the raw jitter.

    Parameters
    ----------
    stage_delay : array_like (N,)
        Nominal delays, ps.
    edge : array_like (N,)
        Timing-tool edge positions, px (NaN: none found; such shots are left out).
    values : array_like (N,)
        A scalar per shot that steps at time zero (e.g. each shot's difference
        projected on the signal seen at positive delays).
    calibration_fs, time_zero, edge_at_time_zero
        As in :func:`corrected_delay`.

    Returns
    -------
    dict
        ``nominal``, ``plus``, ``minus``: 10-90 % widths in ps, and ``best``:
        the sign (+1 or -1) that gives the sharper onset.
    """
    ok = np.isfinite(np.asarray(edge, float))
    out = {"nominal": onset_width(np.asarray(stage_delay, float)[ok] - time_zero, np.asarray(values)[ok])[0]}
    for name, sign in (("plus", 1), ("minus", -1)):
        d = corrected_delay(stage_delay, edge, calibration_fs, time_zero, sign, edge_at_time_zero)
        out[name] = onset_width(d[ok], np.asarray(values)[ok])[0]
    out["best"] = 1 if out["plus"] < out["minus"] else -1
    return out


def projected_signal(on_curves, reference_curves, after):
    """Each shot's difference projected on the mean difference of the shots after the onset.

    Parameters
    ----------
    on_curves : ndarray (n, nq)
        Normalized pump-on curves.
    reference_curves : ndarray (n, k, nq)
        Normalized curves of each shot's k references.
    after : ndarray (n,) bool
        Shots whose mean difference defines the signal (well after time zero).

    Returns
    -------
    ndarray (n,) float64
        d_i . s / (s . s) with d_i the shot's difference and s the signal:
        about 1 after the onset, 0 before it.
    """
    differences = np.asarray(on_curves, float) - np.asarray(reference_curves, float).mean(axis=1)
    signal = differences[np.asarray(after, bool)].mean(axis=0)
    return differences @ signal / (signal @ signal)
