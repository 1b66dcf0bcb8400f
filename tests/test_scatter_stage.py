"""Model difference curves, cage term, real-space transform, geometry and the scatter stage."""

import numpy as np
import yaml
import pytest

from movieproc import config as mpconfig
from movieproc.errors import ConfigError, InputError
from movieproc.io import store
from movieproc.io.structures import write_trajectory
from movieproc.scattering import debye as D
from movieproc.scattering import formfactors as ff
from movieproc.scattering import geometry, model, realspace
from movieproc.stages import scatter

Q = np.linspace(0.2, 8.0, 120)
ELEMENTS = ["Ir", "Ir", "Cl", "Cl", "C", "O", "C", "O", "C", "O"]


def ground_structure():
    """The invented Ir2(mu-Cl)2(CO)3 complex (Å)."""
    h = 1.45
    return np.array([
        [-h, 0, 0], [h, 0, 0], [0, 1.7, 0], [0, -1.7, 0],
        [-h - 1.85, 0, 0], [-h - 3.0, 0, 0], [h + 1.85, 0, 0], [h + 3.0, 0, 0],
        [-h, 0, 1.85], [-h, 0, 3.0]], dtype=float)


def trajectory(n_frames=30, seed=0):
    """Ir-Ir contraction with a damped vibration, plus thermal noise."""
    rng = np.random.default_rng(seed)
    g = ground_structure()
    t = np.arange(n_frames) * 0.05  # ps
    contraction = 0.3 * (1 - np.exp(-t / 0.2) * np.cos(2 * np.pi * t / 0.3))
    pos = np.repeat(g[None], n_frames, axis=0)
    pos[:, 0, 0] += contraction / 2
    pos[:, 1, 0] -= contraction / 2
    pos += rng.normal(scale=0.02, size=pos.shape)
    return pos, t


# ---------------------------------------------------------------------------
# model.py
# ---------------------------------------------------------------------------

def test_trajectory_curves_match_exact_per_frame():
    pos, _ = trajectory(12)
    got = model.trajectory_curves(Q, pos, ELEMENTS, workers=2, frames_per_task=5)
    exact = np.array([D.debye(Q, p, ELEMENTS) for p in pos])
    # docs/METHODS.md sec 5: linear sharing at dr = 0.01 Å keeps errors ~1e-5 of S; require 1e-4
    assert np.abs(got - exact).max() < 1e-4 * np.abs(exact).max()
    sync = model.trajectory_curves(Q, pos, ELEMENTS, scheduler="synchronous")
    np.testing.assert_allclose(got, sync, rtol=1e-12, atol=1e-9)  # same arithmetic, any split


def test_difference_curves_and_ensemble_mean():
    g = ground_structure()
    members = np.stack([trajectory(8, seed=s)[0] for s in range(3)])
    mean, each = model.ensemble_difference_curves(Q, members, ELEMENTS, g, return_members=True,
                                                  workers=2)
    exact = np.array([[D.debye(Q, p, ELEMENTS) for p in m] for m in members]) - D.debye(Q, g, ELEMENTS)
    assert each.shape == (3, 8, Q.size)
    # issue requirement: histogram path within 1e-3 of max|dS|
    assert np.abs(each - exact).max() < 1e-3 * np.abs(exact).max()
    np.testing.assert_allclose(mean, each.mean(axis=0), rtol=1e-12)
    single = model.difference_curves(Q, members[1], ELEMENTS, g)
    np.testing.assert_allclose(single, each[1], rtol=1e-10, atol=1e-9)


def test_species_difference_curves():
    g = ground_structure()
    fragment = g[:4]  # Ir2Cl2 core alone: a species with other atoms than the ground state
    names, curves = model.species_difference_curves(
        Q, {"core": (ELEMENTS[:4], fragment), "same": (ELEMENTS, g)}, g, ELEMENTS)
    assert names == ["core", "same"]
    exact = D.debye(Q, fragment, ELEMENTS[:4]) - D.debye(Q, g, ELEMENTS)
    assert np.abs(curves[0] - exact).max() < 1e-4 * D.debye(Q, g, ELEMENTS).max()
    np.testing.assert_array_equal(curves[1], 0.0)  # identical structure: exactly zero


def test_cage_term_gaussian_closed_form():
    # closed form: the 3-D Fourier transform of a Gaussian,
    # int_0^inf 4 pi r^2 A exp(-r^2/(2 w^2)) sin(qr)/(qr) dr = A (2 pi)^(3/2) w^3 exp(-q^2 w^2 / 2)
    q = np.linspace(0.0, 6.0, 50)
    r = np.linspace(0.0, 12.0, 6001)
    amp, width = 0.8, 0.6
    g = 1.0 + amp * np.exp(-((r - 0.0) ** 2) / (2 * width**2))
    fa, fb = ff.form_factor(q, "Ir"), ff.form_factor(q, "O")
    got = model.cage_term(q, r, g, fa, fb, n_a=1, n_b=300, volume=9000.0, window=None)
    ref = 2 * fa * fb * (300 / 9000.0) * amp * (2 * np.pi) ** 1.5 * width**3 * np.exp(-(q * width) ** 2 / 2)
    # trapezoid with dr = 0.002 Å on a smooth integrand: relative error ~1e-7; 1e-5 of max
    np.testing.assert_allclose(got, ref, atol=1e-5 * np.abs(ref).max())
    # Lorch window (1 at r = 0, ~1 - (pi r/R)^2/6 near it): for R = 12 Å >> w it changes
    # the Gaussian's integral by ~ (pi/12)^2 * 3 w^2 / 6 ~ 1.2 % at q = 0
    lorch = model.cage_term(q, r, g, fa, fb, 1, 300, 9000.0, window="lorch")
    assert abs(lorch[0] / ref[0] - 1) < 0.02
    with pytest.raises(InputError):
        model.cage_term(q, r, g, fa, fb, 1, 300, -1.0)


# ---------------------------------------------------------------------------
# realspace.py and geometry.py
# ---------------------------------------------------------------------------

def test_sine_transform_of_single_distance():
    # dS(q) = sin(q d)/(q d); closed form of (r/2pi^2) int_0^inf q dS sin(qr) exp(-k q^2) dq:
    # (r / (2 pi^2 d)) (1/4) sqrt(pi/k) [exp(-(r-d)^2/(4k)) - exp(-(r+d)^2/(4k))]
    d, kappa = 2.9, 0.03
    q = np.linspace(0.0, 40.0, 8001)  # exp(-kappa q^2) = 1e-21 at the end: no truncation
    r = np.linspace(0.5, 6.0, 111)
    got = realspace.sine_transform(q, np.sinc(q * d / np.pi), r, kappa=kappa)
    ref = r / (2 * np.pi**2 * d) * 0.25 * np.sqrt(np.pi / kappa) * (
        np.exp(-((r - d) ** 2) / (4 * kappa)) - np.exp(-((r + d) ** 2) / (4 * kappa)))
    # trapezoid with dq = 0.005 on a smooth, decayed integrand: error << 1e-6 of the peak
    np.testing.assert_allclose(got, ref, atol=1e-6 * ref.max())
    assert r[np.argmax(got)] == pytest.approx(d, abs=0.05)
    two = realspace.sine_transform(q, np.stack([np.sinc(q * d / np.pi)] * 2), r, kappa)
    assert two.shape == (2, r.size)


def test_sine_transform_bad_input():
    with pytest.raises(InputError):
        realspace.sine_transform(np.array([1.0, 0.5]), np.zeros(2), np.ones(3))
    with pytest.raises(InputError):
        realspace.sine_transform(Q, np.zeros(Q.size + 1), np.ones(3))


def test_geometry_distance_angle():
    pos, _ = trajectory(5)
    d = geometry.distance(pos, 0, 1)
    np.testing.assert_allclose(d, np.sqrt(((pos[:, 1] - pos[:, 0]) ** 2).sum(-1)), rtol=1e-14)
    right = np.array([[1.0, 0, 0], [0, 0, 0], [0, 2.0, 0]])
    assert geometry.angle(right, 0, 1, 2) == pytest.approx(90.0, abs=1e-12)
    line = np.array([[-1.0, 0, 0], [0, 0, 0], [2.0, 0, 0]])
    assert geometry.angle(line, 0, 1, 2) == pytest.approx(180.0, abs=1e-12)
    g = ground_structure()
    # Cl-Ir-Cl in the model: atan(1.7/1.45) * 2 (closed form of the construction)
    assert geometry.angle(g, 2, 0, 3) == pytest.approx(np.degrees(2 * np.arctan2(1.7, 1.45)), abs=1e-10)
    assert geometry.angle(pos, 2, 0, 3).shape == (5,)
    with pytest.raises(InputError):
        geometry.distance(g, 0, 10)


# ---------------------------------------------------------------------------
# The stage
# ---------------------------------------------------------------------------

def _inputs(tmp_path):
    g = ground_structure()
    write_trajectory(tmp_path / "ground.xyz", ELEMENTS, g)
    paths = []
    for k in range(2):
        pos, t = trajectory(10, seed=k)
        p = tmp_path / f"traj{k}.xyz"
        write_trajectory(p, ELEMENTS, pos, t)
        paths.append(p)
    excited = g.copy()
    excited[0, 0] += 0.15
    excited[1, 0] -= 0.15
    write_trajectory(tmp_path / "excited.xyz", ELEMENTS, excited)
    return g, paths, excited


def _shots(tmp_path, q=Q):
    """A shots store holding only its q grid (all the scatter stage reads of it)."""
    group = store.new_group(tmp_path / "shots.zarr")
    store.write_array(group, "q", np.asarray(q, float), ["q"], units="1/Å")
    return tmp_path / "shots.zarr"


def _config(tmp_path, *overrides):
    """The validated config sections of the scatter rule (model, plus compute)."""
    cfg = mpconfig.load(mpconfig.ROOT / "config" / "config.yaml",
                        [f"output_dir={tmp_path}", f"model.ground={tmp_path / 'ground.xyz'}", "model.trajectory=[]",
                         "model.species={}", *overrides])
    return {"model": cfg["model"], "compute": cfg["compute"]}


def test_stage_writes_labelled_store(tmp_path):
    import xarray as xr

    g, paths, excited = _inputs(tmp_path)
    out = tmp_path / "scatter.zarr"
    cfg = _config(tmp_path, "model.dr=0.01", "compute.workers=2", f"model.trajectory={[str(p) for p in paths]}",
                  f"model.species={{excited: {tmp_path / 'excited.xyz'}}}")
    scatter.run({"shots": _shots(tmp_path), "structures": []}, out, cfg)
    ds = xr.open_zarr(out, consolidated=False)
    assert ds["traj_dS"].dims == ("frame", "q")
    assert ds["traj_positions"].dims == ("frame", "atom", "axis")
    assert list(ds["axis"].values) == ["x", "y", "z"]
    assert ds["species_dS"].dims == ("species", "q")
    assert ds["q"].attrs["units"] == "1/angstrom" and ds["frame_time"].attrs["units"] == "ps"
    assert list(ds["element"].values) == ELEMENTS
    assert list(ds["species"].values) == ["excited"]
    np.testing.assert_allclose(ds["frame_time"].values, np.arange(10) * 0.05, atol=1e-12)
    members = np.stack([trajectory(10, seed=k)[0] for k in range(2)])
    exact = np.mean([[D.debye(Q, p, ELEMENTS) for p in m] for m in members], axis=0) - D.debye(Q, g, ELEMENTS)
    # positions pass through extended XYZ (8 decimals); histogram path within 1e-3 of max|dS|
    assert np.abs(ds["traj_dS"].values - exact).max() < 1e-3 * np.abs(exact).max()
    sp = D.debye(Q, excited, ELEMENTS) - D.debye(Q, g, ELEMENTS)
    assert np.abs(ds["species_dS"].values[0] - sp).max() < 1e-3 * np.abs(sp).max()
    np.testing.assert_allclose(ds["ground_S"].values, D.debye(Q, g, ELEMENTS), rtol=1e-4)
    assert yaml.safe_load(ds.attrs["options_yaml"])["dr"] == 0.01
    assert yaml.safe_load(ds.attrs["input_files_yaml"])["species"] == {"excited": str(tmp_path / "excited.xyz")}


def test_stage_without_trajectory_or_species(tmp_path):
    import xarray as xr

    _inputs(tmp_path)
    out = tmp_path / "s.zarr"
    cfg = _config(tmp_path, "model.photon_energy_kev=11.0", "model.anomalous=true", "model.excluded_volume=true",
                  "model.damping_A=0.05")
    scatter.run({"shots": _shots(tmp_path), "structures": []}, out, cfg)
    ds = xr.open_zarr(out, consolidated=False)
    assert ds["traj_dS"].shape == (0, Q.size) and ds["species_dS"].shape == (0, Q.size)
    ref = D.debye(Q, ground_structure(), ELEMENTS, photon_energy=11.0, anomalous=True,
                  excluded_volume=ff.WATER_ELECTRON_DENSITY, damping=0.05)
    np.testing.assert_allclose(ds["ground_S"].values, ref, rtol=0, atol=1e-4 * np.abs(ref).max())


@pytest.mark.parametrize("override, key", [
    ("model.bogus=1", "model.bogus"),
    ("model.dr=0", "model.dr"),
    ("model.anomalous=true", "model.photon_energy_kev"),
    ("model.photon_energy_kev=twelve", "model.photon_energy_kev"),
    ("compute.workers=0", "compute.workers"),
    ("model.damping_A=-0.1", "model.damping_A"),
])
def test_option_errors_name_the_config_key(tmp_path, override, key):
    # the config schema checks the stage's options before any stage runs
    with pytest.raises(ConfigError) as err:
        _config(tmp_path, override)
    assert err.value.key == key


def test_core_option_errors_reach_the_user_as_config_keys(tmp_path):
    # a config that bypassed the schema: the core's own parameter is reported as the key a user sets
    _inputs(tmp_path)
    cfg = _config(tmp_path)
    cfg["model"] = dict(cfg["model"], anomalous=True, photon_energy_kev=None)
    with pytest.raises(ConfigError) as err:
        scatter.run({"shots": _shots(tmp_path), "structures": []}, tmp_path / "x.zarr", cfg)
    assert err.value.key == "model.photon_energy_kev"
    assert set(scatter.CONFIG_KEYS.values()) <= {f"model.{k}" for k in cfg["model"]} | {"compute.workers"}
    assert not (tmp_path / "x.zarr").exists()


def test_stage_input_errors_leave_no_store(tmp_path):
    _inputs(tmp_path)
    other = tmp_path / "other.xyz"
    write_trajectory(other, ["O", "H"], np.zeros((2, 2, 3)) + [[0, 0, 0], [0, 0, 1]], [0.0, 0.1])
    out = tmp_path / "x.zarr"
    shots = _shots(tmp_path)
    with pytest.raises(InputError, match="same order"):
        scatter.run({"shots": shots}, out, _config(tmp_path, f"model.trajectory=['{other}']"))
    with pytest.raises(InputError, match="no such file"):
        scatter.run({"shots": shots}, out, _config(tmp_path, f"model.species={{gone: {tmp_path / 'gone.xyz'}}}"))
    assert not out.exists()
