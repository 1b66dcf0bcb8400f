"""Detector geometry from calibrant images (movieproc.detector.calibrate) and the geometry ring check.

Synthetic calibrant images are rendered by the project's forward model
(movieproc.detector.forward.render_frames: geometry, solid angle,
polarization, beam-stop shadow, Poisson noise) from a curve of narrow peaks at
q = 2 pi / d of the calibrant's reflections.
"""

from __future__ import annotations

import argparse
import dataclasses
import itertools

import h5py
import numpy as np
import pytest
import yaml

from movieproc import calibrate_command, config
from movieproc.detector import calibrants, corrections, forward
from movieproc.detector import geometry as geom
from movieproc.detector.calibrate import calibrate
from movieproc.detector.ringcheck import ring_check
from movieproc.errors import DataError, InputError
from movieproc.xray import wavelength

SHAPE = (1000, 1040)
# Lattice constants and their sources (checked against the calibrants module, not imported from it):
LAB6_A = 4.156826  # NIST SRM 660c certificate: 0.4156826 nm at 22.5 C
CEO2_A = 5.411651  # NIST SRM 674b certificate (from memory)
AGBE_D = 58.380  # Huang et al., J. Appl. Cryst. 26 (1993) 180: d(001) = 58.380(3) Å

# name, distance mm, pixel mm, energy keV, beam centre (row, col), tilt deg
CASES = {
    "LaB6": (100.0, 0.1, 12.0, (467.3, 548.6), (2.6, -1.9)),
    "CeO2": (80.0, 0.1, 15.0, (531.8, 490.2), (-1.5, 3.0)),
    "AgBe": (300.0, 0.075, 12.0, (480.4, 561.7), (3.0, 2.2)),
}


def _detector(case):
    distance, pixel, energy, centre, tilt = case
    return dict(distance_mm=distance, pixel_size_mm=pixel, beam_center_px=list(centre), tilt_deg=list(tilt),
                polarization_fraction=0.99, photon_energy_kev=energy)


def render(calibrant, case, rng, shape=SHAPE, peak_px=1.3):
    """Calibrant image through the forward model; returns (image, shadow) with a gap stripe in the shadow."""
    distance, pixel, energy, _, _ = case
    det = _detector(case)
    q = np.arange(0.0, 12.0, 1e-4)
    sigma_q = peak_px * 2 * np.pi / wavelength(energy) * pixel / distance
    curve = 0.3 + 0.3 * np.exp(-q / 3.0)
    for j, qk in enumerate(2 * np.pi / calibrant.d_spacings[:40]):
        curve += 3.0 * np.exp(-0.5 * ((q - qk) / sigma_q) ** 2) / (1.0 + 0.1 * j)
    shadow = forward.default_mask(det, shape)
    shadow[:, shape[1] // 3: shape[1] // 3 + 7] = True  # module gap
    image = forward.render_frames(q, curve[None], [energy], det, rng, shape=shape, photons_per_pixel=150.0,
                                  masked_region=shadow, dtype=np.float32)[0]
    return image, shadow


@pytest.fixture(scope="module")
def lab6_image():
    image, shadow = render(calibrants.get("LaB6"), CASES["LaB6"], np.random.default_rng(11))
    return image, shadow


def _independent_spacings(species, basis, spacegroup, a, count):
    """Distinct d of reflections with nonzero structure factor (point scatterers f = Z), from an ASE cell."""
    from ase.data import atomic_numbers
    from ase.spacegroup import crystal

    atoms = crystal(species, basis=basis, spacegroup=spacegroup, cellpar=[a, a, a, 90, 90, 90])
    z = np.array([atomic_numbers[s] for s in atoms.get_chemical_symbols()], dtype=float)
    frac = atoms.get_scaled_positions()
    recip = atoms.cell.reciprocal()  # rows b_i with a_i . b_j = delta_ij (no 2 pi)
    found = {}
    for hkl in itertools.product(range(-6, 7), repeat=3):
        if hkl == (0, 0, 0):
            continue
        f = np.sum(z * np.exp(2j * np.pi * frac @ np.array(hkl)))
        if abs(f) > 1e-6 * z.sum():
            d = 1.0 / np.linalg.norm(np.array(hkl) @ recip)
            found[round(d, 9)] = d
    return np.array(sorted(found.values(), reverse=True)[:count])


def test_reflections_match_lattice_formulas():
    # LaB6, Pm-3m (221): La at 0,0,0; B at (x, 1/2, 1/2), x = 0.1975 (from memory; any x gives the same d's).
    lab6 = _independent_spacings(["La", "B"], [(0, 0, 0), (0.1975, 0.5, 0.5)], 221, LAB6_A, 10)
    np.testing.assert_allclose(calibrants.get("LaB6").d_spacings[:10], lab6, rtol=1e-12)
    # CeO2, fluorite Fm-3m (225): Ce at 0,0,0; O at 1/4,1/4,1/4: only hkl all even or all odd survive.
    ceo2 = _independent_spacings(["Ce", "O"], [(0, 0, 0), (0.25, 0.25, 0.25)], 225, CEO2_A, 10)
    np.testing.assert_allclose(calibrants.get("CeO2").d_spacings[:10], ceo2, rtol=1e-12)
    assert calibrants.get("CeO2").labels[:3] == ("(1 1 1)", "(2 0 0)", "(2 2 0)")  # fluorite rule
    # Silver behenate: lamellar orders d(00l) = d001 / l.
    np.testing.assert_allclose(calibrants.get("AgBe").d_spacings[:10], AGBE_D / np.arange(1, 11), rtol=1e-12)
    user = calibrants.from_spacings([2.0, 3.5, 3.5, 1.2])
    np.testing.assert_array_equal(user.d_spacings, [3.5, 2.0, 1.2])


@pytest.mark.parametrize("name", sorted(CASES))
def test_recovers_geometry(name):
    case = CASES[name]
    distance, pixel, energy, centre, tilt = case
    cal = calibrants.get(name)
    image, shadow = render(cal, case, np.random.default_rng(5))
    res = calibrate(image, shadow, cal, energy, pixel, distance_guess=distance * 1.15)
    g = res.geometry
    assert abs(g.distance_mm / distance - 1) < 5e-4
    assert np.all(np.abs(np.subtract(g.beam_center_px, centre)) < 0.1)
    assert np.all(np.abs(np.subtract(g.tilt_deg, tilt)) < 0.02)
    true = geom.Geometry(SHAPE, distance, (pixel, pixel), centre, tilt)
    q_true, q_fit = geom.q_map(true, energy), geom.q_map(g, energy)
    first_ring = 2 * np.pi / cal.d_spacings[0]
    # Relative q error over every pixel at or beyond the first ring (inside it, at q -> 0, a relative error is
    # dominated by the centre's last hundredths of a pixel), and the absolute error over the whole detector.
    outer = q_true >= first_ring
    assert np.max(np.abs(q_fit[outer] / q_true[outer] - 1)) < 2e-4
    assert np.max(np.abs(q_fit - q_true)) < 2e-4 * q_true.max()
    assert len(res.rings) >= 3 and all(r.systematic_deg <= res.max_residual_deg for r in res.rings)
    assert res.errors["distance_mm"] > 0 and res.errors["photon_energy_kev"] == 0.0


def _args(image, out, **kw):
    parser = argparse.ArgumentParser()
    calibrate_command.add_parser(parser.add_subparsers(dest="command"))
    argv = ["calibrate", str(image), "--calibrant", kw.pop("calibrant", "LaB6"), "--energy-kev",
            str(kw.pop("energy", 12.0)), "--pixel-size-mm", "0.1", "--out", str(out)]
    for key, value in kw.items():
        flag = "--" + key.replace("_", "-")
        argv += [flag] + ([str(v) for v in value] if isinstance(value, (list, tuple)) else [str(value)])
    return parser.parse_args(argv)


def test_command_writes_geometry_that_plugs_into_the_config(lab6_image, tmp_path):
    image, shadow = lab6_image
    with h5py.File(tmp_path / "cal.h5", "w") as h5:  # a stack of two frames is averaged
        h5["entry/data"] = np.stack([image, image])
    np.save(tmp_path / "mask.npy", shadow)
    out = tmp_path / "geo" / "geometry.yaml"
    args = _args(f"{tmp_path / 'cal.h5'}:entry/data", out, mask=tmp_path / "mask.npy", distance_mm=110,
                 center_px=[500, 520])
    assert calibrate_command.main(args) == 0
    doc = yaml.safe_load(out.read_text())
    assert set(doc) == {"detector", "calibration"}
    det = config.validate({"run": {"files": ["x.h5"]}, "detector": doc["detector"]})["detector"]
    g = geom.from_config(det, SHAPE)
    distance, _, _, centre, tilt = CASES["LaB6"]
    assert abs(g.distance_mm / distance - 1) < 5e-4 and np.allclose(g.beam_center_px, centre, atol=0.1)
    assert np.allclose(g.tilt_deg, tilt, atol=0.02)
    assert (out.parent / "geometry.png").stat().st_size > 10_000
    assert len(doc["calibration"]["rings"]) >= 3 and doc["calibration"]["errors"]["distance_mm"] > 0


def test_command_reads_tiff(lab6_image, tmp_path):
    import tifffile

    image, shadow = lab6_image
    tifffile.imwrite(tmp_path / "cal.tif", image)
    tifffile.imwrite(tmp_path / "mask.tif", shadow.astype(np.uint8))
    np.testing.assert_array_equal(calibrate_command.read_image(str(tmp_path / "cal.tif")), image)
    assert calibrate_command.main(_args(tmp_path / "cal.tif", tmp_path / "g.yaml", mask=tmp_path / "mask.tif",
                                        distance_mm=100)) == 0


def test_no_rings_is_reported(tmp_path):
    noise = np.random.default_rng(3).poisson(40.0, SHAPE).astype(np.float32)
    np.save(tmp_path / "blank.npy", noise)
    with pytest.raises(DataError, match="blank.npy.*no calibrant rings"):
        calibrate_command.main(_args(tmp_path / "blank.npy", tmp_path / "g.yaml", distance_mm=100))
    assert not (tmp_path / "g.yaml").exists()


def test_wrong_calibrant_is_reported(lab6_image, tmp_path):
    image, shadow = lab6_image
    with pytest.raises(DataError, match="CeO2|index"):
        calibrate(image, shadow, calibrants.get("CeO2"), 12.0, 0.1, distance_guess=110)


def test_energy_far_off_is_named(lab6_image, tmp_path):
    image, shadow = lab6_image
    np.save(tmp_path / "cal.npy", image)
    np.save(tmp_path / "mask.npy", shadow)
    with pytest.raises(DataError, match="photon energy given is likely wrong"):
        calibrate_command.main(_args(tmp_path / "cal.npy", tmp_path / "g.yaml", energy=14.0, distance_mm=110,
                                     mask=tmp_path / "mask.npy"))
    assert not (tmp_path / "g.yaml").exists()


def test_mask_hiding_everything_is_reported(lab6_image, tmp_path):
    image, _ = lab6_image
    np.save(tmp_path / "cal.npy", image)
    np.save(tmp_path / "all.npy", np.ones(SHAPE, dtype=bool))
    with pytest.raises(DataError, match="all.npy hides every pixel"):
        calibrate_command.main(_args(tmp_path / "cal.npy", tmp_path / "g.yaml", mask=tmp_path / "all.npy"))
    nearly = np.ones(SHAPE, dtype=bool)
    nearly[:10, :10] = False
    with pytest.raises(DataError, match="only 100 of"):
        calibrate(image, nearly, calibrants.get("LaB6"), 12.0, 0.1)


def test_centre_guess_outside_the_image_names_the_option(lab6_image, tmp_path):
    image, _ = lab6_image
    np.save(tmp_path / "cal.npy", image)
    with pytest.raises(InputError, match="--center-px"):
        calibrate_command.main(_args(tmp_path / "cal.npy", tmp_path / "g.yaml", center_px=[-40, 5000]))


def test_missing_image_names_the_file(tmp_path):
    with pytest.raises(InputError, match="nope.npy: found no such file"):
        calibrate_command.main(_args(tmp_path / "nope.npy", tmp_path / "g.yaml"))


def _solvent_frame(det, shape, rng):
    q = np.linspace(0.0, 8.0, 4000)
    curve = 1.0 + 2.0 * np.exp(-0.5 * ((q - 2.0) / 0.25) ** 2) + 0.6 * np.exp(-0.5 * ((q - 2.9) / 0.35) ** 2)
    shadow = forward.default_mask(det, shape)
    frame = forward.render_frames(q, curve[None], [12.0], det, rng, shape=shape, photons_per_pixel=50.0,
                                  masked_region=shadow, dtype=np.float32)[0]
    return frame, shadow


def test_ring_check_passes_right_geometry_and_flags_swapped_centre():
    det = dict(distance_mm=60.0, pixel_size_mm=0.1, beam_center_px=[470.0, 545.0], tilt_deg=[1.0, -0.5],
               polarization_fraction=0.99)
    shape = (1024, 1024)
    frame, shadow = _solvent_frame(det, shape, np.random.default_rng(3))
    section = config.validate({"run": {"files": ["x.h5"]}, "detector": det})["detector"]
    g = geom.from_config(section, shape)
    factor = corrections.factor_from_config(g, section)
    good = ring_check(frame, shadow, g, 12.0, correction=factor)
    assert good.verdict == "ok" and good.offset_px < 0.5 and abs(good.ring_q - 2.0) < 0.05
    swapped = ring_check(frame, shadow, dataclasses.replace(g, beam_center_px=g.beam_center_px[::-1]), 12.0,
                         correction=factor)
    assert swapped.verdict == "suspect" and swapped.offset_px > 20 and "beam_center_px" in swapped.message
    wrong_pixels = ring_check(frame, shadow, dataclasses.replace(g, pixel_size_mm=(0.1, 0.092)), 12.0,
                              correction=factor)
    assert wrong_pixels.verdict == "suspect" and wrong_pixels.ellipticity_px > 3
