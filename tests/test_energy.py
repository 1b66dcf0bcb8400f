"""Photon energy: undulator resonance, choice of source, q rescaling and the effect of energy jitter."""

import h5py
import numpy as np
import pytest

from movieproc.config import validate
from movieproc.detector import energy, forward
from movieproc.io.shotstore import open_shots
from movieproc.stages import integrate


def test_planar_resonance_against_a_hand_computed_value():
    # docs/METHODS.md sec. 7 (Huang & Kim, PRST-AB 10, 034801 (2007)): lambda = lambda_u / (2 gamma^2) (1 + K^2 / 2).
    # By hand: gamma = 14 GeV / 0.51099895 MeV (m_e c^2, CODATA via scipy.constants) = 27397.32;
    # lambda = 30 mm / (2 * 27397.32^2) * (1 + 3.5^2 / 2) = 1.423836 Å;
    # E = h c / lambda = 12.398420 keV Å / 1.423836 Å = 8.707756 keV.
    assert energy.resonance_energy(14.0, 30.0, 3.5, "planar") == pytest.approx(8.707756, rel=2e-7)
    # Cross-check with the practical undulator equation E1[keV] = 0.9496 E[GeV]^2 / (lambda_u[cm] (1 + K^2/2))
    # (X-ray Data Booklet, sec. 2.1; constant from memory, 4 digits).
    assert energy.resonance_energy(14.0, 30.0, 3.5) == pytest.approx(0.9496 * 14.0 ** 2 / (3.0 * 7.125), rel=2e-4)


def test_helical_resonance_against_a_hand_computed_value():
    # Helical: lambda = lambda_u / (2 gamma^2) (1 + K^2) (docs/METHODS.md sec. 7).
    # gamma = 8 GeV / 0.51099895 MeV = 15655.61; lambda = 26 mm / (2 * 15655.61^2) * 2.44 = 1.294176 Å;
    # E = 12.398420 / 1.294176 = 9.580168 keV.
    assert energy.resonance_energy(8.0, 26.0, 1.2, "helical") == pytest.approx(9.580168, rel=2e-7)
    # third harmonic, and photon energy scales as the electron energy squared (dE/E = 2 dE_e/E_e)
    assert energy.resonance_energy(8.0, 26.0, 1.2, "helical", 3) == pytest.approx(3 * 9.580168, rel=2e-7)
    e = energy.resonance_energy(np.array([8.0, 8.008]), 26.0, 1.2, "helical")
    assert e[1] / e[0] == pytest.approx(1.001 ** 2, rel=1e-12)
    with pytest.raises(ValueError):
        energy.resonance_energy(8.0, 26.0, 1.2, "elliptic")


def test_photon_energy_sources_in_order():
    photon = np.array([9.0, 0.0, np.nan, 9.1, -1.0])
    electron = np.array([14.0, 14.0, np.nan, 14.0, 14.0])
    und = {"period_mm": 30.0, "k": 3.5, "kind": "planar", "harmonic": 1}
    e, origin = energy.choose_photon_energy(5, photon, electron, undulator=und, default_kev=12.0)
    assert origin.tolist() == [0, 1, 2, 0, 1]
    np.testing.assert_allclose(e, [9.0, 8.707756, 12.0, 9.1, 8.707756], rtol=2e-7)
    e, origin = energy.choose_photon_energy(5, photon, None)
    assert origin.tolist() == [0, -1, -1, 0, -1] and np.isnan(e[1])
    e, origin = energy.choose_photon_energy(5, photon, electron, source="config", default_kev=12.0, undulator=und)
    assert np.all(e == 12.0) and np.all(origin == 2)
    # an undulator without K cannot be used
    _, origin = energy.choose_photon_energy(5, None, electron, undulator=dict(und, k=None))
    assert np.all(origin == -1)


def test_rescale_is_exact_for_cubics_and_the_identity_at_equal_energy():
    grid = np.linspace(0.2, 5.0, 97)
    cubic = lambda x: 0.3 - 0.2 * x + 0.05 * x ** 2 - 0.01 * x ** 3  # noqa: E731
    q = np.linspace(0.5, 4.5, 41)
    scale = np.array([0.997, 1.0, 1.0023])
    out = energy.rescale_curves(np.tile(cubic(grid), (3, 1)), grid, q, scale)
    # 4-point Lagrange interpolation reproduces cubic polynomials (float64 rounding only)
    np.testing.assert_allclose(out, cubic(q[None, :] / scale[:, None]), rtol=1e-12, atol=1e-13)
    same = energy.rescale_curves(grid[None, :] ** 2, grid, grid[2:-3], np.ones(1))
    np.testing.assert_allclose(same[0], grid[2:-3] ** 2, rtol=1e-13)
    assert np.isnan(energy.rescale_curves(grid[None, :], grid, np.array([0.2, 4.99]), np.ones(1))).all()


def _write_run(path, frames, photon):
    n = len(frames)
    with h5py.File(path, "w") as h5:
        g = h5.create_group("shots")
        g["pulse_id"] = np.arange(n)
        g["stage_delay"] = np.zeros(n)
        g["pump_on"] = np.arange(n) % 2 == 0
        g["pulse_energy"] = np.ones(n)
        g["timing_edge"] = np.zeros(n)
        g["photon_energy"] = photon
        h5.create_dataset("frames", data=frames, chunks=(16,) + frames.shape[1:])


def test_energy_jitter_leaves_no_residual_when_each_shot_has_its_own_q(tmp_path):
    # A run with 0.2 % rms photon-energy jitter and no pump signal, rendered twice with the same
    # energies and independent Poisson noise (runs A and B). The noise variance of a processed
    # curve is half the mean square of A - B (the energy effects cancel there), so
    # chi^2 = <(on - off)^2> / (2 sigma^2) per q is 1 when on-off differences hold only noise.
    det = validate({"run": {"files": ["x.h5"]}, "detector": {
        "shape_px": [128, 128], "q_min": 0.8, "q_max": 2.6, "q_count": 60}})["detector"]
    np.save(tmp_path / "mask.npy", forward.default_mask(det))
    det["mask_file"] = str(tmp_path / "mask.npy")
    q = np.linspace(0.0, 8.0, 4001)
    curve = 1.0 + np.exp(-(q - 2.0) ** 2 / 0.1)  # a steep peak: energy jitter moves it visibly
    rng = np.random.default_rng(11)
    n = 300
    photon = 12.0 * (1 + 0.002 * rng.standard_normal(n))
    for name in "AB":
        frames = forward.render_frames(q, np.tile(curve, (n, 1)), photon, det, rng, photons_per_pixel=1000.0)
        _write_run(tmp_path / f"{name}.h5", frames, photon)
    compute = {"workers": 1, "scheduler": "synchronous", "chunk_shots": 128, "progress": False}
    chi2 = {}
    for aware in (True, False):
        curves = {}
        for name in "AB":
            integrate.run({"files": [tmp_path / f"{name}.h5"]}, tmp_path / f"{name}.zarr",
                          {"detector": dict(det, energy_aware=aware), "compute": compute})
            curves[name] = open_shots(tmp_path / f"{name}.zarr").curves(0, n).astype(np.float64)
        sigma2 = np.mean((curves["A"] - curves["B"]) ** 2, axis=0) / 2
        diff = curves["A"][0::2] - curves["A"][1::2]
        chi2[aware] = np.mean(diff ** 2, axis=0) / (2 * sigma2)
    # 150 pairs and 300 noise pairs per q: each chi^2 scatters by ~0.14, the mean over 60
    # q points (neighbours share pixels) by ~0.025; 0.1 is a 4-sigma bound.
    assert chi2[True].mean() == pytest.approx(1.0, abs=0.1)
    # ignoring the energy: the moving peak leaves a residual several times the noise
    assert chi2[False].mean() > 2.0 and chi2[False].max() > 10.0
