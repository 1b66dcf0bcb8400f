"""Shot selection: which shots to keep, and why the others were dropped.

Each shot gets a bit set of reasons (:data:`REASONS`); a shot is kept when no
bit is set. The counts per reason are what a user checks first after a run.
"""

from __future__ import annotations

import numpy as np

#: Reason bits for dropping a shot.
REASONS = {
    "pulse_energy": 1,       # pulse energy outside the configured window
    "timing_missing": 2,     # timing tool found no edge (NaN)
    "timing_amplitude": 4,   # edge amplitude below threshold
    "timing_range": 8,       # edge outside the calibrated window
    "outlier": 16,           # curve far from the running median of its neighbours
}

#: Fewest shots of one kind (pump-on or pump-off) in a block for their per-q median and MAD
#: to mean anything: below it, their outlier scores stay NaN and they are never flagged.
MIN_SHOTS_TO_SCORE = 5

#: 1.4826 * MAD estimates the standard deviation of normally distributed data
#: (1 / Phi^-1(3/4); Hampel 1974, J. Am. Stat. Assoc. 69, 383).
MAD_TO_SIGMA = 1.4826


def pulse_energy_flags(pulse_energy, low=None, high=None, min_fraction_of_median=None):
    """Flags (N,) bool: True where the pulse energy is outside the window.

    Parameters
    ----------
    pulse_energy : array_like (N,)
        X-ray pulse energy per shot (any unit).
    low, high : float, optional
        Absolute limits in the same unit.
    min_fraction_of_median : float, optional
        Lower limit relative to the median pulse energy of the run.
    """
    e = np.asarray(pulse_energy, float)
    bad = ~np.isfinite(e)
    if low is not None:
        bad |= e < low
    if high is not None:
        bad |= e > high
    if min_fraction_of_median is not None:
        bad |= e < min_fraction_of_median * np.nanmedian(e)
    return bad


def timing_flags(edge, amplitude=None, require_edge=True, min_amplitude=None, edge_range=None):
    """Reason bits (N,) uint8 from the timing-tool reading.

    Parameters
    ----------
    edge : array_like (N,)
        Edge position, px (NaN: none found).
    amplitude : array_like (N,), optional
        Edge amplitude.
    require_edge : bool
        Flag shots without an edge.
    min_amplitude : float, optional
        Flag shots whose amplitude is below this.
    edge_range : (float, float), optional
        Calibrated window of edge positions, px.
    """
    edge = np.asarray(edge, float)
    flags = np.zeros(edge.shape, np.uint8)
    missing = ~np.isfinite(edge)
    if require_edge:
        flags[missing] |= REASONS["timing_missing"]
    if min_amplitude is not None and amplitude is not None:
        amp = np.asarray(amplitude, float)
        flags[~missing & ~(amp >= min_amplitude)] |= REASONS["timing_amplitude"]
    if edge_range is not None:
        lo, hi = edge_range
        with np.errstate(invalid="ignore"):
            flags[~missing & ((edge < lo) | (edge > hi))] |= REASONS["timing_range"]
    return flags


def outlier_scores(curves):
    """Distance of each curve from the median of its block, in robust units.

    The reference is the per-q median of the block and the scale the per-q
    MAD (times 1.4826); the score is the root mean square of the robust
    z-values over q, about 1 for a shot that differs only by noise.

    Parameters
    ----------
    curves : array_like (n, nq)
        Normalized curves of one block of neighbouring shots (n >= 5).

    Returns
    -------
    ndarray (n,) float64
    """
    c = np.asarray(curves, np.float32)
    med = np.median(c, axis=0)
    mad = np.median(np.abs(c - med), axis=0) * MAD_TO_SIGMA
    mad = np.where(mad > 0, mad, np.inf)
    z = (c - med) / mad
    return np.sqrt(np.mean(z.astype(np.float64) ** 2, axis=1))


def robust_outliers(scores, threshold):
    """True where a score exceeds the run's median by ``threshold`` robust sigmas.

    Parameters
    ----------
    scores : array_like (N,)
        From :func:`outlier_scores`; NaN scores are never flagged.
    threshold : float
        In units of 1.4826 * MAD of the scores (> 0).
    """
    if not threshold > 0:
        raise ValueError(f"threshold must be positive (robust sigmas), got {threshold!r}")
    s = np.asarray(scores, float)
    if not np.isfinite(s).any():
        return np.zeros(s.shape, bool)
    med = np.nanmedian(s)
    mad = np.nanmedian(np.abs(s - med)) * MAD_TO_SIGMA
    if not mad > 0:
        return np.zeros(s.shape, bool)
    with np.errstate(invalid="ignore"):
        return (s - med) / mad > threshold


def reason_counts(flags):
    """Shots dropped per reason (a shot can count under several), and totals."""
    flags = np.asarray(flags, np.uint8)
    out = {name: int(np.count_nonzero(flags & bit)) for name, bit in REASONS.items()}
    out["total"] = int(flags.size)
    out["kept"] = int(np.count_nonzero(flags == 0))
    out["dropped"] = out["total"] - out["kept"]
    return out


def block_scores(curves, pump_on):
    """Outlier scores of one block of shots, pump-on and pump-off each against their own median.

    A strong pump signal is then never mistaken for an outlier. A kind with
    fewer than :data:`MIN_SHOTS_TO_SCORE` shots in the block is not scored.

    Parameters
    ----------
    curves : array_like (n, nq)
        Normalized curves of the block.
    pump_on : array_like (n,) bool

    Returns
    -------
    ndarray (n,) float64
        :func:`outlier_scores`; NaN for shots not scored.
    """
    pump_on = np.asarray(pump_on, bool)
    scores = np.full(pump_on.size, np.nan)
    for state in (True, False):
        same = pump_on == state
        if same.sum() >= MIN_SHOTS_TO_SCORE:
            scores[same] = outlier_scores(np.asarray(curves)[same])
    return scores
