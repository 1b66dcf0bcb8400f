"""Frames to curves: a precomputed pixel-to-grid layout applied to batches of frames.

Each pixel is shared between the two grid points that bracket its coordinate
(usually q at a reference photon energy), with linear weights: a pixel at
fractional grid position t = (coordinate - grid[0]) / step gives weight
1 - (t - floor t) to grid point floor t and t - floor t to the next one. A
grid value is therefore the weighted mean of the pixels within one step of
it, with a triangular weight; the weights change continuously as a ring moves
across a pixel, so curves come out smooth, and each pixel counts once in
total. Pixels can further be split into azimuthal sectors (by the azimuth of
their centre) and carry extra per-pixel regressors (see ``anisotropy``).

Layout for speed: every pixel points to one accumulator row (its lower grid
point and sector) and carries two coefficients per channel (lower and upper
share, the correction factor folded in). Frames are processed 16 at a time:
a tile of 256 pixels of the 16 frames is transposed into a small buffer, so
the inner loop updates 16 frames with one vector operation per coefficient
and every frame is read from memory once. Partial sums are kept in float32
for at most ``max(16384, 8 * rows)`` pixels and then added into float64
accumulators. Frames holding a non-finite or saturated value among valid
pixels (rare) are redone one by one with per-frame validity.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import NamedTuple

import numba
import numpy as np
import scipy.sparse

from . import anisotropy

#: Frames processed together by the kernel (the vector width of the inner loop).
LANES = 16
#: Pixels per transposed tile.
TILE = 256


@dataclass(frozen=True)
class Binning:
    """A pixel-to-grid layout, built once by :func:`build_binning`.

    Attributes
    ----------
    shape : (int, int)
        Frame shape (ny, nx).
    grid : ndarray (ng,) float64
        Uniform grid of the binning coordinate (e.g. q in 1/Å).
    sector_edges : ndarray (S + 1,) float64 or None
        Azimuth edges of the sectors, radians; None for whole rings (S = 1).
    row : ndarray (npix,) int32
        Accumulator row of each pixel: ``sector * (ng + 1) + floor(t) + 1``;
        left-out pixels point to the last row, which is discarded.
    frac : ndarray (npix,) float64
        Upper share t - floor(t) of each pixel (0 when each pixel goes wholly to its nearest point).
    valid : ndarray (npix,) bool
        Pixels that enter the sums.
    scale : ndarray (npix,) float64
        1 / correction factor on valid pixels, 0 elsewhere.
    channels : ndarray (M, npix) float64
        Per-pixel regressors h_m; channel 0 is 1.
    coef : ndarray (npix, 2 M) float32
        Kernel coefficients (lower, upper share) per channel:
        scale * h_m * (1 - frac), scale * h_m * frac.
    dark : ndarray (npix,) float64 or None
        Subtracted from raw values before the factors, detector units.
    saturation : float
        Raw values at or above this are left out of their frame (inf: none).
    moments : ndarray (M (M + 1) / 2, S, ng) float64
        Sums of w h_m h_n over valid pixels (w the triangular weight), for
        (m, n) = (0, 0), (0, 1), ..., (M-1, M-1); moment 0 is the pixel count.
    dark_sums : ndarray (M, S, ng) float64
        Sums of the coefficients times the dark over valid pixels.
    """

    shape: tuple
    grid: np.ndarray
    sector_edges: np.ndarray | None
    row: np.ndarray
    frac: np.ndarray
    valid: np.ndarray
    scale: np.ndarray
    channels: np.ndarray
    coef: np.ndarray
    dark: np.ndarray | None
    saturation: float
    moments: np.ndarray
    dark_sums: np.ndarray

    @property
    def n_sectors(self) -> int:
        return 1 if self.sector_edges is None else len(self.sector_edges) - 1

    @property
    def n_channels(self) -> int:
        return self.channels.shape[0]

    @property
    def n_rows(self) -> int:
        """Accumulator rows: (ng + 1) per sector plus one discard row."""
        return self.n_sectors * (self.grid.size + 1) + 1


class BinSums(NamedTuple):
    """Per-frame sums over the pixels around each grid point.

    Attributes
    ----------
    sums : ndarray (n, M, S, ng) float64
        sum_p w_p h_m,p (x_p - dark_p) / factor_p over valid pixels.
    moments : ndarray (n, M (M + 1) / 2, S, ng) float64
        sum_p w_p h_m,p h_n,p over the pixels valid in that frame.
    excluded : ndarray (n,) int64
        Pixels of each frame left out beyond the static mask (non-finite or
        saturated values).
    """

    sums: np.ndarray
    moments: np.ndarray
    excluded: np.ndarray


@dataclass(frozen=True)
class Integrated:
    """Azimuthally averaged frames.

    Attributes
    ----------
    mean : ndarray (n, ng) float64
        Weighted mean corrected intensity of the whole ring around each grid
        point (with a P2 regressor: its isotropic part); NaN where no pixel
        contributes.
    count : ndarray (n, ng) float64
        Effective number of valid pixels of the whole ring (sum of their weights).
    variance : ndarray (n, ng) float64 or None
        Variance of ``mean`` (:func:`mean_variance` over whole rings), when asked for.
    p2 : ndarray (n, ng) float64 or None
        P2 part of each ring, with a binning that has the P2 regressor.
    sectors : ndarray (n, S, ng) float64 or None
        Mean of each azimuthal sector, with a sectored binning (NaN where a
        sector has no pixels).
    sector_count : ndarray (n, S, ng) float64 or None
        Effective number of valid pixels of each sector.
    excluded : ndarray (n,) int64
        Pixels of each frame left out beyond the static mask (non-finite or saturated).
    """

    mean: np.ndarray
    count: np.ndarray
    variance: np.ndarray | None
    p2: np.ndarray | None
    sectors: np.ndarray | None
    sector_count: np.ndarray | None
    excluded: np.ndarray


def _moment_pairs(m: int):
    return [(a, b) for a in range(m) for b in range(a, m)]


def _grid_step(grid: np.ndarray) -> float:
    """Step of a uniform, increasing grid of at least 2 points; ValueError otherwise."""
    if grid.ndim != 1 or grid.size < 2:
        raise ValueError("grid must be 1-D with at least 2 points")
    step = (grid[-1] - grid[0]) / (grid.size - 1)
    if not step > 0 or not np.allclose(np.diff(grid), step, rtol=1e-6, atol=0):
        raise ValueError("grid must be uniform and increasing")
    return float(step)


def build_binning(coordinate, grid, *, factor=None, mask=None, dark=None, azimuth=None,
                  sector_edges=None, regressors=(), share_between_points=True, saturation_level=None) -> Binning:
    """Precompute the pixel-to-grid layout.

    Parameters
    ----------
    coordinate : array_like (ny, nx)
        Binning coordinate of each pixel centre, e.g. q in 1/Å at a reference
        photon energy (:func:`geometry.q_map`).
    grid : array_like (ng,)
        Uniform, increasing grid of the same coordinate (at least 2 points).
    factor : array_like (ny, nx), optional
        Correction divisor (e.g. :func:`corrections.combined_factor`); pixels
        where it is not finite and positive are left out. Default 1.
    mask : array_like (ny, nx) bool, optional
        True for pixels to leave out.
    dark : array_like (ny, nx), optional
        Dark level subtracted from raw values, detector units.
    azimuth : array_like (ny, nx), optional
        Azimuth of each pixel, radians, used with ``sector_edges``.
    sector_edges : array_like (S + 1,), optional
        Increasing azimuth edges, radians; pixels outside all sectors are left out.
    regressors : sequence of array_like (ny, nx)
        Extra per-pixel channels h_1, h_2, ... (e.g. the P2 term of
        :mod:`anisotropy`); their weighted sums and cross moments are kept.
    share_between_points : bool
        Share each pixel between the two bracketing grid points (default);
        False gives each pixel wholly to the nearest grid point.
    saturation_level : float, optional
        Raw values at or above it are left out of their frame.

    Returns
    -------
    Binning
    """
    coordinate = np.asarray(coordinate, dtype=np.float64)
    if coordinate.ndim != 2:
        raise ValueError(f"coordinate must be a (ny, nx) map, got shape {coordinate.shape}")
    shape = coordinate.shape
    grid = np.asarray(grid, dtype=np.float64)
    step = _grid_step(grid)
    ng = grid.size

    def pixel_map(values, name, dtype=np.float64):
        values = np.asarray(values, dtype=dtype)
        if values.shape != shape:
            raise ValueError(f"{name} has shape {values.shape}, expected the frame shape {shape}")
        return values.ravel()

    t = (coordinate.ravel() - grid[0]) / step
    valid = np.isfinite(t)
    t = np.where(valid, t, -10.0)
    if share_between_points:
        base = np.floor(t)
        frac = t - base
        valid &= (base >= -1) & (base <= ng - 1)
    else:
        base = np.rint(t)
        frac = np.zeros_like(t)
        valid &= (base >= 0) & (base <= ng - 1)
    if factor is None:
        scale = np.ones(t.size)
    else:
        f = pixel_map(factor, "factor")
        with np.errstate(divide="ignore", invalid="ignore"):
            scale = 1.0 / f
        valid &= np.isfinite(f) & (f > 0)
    if mask is not None:
        valid &= ~pixel_map(mask, "mask", bool)
    sector = np.zeros(t.size, dtype=np.int64)
    if sector_edges is not None:
        if azimuth is None:
            raise ValueError("sector_edges need the azimuth map")
        sector_edges = np.asarray(sector_edges, dtype=np.float64)
        if sector_edges.ndim != 1 or sector_edges.size < 2 or np.any(np.diff(sector_edges) <= 0):
            raise ValueError("sector_edges must be increasing with at least 2 values")
        phi = pixel_map(azimuth, "azimuth")
        sector = np.searchsorted(sector_edges, phi, side="right") - 1
        valid &= (sector >= 0) & (sector < sector_edges.size - 1)
    channels = np.array([np.ones(t.size)] + [pixel_map(r, "regressor") for r in regressors])
    valid &= np.all(np.isfinite(channels), axis=0)
    dark_flat = None
    if dark is not None:
        dark_flat = pixel_map(dark, "dark")
        valid &= np.isfinite(dark_flat)
    n_sectors = 1 if sector_edges is None else sector_edges.size - 1
    n_rows = n_sectors * (ng + 1) + 1
    row = np.where(valid, sector * (ng + 1) + base.astype(np.int64) + 1, n_rows - 1).astype(np.int32)
    frac = np.where(valid, frac, 0.0)
    scale = np.where(valid, scale, 0.0)
    channels = np.where(valid, channels, 0.0)
    coef = np.empty((t.size, 2 * channels.shape[0]), dtype=np.float32)
    coef[:, 0::2] = (scale * channels * (1.0 - frac)).T
    coef[:, 1::2] = (scale * channels * frac).T
    sat = np.inf if saturation_level is None else float(saturation_level)
    binning = Binning(shape=shape, grid=grid, sector_edges=sector_edges, row=row, frac=frac, valid=valid,
                      scale=scale, channels=channels, coef=coef, dark=dark_flat, saturation=sat,
                      moments=np.empty(0), dark_sums=np.empty(0))
    moments, dark_sums = _static_sums(binning, valid)
    return dataclasses.replace(binning, moments=moments, dark_sums=dark_sums)


def _rows_to_grid(lo, hi, n_sectors, ng):
    """Combine lower/upper shares on accumulator rows into grid values; (..., S, ng)."""
    lead = lo.shape[:-1]
    lo = lo[..., : n_sectors * (ng + 1)].reshape(lead + (n_sectors, ng + 1))
    hi = hi[..., : n_sectors * (ng + 1)].reshape(lead + (n_sectors, ng + 1))
    return lo[..., 1:] + hi[..., :-1]


def _scatter(binning, ok, lo, hi):
    rows = binning.row[ok]
    n = binning.n_rows
    return _rows_to_grid(np.bincount(rows, lo[ok], n), np.bincount(rows, hi[ok], n),
                         binning.n_sectors, binning.grid.size)


def _static_sums(binning, ok):
    """Moments and dark sums over the pixels in ``ok``."""
    frac, ch = binning.frac, binning.channels
    moments = np.array([_scatter(binning, ok, ch[a] * ch[b] * (1.0 - frac), ch[a] * ch[b] * frac)
                        for a, b in _moment_pairs(ch.shape[0])])
    m = ch.shape[0]
    if binning.dark is None:
        dark_sums = np.zeros((m,) + moments.shape[1:])
    else:
        coef = binning.coef.astype(np.float64)
        dark_sums = np.array([_scatter(binning, ok, coef[:, 2 * k] * binning.dark,
                                       coef[:, 2 * k + 1] * binning.dark) for k in range(m)])
    return moments, dark_sums


def _frame_sums(x, binning):
    """Sums and moments of one frame with per-pixel validity (the careful path)."""
    x = np.asarray(x, dtype=np.float64)
    ok = binning.valid & np.isfinite(x) & (x < binning.saturation)
    coef = binning.coef.astype(np.float64)
    sums = np.array([_scatter(binning, ok, coef[:, 2 * k] * np.where(ok, x, 0.0),
                              coef[:, 2 * k + 1] * np.where(ok, x, 0.0))
                     for k in range(binning.n_channels)])
    moments, dark_sums = _static_sums(binning, ok)
    return sums - dark_sums, moments, int(binning.valid.sum() - ok.sum())


@numba.njit(nogil=True, cache=True, boundscheck=False, fastmath={"contract"})
def _accumulate(frames, row, coef, n_rows, saturation, lanes, out):  # noqa: C901  # pragma: no cover - compiled
    """out[i, r, k] = sum over pixels p with row[p] == r of coef[p, k] * frames[i, p].

    frames (n, npix) any real dtype; values >= saturation become NaN. ``lanes``
    is LANES, passed at run time so the inner loop is vectorized with checks.
    """
    # one compiled pass over the pixels with the lane and saturation branches inline (complexity
    # above the house limit on purpose: split into helpers the kernel runs slower)
    n, npix = frames.shape
    width = coef.shape[1]
    sat = np.float32(saturation)
    check = saturation < np.inf
    tile = np.zeros((TILE, lanes), np.float32)
    part = np.zeros((n_rows, width, lanes), np.float32)
    total = np.zeros((n_rows, width, lanes), np.float64)
    flush_every = max(16384, 8 * n_rows)
    for start in range(0, n, lanes):
        used = min(lanes, n - start)
        part[:] = 0.0
        total[:] = 0.0
        since = 0
        for p0 in range(0, npix, TILE):
            m = min(TILE, npix - p0)
            for f in range(0, lanes, 4):
                r0 = frames[start + min(f, used - 1)]
                r1 = frames[start + min(f + 1, used - 1)]
                r2 = frames[start + min(f + 2, used - 1)]
                r3 = frames[start + min(f + 3, used - 1)]
                if check:
                    for j in range(m):
                        v0 = np.float32(r0[p0 + j])
                        v1 = np.float32(r1[p0 + j])
                        v2 = np.float32(r2[p0 + j])
                        v3 = np.float32(r3[p0 + j])
                        tile[j, f] = v0 if v0 < sat else np.nan
                        tile[j, f + 1] = v1 if v1 < sat else np.nan
                        tile[j, f + 2] = v2 if v2 < sat else np.nan
                        tile[j, f + 3] = v3 if v3 < sat else np.nan
                else:
                    for j in range(m):
                        tile[j, f] = r0[p0 + j]
                        tile[j, f + 1] = r1[p0 + j]
                        tile[j, f + 2] = r2[p0 + j]
                        tile[j, f + 3] = r3[p0 + j]
            if width == 2:
                for j in range(m):
                    p = p0 + j
                    r = row[p]
                    c0 = coef[p, 0]
                    c1 = coef[p, 1]
                    for f in range(lanes):
                        v = tile[j, f]
                        part[r, 0, f] += c0 * v
                        part[r, 1, f] += c1 * v
            elif width == 4:
                for j in range(m):
                    p = p0 + j
                    r = row[p]
                    c0 = coef[p, 0]
                    c1 = coef[p, 1]
                    c2 = coef[p, 2]
                    c3 = coef[p, 3]
                    for f in range(lanes):
                        v = tile[j, f]
                        part[r, 0, f] += c0 * v
                        part[r, 1, f] += c1 * v
                        part[r, 2, f] += c2 * v
                        part[r, 3, f] += c3 * v
            else:
                for j in range(m):
                    p = p0 + j
                    r = row[p]
                    for k in range(width):
                        c = coef[p, k]
                        for f in range(lanes):
                            part[r, k, f] += c * tile[j, f]
            since += m
            if since >= flush_every:
                since = 0
                for r in range(n_rows):
                    for k in range(width):
                        for f in range(lanes):
                            total[r, k, f] += part[r, k, f]
                            part[r, k, f] = 0.0
        for r in range(n_rows):
            for k in range(width):
                for f in range(lanes):
                    total[r, k, f] += part[r, k, f]
        for f in range(used):
            for r in range(n_rows):
                for k in range(width):
                    out[start + f, r, k] = total[r, k, f]


def _as_frames(frames, shape):
    frames = np.asarray(frames)
    if frames.ndim == 2:
        frames = frames[None]
    if frames.ndim != 3 or frames.shape[1:] != tuple(shape):
        raise ValueError(f"frames must have shape (n, {shape[0]}, {shape[1]}), got {frames.shape}")
    if frames.dtype.kind not in "iuf":
        raise TypeError(f"frames must hold integers or floats, got dtype {frames.dtype}")
    return np.ascontiguousarray(frames.reshape(frames.shape[0], -1))


def _raw_sums(flat, binning):
    out = np.empty((flat.shape[0], binning.n_rows, binning.coef.shape[1]), dtype=np.float64)
    if flat.shape[0]:
        _accumulate(flat, binning.row, binning.coef, binning.n_rows, binning.saturation, LANES, out)
    return out


def bin_sums(frames, binning: Binning) -> BinSums:
    """Weighted sums of corrected pixel values around each grid point, per frame.

    Parameters
    ----------
    frames : array_like (n, ny, nx) (or one (ny, nx) frame)
        Raw frames, any integer or float dtype (values are converted to
        float32, exact for integers below 2^24); not modified.
    binning : Binning

    Returns
    -------
    BinSums
        ``sums`` (n, M, S, ng), ``moments`` (n, M(M+1)/2, S, ng), ``excluded`` (n,).
    """
    return _bin_sums_flat(_as_frames(frames, binning.shape), binning)


def _bin_sums_flat(flat, binning):
    raw = _raw_sums(flat, binning)
    m = binning.n_channels
    sums = np.stack([_rows_to_grid(raw[..., 2 * k], raw[..., 2 * k + 1], binning.n_sectors, binning.grid.size)
                     for k in range(m)], axis=1) - binning.dark_sums
    moments = np.repeat(binning.moments[None], flat.shape[0], axis=0)
    excluded = np.zeros(flat.shape[0], dtype=np.int64)
    redo = ~np.all(np.isfinite(raw[:, :-1, :]), axis=(1, 2))
    for i in np.flatnonzero(redo):
        sums[i], moments[i], excluded[i] = _frame_sums(flat[i], binning)
    return BinSums(sums, moments, excluded)


def _derived(binning, lo, hi, dark):
    coef = np.empty((lo.size, 2), dtype=np.float32)
    coef[:, 0], coef[:, 1] = lo, hi
    other = dataclasses.replace(binning, coef=coef, channels=binning.channels[:1], dark=dark)
    _, dark_sums = _static_sums(other, binning.valid)
    return dataclasses.replace(other, moments=binning.moments[:1], dark_sums=dark_sums)


def integrate(frames, binning: Binning, *, variance=None) -> Integrated:
    """Azimuthal average of each frame on the grid: whole rings, their P2 part and sectors.

    One pass over the frames (:func:`bin_sums`) gives everything the binning
    holds: the whole-ring mean (the sums over all sectors), with a P2
    regressor (:func:`movieproc.detector.anisotropy.p2_regressor` as the only
    extra channel) the isotropic and P2 parts of each ring
    (:func:`movieproc.detector.anisotropy.solve`), and with sectors the mean
    of each sector.

    Parameters
    ----------
    frames : array_like (n, ny, nx) (or one (ny, nx) frame)
        Raw frames, any integer or float dtype; not modified.
    binning : Binning
    variance : {None, "counting", "spread"}
        Also compute the variance of each whole-ring mean,
        :func:`mean_variance` with this mode. Not available with regressors
        (the variance of the isotropic part of the P2 fit is not computed).

    Returns
    -------
    Integrated

    Raises
    ------
    ValueError
        On an unknown ``variance`` or one asked for with regressors.
    """
    if variance not in (None, "counting", "spread"):
        raise ValueError(f"variance must be None, 'counting' or 'spread', got {variance!r}")
    if variance is not None and binning.n_channels > 1:
        raise ValueError("variance must be None with regressors (the variance of the isotropic part of the "
                         "P2 fit is not computed)")
    if binning.n_channels > 2:
        raise ValueError(f"binning has {binning.n_channels - 1} regressors; integrate takes none or the P2 one")
    flat = _as_frames(frames, binning.shape)
    res = _bin_sums_flat(flat, binning)
    sums, moments = res.sums.sum(axis=2), res.moments.sum(axis=2)  # whole rings: (n, M, ng)
    count = moments[:, 0]
    p2 = None
    if binning.n_channels == 2:
        mean, p2 = anisotropy.solve(sums, moments)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(count > 0, sums[:, 0] / count, np.nan)
    var = None
    if variance is not None:
        var = mean_variance(frames, binning, variance, sums=res, whole_rings=True)[:, 0]
    sectors = sector_count = None
    if binning.sector_edges is not None:
        sector_count = res.moments[:, 0]
        with np.errstate(invalid="ignore", divide="ignore"):
            sectors = np.where(sector_count > 0, res.sums[:, 0] / sector_count, np.nan)
    return Integrated(mean, count, var, p2, sectors, sector_count, res.excluded)


@numba.njit(nogil=True, cache=True)
def _centred_squares(frames, curves, lo, frac, factor, dark, saturation, out):  # pragma: no cover - compiled
    """out[i, p] = (x - d - F r)^2 with r the frame's curve at the pixel, (1 - f) c[lo] + f c[lo + 1];
    NaN for a saturated or non-finite x, 0 for pixels left out (lo < 0)."""
    n, npix = frames.shape
    for i in range(n):
        for p in range(npix):
            k = lo[p]
            if k < 0:
                out[i, p] = 0.0
                continue
            x = np.float64(frames[i, p])
            if not x < saturation:
                out[i, p] = np.nan
                continue
            z = x - dark[p] - factor[p] * ((1.0 - frac[p]) * curves[i, k] + frac[p] * curves[i, k + 1])
            out[i, p] = z * z


#: Centred values of at most this many bytes (float32) are formed at once by :func:`mean_variance`.
_SPREAD_BYTES = 32 * 2**20


def mean_variance(frames, binning: Binning, mode: str, *, sums: BinSums | None = None,
                  whole_rings: bool = False) -> np.ndarray:
    """Variance of each frame's weighted mean (channel 0) at each grid point.

    The mean at grid point k is m = sum w y / sum w over the valid pixels
    around k, with y = (x - d) / F the corrected pixel values and w the
    triangular weights (see the module docstring).

    Parameters
    ----------
    frames : array_like (n, ny, nx) (or one (ny, nx) frame)
        Raw frames, any integer or float dtype; not modified.
    binning : Binning
    mode : {"counting", "spread"}
        ``"counting"``: the dark-subtracted values are photon counts
        (Var x = x - d, independent pixels), so
        Var m = sum w^2 (x - d) / F^2 / (sum w)^2. ``"spread"``: the pixels
        around k scatter with one common variance s^2, estimated from the
        frame itself by the weighted spread about the frame's own mean
        curve, linearly interpolated to each pixel,
        s^2 = sum w (y - m(pixel))^2 / sum w; then
        Var m = s^2 / (n_eff - 1) with n_eff = (sum w)^2 / sum w^2 (the
        reliability-weights correction of a weighted spread). The values are
        centred before squaring, so float32 sums keep their precision at
        high counts, and the slope of the curve across the window adds
        little. NaN where
        n_eff <= 1.
    sums : BinSums, optional
        :func:`bin_sums` of the same frames and binning, when already at hand
        (saves a pass over the frames).
    whole_rings : bool
        With a sectored binning: the variance of the mean over whole rings
        (all sectors together), shape (n, 1, ng); default per sector.

    Returns
    -------
    ndarray (n, S, ng) float64
        Squared units of the corrected intensity; NaN where no pixel
        contributes.
    """
    flat = _as_frames(frames, binning.shape)
    res = _bin_sums_flat(flat, binning) if sums is None else sums
    ng = binning.grid.size

    def ring(a):
        return a.sum(axis=-2, keepdims=True) if whole_rings else a

    count = ring(res.moments[:, 0])
    if mode == "counting":
        w2 = _derived(binning, binning.scale ** 2 * (1 - binning.frac) ** 2, binning.scale ** 2 * binning.frac ** 2,
                      binning.dark)
        with np.errstate(invalid="ignore", divide="ignore"):
            var = ring(_bin_sums_flat(flat, w2).sums[:, 0]) / count ** 2
        return np.where(count > 0, var, np.nan)
    if mode != "spread":
        raise ValueError(f"mode must be 'counting' or 'spread', got {mode!r}")
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nan_to_num(ring(res.sums[:, 0]) / count)
    # The frame's mean curve at each pixel: lower and upper grid values of the pixel's
    # row, held at the end values beyond the grid; 0 for pixels left out.
    padded = np.concatenate([mean[..., :1], mean, mean[..., -1:]], axis=-1)  # (n, S', ng + 2)
    sec, b1 = np.divmod(binning.row.astype(np.int64), ng + 1)
    if whole_rings:
        sec = np.zeros_like(sec)
    ok = binning.valid
    lo = np.where(ok, sec * (ng + 2) + b1, -1).astype(np.int64)  # -1: pixel left out
    padded = np.ascontiguousarray(padded.reshape(padded.shape[0], -1))
    factor = np.where(ok, 1.0 / np.where(ok, binning.scale, 1.0), 0.0)  # F on valid pixels
    dark = np.zeros(lo.size) if binning.dark is None else np.where(ok, binning.dark, 0.0)
    sq = dataclasses.replace(_derived(binning, binning.scale ** 2 * (1 - binning.frac),
                                      binning.scale ** 2 * binning.frac, None), saturation=np.inf)
    n = flat.shape[0]
    step = max(LANES, _SPREAD_BYTES // (4 * flat.shape[1]) // LANES * LANES)
    resid = np.empty((n,) + res.sums.shape[2:], dtype=np.float64)
    z2 = np.empty((min(step, n), flat.shape[1]), dtype=np.float32)
    for a in range(0, n, step):
        b = min(a + step, n)
        _centred_squares(flat[a:b], padded[a:b], lo, binning.frac, factor, dark, binning.saturation, z2)
        resid[a:b] = _bin_sums_flat(z2[: b - a], sq).sums[:, 0]
    w2 = ring(_scatter(binning, ok, (1.0 - binning.frac) ** 2, binning.frac ** 2)[None])
    with np.errstate(invalid="ignore", divide="ignore"):
        spread = ring(resid) / count
        n_eff = count ** 2 / w2
        var = spread / (n_eff - 1.0)
    return np.where((count > 0) & (n_eff > 1.0 + 1e-9), var, np.nan)


def weight_matrix(binning: Binning, channel: int = 0) -> scipy.sparse.csr_array:
    """The layout as a sparse matrix of per-pixel coefficients.

    Returns
    -------
    scipy.sparse.csr_array, shape (S * ng, npix), float64
        Entry (s * ng + k, p) is w_p * h_channel,p / factor_p for pixel p near
        grid point k in sector s, so ``matrix @ (x - dark)`` gives channel sums
        of a frame whose pixels are all valid.
    """
    ng, s = binning.grid.size, binning.n_sectors
    ok = binning.valid
    pix = np.flatnonzero(ok)
    sec, base = np.divmod(binning.row[ok].astype(np.int64), ng + 1)
    lo_bin, hi_bin = base - 1, base
    coef = binning.coef.astype(np.float64)
    vals, rows, cols = [], [], []
    for b, c in ((lo_bin, coef[ok, 2 * channel]), (hi_bin, coef[ok, 2 * channel + 1])):
        keep = (b >= 0) & (b < ng)
        rows.append(sec[keep] * ng + b[keep])
        cols.append(pix[keep])
        vals.append(c[keep])
    return scipy.sparse.csr_array((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                                  shape=(s * ng, ok.size))
