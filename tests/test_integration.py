"""Batched integration: exactness against a sparse reference, round trips through the forward model,
dtypes, bad pixels, variances."""

import numpy as np
import pytest

from movieproc.config import validate
from movieproc.detector import corrections, forward, geometry, integration


def _config(**extra):
    return validate({"run": {"files": ["x.h5"]}, "detector": extra})["detector"]


def _curve(q):
    # smooth test pattern: a liquid-like peak on a slope, 1/Å
    return 1.0 + np.exp(-(q - 2.0) ** 2 / 0.3) + 0.3 * np.exp(-(q - 3.2) ** 2 / 0.5) - 0.05 * q


Q_FINE = np.linspace(0.0, 8.0, 4001)


def _setup(shape=(256, 256), **extra):
    det = _config(shape_px=list(shape), beam_center_px=[shape[0] / 2 - 0.3, shape[1] / 2 + 0.2], **extra)
    geo = geometry.from_config(det, shape)
    return det, geo, corrections.factor_from_config(geo, det)


@pytest.mark.parametrize("tilt", [(0.0, 0.0), (5.0, -3.0)])
def test_isotropic_pattern_integrates_back_to_its_curve(tilt):
    det, geo, factor = _setup(tilt_deg=list(tilt))
    frames = forward.render_frames(Q_FINE, _curve(Q_FINE)[None], [12.0], det, np.random.default_rng(0),
                                   photons_per_pixel=None, masked_region=None)
    grid = np.linspace(0.5, 4.5, 200)
    b = integration.build_binning(geometry.q_map(geo, 12.0), grid, factor=factor)
    res = integration.integrate(frames, b)
    covered = res.count[0] > 5
    assert covered.mean() > 0.95  # the detector reaches nearly the whole q range
    # Bias of the triangular weighting and of sampling pixel centres is ~I'' step^2 / 12 and
    # ~I' x (centroid offset), both below 1e-3 here; 0.2 % is the requirement.
    np.testing.assert_allclose(res.mean[0][covered], _curve(grid)[covered], rtol=2e-3)


def test_kernel_matches_the_sparse_matrix_reference():
    det, geo, factor = _setup(shape=(200, 210))  # 42000 pixels: more than one float32 flush
    rng = np.random.default_rng(1)
    mask = rng.random(geo.shape) < 0.05
    dark = rng.normal(5.0, 1.0, geo.shape)
    b = integration.build_binning(geometry.q_map(geo, 10.0), np.linspace(0.3, 3.0, 90), factor=factor,
                                  mask=mask, dark=dark)
    frames = rng.gamma(2.0, 50.0, (21, *geo.shape)).astype(np.float32)  # 21: one full batch and a tail
    res = integration.bin_sums(frames, b)
    ref = (integration.weight_matrix(b) @ (frames.reshape(21, -1).astype(np.float64) - dark.ravel()).T).T
    # float32 tile values and float32 partial sums over at most 16384 pixels: relative
    # rounding ~ 6e-8 * sqrt(terms) < 1e-5 of the typical sum
    np.testing.assert_allclose(res.sums[:, 0, 0], ref, rtol=1e-5, atol=1e-5 * np.abs(ref).max())
    assert res.sums.shape == (21, 1, 1, 90) and np.all(res.excluded == 0)
    # Each pixel's weights add up to one when both its grid points exist, and to the share that
    # falls on the grid at the two ends: sum of counts = sum over pixels of that share.
    t = (geometry.q_map(geo, 10.0)[~mask] - 0.3) / (2.7 / 89)
    share = np.clip(np.minimum(t + 1, 90 - t), 0, 1)
    assert b.moments[0, 0].sum() == pytest.approx(share.sum(), rel=1e-12)


@pytest.mark.slow
def test_integer_and_float_frames_give_the_same_result():
    det, geo, factor = _setup(shape=(96, 96))
    b = integration.build_binning(geometry.q_map(geo, 12.0), np.linspace(0.5, 3.5, 60), factor=factor)
    counts = forward.render_frames(Q_FINE, np.tile(_curve(Q_FINE), (3, 1)), [12.0] * 3, det,
                                   np.random.default_rng(2), photons_per_pixel=500.0)
    assert counts.dtype == np.uint16
    results = [integration.integrate(counts.astype(dt), b).mean for dt in (np.uint16, np.int32, np.float32, np.float64)]
    for other in results[1:]:
        # integers below 2^24 convert to float32 exactly, so the sums are identical
        np.testing.assert_array_equal(other, results[0])


def test_nan_pixels_and_masked_rows_do_not_poison_the_average():
    det, geo, factor = _setup(shape=(96, 96))
    mask = np.zeros(geo.shape, bool)
    mask[40:43, :] = True  # masked rows
    b = integration.build_binning(geometry.q_map(geo, 12.0), np.linspace(0.5, 3.5, 60), factor=factor, mask=mask)
    clean = forward.render_frames(Q_FINE, np.tile(_curve(Q_FINE), (3, 1)), [12.0] * 3, det,
                                  np.random.default_rng(3), photons_per_pixel=None, masked_region=None)
    frames = clean.copy()
    frames[:, 40:43, :] = 1e30      # garbage in masked rows: never read into the sums
    frames[1, 10, :] = np.nan       # a NaN row in one frame
    frames[1, 60:64, 20:30] = np.inf
    before = frames.copy()
    res = integration.integrate(frames, b)
    np.testing.assert_array_equal(frames, before)  # input untouched
    ref = integration.integrate(clean, b)
    # frames 0 and 2: the masked rows are not used at all
    np.testing.assert_allclose(res.mean[[0, 2]], ref.mean[[0, 2]], rtol=1e-6)
    # frame 1: exactly the mean over the remaining pixels (sparse reference with those pixels dropped)
    keep = np.isfinite(frames[1]).ravel()
    w = integration.weight_matrix(b)
    tent = integration.weight_matrix(integration.build_binning(geometry.q_map(geo, 12.0), b.grid, mask=mask))
    x = np.where(keep, frames[1].ravel(), 0.0)
    with np.errstate(invalid="ignore"):
        expected = (w @ x) / (tent @ keep.astype(float))
    finite = np.isfinite(ref.mean[1])
    assert np.all(np.isfinite(res.mean[1][finite]))
    np.testing.assert_allclose(res.mean[1][finite], expected[finite], rtol=1e-5)  # float32 sums, as above
    assert np.all(res.count[1] <= res.count[0] + 1e-9) and res.count[1].sum() < res.count[0].sum()


def test_saturated_pixels_are_left_out_of_their_frame():
    det, geo, factor = _setup(shape=(64, 64))
    q0 = geometry.q_map(geo, 12.0)
    frames = forward.render_frames(Q_FINE, np.tile(_curve(Q_FINE), (2, 1)), [12.0] * 2, det,
                                   np.random.default_rng(4), photons_per_pixel=300.0, masked_region=None)
    frames[0, 30:34, 50:54] = 65535  # q ~ 0.9-1.1, inside the grid
    grid = np.linspace(0.5, 2.5, 40)
    sat = integration.build_binning(q0, grid, factor=factor, saturation_level=60000)
    res = integration.bin_sums(frames, sat)
    assert res.excluded.tolist() == [16, 0]
    as_nan = frames.astype(np.float64)
    as_nan[0, 30:34, 50:54] = np.nan
    plain = integration.build_binning(q0, grid, factor=factor)
    np.testing.assert_allclose(integration.integrate(frames, sat).mean, integration.integrate(as_nan, plain).mean,
                               rtol=1e-12)


def test_dark_is_subtracted():
    det, geo, factor = _setup(shape=(64, 64))
    q0 = geometry.q_map(geo, 12.0)
    rng = np.random.default_rng(5)
    frames = rng.gamma(3.0, 30.0, (4, 64, 64))
    dark = rng.normal(100.0, 5.0, (64, 64))
    grid = np.linspace(0.5, 2.5, 40)
    with_dark = integration.integrate(frames + dark, integration.build_binning(q0, grid, factor=factor, dark=dark))
    without = integration.integrate(frames, integration.build_binning(q0, grid, factor=factor))
    # values ~100-500 stored in float32 (relative 6e-8) before the dark of ~100 is removed
    np.testing.assert_allclose(with_dark.mean, without.mean, rtol=1e-5)


def test_sectors_of_an_isotropic_pattern_agree_with_the_ring():
    det, geo, factor = _setup(shape=(128, 128))
    frames = forward.render_frames(Q_FINE, _curve(Q_FINE)[None], [12.0], det, np.random.default_rng(6),
                                   photons_per_pixel=None, masked_region=None)
    _, phi = geometry.scattering_angles(geo)
    grid = np.linspace(0.8, 2.6, 40)
    edges = np.linspace(-np.pi, np.pi, 9)
    b = integration.build_binning(geometry.q_map(geo, 12.0), grid, factor=factor, azimuth=phi, sector_edges=edges)
    res = integration.integrate(frames, b)
    assert res.sectors.shape == (1, 8, 40) and res.mean.shape == (1, 40)
    # the same 0.2 % accuracy as the whole ring, now with fewer pixels per sector
    np.testing.assert_allclose(res.sectors[0], np.broadcast_to(_curve(grid), (8, 40)), rtol=2e-3)
    ring = integration.integrate(frames, integration.build_binning(geometry.q_map(geo, 12.0), grid, factor=factor))
    np.testing.assert_allclose(res.sector_count[0].sum(axis=0), ring.count[0], rtol=1e-12)
    # the whole ring of a sectored binning is the ring of the plain one (edges cover every azimuth)
    np.testing.assert_allclose(res.count, ring.count, rtol=1e-12)
    np.testing.assert_allclose(res.mean, ring.mean, rtol=1e-5)


def test_counting_variance_matches_the_scatter_of_poisson_frames():
    det, geo, factor = _setup(shape=(64, 64))
    n = 400
    frames = forward.render_frames(Q_FINE, np.tile(_curve(Q_FINE), (n, 1)), [12.0] * n, det,
                                   np.random.default_rng(7), photons_per_pixel=80.0, masked_region=None)
    b = integration.build_binning(geometry.q_map(geo, 12.0), np.linspace(0.5, 2.5, 40), factor=factor)
    res = integration.integrate(frames, b, variance="counting")
    ok = res.count[0] > 5
    ratio = res.mean[:, ok].var(axis=0, ddof=1) / res.variance[:, ok].mean(axis=0)
    # Each bin's sample variance over 400 frames scatters by sqrt(2/399) = 7 %; over ~40
    # bins the mean ratio is known to ~1.1 %, so 5 % is a 4-sigma bound.
    assert ratio.mean() == pytest.approx(1.0, abs=0.05)
    assert np.all(np.abs(ratio - 1) < 0.4)  # no single bin off by more than ~5.6 sigma


def test_spread_variance_matches_the_sparse_reference():
    # Var m = s^2 / (n_eff - 1): s^2 the weighted spread of the pixels about the frame's mean curve
    # interpolated to each pixel, n_eff = (sum w)^2 / sum w^2 (reliability weights), formed here in
    # float64 from the sparse weight matrix.
    det, geo, _ = _setup(shape=(64, 64))
    rng = np.random.default_rng(8)
    frames = rng.gamma(4.0, 25.0, (3, 64, 64)).astype(np.float32)
    grid = np.linspace(0.5, 2.5, 40)
    q0 = geometry.q_map(geo, 12.0)
    b = integration.build_binning(q0, grid)
    res = integration.integrate(frames, b, variance="spread")
    w = integration.weight_matrix(b)  # no factor: the plain triangular weights
    x = frames.reshape(3, -1).astype(np.float64).T
    wsum = w @ np.ones(x.shape[0])
    with np.errstate(invalid="ignore"):
        mean = np.nan_to_num((w @ x) / wsum[:, None])
    t = (q0.ravel() - grid[0]) / (grid[1] - grid[0])
    lo = np.clip(np.floor(t).astype(int), -1, grid.size - 1)
    frac = t - np.floor(t)
    padded = np.concatenate([mean[:1], mean, mean[-1:]])  # held at the end values beyond the grid
    at_pixel = (1 - frac)[:, None] * padded[lo + 1] + frac[:, None] * padded[np.minimum(lo + 2, grid.size + 1)]
    w2 = (w * w) @ np.ones(x.shape[0])
    with np.errstate(invalid="ignore", divide="ignore"):
        spread = (w @ (x - at_pixel) ** 2) / wsum[:, None]
        n_eff = wsum ** 2 / w2
        var = np.where((n_eff > 1)[:, None], spread / (n_eff[:, None] - 1), np.nan)
    assert np.isfinite(var).sum() >= 90  # 32 of the 40 grid points lie on this small detector, 3 frames
    np.testing.assert_array_equal(np.isfinite(res.variance), np.isfinite(var.T))
    # centred float32 squares and float32 partial sums: relative rounding well below 1e-4
    np.testing.assert_allclose(res.variance, var.T, rtol=1e-4)


def test_bad_arguments():
    det, geo, factor = _setup(shape=(32, 40))
    q0 = geometry.q_map(geo, 12.0)
    with pytest.raises(ValueError, match="mask"):
        integration.build_binning(q0, np.linspace(0.5, 2, 10), mask=np.zeros((40, 32), bool))
    with pytest.raises(ValueError, match="uniform"):
        integration.build_binning(q0, np.array([0.5, 0.6, 0.8]))
    b = integration.build_binning(q0, np.linspace(0.5, 2, 10))
    with pytest.raises(ValueError, match="shape"):
        integration.integrate(np.zeros((2, 40, 32)), b)
    with pytest.raises(TypeError, match="dtype"):
        integration.integrate(np.zeros((2, 32, 40), bool), b)
    with pytest.raises(ValueError, match="variance"):
        integration.integrate(np.zeros((2, 32, 40)), b, variance="poisson")


@pytest.mark.parametrize("n_regressors", [1, 2])
def test_regressor_channels_match_the_sparse_reference(n_regressors):
    # one regressor: the 4-coefficient kernel path; two: the general path
    det, geo, factor = _setup(shape=(80, 90))
    rng = np.random.default_rng(9)
    regs = [rng.uniform(-0.5, 1.0, geo.shape) for _ in range(n_regressors)]
    b = integration.build_binning(geometry.q_map(geo, 12.0), np.linspace(0.5, 2.5, 50), factor=factor,
                                  regressors=regs)
    frames = rng.gamma(2.0, 50.0, (5, *geo.shape)).astype(np.float32)
    res = integration.bin_sums(frames, b)
    x = frames.reshape(5, -1).astype(np.float64).T
    for ch in range(n_regressors + 1):
        ref = (integration.weight_matrix(b, ch) @ x).T
        # float32 sums, as in test_kernel_matches_the_sparse_matrix_reference
        np.testing.assert_allclose(res.sums[:, ch, 0], ref, rtol=1e-5, atol=1e-5 * np.abs(ref).max())
    # moments: sum w h_a h_b, here checked for (0, last) against the tent weights times the regressor
    tent = integration.weight_matrix(integration.build_binning(geometry.q_map(geo, 12.0), b.grid))
    pairs = [(a, c) for a in range(n_regressors + 1) for c in range(a, n_regressors + 1)]
    k = pairs.index((0, n_regressors))
    # (the reference matrix holds the weights as float32: relative rounding 6e-8)
    np.testing.assert_allclose(res.moments[0, k, 0], tent @ regs[-1].ravel(), rtol=2e-7)


def test_pixels_go_wholly_to_the_nearest_q_point_when_not_shared():
    """detector.share_pixels_between_q_points = false: each pixel counts once, at its nearest grid point."""
    rng = np.random.default_rng(5)
    coordinate = rng.uniform(0.6, 3.4, (40, 50))
    grid = np.linspace(0.5, 3.5, 31)
    nearest = integration.build_binning(coordinate, grid, share_between_points=False)
    w = integration.weight_matrix(nearest).toarray()
    # reference: plain numpy rounding to the nearest grid index, one whole pixel per point
    index = np.rint((coordinate.ravel() - grid[0]) / (grid[1] - grid[0])).astype(int)
    np.testing.assert_array_equal(w.sum(axis=1), np.bincount(index, minlength=grid.size))
    assert set(np.unique(w)) <= {0.0, 1.0}
    # shared (the default): the same total weight, spread over the two neighbouring points
    shared = integration.weight_matrix(integration.build_binning(coordinate, grid)).toarray()
    np.testing.assert_allclose(shared.sum(), w.sum())
    assert np.count_nonzero(shared) > np.count_nonzero(w)
