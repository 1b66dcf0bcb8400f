"""Isotropic and P2 parts of a pattern after polarized excitation."""

import h5py
import numpy as np
import pytest

from movieproc.config import validate
from movieproc.detector import anisotropy, corrections, forward, geometry, integration
from movieproc.io.shotstore import open_shots
from movieproc.stages import integrate

Q = np.linspace(0.0, 8.0, 4001)


def _s0(q):
    return 1.0 + np.exp(-(q - 2.0) ** 2 / 0.3)


def _s2(q):
    # a P2 part with both signs, a few % of S0
    return 0.05 * np.exp(-(q - 1.5) ** 2 / 0.2) - 0.03 * np.exp(-(q - 2.6) ** 2 / 0.3)


def test_legendre_p2_values():
    # P2(x) = (3 x^2 - 1) / 2: P2(1) = 1, P2(0) = -1/2, P2(1/sqrt 3) = 0 (Legendre polynomial)
    np.testing.assert_allclose(anisotropy.legendre_p2([1.0, 0.0, 3 ** -0.5]), [1.0, -0.5, 0.0], atol=1e-15)
    # along the pump polarization at 2theta -> 0 the regressor is P2(1) = 1
    assert anisotropy.p2_regressor(0.0, 0.4, 0.4) == pytest.approx(1.0)


@pytest.mark.parametrize("pump_deg", [0.0, 35.0])
def test_p2_modulated_pattern_gives_back_both_parts(pump_deg):
    det = validate({"run": {"files": ["x.h5"]}, "detector": {"shape_px": [256, 256]}})["detector"]
    geo = geometry.from_config(det, (256, 256))
    frames = forward.render_frames(Q, _s0(Q)[None], [12.0], det, np.random.default_rng(0), photons_per_pixel=None,
                                   masked_region=None, curves_p2=_s2(Q)[None], pump_polarization_deg=pump_deg)
    two_theta, phi = geometry.scattering_angles(geo)
    g = anisotropy.p2_regressor(two_theta, phi, np.deg2rad(pump_deg))
    grid = np.linspace(0.5, 4.5, 200)
    b = integration.build_binning(geometry.q_map(geo, 12.0), grid, factor=corrections.factor_from_config(geo, det),
                                  regressors=[g])
    res = integration.bin_sums(frames, b)
    s0, s2 = anisotropy.solve(res.sums[:, :, 0], res.moments[:, :, 0])
    ok = np.isfinite(s0[0])
    assert ok.mean() > 0.95
    # within 1 %: of S0 point by point, of S2 relative to its largest value (it crosses zero)
    np.testing.assert_allclose(s0[0][ok], _s0(grid)[ok], rtol=1e-2)
    assert np.max(np.abs(s2[0][ok] - _s2(grid)[ok])) < 1e-2 * np.abs(_s2(grid)).max()
    # the plain ring mean mixes in the P2 part: the decomposition is needed
    mean = res.sums[0, 0, 0] / res.moments[0, 0, 0]
    assert np.max(np.abs(mean[ok] - _s0(grid)[ok]) / _s0(grid)[ok]) > 3e-3


def test_stage_stores_both_parts(tmp_path):
    det = validate({"run": {"files": ["x.h5"]}, "detector": {
        "shape_px": [160, 160], "anisotropy": {"enabled": True, "pump_polarization_deg": 90.0},
        "q_min": 0.6, "q_max": 3.0, "q_count": 80}})["detector"]
    n = 20
    rng = np.random.default_rng(1)
    photon = 12.0 * (1 + 0.002 * rng.standard_normal(n))
    amp = np.linspace(0.5, 1.5, n)[:, None]  # a different P2 amplitude per shot
    frames = forward.render_frames(Q, np.tile(_s0(Q), (n, 1)), photon, det, rng, photons_per_pixel=None,
                                   masked_region=None, curves_p2=amp * _s2(Q), pump_polarization_deg=90.0)
    with h5py.File(tmp_path / "run.h5", "w") as h5:
        for name, values in {"pulse_id": np.arange(n), "stage_delay": np.zeros(n), "pump_on": np.ones(n, bool),
                             "pulse_energy": np.ones(n), "timing_edge": np.zeros(n), "photon_energy": photon}.items():
            h5[f"shots/{name}"] = values
        h5["frames"] = frames
    integrate.run({"files": [tmp_path / "run.h5"]}, tmp_path / "shots.zarr",
                  {"detector": det, "compute": {"workers": 2, "scheduler": "threads", "chunk_shots": 16,
                                                "progress": False}})
    store = open_shots(tmp_path / "shots.zarr")
    q = store.q
    s0, s2 = store.curves(0, n), store.curves(0, n, "curves_p2")
    assert s2.shape == (n, q.size) and store.group["curves_p2"].metadata.dimension_names == ("shot", "q")
    np.testing.assert_allclose(s0, np.broadcast_to(_s0(q), s0.shape), rtol=1e-2)
    assert np.max(np.abs(s2 - amp * _s2(q))) < 1e-2 * np.abs(amp * _s2(q)).max()
