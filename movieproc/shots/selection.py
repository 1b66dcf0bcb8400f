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
    "outlier": 16,           # curve far from its reference (see block_scores), beyond what the signal can make
}

#: Fewest shots of one kind (pump-on or pump-off) in a block for their per-q median and MAD
#: to mean anything: below it, their outlier scores stay NaN and they are never flagged.
MIN_SHOTS_TO_SCORE = 5

#: Fraction cut from each end, per q, in the trimmed means that estimate the pump signal: a minority
#: of distorted shots (< 20 % of a group) cannot steer them (common practice: 10-25 %).
TRIM_FRACTION = 0.2

#: Most directions of the pump signal removed from a block's pump-on shots: a block of neighbouring
#: stage positions holds a few signal shapes (e.g. excited state, its vibration, heating).
SIGNAL_RANK = 3
#: A signal direction must exceed the noise edge sqrt(m) + sqrt(nq) (Marchenko-Pastur: largest singular
#: value of an m x nq map of unit-variance noise) by this factor; trimmed means are noisier than means.
NOISE_EDGE_MARGIN = 1.5

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


def trim_mean(values, fraction: float, axis: int = 0) -> np.ndarray:
    """Mean along ``axis`` after cutting ``int(fraction * n)`` values from each end of the sorted values.

    The definition and behaviour of ``scipy.stats.trim_mean`` (checked against it in the tests):
    NaN where a NaN is among the values, NaN (with numpy's warning) when the cut leaves nothing, an
    error when the cuts overlap. Here because importing ``scipy.stats`` costs about half a second
    of every run for these lines.
    """
    a = np.asarray(values)
    n = a.shape[axis]
    low = int(fraction * n)
    high = n - low
    if low > high:
        raise ValueError(f"cutting {low} of {n} values from each end: the cuts overlap")
    if n == 0:
        return np.mean(a, axis=axis)
    part = np.partition(a, (low, high - 1), axis=axis)
    out = np.mean(np.take(part, np.arange(low, high), axis=axis), axis=axis)
    if a.dtype.kind in "fc":
        out = np.where(np.isnan(a).any(axis=axis), np.nan, out)
    return out


def _half_means(d):
    """Trimmed means (per q) of the shots with the smaller and the larger signal, each times sqrt(count).

    The split is at the median amplitude along the group's trimmed mean; the sqrt(count)
    undoes the averaging, so each row has the single-shot noise.
    """
    mean = trim_mean(d, TRIM_FRACTION, axis=0)
    norm = np.linalg.norm(mean)
    if not norm > 0 or d.shape[0] < 2 * MIN_SHOTS_TO_SCORE:
        return mean[None, :] * np.sqrt(d.shape[0])
    amplitude = d @ (mean / norm)
    high = amplitude > np.median(amplitude)
    return np.stack([trim_mean(d[rows], TRIM_FRACTION, axis=0) * np.sqrt(rows.sum()) for rows in (~high, high)])


def signal_directions(differences, group, rank=None):
    """Orthonormal q-space directions (k, nq) of the pump signal in a block of pump-on shots, k <= ``rank``.

    Each group of shots (one stage position) gives robust averages of its
    differences: the per-q trimmed means of the half with the smaller and the half
    with the larger signal (their difference holds the change of the signal across
    the group's spread of true delays, e.g. the timing jitter over a fast onset).
    The leading right singular vectors of these averages (each scaled to unit noise)
    that rise above the noise edge sqrt(m) + sqrt(nq) of an m x nq map of unit noise
    (times :data:`NOISE_EDGE_MARGIN`) are the signal directions. Averages are shared
    by many shots, so a shot with the signal of its true delay is described by them
    even when it is rare in its own group (a jitter tail across time zero), while a
    distorted shot is trimmed from every average and keeps its distortion.

    Parameters
    ----------
    differences : ndarray (n, nq)
        Pump-on curves minus the pump-off reference, in units of the single-shot noise.
    group : ndarray (n,)
        Group label per shot (e.g. the stage delay).
    rank : int, optional
        Most directions returned; default :data:`SIGNAL_RANK`.

    Returns
    -------
    ndarray (k, nq) float64
    """
    d = np.asarray(differences, np.float64)
    group = np.asarray(group)
    rank = SIGNAL_RANK if rank is None else int(rank)
    rows = [_half_means(d[group == g]) for g in np.unique(group) if (group == g).sum() >= MIN_SHOTS_TO_SCORE]
    if not rows:
        return np.zeros((0, d.shape[1]))
    averages = np.concatenate(rows)
    _, s, vt = np.linalg.svd(averages, full_matrices=False)
    edge = NOISE_EDGE_MARGIN * (np.sqrt(averages.shape[0]) + np.sqrt(d.shape[1]))
    return vt[: min(rank, int(np.count_nonzero(s > edge)))]


def block_scores(curves, pump_on, stage_delay=None):
    """Outlier scores of one block of neighbouring shots that do not follow the pump signal.

    Pump-off shots are scored against the per-q median of the block's pump-off
    shots (they carry no signal). Pump-on shots are scored on what the signal
    cannot make: each is differenced against the same pump-off median (a reference
    without signal, so it cannot lag behind an onset), and the part of the
    difference along the block's signal directions (:func:`signal_directions`,
    robust averages per stage position) is removed before scoring. Near time zero
    the timing jitter spreads the shots of one stage position over the rising edge,
    so their signals range from none to full; a median of the pump-on shots (or a
    running median over stage positions) sits between and calls the shots at either
    end outliers, while the projection removes any amount of the signal shapes, so a
    shot's score does not depend on where it fell on the onset.

    Scores are the root mean square over q of the robust z-values, the scale being
    the per-q MAD (times 1.4826) of the same kind's residuals in the block, the mean
    of squares taken over the q points left after the projection (nq - k), so both
    kinds are about 1 for a shot that differs only by noise. A kind with fewer than
    :data:`MIN_SHOTS_TO_SCORE` shots in the block is not scored; without pump-off
    shots the pump-on median is the reference.

    Parameters
    ----------
    curves : array_like (n, nq)
        Normalized curves of the block.
    pump_on : array_like (n,) bool
    stage_delay : array_like (n,), optional
        Nominal stage delay per shot, ps; shots at the same value form a group.
        Default: the whole block is one group.

    Returns
    -------
    ndarray (n,) float64
        NaN for shots not scored.
    """
    c = np.asarray(curves, np.float64)
    pump_on = np.asarray(pump_on, bool)
    group = np.zeros(pump_on.size) if stage_delay is None else np.asarray(stage_delay, float)
    scores = np.full(pump_on.size, np.nan)
    off, on = ~pump_on, pump_on
    if off.sum() >= MIN_SHOTS_TO_SCORE:
        scores[off] = outlier_scores(c[off])
        reference = np.median(c[off], axis=0)
    elif on.sum() >= MIN_SHOTS_TO_SCORE:
        reference = np.median(c[on], axis=0)
    else:
        return scores
    if on.sum() < MIN_SHOTS_TO_SCORE:
        return scores
    # in units of the single-shot noise per q (pump-off spread, else pump-on)
    spread = c[off] if off.sum() >= MIN_SHOTS_TO_SCORE else c[on]
    d = (c[on] - reference) / _mad(spread)
    basis = signal_directions(d, group[on])
    residual = d - (d @ basis.T) @ basis
    z = residual / _mad(residual)
    scores[on] = np.sqrt(np.sum(z**2, axis=1) / (c.shape[1] - basis.shape[0]))
    return scores


def _mad(x):
    """Per-q robust standard deviation (1.4826 * median absolute deviation), (nq,); inf where zero."""
    mad = np.median(np.abs(x - np.median(x, axis=0)), axis=0) * MAD_TO_SIGMA
    return np.where(mad > 0, mad, np.inf)
