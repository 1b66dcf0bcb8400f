"""The integrate stage end to end: run files in, shots store out; and its errors on bad input."""

from pathlib import Path

import h5py
import numpy as np
import pytest
import zarr

from movieproc.config import validate
from movieproc.detector import energy, forward
from movieproc.errors import ConfigError, InputError
from movieproc.io.shotstore import file_checksum, open_shots
from movieproc.stages import integrate

Q = np.linspace(0.0, 8.0, 4001)
COMPUTE = {"workers": 2, "scheduler": "threads", "chunk_shots": 32, "progress": False}


def _curve(q):
    return 1.0 + np.exp(-(q - 2.0) ** 2 / 0.3)


def _detector(**extra):
    section = {"shape_px": [96, 96], "q_min": 0.8, "q_max": 2.6, "q_count": 40}
    section.update(extra)
    return validate({"run": {"files": ["x.h5"]}, "detector": section})["detector"]


def _write_run(path, frames, photon=None, electron=None, first_id=0):
    n = len(frames)
    with h5py.File(path, "w") as h5:
        fields = {"pulse_id": first_id + np.arange(n), "stage_delay": np.zeros(n), "pump_on": np.arange(n) % 2 == 0,
                  "pulse_energy": np.ones(n), "timing_edge": np.zeros(n)}
        if photon is not None:
            fields["photon_energy"] = photon
        if electron is not None:
            fields["electron_energy"] = electron
        for name, values in fields.items():
            h5[f"shots/{name}"] = values
        h5.create_dataset("frames", data=frames, chunks=(min(8, n),) + frames.shape[1:])


def _frames(det, n, photon, rng, **kw):
    return forward.render_frames(Q, np.tile(_curve(Q), (n, 1)), photon, det, rng, **kw)


def _nothing_written(out: Path):
    return not out.exists() and not any(p.name.startswith(f".{out.name}.") for p in out.parent.iterdir())


def test_two_files_of_uint16_frames_with_dark_hot_pixels_mask_and_saturation(tmp_path):
    rng = np.random.default_rng(0)
    det = _detector()
    shape = (96, 96)
    hot = forward.pick_hot_pixels(shape, 12, rng)
    darks = forward.render_dark(shape, 10, rng, level=20.0, noise=1.0, hot_pixels=hot, hot_value=60000.0)
    np.save(tmp_path / "dark.npy", darks)
    with h5py.File(tmp_path / "mask.h5", "w") as h5:
        h5["entry/mask"] = forward.default_mask(det).astype(np.uint8)
    photon = 12.0 * (1 + 0.001 * rng.standard_normal(48))
    frames = _frames(det, 48, photon, rng, photons_per_pixel=2000.0, hot_pixels=hot, hot_value=60000.0,
                     dark=darks.mean(axis=0))
    frames[5, 50, 10:20] = 65535  # a saturated streak in one shot
    _write_run(tmp_path / "run_b.h5", frames[30:], photon[30:], first_id=30)
    _write_run(tmp_path / "run_a.h5", frames[:30], photon[:30])
    det.update(dark_file=str(tmp_path / "dark.npy"), mask_file=f"{tmp_path / 'mask.h5'}:entry/mask",
               saturation_level=65000)
    out = tmp_path / "shots.zarr"
    summary = integrate.run([str(tmp_path / "run_b.h5"), str(tmp_path / "run_a.h5")], out, det, COMPUTE)
    assert summary["shots"] == 48 and summary["pixels_left_out"]["hot"] >= 10  # some hot pixels sit in the shadow
    assert summary["shot_pixels_left_out"] >= 1
    store = open_shots(out)
    curves = store.curves(0, 48)
    assert curves.shape == (48, 40) and curves.dtype == np.float32
    np.testing.assert_array_equal(store.table["pulse_id"], np.arange(48))  # files in name order
    np.testing.assert_allclose(store.table["photon_energy"], photon)
    # Mean over 48 shots of 2000-photon pixels, >= ~100 pixels per q point: photon noise
    # ~ 1 / sqrt(48 * 2000 * 100) = 3e-4 relative; 3e-3 covers the integration bias (< 1e-3)
    # and leaves room; a missing dark subtraction (20 of ~2000 counts) would fail it.
    np.testing.assert_allclose(curves.mean(axis=0), _curve(store.q) * 2000.0, rtol=3e-3)
    attrs = dict(store.group.attrs)
    assert attrs["mode"] == "frames"
    assert attrs["files"] == [str(tmp_path / "run_a.h5"), str(tmp_path / "run_b.h5")]
    assert attrs["checksums"][str(tmp_path / "run_a.h5")] == file_checksum(tmp_path / "run_a.h5")
    assert attrs["detector"]["mask_file"] == det["mask_file"]
    assert attrs["photon_energy_origin"]["run"] == 48
    assert zarr.open_group(str(out))["pixel_count"].shape == (40,)


def test_results_do_not_depend_on_the_scheduler(tmp_path):
    rng = np.random.default_rng(1)
    det = _detector(mask_file=None)
    photon = np.full(20, 11.5)
    _write_run(tmp_path / "run.h5", _frames(det, 20, photon, rng, photons_per_pixel=100.0).astype(np.int32), photon)
    integrate.run([tmp_path / "run.h5"], tmp_path / "a.zarr", det, COMPUTE)
    integrate.run([tmp_path / "run.h5"], tmp_path / "b.zarr", det,
                  {"workers": 1, "scheduler": "synchronous", "chunk_shots": 16, "progress": False})
    np.testing.assert_array_equal(open_shots(tmp_path / "a.zarr").curves(0, 20), open_shots(tmp_path / "b.zarr").curves(0, 20))


def test_photon_energy_from_the_electron_energy_and_from_the_config(tmp_path):
    rng = np.random.default_rng(2)
    electron = 14.0 * (1 + 0.0005 * rng.standard_normal(16))
    und = {"kind": "planar", "period_mm": 30.0, "k": 3.5}
    expected = energy.resonance_energy(electron, 30.0, 3.5)
    # at ~8.7 keV this detector reaches q ~ 2.2 1/Å: keep the grid inside it (q points
    # without pixels are refused by the stage)
    det = _detector(undulator=und, q_max=2.1)
    _write_run(tmp_path / "run.h5", _frames(det, 16, expected, rng, photons_per_pixel=100.0), electron=electron)
    integrate.run([tmp_path / "run.h5"], tmp_path / "e.zarr", det, COMPUTE)
    np.testing.assert_allclose(open_shots(tmp_path / "e.zarr").table["photon_energy"], expected, rtol=1e-12)
    # no undulator settings: the configured energy is the fallback for every shot
    det2 = _detector(photon_energy_kev=8.7, q_max=2.1)
    integrate.run([tmp_path / "run.h5"], tmp_path / "c.zarr", det2, COMPUTE)
    np.testing.assert_array_equal(open_shots(tmp_path / "c.zarr").table["photon_energy"], np.full(16, 8.7))


def test_missing_or_zero_photon_energy_without_fallback_is_an_error(tmp_path):
    rng = np.random.default_rng(3)
    det = _detector()
    photon = np.full(10, 12.0)
    frames = _frames(det, 10, photon, rng, photons_per_pixel=100.0)
    _write_run(tmp_path / "none.h5", frames)
    out = tmp_path / "shots.zarr"
    with pytest.raises(InputError) as err:
        integrate.run([tmp_path / "none.h5"], out, det, COMPUTE)
    assert "none.h5:shots/photon_energy" in str(err.value) and "detector.photon_energy_kev" in str(err.value)
    photon[7] = 0.0
    _write_run(tmp_path / "zero.h5", frames, photon)
    with pytest.raises(InputError) as err:
        integrate.run([tmp_path / "zero.h5"], out, det, COMPUTE)
    assert "zero.h5:shots/photon_energy" in str(err.value) and "at shot 7" in str(err.value)
    assert _nothing_written(out)
    with pytest.raises(ConfigError, match="detector.photon_energy_kev"):
        integrate.run([tmp_path / "zero.h5"], out, dict(det, photon_energy_source="config"), COMPUTE)


def test_beam_centre_off_the_detector_is_an_error(tmp_path):
    det = _detector(beam_center_px=[48.0, 120.0])
    _write_run(tmp_path / "run.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    out = tmp_path / "shots.zarr"
    with pytest.raises(ConfigError) as err:
        integrate.run([tmp_path / "run.h5"], out, det, COMPUTE)
    assert "detector.beam_center_px" in str(err.value) and "(96, 96)" in str(err.value)
    assert _nothing_written(out)


def test_mask_of_the_wrong_shape_is_an_error_and_an_old_store_survives(tmp_path):
    rng = np.random.default_rng(4)
    det = _detector()
    photon = np.full(8, 12.0)
    _write_run(tmp_path / "run.h5", _frames(det, 8, photon, rng, photons_per_pixel=100.0), photon)
    out = tmp_path / "shots.zarr"
    integrate.run([tmp_path / "run.h5"], out, det, COMPUTE)
    before = open_shots(out).curves(0, 8)
    np.save(tmp_path / "mask.npy", np.zeros((96, 95), bool))
    with pytest.raises(InputError) as err:
        integrate.run([tmp_path / "run.h5"], out, dict(det, mask_file=str(tmp_path / "mask.npy")), COMPUTE)
    text = str(err.value)
    assert "mask.npy" in text and "(96, 95)" in text and "(96, 96)" in text and "run.h5" in text
    np.testing.assert_array_equal(open_shots(out).curves(0, 8), before)
    with pytest.raises(InputError, match="no such file"):
        integrate.run([tmp_path / "run.h5"], out, dict(det, dark_file=str(tmp_path / "dark.npy")), COMPUTE)
    with pytest.raises(InputError, match="no such dataset"):
        with h5py.File(tmp_path / "m.h5", "w") as h5:
            h5["other"] = np.zeros((96, 96))
        integrate.run([tmp_path / "run.h5"], out, dict(det, mask_file=f"{tmp_path / 'm.h5'}:mask"), COMPUTE)


def test_frames_of_different_shapes_across_files_are_an_error(tmp_path):
    _write_run(tmp_path / "a.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    _write_run(tmp_path / "b.h5", np.zeros((4, 96, 90), np.uint16), np.full(4, 12.0), first_id=4)
    out = tmp_path / "shots.zarr"
    with pytest.raises(InputError) as err:
        integrate.run([tmp_path / "a.h5", tmp_path / "b.h5"], out, _detector(), COMPUTE)
    assert "b.h5:frames" in str(err.value) and "(96, 90)" in str(err.value)
    assert _nothing_written(out)


def test_curves_runs_and_a_wrong_configured_shape_are_errors(tmp_path):
    with h5py.File(tmp_path / "curves.h5", "w") as h5:
        for name in ("pulse_id", "stage_delay", "pulse_energy", "timing_edge"):
            h5[f"shots/{name}"] = np.arange(3)
        h5["shots/pump_on"] = np.ones(3, bool)
        h5["q"] = np.linspace(1, 2, 5)
        h5["curves"] = np.ones((3, 5), np.float32)
    with pytest.raises(InputError, match="frames"):
        integrate.run([tmp_path / "curves.h5"], tmp_path / "s.zarr", _detector(), COMPUTE)
    _write_run(tmp_path / "run.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    with pytest.raises(ConfigError, match="detector.shape_px"):
        integrate.run([tmp_path / "run.h5"], tmp_path / "s.zarr", _detector(shape_px=[90, 96]), COMPUTE)
    with pytest.raises(ConfigError, match="detector.q_min"):
        integrate.run([tmp_path / "run.h5"], tmp_path / "s.zarr", _detector(q_min=20.0, q_max=30.0), COMPUTE)


def test_q_points_without_pixels_are_refused(tmp_path):
    # At 8.7 keV the detector reaches q ~ 2.2 1/Å; a grid to 4 1/Å would leave curves
    # NaN at the outer points: the stage refuses it, naming the keys and the covered range.
    rng = np.random.default_rng(5)
    det = _detector(photon_energy_kev=8.7, q_max=4.0)
    photon = np.full(8, 8.7)
    _write_run(tmp_path / "run.h5", _frames(det, 8, photon, rng, photons_per_pixel=100.0), photon)
    out = tmp_path / "shots.zarr"
    with pytest.raises(ConfigError, match="detector.q_min/q_max") as err:
        integrate.run([tmp_path / "run.h5"], out, det, COMPUTE)
    assert "detector.q_max=" in str(err.value)
    assert _nothing_written(out)
