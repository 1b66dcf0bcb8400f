"""Sanity check of a run's detector geometry from the rings of its own mean frame.

With the right beam centre, tilt and pixel size every isotropic ring of the
sample (a solvent peak, a calibrant line) sits at one q for all azimuths. A
centre off by delta pixels moves the ring's apparent position by
delta * dq/dr * cos(phi - phi0): a first harmonic in azimuth. Swapped or wrong
row/column pixel sizes stretch the ring into an ellipse: a second harmonic.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import geometry as geom

#: Azimuth sectors the frame is split into.
SECTORS = 16
#: Largest apparent centre offset or ellipticity (px) still called "ok".
MAX_OFFSET_PX = 3.0
#: A harmonic must also exceed this many standard errors to be flagged.
SIGNIFICANCE = 3.0
#: Fewest sectors with a located ring for a verdict.
MIN_SECTORS = 8
#: Radial bins per pixel of ring radius used for the sector profiles.
BINS_PER_PX = 1.0
#: Part of the peak fitted with a parabola: above this fraction of its height over the profile minimum.
PEAK_TOP = 0.5
#: Boxcar (bins) smoothing a sector profile before its maximum is taken.
SMOOTH_BINS = 5


@dataclass(frozen=True)
class RingCheck:
    """Verdict of :func:`ring_check`.

    Attributes
    ----------
    verdict : str
        "ok", "suspect" (a harmonic above ``max_offset_px`` and significant)
        or "unusable" (no clear ring in enough sectors).
    message : str
        One line for the user.
    ring_q : float
        q of the strongest ring in the azimuthal average, 1/Å.
    offset_px, offset_error_px : float
        Apparent beam-centre error (first-harmonic amplitude / dq/dr) and its
        standard error, px.
    offset_azimuth_deg : float
        Azimuth towards which the ring appears shifted outwards, degrees.
    ellipticity_px, ellipticity_error_px : float
        Second-harmonic amplitude / dq/dr and its standard error, px.
    sector_deg : ndarray (s,)
        Sector centre azimuths, degrees.
    peak_q : ndarray (s,)
        Ring position in each sector, 1/Å (NaN where not located).
    """

    verdict: str
    message: str
    ring_q: float
    offset_px: float
    offset_error_px: float
    offset_azimuth_deg: float
    ellipticity_px: float
    ellipticity_error_px: float
    sector_deg: np.ndarray
    peak_q: np.ndarray


def _profiles(values, q, sector, valid, edges, sectors):
    nb = edges.size - 1
    qbin = np.clip(np.searchsorted(edges, q[valid]) - 1, 0, nb - 1)
    key = sector[valid] * nb + qbin
    sums = np.bincount(key, values[valid], sectors * nb).reshape(sectors, nb)
    counts = np.bincount(key, None, sectors * nb).reshape(sectors, nb)
    with np.errstate(invalid="ignore", divide="ignore"):
        return sums / counts, counts


def _peak(profile, centres):
    """q of the top of the strongest peak of one sector profile (parabola through its upper half); NaN if none."""
    finite = np.isfinite(profile)
    if finite.sum() < 10:
        return np.nan
    smooth = np.convolve(np.where(finite, profile, 0.0), np.ones(SMOOTH_BINS), "same") / np.maximum(
        np.convolve(finite.astype(float), np.ones(SMOOTH_BINS), "same"), 1e-12)
    smooth[~finite] = -np.inf
    j = int(np.argmax(smooth))
    first, last = np.flatnonzero(finite)[[0, -1]]
    if j - first < SMOOTH_BINS or last - j < SMOOTH_BINS:
        return np.nan
    base = np.min(smooth[finite])
    level = base + PEAK_TOP * (smooth[j] - base)
    left, right = j, j
    while left > first and smooth[left - 1] >= level:
        left -= 1
    while right < last and smooth[right + 1] >= level:
        right += 1
    if left == first or right == last or right - left < 2:
        return np.nan
    top = slice(left, right + 1)
    keep = finite[top]
    coef = np.polyfit(centres[top][keep], profile[top][keep], 2)
    if coef[0] >= 0:
        return np.nan
    return float(-coef[1] / (2 * coef[0]))


def ring_check(frame, mask, geometry: geom.Geometry, photon_energy: float, *, q_range=None, correction=None,
               sectors: int = SECTORS, max_offset_px: float = MAX_OFFSET_PX) -> RingCheck:
    """How round the strongest ring of a mean frame is, for the given geometry.

    The frame is split into ``sectors`` azimuth sectors; in each the radial
    profile I(q) is formed with the geometry's q map and the strongest ring of
    the azimuthal average is located (top of the peak fitted with a parabola).
    The sector positions q_s are fitted with
    q0 + A cos(phi) + B sin(phi) + C cos(2 phi) + D sin(2 phi); the first
    harmonic sqrt(A^2 + B^2) divided by dq/dr (1/Å per pixel at the ring) is
    the apparent beam-centre error in pixels, the second the ellipticity.

    Parameters
    ----------
    frame : array_like (ny, nx)
        Mean frame (dark-subtracted), detector units.
    mask : array_like (ny, nx) bool or None
        True for pixels to leave out.
    geometry : Geometry
        Geometry to check (from the run's config).
    photon_energy : float
        keV.
    q_range : (float, float), optional
        Where to look for the ring, 1/Å; default the whole frame.
    correction : array_like (ny, nx), optional
        Per-pixel factor (solid angle, polarization...) to divide out first.
    sectors : int
    max_offset_px : float
        Largest offset or ellipticity (px) called "ok".

    Returns
    -------
    RingCheck

    Notes
    -----
    Limits: a wrong distance, photon energy or a wrong but square pixel size
    scales q equally in all directions and is not seen (the ring stays round);
    a tilt error looks like a centre offset; the beam-stop shadow, gaps and a
    sample ring that is itself anisotropic (a P2 pump signal, texture) bias the
    sector positions. Polarization does not change the first harmonic but,
    uncorrected, shifts a broad peak with a cos(2 phi) pattern, so pass
    ``correction`` before trusting the ellipticity. Broad, weak rings give
    large standard errors: the verdict "suspect" needs the harmonic to be both
    above ``max_offset_px`` and ``SIGNIFICANCE`` standard errors.
    """
    frame = np.asarray(frame, dtype=np.float64)
    if frame.shape != geometry.shape:
        raise ValueError(f"frame has shape {frame.shape}, expected the geometry's {geometry.shape}")
    if int(sectors) < MIN_SECTORS:
        raise ValueError(f"sectors must be at least {MIN_SECTORS}, got {sectors}")
    sectors = int(sectors)
    valid = np.isfinite(frame)
    if mask is not None:
        valid &= ~np.asarray(mask, dtype=bool)
    values = frame if correction is None else frame / np.asarray(correction, dtype=np.float64)
    valid &= np.isfinite(values)
    q = geom.q_map(geometry, photon_energy)
    phi = geom.scattering_angles(geometry)[1]
    lo, hi = (q[valid].min(), q[valid].max()) if q_range is None else (float(q_range[0]), float(q_range[1]))
    valid &= (q >= lo) & (q <= hi)
    if valid.sum() < 100 * sectors:
        return _unusable(sectors, "too few unmasked pixels in the q range")
    dq_dr = float(np.median(np.hypot(*np.gradient(q))[valid]))
    edges = np.arange(lo, hi + dq_dr / BINS_PER_PX, dq_dr / BINS_PER_PX)
    centres = 0.5 * (edges[1:] + edges[:-1])
    sector = (np.floor((phi + np.pi) / (2 * np.pi) * sectors).astype(int)) % sectors
    prof, _ = _profiles(values, q, sector, valid, edges, sectors)
    peaks = np.array([_peak(prof[s], centres) for s in range(sectors)])
    sector_deg = (np.arange(sectors) + 0.5) * 360.0 / sectors - 180.0
    ok = np.isfinite(peaks)
    if ok.sum() < MIN_SECTORS:
        return _unusable(sectors, f"a ring peak was located in only {int(ok.sum())} of {sectors} sectors",
                         sector_deg, peaks)
    ring_q = float(np.median(peaks[ok]))
    return _harmonics(peaks, sector_deg, ok, dq_dr, ring_q, max_offset_px)


def _harmonics(peaks, sector_deg, ok, dq_dr, ring_q, max_offset_px):
    ang = np.deg2rad(sector_deg[ok])
    design = np.column_stack([np.ones_like(ang), np.cos(ang), np.sin(ang), np.cos(2 * ang), np.sin(2 * ang)])
    coef, *_ = np.linalg.lstsq(design, peaks[ok], rcond=None)
    resid = peaks[ok] - design @ coef
    dof = max(ok.sum() - 5, 1)
    s2 = float(resid @ resid) / dof
    cov = np.linalg.pinv(design.T @ design) * s2
    offset = np.hypot(coef[1], coef[2]) / dq_dr
    offset_err = np.sqrt(0.5 * (cov[1, 1] + cov[2, 2])) / dq_dr
    ellip = np.hypot(coef[3], coef[4]) / dq_dr
    ellip_err = np.sqrt(0.5 * (cov[3, 3] + cov[4, 4])) / dq_dr
    azimuth = float(np.rad2deg(np.arctan2(coef[2], coef[1])))
    flagged = [f"{name} {v:.1f} px (+- {e:.1f})" for name, v, e in
               (("centre offset", offset, offset_err), ("ellipticity", ellip, ellip_err))
               if v > max_offset_px and v > SIGNIFICANCE * e]
    if flagged:
        verdict = "suspect"
        message = (f"the ring at q = {ring_q:.3f} 1/Å is not round for this geometry: {', '.join(flagged)}; "
                   "check detector.beam_center_px (row, col order), detector.pixel_size_mm and detector.tilt_deg")
    else:
        verdict = "ok"
        message = (f"the ring at q = {ring_q:.3f} 1/Å is round within {max_offset_px:g} px "
                   f"(centre offset {offset:.2f} px, ellipticity {ellip:.2f} px)")
    return RingCheck(verdict, message, float(ring_q), float(offset), float(offset_err), azimuth, float(ellip),
                     float(ellip_err), sector_deg, peaks)


def _unusable(sectors, why, sector_deg=None, peaks=None):
    sector_deg = (np.arange(sectors) + 0.5) * 360.0 / sectors - 180.0 if sector_deg is None else sector_deg
    peaks = np.full(sectors, np.nan) if peaks is None else peaks
    return RingCheck("unusable", f"geometry check not possible: {why}", np.nan, np.nan, np.nan, np.nan, np.nan,
                     np.nan, sector_deg, peaks)
