"""Detector geometry from a calibrant powder image.

Steps (formulas and sources in docs/METHODS.md, "Calibration"):

1. Rough start: the image is unwrapped into polar coordinates about a rough
   centre (``skimage.transform.warp_polar``), the smooth background removed
   along the radius by a grey opening (white top-hat), and the ring ridges
   labelled (``skimage.measure.label``). Ellipses fitted robustly to each
   long ridge (``skimage.measure.EllipseModel`` with ``skimage.measure.ransac``)
   give a better centre and the ring radii; the radii are indexed to the
   calibrant's reflections, which fixes the distance (untilted detector).
2. Ring points: along each of ``AZIMUTHS`` rays from the current beam centre
   the peak of every reflection is searched in a window around where the
   current geometry puts it, and located to a fraction of a pixel (centroid of
   the top-hat profile). Masked pixels, gaps (negative or non-finite values)
   and rays that leave the frame are skipped.
3. Refinement: ``scipy.optimize.least_squares`` of distance, beam centre
   (row, col) and the two tilt angles of :mod:`movieproc.detector.geometry`
   (the same functions the integrate stage uses), minimizing
   2theta(point; geometry) - 2theta_hkl(energy) over all ring points: first
   with a robust loss (soft L1), then plain least squares on the inliers,
   whose Jacobian gives the parameter errors. The photon energy is fixed, or
   refined when the distance is fixed. Steps 2-3 repeat until the geometry
   settles.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize

from ..errors import DataError
from ..xray import wavelength
from . import geometry as geom
from .calibrants import Calibrant

#: Length (px) of the radial grey opening that removes the background: wider than a calibrant ring.
TOPHAT_PX = 21
#: A ring sample must stand this many noise standard deviations above the background.
PEAK_SIGMA = 5.0
#: Rays per full turn in the polar unwrapping (0.5 degree apart).
AZIMUTHS = 720
#: Largest half-width (px) of the window searched around a predicted ring.
WINDOW_PX = 12
#: Half-width (px) of the centroid taken around a ring peak.
CENTROID_PX = 3
#: RANSAC inlier distance (px) of ring points from a fitted ellipse.
RANSAC_PX = 2.0
#: A ridge must cover this fraction of the azimuths to be fitted with an ellipse.
MIN_RIDGE_FRACTION = 0.2
#: Ridges shorter than this (azimuth rows) are noise or spots, not ring arcs.
MIN_RIDGE_PEAKS = 20
#: Ridges whose median radii differ by less than this fraction are taken as arcs of one ring.
RIDGE_GROUP = 0.03
#: Relative tolerance on 2theta when indexing rough ring radii to reflections.
INDEX_TOLERANCE = 0.01
#: Fewest points for a ring to enter the fit.
MIN_RING_POINTS = 12
#: Outer rounds of point extraction and fit.
MAX_ROUNDS = 6
#: Rounds stop when the beam centre moves less than this (px) and the distance less than STOP_DISTANCE.
STOP_CENTRE_PX = 0.005
STOP_DISTANCE = 1e-6
#: Points further than this many robust standard deviations from the fit are outliers.
OUTLIER_SIGMA = 5.0
#: Default threshold on a ring's systematic residual: this fraction of one pixel's angular size.
DEFAULT_RESIDUAL_PX = 0.25
#: Width of the azimuth sectors over which ring residuals are averaged, degrees.
SECTOR_DEG = 10.0
#: The photon-energy diagnosis believes a free-energy fit only within this factor of the given energy.
ENERGY_DIAGNOSIS_FACTOR = 2.0
#: Fewest valid pixels to attempt a calibration.
MIN_VALID_PIXELS = 1000

PARAMETERS = ("distance_mm", "beam_row_px", "beam_col_px", "tilt_x_deg", "tilt_y_deg", "photon_energy_kev")


@dataclass(frozen=True)
class RingFit:
    """Residuals of one calibrant reflection after the fit.

    Attributes
    ----------
    label : str
        Reflection(s), e.g. "(1 1 0)".
    d_spacing : float
        Å.
    two_theta_deg : float
        Bragg angle 2theta at the fitted photon energy, degrees.
    points : int
        Ring points found on it.
    inliers : int
        Points kept in the final fit.
    rms_deg, median_abs_deg : float
        RMS and median absolute residual 2theta(point) - 2theta_hkl of all its points, degrees.
    systematic_deg : float
        RMS over azimuth sectors (``SECTOR_DEG`` wide, at least 3 points) of
        the sector's median residual, degrees: how far the ring's shape and
        size depart from the model, with the point-to-point noise averaged out.
        This is what ``max_residual_deg`` is checked against.
    """

    label: str
    d_spacing: float
    two_theta_deg: float
    points: int
    inliers: int
    rms_deg: float
    median_abs_deg: float
    systematic_deg: float


@dataclass(frozen=True)
class Calibration:
    """Result of :func:`calibrate`.

    Attributes
    ----------
    geometry : Geometry
        Fitted geometry (shape, distance, pixel size, beam centre, tilt).
    photon_energy : float
        keV (given, or refined).
    errors : dict
        One-standard-error of each fitted parameter (keys of ``PARAMETERS``;
        mm, px, degrees, keV), from the Jacobian at the solution.
    rings : tuple of RingFit
    point_rows, point_cols : ndarray (m,) float64
        Ring points, fractional pixel indices.
    point_ring : ndarray (m,) int
        Index into ``rings`` of each point.
    point_residual_deg : ndarray (m,) float64
        2theta(point) - 2theta_hkl, degrees.
    point_azimuth_deg : ndarray (m,) float64
        Azimuth phi of each point (geometry convention), degrees.
    inlier : ndarray (m,) bool
    max_residual_deg : float
        Threshold the ring residuals were checked against, degrees.
    calibrant : Calibrant
    refined : tuple of str
        Names of the fitted parameters.
    rounds : int
        Rounds of point extraction and fit.
    """

    geometry: geom.Geometry
    photon_energy: float
    errors: dict
    rings: tuple
    point_rows: np.ndarray
    point_cols: np.ndarray
    point_ring: np.ndarray
    point_residual_deg: np.ndarray
    point_azimuth_deg: np.ndarray
    inlier: np.ndarray
    max_residual_deg: float
    calibrant: Calibrant
    refined: tuple
    rounds: int


@dataclass(frozen=True)
class _Polar:
    """Background-free polar unwrapping about ``centre``: rows = azimuth, columns = radius (1 px steps)."""

    centre: tuple
    values: np.ndarray
    valid: np.ndarray
    noise: float

    @property
    def angles(self) -> np.ndarray:
        return np.arange(self.values.shape[0]) * (2.0 * np.pi / self.values.shape[0])

    def to_image(self, az_index, radius):
        """(row, col) of polar samples (fractional radius allowed)."""
        ang = self.angles[az_index]
        return self.centre[0] + radius * np.sin(ang), self.centre[1] + radius * np.cos(ang)


def _polar(image: np.ndarray, valid: np.ndarray, centre, azimuths: int = AZIMUTHS) -> _Polar:
    from skimage.transform import warp_polar

    ny, nx = image.shape
    corner_r = np.array([0, 0, ny - 1, ny - 1]) - centre[0]
    corner_c = np.array([0, nx - 1, 0, nx - 1]) - centre[1]
    radius = int(np.ceil(np.hypot(corner_r, corner_c).max())) + 2
    kw = dict(center=tuple(centre), radius=radius, output_shape=(azimuths, radius), order=1,
              preserve_range=True, mode="constant", cval=0.0)
    values = warp_polar(np.where(valid, image, 0.0), **kw)
    ok = warp_polar(valid.astype(np.float64), **kw) > 0.999
    diffs = np.diff(values, axis=1)[ok[:, 1:] & ok[:, :-1]]
    noise = 1.4826 * float(np.median(np.abs(diffs))) / np.sqrt(2.0) if diffs.size else 0.0
    # Invalid samples are lifted so that the opening (a running minimum first) ignores them.
    lifted = np.where(ok, values, values[ok].max() if ok.any() else 0.0)
    top = lifted - ndimage.grey_opening(lifted, size=(1, TOPHAT_PX))
    top[~ok] = 0.0
    return _Polar(tuple(float(v) for v in centre), top, ok, max(noise, 1e-12))


def _ridge_peaks(coords: np.ndarray, vals: np.ndarray) -> np.ndarray:
    """The brightest sample of a labelled ridge in each azimuth row, (k, 2) (row, radius)."""
    order = np.lexsort((-vals, coords[:, 0]))
    c = coords[order]
    first = np.r_[True, c[1:, 0] != c[:-1, 0]]
    return c[first]


def _ellipse_model_class():
    """``EllipseModel`` with a fast residual: radial distance to the ellipse along the ray from its centre.

    For the near-circular rings of a calibrant this equals the geometric
    distance to first order in the eccentricity; the library's exact residual
    solves a small minimization per point and dominates the RANSAC time.
    """
    from skimage.measure import EllipseModel

    class RadialEllipseModel(EllipseModel):
        def residuals(self, data):
            xc, yc = self.center
            a, b = self.axis_lengths
            dx, dy = data[:, 0] - xc, data[:, 1] - yc
            ct, st = np.cos(self.theta), np.sin(self.theta)
            u, v = dx * ct + dy * st, -dx * st + dy * ct
            t = np.arctan2(v, u)
            edge = a * b / np.sqrt((b * np.cos(t)) ** 2 + (a * np.sin(t)) ** 2)
            return np.abs(np.hypot(u, v) - edge)

    return RadialEllipseModel


def ring_ellipses(polar: _Polar, rng: np.random.Generator):
    """Ellipses fitted robustly to the ring ridges of a polar unwrapping.

    Ridges (connected runs of samples above ``PEAK_SIGMA`` noise) are grouped
    by their median radius (within ``RIDGE_GROUP`` relative): the arcs of one
    ring cut by gaps or a beam-stop holder fit together.

    Returns
    -------
    list of (centre (row, col), radius px, inliers)
        One per group of ridges with at least ``MIN_RIDGE_FRACTION`` of the
        azimuths as inliers; radius = sqrt(a b) of the ellipse's semi-axes.
    """
    from skimage.measure import label, ransac, regionprops

    model_class = _ellipse_model_class()
    n_az = polar.values.shape[0]
    labels = label(polar.values > PEAK_SIGMA * polar.noise, connectivity=2)
    ridges = []
    for region in regionprops(labels):
        if region.area < MIN_RIDGE_PEAKS:
            continue
        coords = region.coords
        peaks = _ridge_peaks(coords, polar.values[coords[:, 0], coords[:, 1]])
        if len(peaks) >= MIN_RIDGE_PEAKS:
            ridges.append((float(np.median(peaks[:, 1])), peaks))
    ridges.sort(key=lambda r: r[0])
    groups: list[list] = []
    for radius, peaks in ridges:
        if groups and radius - groups[-1][0] <= RIDGE_GROUP * radius:
            groups[-1][1].append(peaks)
        else:
            groups.append([radius, [peaks]])
    out = []
    for _, members in groups:
        peaks = np.concatenate(members)
        if len(peaks) < MIN_RIDGE_FRACTION * n_az:
            continue
        rows, cols = polar.to_image(peaks[:, 0], peaks[:, 1].astype(float))
        model, inliers = ransac(np.column_stack([cols, rows]), model_class, min_samples=5,
                                residual_threshold=RANSAC_PX, max_trials=100, rng=rng)
        if model is None or inliers is None or inliers.sum() < MIN_RIDGE_FRACTION * n_az:
            continue
        xc, yc = model.center
        a, b = model.axis_lengths
        out.append(((float(yc), float(xc)), float(np.sqrt(a * b)), int(inliers.sum())))
    return out


def _score_distance(distance, radii_mm, two_theta_ref):
    tt = np.arctan(radii_mm / distance)
    k = np.clip(np.searchsorted(two_theta_ref, tt), 1, len(two_theta_ref) - 1)
    k = np.where(np.abs(two_theta_ref[k - 1] - tt) < np.abs(two_theta_ref[k] - tt), k - 1, k)
    rel = np.abs(tt - two_theta_ref[k]) / two_theta_ref[k]
    matched = rel < INDEX_TOLERANCE
    inside = (two_theta_ref >= tt.min() * (1 - INDEX_TOLERANCE)) & (two_theta_ref <= tt.max() * (1 + INDEX_TOLERANCE))
    hit = np.unique(k[matched])
    missing = int(inside.sum()) - hit.size
    return hit.size - missing, float(rel[matched].mean()) if matched.any() else 1.0, k, matched


def index_rings(radii_mm, two_theta_ref, distance_guess=None):
    """Distance that indexes ring radii of an untilted detector to a calibrant's reflections.

    Each pairing of a radius r_j with a reflection 2theta_k proposes
    D = r_j / tan(2theta_k); a proposal scores the rings it indexes within
    ``INDEX_TOLERANCE`` (relative 2theta) minus the reflections it predicts
    between the innermost and outermost ring that no ring matches.

    Parameters
    ----------
    radii_mm : array_like (n,)
        Ring radii, mm.
    two_theta_ref : array_like (m,)
        Reflections' 2theta, radians, increasing.
    distance_guess : float, optional
        Rough distance, mm: proposals outside guess/2 .. 2 guess are dropped.

    Returns
    -------
    distance : float
        mm, median over the indexed rings of r_j / tan(2theta_k).
    reflection : ndarray (n,) int
        Reflection index of each ring; -1 where none.
    """
    radii = np.asarray(radii_mm, dtype=float)
    ref = np.asarray(two_theta_ref, dtype=float)
    ref = ref[ref < np.pi / 2]
    if radii.size == 0 or ref.size < 2:
        raise DataError("no rings to index")
    cands = (radii[:, None] / np.tan(ref[None, :])).ravel()
    if distance_guess is not None:
        cands = cands[(cands > distance_guess / 2.0) & (cands < distance_guess * 2.0)]
    best = None
    for d in cands:
        score, err, k, matched = _score_distance(d, radii, ref)
        key = (score, -err, -abs(np.log(d / distance_guess)) if distance_guess else 0.0)
        if best is None or key > best[0]:
            best = (key, k, matched)
    if best is None or best[2].sum() < min(2, radii.size) or best[2].sum() < 0.5 * radii.size:
        raise DataError(f"ring radii {np.round(radii, 2).tolist()} mm do not index to the calibrant's reflections")
    _, k, matched = best
    distance = float(np.median(radii[matched] / np.tan(ref[k[matched]])))
    return distance, np.where(matched, k, -1)


def _check_inputs(image, mask, centre_guess, distance_guess):
    image = np.asarray(image, dtype=np.float64)
    if image.ndim != 2 or min(image.shape) < 16:
        raise ValueError(f"image must be a 2-D frame of at least 16 x 16 pixels, got shape {image.shape}")
    valid = np.isfinite(image) & (image >= 0)
    if mask is not None:
        mask = np.asarray(mask)
        if mask.shape != image.shape:
            raise ValueError(f"mask has shape {mask.shape}, expected the image shape {image.shape}")
        valid &= ~mask.astype(bool)
    if valid.sum() < MIN_VALID_PIXELS:
        raise DataError(f"only {int(valid.sum())} of {image.size} pixels are usable (mask, gaps, negative or "
                        f"non-finite values): at least {MIN_VALID_PIXELS} are needed")
    ny, nx = image.shape
    centre = ((ny - 1) / 2.0, (nx - 1) / 2.0) if centre_guess is None else tuple(float(v) for v in centre_guess)
    if len(centre) != 2 or not (0 <= centre[0] <= ny - 1 and 0 <= centre[1] <= nx - 1):
        raise ValueError(f"centre_guess must be (row, col) on the frame 0..{ny - 1}, 0..{nx - 1}, got {centre_guess}")
    if distance_guess is not None and not (np.isfinite(distance_guess) and distance_guess > 0):
        raise ValueError(f"distance_guess must be a positive distance in mm, got {distance_guess}")
    return image, valid, centre


def rough_geometry(image, valid, pixel_size, two_theta_ref, centre, distance_guess, rng):
    """Untilted start: beam centre from ring ellipses, distance from indexing their radii.

    Returns
    -------
    Geometry
    """
    pix = np.broadcast_to(np.asarray(pixel_size, dtype=float), (2,))
    ellipses = []
    for _ in range(2):
        ellipses = ring_ellipses(_polar(image, valid, centre), rng)
        if not ellipses:
            raise DataError("no calibrant rings found: no bright ridge runs around the beam centre "
                            f"{tuple(round(c, 1) for c in centre)} (px) over a fifth of the azimuths")
        centre = max(ellipses, key=lambda e: e[2])[0]
    radii = np.array(sorted({round(e[1], 0) for e in ellipses}))
    keep = np.r_[True, np.diff(radii) / radii[1:] > INDEX_TOLERANCE]
    distance, _ = index_rings(radii[keep] * float(np.sqrt(pix[0] * pix[1])), two_theta_ref, distance_guess)
    return geom.Geometry(image.shape, distance, tuple(pix), centre, (0.0, 0.0))


def _windows(two_theta_rows: np.ndarray, ref: np.ndarray):
    """Predicted radius index of each reflection on each ray and its search half-width, (k, n_az) each."""
    pos = np.stack([np.searchsorted(row, ref) for row in two_theta_rows], axis=1).astype(float)
    gaps = np.diff(pos, axis=0)
    left = np.vstack([np.full((1, pos.shape[1]), np.inf), gaps])
    right = np.vstack([gaps, np.full((1, pos.shape[1]), np.inf)])
    half = np.minimum(WINDOW_PX, np.floor(0.45 * np.minimum(left, right)))
    return pos.astype(int), half.astype(int)


def ring_points(image, valid, geometry, two_theta_ref):
    """Sub-pixel points on the calibrant rings the geometry predicts.

    Parameters
    ----------
    image : ndarray (ny, nx) float64
    valid : ndarray (ny, nx) bool
    geometry : Geometry
        Current estimate.
    two_theta_ref : ndarray (k,)
        Reflections' 2theta, radians, increasing.

    Returns
    -------
    rows, cols : ndarray (m,) float64
        Fractional pixel indices of the ring maxima.
    ring : ndarray (m,) int
        Reflection index of each point.
    """
    polar = _polar(image, valid, geometry.beam_center_px)
    n_az, n_r = polar.values.shape
    rr, cc = polar.to_image(np.arange(n_az)[:, None], np.arange(n_r)[None, :].astype(float))
    tt = geom.scattering_angles(geometry, rr, cc)[0]
    reach = ref_ok = two_theta_ref < tt[polar.valid].max()
    pos, half = _windows(tt, two_theta_ref[reach])
    offsets = np.arange(-WINDOW_PX, WINDOW_PX + 1)
    az = np.arange(n_az)[:, None]
    out_r, out_c, out_k = [], [], []
    for i, k in enumerate(np.flatnonzero(ref_ok)):
        idx = pos[i][:, None] + offsets[None, :]
        inside = (idx >= 0) & (idx < n_r) & (np.abs(offsets)[None, :] <= half[i][:, None])
        idx = np.clip(idx, 0, n_r - 1)
        vals = np.where(inside, polar.values[az, idx], -np.inf)
        p = np.argmax(vals, axis=1)
        peak = vals[np.arange(n_az), p]
        centred = np.abs(offsets[p]) <= half[i] - CENTROID_PX - 1
        near = np.clip(p[:, None] + np.arange(-CENTROID_PX, CENTROID_PX + 1)[None, :], 0, offsets.size - 1)
        near_idx = idx[np.arange(n_az)[:, None], near]
        good = centred & (peak > PEAK_SIGMA * polar.noise) & polar.valid[az, near_idx].all(axis=1)
        if good.sum() < MIN_RING_POINTS:
            continue
        w = np.clip(polar.values[az, near_idx], 0.0, None)
        radius = (w * near_idx).sum(axis=1) / np.maximum(w.sum(axis=1), 1e-300)
        r, c = polar.to_image(np.flatnonzero(good), radius[good])
        out_r.append(r)
        out_c.append(c)
        out_k.append(np.full(r.size, k))
    if not out_r:
        return np.empty(0), np.empty(0), np.empty(0, dtype=int)
    return np.concatenate(out_r), np.concatenate(out_c), np.concatenate(out_k)


def _unpack(x, free, fixed):
    values = dict(fixed)
    values.update(zip(free, x, strict=True))
    return values


def _residuals_deg(values, shape, pixel_size, rows, cols, d_point):
    g = geom.Geometry(shape, values["distance_mm"], pixel_size, (values["beam_row_px"], values["beam_col_px"]),
                      (values["tilt_x_deg"], values["tilt_y_deg"]))
    tt = geom.scattering_angles(g, rows, cols)[0]
    ratio = wavelength(values["photon_energy_kev"]) / (2.0 * d_point)
    ref = 2.0 * np.arcsin(np.clip(ratio, -1.0, 1.0))
    return np.rad2deg(tt - ref)


def fit_geometry(rows, cols, d_point, start: geom.Geometry, photon_energy, free):
    """Least-squares geometry from ring points: robust pass, then plain least squares on the inliers.

    Parameters
    ----------
    rows, cols : ndarray (m,)
        Ring points, fractional pixel indices.
    d_point : ndarray (m,)
        d-spacing (Å) of the reflection each point belongs to.
    start : Geometry
    photon_energy : float
        keV.
    free : sequence of str
        Names from ``PARAMETERS`` to fit; the others stay at their start values.

    Returns
    -------
    values : dict
        All of ``PARAMETERS``.
    errors : dict
        Standard errors of the free parameters (NaN where the Jacobian is singular).
    residual_deg : ndarray (m,)
    inlier : ndarray (m,) bool
    """
    fixed = {"distance_mm": start.distance_mm, "beam_row_px": start.beam_center_px[0],
             "beam_col_px": start.beam_center_px[1], "tilt_x_deg": start.tilt_deg[0],
             "tilt_y_deg": start.tilt_deg[1], "photon_energy_kev": float(photon_energy)}
    free = tuple(free)
    args = (start.shape, start.pixel_size_mm)

    def fun(x, r, c, d):
        return _residuals_deg(_unpack(x, free, fixed), *args, r, c, d)

    x0 = np.array([fixed[n] for n in free])
    res0 = fun(x0, rows, cols, d_point)
    scale = max(1.4826 * float(np.median(np.abs(res0 - np.median(res0)))), 1e-5)
    robust = optimize.least_squares(fun, x0, args=(rows, cols, d_point), loss="soft_l1", f_scale=scale,
                                    x_scale="jac")
    res = fun(robust.x, rows, cols, d_point)
    sigma = max(1.4826 * float(np.median(np.abs(res))), 1e-6)
    inlier = np.abs(res) <= OUTLIER_SIGMA * sigma
    if inlier.sum() <= len(free):
        inlier[:] = True
    final = optimize.least_squares(fun, robust.x, args=(rows[inlier], cols[inlier], d_point[inlier]),
                                   x_scale="jac")
    dof = max(int(inlier.sum()) - len(free), 1)
    s2 = float(np.sum(final.fun ** 2)) / dof
    jtj = final.jac.T @ final.jac
    try:
        cov = np.linalg.inv(jtj) * s2
        errs = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    except np.linalg.LinAlgError:
        errs = np.full(len(free), np.nan)
    values = _unpack(final.x, free, fixed)
    return values, dict(zip(free, errs.tolist(), strict=True)), fun(final.x, rows, cols, d_point), inlier


def _free_parameters(fix_distance: bool, refine_energy: bool):
    if refine_energy and not fix_distance:
        raise ValueError("refine_energy needs fix_distance: distance and photon energy are nearly degenerate")
    free = [n for n in PARAMETERS[:5] if not (fix_distance and n == "distance_mm")]
    return free + (["photon_energy_kev"] if refine_energy else [])


def _to_geometry(values, shape, pixel_size):
    return geom.Geometry(shape, values["distance_mm"], pixel_size, (values["beam_row_px"], values["beam_col_px"]),
                         (values["tilt_x_deg"], values["tilt_y_deg"]))


def _systematic(residual, azimuth_deg):
    sector = np.floor((azimuth_deg + 180.0) / SECTOR_DEG).astype(int)
    medians = [np.median(residual[sector == k]) for k in np.unique(sector) if np.sum(sector == k) >= 3]
    return float(np.sqrt(np.mean(np.square(medians)))) if medians else float(np.sqrt(np.mean(residual ** 2)))


def _ring_table(calibrant, ring_index, residual, inlier, azimuth_deg, energy):
    rings, remap = [], np.full(ring_index.max() + 1, -1)
    tt = np.rad2deg(calibrant.two_theta(energy))
    for j, k in enumerate(np.unique(ring_index)):
        sel = ring_index == k
        remap[k] = j
        rings.append(RingFit(calibrant.labels[k], float(calibrant.d_spacings[k]), float(tt[k]), int(sel.sum()),
                             int((sel & inlier).sum()), float(np.sqrt(np.mean(residual[sel] ** 2))),
                             float(np.median(np.abs(residual[sel]))),
                             _systematic(residual[sel], azimuth_deg[sel])))
    return tuple(rings), remap[ring_index]


def calibrate(image, mask, calibrant: Calibrant, photon_energy: float, pixel_size, *, distance_guess=None,
              centre_guess=None, max_residual_deg=None, fix_distance=False, refine_energy=False,
              rng: np.random.Generator | None = None) -> Calibration:
    """Fit the detector geometry to a calibrant powder image.

    Parameters
    ----------
    image : array_like (ny, nx)
        Calibrant image, detector units; negative or non-finite pixels count as gaps.
    mask : array_like (ny, nx) bool or None
        True (nonzero) for pixels to leave out.
    calibrant : Calibrant
    photon_energy : float
        keV.
    pixel_size : float or (float, float)
        Pixel pitch (rows, cols), mm.
    distance_guess : float, optional
        Rough sample-detector distance, mm; without it the distance is found
        from the ring radii alone. With ``fix_distance`` it is held fixed.
    centre_guess : (float, float), optional
        Rough beam centre (row, col), px; default the frame centre. The rough
        centre should lie within a few ring spacings of the true one.
    max_residual_deg : float, optional
        Largest accepted systematic residual of a ring (see
        :class:`RingFit`), degrees; default ``DEFAULT_RESIDUAL_PX`` of the
        angular size of one pixel at the fitted distance.
    fix_distance, refine_energy : bool
        Hold the distance at ``distance_guess``; fit the photon energy (needs
        ``fix_distance``).
    rng : numpy.random.Generator, optional
        For the RANSAC ellipse fits; default seeded with 0.

    Returns
    -------
    Calibration

    Raises
    ------
    ValueError
        On arguments outside their range (named by parameter).
    DataError
        No rings, rings that do not index, too few usable pixels, or ring
        residuals above ``max_residual_deg`` (naming the likely cause).
    """
    image, valid, centre = _check_inputs(image, mask, centre_guess, distance_guess)
    if fix_distance and distance_guess is None:
        raise ValueError("fix_distance needs distance_guess")
    free = _free_parameters(fix_distance, refine_energy)
    rng = np.random.default_rng(0) if rng is None else rng
    ref = calibrant.two_theta(photon_energy)
    start = rough_geometry(image, valid, pixel_size, ref, centre, distance_guess, rng)
    if fix_distance:
        start = dataclasses.replace(start, distance_mm=float(distance_guess))
    values, errors, residual, inlier, rounds = _refine(image, valid, calibrant, start, photon_energy, free)
    return _finish(calibrant, image.shape, start.pixel_size_mm, values, errors, residual, inlier, rounds,
                   max_residual_deg, free)


def _refine(image, valid, calibrant, start, photon_energy, free):
    current, energy = start, float(photon_energy)
    for rounds in range(1, MAX_ROUNDS + 1):
        rows, cols, ring = ring_points(image, valid, current, calibrant.two_theta(energy))
        if np.unique(ring).size < 1 or rows.size < len(free) + MIN_RING_POINTS:
            raise DataError(f"too few ring points ({rows.size}) on the predicted {calibrant.name} rings "
                            f"to fit the geometry")
        values, errors, residual, inlier = fit_geometry(rows, cols, calibrant.d_spacings[ring], current, energy,
                                                        free)
        new = _to_geometry(values, current.shape, current.pixel_size_mm)
        moved = np.hypot(*np.subtract(new.beam_center_px, current.beam_center_px))
        change = abs(new.distance_mm / current.distance_mm - 1.0)
        current, energy = new, values["photon_energy_kev"]
        if rounds > 1 and moved < STOP_CENTRE_PX and change < STOP_DISTANCE:
            break
    return values, errors, (rows, cols, ring, residual), inlier, rounds


def _finish(calibrant, shape, pixel_size, values, errors, points, inlier, rounds, max_residual_deg, free):
    rows, cols, ring, residual = points
    g = _to_geometry(values, shape, pixel_size)
    energy = values["photon_energy_kev"]
    pixel_deg = float(np.rad2deg(np.arctan(min(pixel_size) / g.distance_mm)))
    limit = DEFAULT_RESIDUAL_PX * pixel_deg if max_residual_deg is None else float(max_residual_deg)
    if not limit > 0:
        raise ValueError(f"max_residual_deg must be positive, got {max_residual_deg}")
    phi = np.rad2deg(geom.scattering_angles(g, rows, cols)[1])
    rings, local = _ring_table(calibrant, ring, residual, inlier, phi, energy)
    worst = max(rings, key=lambda r: r.systematic_deg)
    if worst.systematic_deg > limit:
        raise DataError(_residual_message(worst, limit, pixel_deg, calibrant, g, energy, rows, cols, ring, phi))
    errs = {n: float(errors.get(n, 0.0)) if n in free else 0.0 for n in PARAMETERS}
    return Calibration(g, float(energy), errs, rings, rows, cols, local, residual, phi, inlier, limit, calibrant,
                       tuple(free), rounds)


def _residual_message(worst, limit, pixel_deg, calibrant, g, energy, rows, cols, ring, phi):
    text = (f"ring {worst.label} of {calibrant.name} departs from the fitted geometry by "
            f"{worst.systematic_deg:.4f} deg ({worst.systematic_deg / pixel_deg:.2f} px; RMS of its sector "
            f"medians), above the threshold {limit:.4f} deg: ")
    try:
        values, _, residual, _ = fit_geometry(rows, cols, calibrant.d_spacings[ring], g, energy, list(PARAMETERS))
        free_worst = max(_systematic(residual[ring == k], phi[ring == k]) for k in np.unique(ring))
        fitted = values["photon_energy_kev"]
    except (ValueError, np.linalg.LinAlgError):
        free_worst, fitted = np.inf, energy
    ratio = fitted / energy
    plausible = 1.0 / ENERGY_DIAGNOSIS_FACTOR < ratio < ENERGY_DIAGNOSIS_FACTOR and abs(ratio - 1) > 1e-3
    if free_worst <= limit and plausible:
        return text + (f"with the photon energy free the rings fit (worst {free_worst:.4f} deg) at {fitted:.4f} keV "
                       f"instead of {energy:.4f} keV: the photon energy given is likely wrong")
    return text + ("the rings do not fit this calibrant at this photon energy: check the calibrant, the photon "
                   "energy and the pixel size (or raise the threshold if the rings are known to be distorted)")
