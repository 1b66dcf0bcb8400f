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


def _integrate(files, out, detector, compute=COMPUTE):
    """Run the stage; its summary read back from the store it wrote."""
    integrate.run({"files": files}, Path(out), {"detector": detector, "compute": compute})
    attrs = zarr.open_group(str(out), mode="r").attrs
    return {"shots": sum(attrs["counts"]), "pixels_left_out": attrs["pixels_left_out"],
            "shot_pixels_left_out": attrs["shot_pixels_left_out"], "sectors": attrs["detector"]["sectors"],
            "variance": attrs["detector"]["variance"], "warnings": attrs["warnings"]}


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
    summary = _integrate([str(tmp_path / "run_b.h5"), str(tmp_path / "run_a.h5")], out, det, COMPUTE)
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


def _run_of_72_frames(tmp_path, seed):
    """72 int32 frames of 36 kB (2.5 MiB): whole 1 MiB checksum blocks inside the frames; (file, detector)."""
    rng = np.random.default_rng(seed)
    det = _detector(mask_file=None)
    photon = np.full(72, 11.5)
    run = tmp_path / "run.h5"
    _write_run(run, _frames(det, 72, photon, rng, photons_per_pixel=100.0).astype(np.int32), photon)
    return run, det


def test_results_do_not_depend_on_the_scheduler_nor_on_how_frames_are_read(tmp_path):
    # the run file hashed from the bytes the integration reads (mapped or read), whatever the scheduler
    run, det = _run_of_72_frames(tmp_path, 1)
    _integrate([run], tmp_path / "a.zarr", det, COMPUTE)
    _integrate([run], tmp_path / "b.zarr", det,
               {"workers": 1, "scheduler": "synchronous", "chunk_shots": 16, "progress": False})
    _integrate([run], tmp_path / "c.zarr", det, dict(COMPUTE, map_frames=False))
    first = open_shots(tmp_path / "a.zarr")
    for other in ("b.zarr", "c.zarr"):
        np.testing.assert_array_equal(first.curves(0, 72), open_shots(tmp_path / other).curves(0, 72))
        # the checksum from the bytes the integration read is the file's (hashed whole, again)
        assert open_shots(tmp_path / other).group.attrs["checksums"] == {str(run): file_checksum(run)}
    assert first.group.attrs["checksums"] == {str(run): file_checksum(run)}


@pytest.mark.slow
def test_frames_integrated_in_worker_processes_give_the_threaded_store(tmp_path):
    # a LocalCluster of 2 worker processes: the tasks map, integrate and hash the frames in other
    # processes and send their block digests back pickled; curves and checksum as with threads
    from movieproc import parallel

    run, det = _run_of_72_frames(tmp_path, 4)
    _integrate([run], tmp_path / "threads.zarr", det, COMPUTE)
    try:
        with parallel.compute_settings({"memory_per_worker": "1GB"}):
            _integrate([run], tmp_path / "cluster.zarr", det, dict(COMPUTE, scheduler="local-cluster"))
    finally:
        assert parallel.close_local_clusters() == 1
    threads, cluster = open_shots(tmp_path / "threads.zarr"), open_shots(tmp_path / "cluster.zarr")
    np.testing.assert_array_equal(threads.curves(0, 72), cluster.curves(0, 72))
    assert cluster.group.attrs["checksums"] == threads.group.attrs["checksums"] == {str(run): file_checksum(run)}


def test_photon_energy_from_the_electron_energy_and_from_the_config(tmp_path):
    rng = np.random.default_rng(2)
    electron = 14.0 * (1 + 0.0005 * rng.standard_normal(16))
    und = {"kind": "planar", "period_mm": 30.0, "k": 3.5}
    expected = energy.resonance_energy(electron, 30.0, 3.5)
    # at ~8.7 keV this detector reaches q ~ 2.2 1/Å: keep the grid inside it (q points
    # without pixels are refused by the stage)
    det = _detector(undulator=und, q_max=2.1)
    _write_run(tmp_path / "run.h5", _frames(det, 16, expected, rng, photons_per_pixel=100.0), electron=electron)
    _integrate([tmp_path / "run.h5"], tmp_path / "e.zarr", det, COMPUTE)
    np.testing.assert_allclose(open_shots(tmp_path / "e.zarr").table["photon_energy"], expected, rtol=1e-12)
    # no undulator settings: the configured energy is the fallback for every shot
    det2 = _detector(photon_energy_kev=8.7, q_max=2.1)
    _integrate([tmp_path / "run.h5"], tmp_path / "c.zarr", det2, COMPUTE)
    np.testing.assert_array_equal(open_shots(tmp_path / "c.zarr").table["photon_energy"], np.full(16, 8.7))


def test_missing_or_zero_photon_energy_without_fallback_is_an_error(tmp_path):
    rng = np.random.default_rng(3)
    det = _detector()
    photon = np.full(10, 12.0)
    frames = _frames(det, 10, photon, rng, photons_per_pixel=100.0)
    _write_run(tmp_path / "none.h5", frames)
    out = tmp_path / "shots.zarr"
    with pytest.raises(InputError) as err:
        _integrate([tmp_path / "none.h5"], out, det, COMPUTE)
    assert "none.h5:shots/photon_energy" in str(err.value) and "detector.photon_energy_kev" in str(err.value)
    photon[7] = 0.0
    _write_run(tmp_path / "zero.h5", frames, photon)
    with pytest.raises(InputError) as err:
        _integrate([tmp_path / "zero.h5"], out, det, COMPUTE)
    assert "zero.h5:shots/photon_energy" in str(err.value) and "at shot 7" in str(err.value)
    assert _nothing_written(out)
    with pytest.raises(ConfigError, match="detector.photon_energy_kev"):
        _integrate([tmp_path / "zero.h5"], out, dict(det, photon_energy_source="config"), COMPUTE)


def test_beam_centre_off_the_detector_is_an_error(tmp_path):
    det = _detector(beam_center_px=[48.0, 120.0])
    _write_run(tmp_path / "run.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    out = tmp_path / "shots.zarr"
    with pytest.raises(ConfigError) as err:
        _integrate([tmp_path / "run.h5"], out, det, COMPUTE)
    assert "detector.beam_center_px" in str(err.value) and "(96, 96)" in str(err.value)
    assert _nothing_written(out)


def test_mask_of_the_wrong_shape_is_an_error_and_an_old_store_survives(tmp_path):
    rng = np.random.default_rng(4)
    det = _detector()
    photon = np.full(8, 12.0)
    _write_run(tmp_path / "run.h5", _frames(det, 8, photon, rng, photons_per_pixel=100.0), photon)
    out = tmp_path / "shots.zarr"
    _integrate([tmp_path / "run.h5"], out, det, COMPUTE)
    before = open_shots(out).curves(0, 8)
    np.save(tmp_path / "mask.npy", np.zeros((96, 95), bool))
    with pytest.raises(InputError) as err:
        _integrate([tmp_path / "run.h5"], out, dict(det, mask_file=str(tmp_path / "mask.npy")), COMPUTE)
    text = str(err.value)
    assert "mask.npy" in text and "(96, 95)" in text and "(96, 96)" in text and "run.h5" in text
    np.testing.assert_array_equal(open_shots(out).curves(0, 8), before)
    with pytest.raises(InputError, match="no such file"):
        _integrate([tmp_path / "run.h5"], out, dict(det, dark_file=str(tmp_path / "dark.npy")), COMPUTE)
    with pytest.raises(InputError, match="no such dataset"):
        with h5py.File(tmp_path / "m.h5", "w") as h5:
            h5["other"] = np.zeros((96, 96))
        _integrate([tmp_path / "run.h5"], out, dict(det, mask_file=f"{tmp_path / 'm.h5'}:mask"), COMPUTE)


def test_frames_of_different_shapes_across_files_are_an_error(tmp_path):
    _write_run(tmp_path / "a.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    _write_run(tmp_path / "b.h5", np.zeros((4, 96, 90), np.uint16), np.full(4, 12.0), first_id=4)
    out = tmp_path / "shots.zarr"
    with pytest.raises(InputError) as err:
        _integrate([tmp_path / "a.h5", tmp_path / "b.h5"], out, _detector(), COMPUTE)
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
        _integrate([tmp_path / "curves.h5"], tmp_path / "s.zarr", _detector(), COMPUTE)
    _write_run(tmp_path / "run.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    with pytest.raises(ConfigError, match="detector.shape_px"):
        _integrate([tmp_path / "run.h5"], tmp_path / "s.zarr", _detector(shape_px=[90, 96]), COMPUTE)
    with pytest.raises(ConfigError, match="detector.q_min"):
        _integrate([tmp_path / "run.h5"], tmp_path / "s.zarr", _detector(q_min=20.0, q_max=30.0), COMPUTE)


def test_q_points_without_pixels_are_refused(tmp_path):
    # At 8.7 keV the detector reaches q ~ 2.2 1/Å; a grid to 4 1/Å would leave curves
    # NaN at the outer points: the stage refuses it, naming the keys and the covered range.
    rng = np.random.default_rng(5)
    det = _detector(photon_energy_kev=8.7, q_max=4.0)
    photon = np.full(8, 8.7)
    _write_run(tmp_path / "run.h5", _frames(det, 8, photon, rng, photons_per_pixel=100.0), photon)
    out = tmp_path / "shots.zarr"
    with pytest.raises(ConfigError, match="detector.q_min/q_max") as err:
        _integrate([tmp_path / "run.h5"], out, det, COMPUTE)
    assert "detector.q_max=" in str(err.value)
    assert _nothing_written(out)


# --- azimuthal sectors and per-shot variance -------------------------------------------


def _p2(x):
    # second Legendre polynomial, from memory: P2(x) = (3 x^2 - 1) / 2
    return 1.5 * x * x - 0.5


def test_sectors_of_an_isotropic_pattern_all_equal_the_whole_ring(tmp_path):
    # Noise-free frames rendered through the same solid-angle and polarization factors the
    # stage divides out, at jittered photon energies (energy-aware path), with the default
    # beamstop shadow masked (its holder lies in the +y sector).
    rng = np.random.default_rng(10)
    det = _detector(sectors=4)
    np.save(tmp_path / "mask.npy", forward.default_mask(det))
    det["mask_file"] = str(tmp_path / "mask.npy")
    photon = 12.0 * (1 + 0.001 * rng.standard_normal(6))
    _write_run(tmp_path / "run.h5", _frames(det, 6, photon, rng, photons_per_pixel=None), photon)
    summary = _integrate([tmp_path / "run.h5"], tmp_path / "s4.zarr", det, COMPUTE)
    assert summary["sectors"] == 4 and summary["warnings"] == []
    group = zarr.open_group(str(tmp_path / "s4.zarr"))
    # sector k centred at k * 360 / 4 degrees (schema description)
    np.testing.assert_array_equal(group["sector"][...], [0.0, 90.0, 180.0, 270.0])
    assert group["sector"].attrs["units"] == "deg"
    assert group["curves_sectors"].metadata.dimension_names == ("shot", "sector", "q")
    sectors = group["curves_sectors"][...]
    curves = group["curves"][...]
    assert sectors.shape == (6, 4, 40) and sectors.dtype == np.float32 and np.all(np.isfinite(sectors))
    # an isotropic I(q) looks the same in every direction once the factors are divided out
    np.testing.assert_allclose(sectors, np.repeat(curves[:, None], 4, axis=1), rtol=5e-3)
    # and the whole rings (sums over the sectors) are the plain integration's rings; float32
    # partial sums in a different order differ by ~1e-7 relative
    _integrate([tmp_path / "run.h5"], tmp_path / "s1.zarr", dict(det, sectors=1), COMPUTE)
    plain = zarr.open_group(str(tmp_path / "s1.zarr"))
    assert "curves_sectors" not in plain and "sector" not in plain and "curves_var" not in plain
    np.testing.assert_allclose(curves, plain["curves"][...], rtol=1e-5)


def test_sectors_of_an_aligned_pattern_follow_p2(tmp_path):
    # Pump polarized along azimuth 0 (+x): S(q, phi) = I0(q) + P2(cos(theta) cos(phi)) I2(q).
    # Rings kept whole (q <= 2 1/Å on this 96 x 96 detector, no shadow) so each 90-degree
    # sector samples its azimuths evenly.
    rng = np.random.default_rng(11)
    det = _detector(sectors=4, q_max=2.0, anisotropy={"enabled": True, "pump_polarization_deg": 0.0})
    photon = np.full(3, 12.0)
    i2 = 0.3 * np.exp(-(Q - 1.5) ** 2 / 0.1)
    frames = forward.render_frames(Q, np.tile(_curve(Q), (3, 1)), photon, det, rng, photons_per_pixel=None,
                                   masked_region=None, curves_p2=np.tile(i2, (3, 1)))
    _write_run(tmp_path / "run.h5", frames, photon)
    _integrate([tmp_path / "run.h5"], tmp_path / "s.zarr", det, COMPUTE)
    group = zarr.open_group(str(tmp_path / "s.zarr"))
    q = group["q"][...]
    sectors, iso = group["curves_sectors"][...][0], group["curves"][...][0]
    # the P2 fit over whole rings (sums over the sectors) still separates the parts
    np.testing.assert_allclose(iso, _curve(q), rtol=3e-3)
    np.testing.assert_allclose(group["curves_p2"][...][0], np.interp(q, Q, i2), atol=3e-3 * _curve(q).max())
    # theta from Bragg's law, sin(theta) = q lambda / (4 pi), lambda = hc / E (CODATA hc)
    hc = 12.398419843320026  # keV Å, from memory (h c = 1239.84198 eV nm)
    cos2 = 1.0 - (q * hc / 12.0 / (4 * np.pi)) ** 2
    phi = np.deg2rad(group["sector"][...])[:, None]
    at_centre = _p2(np.sqrt(cos2) * np.cos(phi))  # P2 at each sector centre (docs/METHODS.md sec 3)
    ring = 0.75 * cos2 - 0.5  # P2 averaged over a whole ring: <cos^2 phi> = 1/2
    # A sector's mean differs from the sector-free mean I0 + ring I2 as P2 at its centre does,
    # its cos(2 phi) part averaged over the 90-degree sector: sin(pi/2) / (pi/2) = 2/pi.
    predicted = (at_centre - ring) * (2.0 / np.pi) * np.interp(q, Q, i2)
    strong = np.interp(q, Q, i2) > 0.03
    # measured against the sectors' own average, so that pixel-level errors of the I0 part
    # common to all sectors drop out (the predicted cos(2 phi) terms sum to 0 over 4 sectors)
    found = sectors - sectors.mean(axis=0)
    # direction: above the mean along the pump polarization (0, 180 deg), below across it
    assert np.all(np.sign(found[:, strong]) == np.sign(at_centre - ring)[:, strong])
    assert np.all(found[[0, 2]][:, strong] > 0) and np.all(found[[1, 3]][:, strong] < 0)
    # size: within 5 %; a 90-degree sector of a 20-40 px ring holds 30-60 pixels, and the pixels
    # straddling its edges shift its azimuth average by a few %
    np.testing.assert_allclose(found[:, strong], predicted[:, strong], rtol=0.05)


def test_sector_q_points_without_pixels_are_nan_and_named_in_a_warning(tmp_path):
    # Masking rows >= centre + 30 px empties sector 1 (45..135 deg, towards +y) beyond
    # r = 30 / sin(45 deg) = 42.4 px: every pixel of that sector there has y >= r sin 45.
    rng = np.random.default_rng(12)
    det = _detector(sectors=4)
    mask = np.zeros((96, 96), bool)
    mask[int(np.ceil(47.5 + 30)):] = True
    np.save(tmp_path / "mask.npy", mask)
    det["mask_file"] = str(tmp_path / "mask.npy")
    photon = 12.0 * (1 + 0.001 * rng.standard_normal(4))
    _write_run(tmp_path / "run.h5", _frames(det, 4, photon, rng, photons_per_pixel=None, masked_region=None), photon)
    summary = _integrate([tmp_path / "run.h5"], tmp_path / "s.zarr", det, COMPUTE)
    store = open_shots(tmp_path / "s.zarr")
    sectors = store.curves(0, 4, "curves_sectors")
    assert np.all(np.isfinite(store.curves(0, 4)))  # whole rings still covered
    assert np.all(np.isfinite(sectors[:, [0, 2, 3]]))
    # the warning names the q points NaN for the lowest or the highest shot energy: the union
    # over the shots; each shot's NaN points run to the end of the grid
    per_shot = ~np.isfinite(sectors[:, 1])
    lost = per_shot.any(axis=0)
    assert lost.any() and np.all(per_shot[:, -1])
    assert np.all(np.diff(per_shot.astype(int), axis=1) >= 0)
    # q at r = 42.4 px: 2 theta = atan(r * 0.4 mm / 50 mm), q = 4 pi sin(theta) / lambda
    lam = 12.398419843320026 / 12.0  # Å, hc from memory
    q_edge = 4 * np.pi * np.sin(np.arctan(30 / np.sin(np.pi / 4) * 0.4 / 50.0) / 2) / lam
    first = store.q[lost][0]
    step = store.q[1] - store.q[0]
    # the NaN run starts where the sector ends, give or take the weighting window and stencil
    assert q_edge - 3 * step <= first <= q_edge + step
    text = [w for w in summary["warnings"] if "sector 1" in w]
    assert len(text) == 1 and f"q = {first:.4g}-{store.q[-1]:.4g} 1/Å" in text[0]
    assert "centre 90 deg" in text[0] and f"{int(lost.sum())} q point(s)" in text[0]
    assert text[0] in dict(store.group.attrs)["warnings"]


def _poisson_run(tmp_path, n, photon, rng, det):
    darks = forward.render_dark((96, 96), 10, rng, level=20.0, noise=1.0)
    np.save(tmp_path / "dark.npy", darks)
    frames = forward.render_frames(Q, np.tile(_curve(Q), (n, 1)), photon, det, rng, photons_per_pixel=50.0,
                                   masked_region=None, dark=darks.mean(axis=0))
    _write_run(tmp_path / "run.h5", frames, photon)
    return str(tmp_path / "dark.npy")


def test_per_shot_variance_matches_the_shot_to_shot_scatter(tmp_path):
    # 3200 shots of identical expectation (one photon energy, one curve), Poisson counts of
    # ~50 photons per pixel on a 20-count pedestal that the dark file removes.
    rng = np.random.default_rng(13)
    n = 3200
    photon = np.full(n, 12.0)
    dark = _poisson_run(tmp_path, n, photon, rng, _detector())
    # Statistics of the tolerance: the observed sample variance of n Gaussian-like values has
    # relative standard error sqrt(2 / (n - 1)) = 2.5 %, so 10 % is 4 sigma at each of the 40 q
    # points (chance of any failing ~ 40 * 6e-5); the predicted variance averaged over 3200
    # shots has a negligible error of its own (each shot's ~ 1 / sqrt(photons in the bin)).
    # A pedestal left in (20 of 50 counts) would be 40 % off; a missing (n_eff - 1) or a
    # pixel spread not divided down to the mean's variance would be ~100x off.
    for mode in ("counting", "spread"):
        det = _detector(mask_file=None, dark_file=dark, variance=mode)
        summary = _integrate([tmp_path / "run.h5"], tmp_path / f"{mode}.zarr", det, dict(COMPUTE, chunk_shots=400))
        assert summary["variance"] == mode and summary["warnings"] == []
        store = open_shots(tmp_path / f"{mode}.zarr")
        var = store.curves(0, n, "curves_var")
        assert var.dtype == np.float32 and var.shape == (n, 40) and np.all(var > 0)
        assert store.group["curves_var"].attrs["mode"] == mode
        observed = store.curves(0, n).astype(np.float64).var(axis=0, ddof=1)
        np.testing.assert_allclose(var.mean(axis=0), observed, rtol=0.10)
        # pooled over the 40 q points (about 30 independent: neighbours share a quarter of
        # their pixel weight): standard error ~0.5 %, so 2 % is 4 sigma
        assert abs(np.mean(var.mean(axis=0) / observed) - 1) < 0.02


def test_variance_read_between_grid_points_is_conservative_as_documented(tmp_path):
    # Energy-aware: each shot's variance curve is interpolated like its curve (4-point Lagrange
    # weights c at fractional grid position u). The true variance of the interpolated mean is
    # v c^T R c, with R the correlation of neighbouring grid values: with pixels shared linearly
    # between neighbouring q points and pixels spread evenly over a grid step, neighbours share sum w_k w_k+1 =
    # int u (1 - u) du = 1/6 of the weight products against sum w_k^2 = 2 int u^2 du = 2/3,
    # so R has 1 on the diagonal and 1/4 next to it (derived in this test's comment).
    rng = np.random.default_rng(14)
    n = 3200
    photon = 12.0 * (1 + 0.01 * rng.standard_normal(n))  # spreads shots over grid positions
    dark = _poisson_run(tmp_path, n, photon, rng, _detector())
    det = _detector(mask_file=None, dark_file=dark, variance="counting", q_max=2.0)
    _integrate([tmp_path / "run.h5"], tmp_path / "s.zarr", det, dict(COMPUTE, chunk_shots=400))
    store = open_shots(tmp_path / "s.zarr")
    var = store.curves(0, n, "curves_var").mean(axis=0)
    observed = store.curves(0, n).astype(np.float64).var(axis=0, ddof=1)
    e0 = np.median(store.table["photon_energy"])
    step = store.q[1] - store.q[0]
    t = (store.q[None, :] * e0 / store.table["photon_energy"][:, None] - store.q[0]) / step
    u = t - np.floor(t)
    # Lagrange weights on nodes -1, 0, 1, 2 written out independently
    nodes = np.array([-1.0, 0.0, 1.0, 2.0])
    c = np.stack([np.prod([(u - nodes[m]) / (nodes[j] - nodes[m]) for m in range(4) if m != j], axis=0)
                  for j in range(4)])
    r = np.eye(4) + 0.25 * (np.eye(4, k=1) + np.eye(4, k=-1))
    true_factor = np.einsum("jsq,jk,ksq->sq", c, r, c).mean(axis=0)  # per q, over the shots
    assert np.all(true_factor <= 1.0 + 1e-12) and true_factor.min() < 0.9
    # observed = v * true_factor; stored = v: same 2.5 %-per-point statistics as above, 10 % at 4 sigma
    np.testing.assert_allclose(var * true_factor, observed, rtol=0.10)
    assert np.all(var > observed * 0.9)  # conservative, within the noise


def test_sector_and_variance_settings_are_checked(tmp_path):
    for value in (0, -2, 2.5):
        with pytest.raises(ConfigError, match=r"detector\.sectors"):
            _detector(sectors=value)
    with pytest.raises(ConfigError, match=r"detector\.variance"):
        _detector(variance="poisson")
    assert _detector()["sectors"] == 1 and _detector()["variance"] is None
    assert _detector(sectors=None)["sectors"] is None  # null: off, like 1
    _write_run(tmp_path / "run.h5", np.zeros((4, 96, 96), np.uint16), np.full(4, 12.0))
    out = tmp_path / "s.zarr"
    det = _detector(variance="counting", anisotropy={"enabled": True})
    with pytest.raises(ConfigError, match=r"detector\.variance") as err:
        _integrate([tmp_path / "run.h5"], out, det, COMPUTE)
    assert "detector.anisotropy.enabled" in str(err.value)
    assert _nothing_written(out)


def test_variance_leaves_out_the_saturated_pixels_of_a_shot(tmp_path):
    rng = np.random.default_rng(15)
    photon = np.full(16, 12.0)
    frames = _frames(_detector(), 16, photon, rng, photons_per_pixel=100.0, masked_region=None)
    frames[3, 60, 20:40] = 65535  # a saturated streak in one shot
    _write_run(tmp_path / "run.h5", frames, photon)
    for mode in ("counting", "spread"):
        det = _detector(variance=mode, saturation_level=65000, sectors=3)
        summary = _integrate([tmp_path / "run.h5"], tmp_path / f"{mode}.zarr", det, COMPUTE)
        assert summary["shot_pixels_left_out"] == 20 and summary["warnings"] == []
        store = open_shots(tmp_path / f"{mode}.zarr")
        var = store.curves(0, 16, "curves_var")
        # left in, 20 pixels of 65535 counts against ~100 would raise some q points' variance
        # by orders of magnitude (counting: + 20 * 65535 / F^2; spread: their squared excess)
        assert np.all(np.isfinite(var)) and np.all(var > 0)
        assert np.all(var[3] < 2 * np.median(var, axis=0))
        assert np.all(np.isfinite(store.curves(0, 16, "curves_sectors")))


def test_geometry_check_warns_when_the_beam_centre_row_and_column_are_swapped(tmp_path):
    # The ring check (detector.ringcheck) on the run's first frames: with the centre the frames were
    # made with, the solvent-like ring at q = 2 1/Å is round and nothing is said; with row and column
    # swapped it is off-centre by about sqrt(2) * 12 px, and the stage warns, naming the config keys.
    rng = np.random.default_rng(7)
    true = _detector(shape_px=[128, 128], beam_center_px=[58.0, 70.0], q_min=1.0, q_max=3.0)
    photon = np.full(24, 12.0)
    frames = _frames(true, 24, photon, rng, photons_per_pixel=2000.0)
    _write_run(tmp_path / "run.h5", frames, photon)
    right = _integrate([str(tmp_path / "run.h5")], tmp_path / "right.zarr", true)
    assert not any("geometry check" in w for w in right["warnings"])
    assert zarr.open_group(str(tmp_path / "right.zarr"), mode="r").attrs["geometry_check"]["verdict"] == "ok"
    swapped = dict(true, beam_center_px=[70.0, 58.0])
    wrong = _integrate([str(tmp_path / "run.h5")], tmp_path / "wrong.zarr", swapped)
    assert any("geometry check" in w and "detector.beam_center_px" in w for w in wrong["warnings"])
    check = zarr.open_group(str(tmp_path / "wrong.zarr"), mode="r").attrs["geometry_check"]
    assert check["verdict"] == "suspect" and check["offset_px"] > 10
