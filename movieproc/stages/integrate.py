"""Stage ``integrate``: detector frames of a run -> shots store of per-shot I(q).

Reads the run's shot table, settles each shot's photon energy (measured,
from the electron energy through the undulator resonance, or the configured
fallback), builds the geometry, masks, corrections and pixel layout once,
then integrates shot chunks in parallel. Frames are integrated on a q grid at
a reference photon energy E0 (the run's median) and each shot's curve is read
at q E0 / E_shot, so photon-energy jitter does not move the q axis
(``detector.energy_aware``). With ``detector.anisotropy.enabled`` each ring is
split into its isotropic part (``curves``) and its P2 part (``curves_p2``).

Options that add work only when switched on:

- ``detector.sectors`` = S > 1: the azimuth is cut into S equal sectors, the
  first centred on azimuth 0 (the +x column direction, counted towards +y,
  rows, like ``polarization_plane_deg``), and ``curves_sectors`` (shot, sector,
  q) holds the mean of each sector, with the coordinate ``sector`` (centre
  azimuths, degrees). One pixel layout serves both: the whole-ring sums are
  the sums over the sectors, so the frames are still read and binned once.
  Sector q points without pixels stay NaN and are named in a warning.
- ``detector.variance`` = "counting" or "spread": ``curves_var`` (shot, q),
  the variance of each shot's mean intensity in each q bin
  (:func:`integration.mean_variance`), read at the shot's q like the curves
  (see :mod:`movieproc.detector.curves`: high between the grid points).

The numerics live in :mod:`movieproc.detector.curves` and
:mod:`movieproc.detector.integration`; this stage reads, checks, calls them
and writes.
"""

from __future__ import annotations

import logging
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import partial
from pathlib import Path

import h5py
import numpy as np
import zarr

from ..detector import anisotropy, corrections, curves, energy, geometry, integration, masks, ringcheck
from ..errors import ConfigError, InputError
from ..io import runfile, shotstore, store
from ..parallel import chunk_ranges, map_ranges
from .keys import config_keys
from .common import Warnings, now, versions

log = logging.getLogger("movieproc.integrate")

#: Frames read and integrated at once inside a task: about this many bytes.
BLOCK_BYTES = 64 * 2**20
HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".nxs")
ORIGIN_NAMES = {energy.FROM_RUN: "run", energy.FROM_ELECTRON: "electron energy",
                energy.FROM_CONFIG: "detector.photon_energy_kev"}
#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"variance": "detector.variance", "sectors": "detector.sectors",
               "source": "detector.photon_energy_source", "threshold": "detector.hot_pixel_threshold",
               "fraction": "detector.dead_pixel_fraction", "chunk": "compute.chunk_shots",
               "scheduler": "compute.scheduler"}
#: q points named in full in an error message before it says "...".
NAMED_Q_POINTS = 6
#: Tasks per worker the frames are split into at least (each task a whole number of store chunks), so
#: that every worker has work to the end: one task of compute.chunk_shots frames would leave the other
#: workers idle on a run of a few thousand frames.
TASKS_PER_WORKER = 4

#: Frames averaged for the geometry check: enough for a clear solvent ring, cheap next to the run.
CHECK_FRAMES = 32
UNITS = "detector units / (solid angle and polarization factors)"


def read_pixel_array(spec: str, key: str) -> np.ndarray:
    """Read a per-pixel array named by a config value: 'file.npy' or 'file.h5:dataset'.

    Raises
    ------
    InputError
        Naming the file (and dataset) when it is missing or unreadable.
    """
    text = str(spec)
    head, sep, tail = text.rpartition(":")
    expected = f"a .npy file or 'file.h5:dataset' (detector.{key})"
    if sep and head.lower().endswith(HDF5_SUFFIXES):
        path = Path(head)
        if not path.exists():
            raise InputError(path, "no such file", expected)
        try:
            with h5py.File(path, "r") as h5:
                if tail not in h5 or not isinstance(h5[tail], h5py.Dataset):
                    raise InputError(f"{path}:{tail}", "no such dataset", expected)
                return np.asarray(h5[tail][...])
        except OSError as exc:
            raise InputError(path, f"a file HDF5 cannot open ({exc})", expected) from None
    path = Path(text)
    if not path.exists():
        raise InputError(path, "no such file", expected)
    try:
        return np.load(path, allow_pickle=False)
    except (ValueError, OSError) as exc:
        raise InputError(path, f"a file numpy cannot load ({exc})", expected) from None


def _check_shape(values, spec, key, shape, series_ok, run_file):
    ok = values.shape == shape or (series_ok and values.ndim == 3 and values.shape[1:] == shape)
    if not ok or values.dtype.kind not in "biuf":
        what = f"(ny, nx) = {shape}" + (" or a series (n, ny, nx)" if series_ok else "")
        raise InputError(spec, f"an array of shape {values.shape} and dtype {values.dtype} (detector.{key})",
                         f"a numeric array of shape {what}, the frame shape of {run_file}")


def _photon_energies(info, table, detector, warnings):
    n = info.n_shots
    source = detector["photon_energy_source"]
    if source == "config" and detector["photon_energy_kev"] is None:
        raise ConfigError("detector.photon_energy_kev", "null",
                          "a photon energy in keV when detector.photon_energy_source is 'config'")
    und = detector["undulator"]
    if source == "electron" and (und["period_mm"] is None or und["k"] is None):
        raise ConfigError("detector.undulator", f"period_mm={und['period_mm']}, k={und['k']}",
                          "the undulator period (mm) and K when detector.photon_energy_source is 'electron'")
    values, origin = energy.choose_photon_energy(
        n, table.get("photon_energy"), table.get("electron_energy"), source=source,
        default_kev=detector["photon_energy_kev"], undulator=und)
    missing = np.flatnonzero(origin == energy.MISSING)
    if missing.size:
        first = int(missing[0])
        path, local = runfile.shot_file(info, first)
        fallbacks = ("detector.photon_energy_kev, or shots/electron_energy (GeV) with "
                     "detector.undulator.period_mm and k")
        if "photon_energy" in table:
            found = (f"{table['photon_energy'][first]!r} at shot {local} "
                     f"({missing.size} shot(s) without a usable energy)")
            raise InputError(f"{path}:shots/photon_energy", found,
                             f"a positive photon energy in keV for every shot, or a fallback: {fallbacks}")
        raise InputError(f"{path}:shots/photon_energy", "no such dataset and no usable fallback",
                         f"per-shot photon energies in keV, or a fallback: {fallbacks}")
    counts = {ORIGIN_NAMES[code]: int(np.sum(origin == code)) for code in ORIGIN_NAMES}
    if "photon_energy" in table and counts["run"] < n:
        warnings.add(f"{n - counts['run']} shot(s) without a usable shots/photon_energy took a fallback: "
                     + ", ".join(f"{v} from {k}" for k, v in counts.items() if k != "run" and v))
    return values, counts


def _static_mask(detector, shape, run_file, warnings):
    """Static mask, dark and the pixel counts left out per reason."""
    mask = np.zeros(shape, dtype=bool)
    reasons = {}
    if detector["mask_file"]:
        spec = detector["mask_file"]
        values = read_pixel_array(spec, "mask_file")
        _check_shape(values, spec, "mask_file", shape, False, run_file)
        given = values.astype(bool) if values.dtype.kind == "b" else np.asarray(values != 0)
        reasons["mask_file"] = int(given.sum())
        mask |= given
    dark = None
    if detector["dark_file"]:
        spec = detector["dark_file"]
        values = read_pixel_array(spec, "dark_file")
        _check_shape(values, spec, "dark_file", shape, True, run_file)
        values = values.astype(np.float64)
        dark = values.mean(axis=0) if values.ndim == 3 else values
        if detector["hot_pixel_threshold"] is not None:
            hot = masks.hot_pixels(values, detector["hot_pixel_threshold"])
            reasons["hot"] = int((hot & ~mask).sum())
            mask |= hot
    if detector["flat_file"]:
        spec = detector["flat_file"]
        values = read_pixel_array(spec, "flat_file")
        _check_shape(values, spec, "flat_file", shape, True, run_file)
        dead = masks.dead_pixels(values, detector["dead_pixel_fraction"])
        reasons["dead"] = int((dead & ~mask).sum())
        mask |= dead
    return mask, dark, reasons


def _q_ranges(q, points):
    """'a-b, c' for runs of consecutive q points (1/Å)."""
    idx = np.flatnonzero(points)
    runs = np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1)
    return ", ".join(f"{q[r[0]]:.4g}" if r.size == 1 else f"{q[r[0]]:.4g}-{q[r[-1]]:.4g}" for r in runs)


@dataclass(frozen=True)
class _Setup:
    """What the integration of a run needs, settled once before any frame is read."""

    layout: curves.CurveLayout
    scale: np.ndarray
    reference_energy: float
    reasons: dict
    used: int
    pixel_count: np.ndarray
    centres: np.ndarray | None
    geometry: geometry.Geometry
    mask: np.ndarray
    factor: np.ndarray


def _reference(detector, photon):
    """Reference photon energy (keV) and each shot's energy over it."""
    aware = detector["energy_aware"]
    if aware or detector["photon_energy_kev"] is None:
        e_ref = float(np.median(photon))
    else:
        e_ref = float(detector["photon_energy_kev"])
    return e_ref, (photon / e_ref if aware else np.ones_like(photon))


def _binning(detector, geo, grid, e_ref, mask, dark):
    """Pixel layout on the reference grid with the P2 regressor and sectors the config asks for."""
    factor = corrections.factor_from_config(geo, detector)
    aniso = detector["anisotropy"]["enabled"]
    sectors = int(detector.get("sectors") or 1)
    regressors, edges, azimuth, centres = [], None, None, None
    if aniso or sectors > 1:
        two_theta, phi = geometry.scattering_angles(geo)
    if aniso:
        polarization = np.deg2rad(detector["anisotropy"]["pump_polarization_deg"])
        regressors = [anisotropy.p2_regressor(two_theta, phi, polarization)]
    if sectors > 1:
        edges, azimuth, centres = curves.sector_layout(phi, sectors)
    binning = integration.build_binning(geometry.q_map(geo, e_ref), grid, factor=factor, mask=mask, dark=dark,
                                        azimuth=azimuth, sector_edges=edges, regressors=regressors,
                                        share_between_points=detector["share_pixels_between_q_points"],
                                        saturation_level=detector["saturation_level"])
    return binning, factor, centres


def _check_coverage(detector, binning, q, scale, e_ref):
    """Pixel count per q point; an error naming the q points no pixel reaches."""
    aware, grid = detector["energy_aware"], binning.grid
    ring = binning.moments[0].sum(axis=0)  # whole rings: the sum over the sectors
    empty = curves.uncovered(ring, grid, q, scale, aware)
    if np.any(empty):
        # Curves must be finite everywhere downstream: name the q points and the range that works.
        covered = q[~empty]
        hint = (f"a q grid inside the covered range, e.g. detector.q_min={covered.min():.4g} and "
                f"detector.q_max={covered.max():.4g}" if covered.size else "a q range the detector reaches")
        named = ", ".join(f"{v:.3g}" for v in q[empty][:NAMED_Q_POINTS])
        more = " ..." if empty.sum() > NAMED_Q_POINTS else ""
        raise ConfigError("detector.q_min/q_max", f"{int(empty.sum())} q point(s) with no unmasked pixels at "
                          f"{e_ref:.4g} keV (q = {named}{more} 1/Å)", hint)
    return energy.rescale_curves(ring[None], grid, q, np.ones(1))[0]


def _sector_gaps(binning, q, scale, aware, centres, warnings):
    """Sector q points without pixels (a beamstop holder, a detector edge), each sector named in a warning."""
    sectors = centres.size
    empty = curves.uncovered(binning.moments[0], binning.grid, q, scale, aware)
    for k in np.flatnonzero(empty.any(axis=1)):
        lo, hi = (centres[k] - 180.0 / sectors) % 360.0, (centres[k] + 180.0 / sectors) % 360.0
        warnings.add(f"sector {k} (azimuth {lo:.4g}-{hi:.4g} deg, centre {centres[k]:.4g} deg) lacks pixels "
                     f"for {int(empty[k].sum())} q point(s), q = {_q_ranges(q, empty[k])} 1/Å "
                     "(at the run's lowest or highest photon energy): curves_sectors is NaN there")
    return empty


def _setup(info, detector, photon, warnings) -> _Setup:
    """Geometry, masks, corrections and pixel layout of the run, checked against the config."""
    shape = tuple(info.frame_shape)
    if detector.get("shape_px") is not None and tuple(detector["shape_px"]) != shape:
        raise ConfigError("detector.shape_px", f"{list(detector['shape_px'])}",
                          f"the frame shape {list(shape)} of {info.files[0]}")
    if detector.get("variance") is not None and detector["anisotropy"]["enabled"]:
        raise ConfigError("detector.variance", repr(detector["variance"]),
                          "null while detector.anisotropy.enabled is true (the variance of the isotropic part "
                          "of the P2 fit is not computed)")
    geo = geometry.from_config(detector, shape)
    if not detector["q_max"] > detector["q_min"]:
        raise ConfigError("detector.q_max", f"{detector['q_max']}",
                          f"a value above detector.q_min = {detector['q_min']}")
    e_ref, scale = _reference(detector, photon)
    q = np.linspace(detector["q_min"], detector["q_max"], detector["q_count"])
    grid = curves.reference_grid(q, scale, detector["energy_aware"])
    mask, dark, reasons = _static_mask(detector, shape, info.files[0], warnings)
    binning, factor, centres = _binning(detector, geo, grid, e_ref, mask, dark)
    reasons["bad_factor"] = int(((~np.isfinite(factor) | ~(factor > 0)) & ~mask).sum())
    used = int(binning.valid.sum())
    reasons["outside_q_range"] = int(shape[0] * shape[1] - used - sum(reasons.values()))
    if used == 0:
        raise ConfigError("detector.q_min", f"q range [{detector['q_min']}, {detector['q_max']}] 1/Å",
                          f"a q range the detector reaches at {e_ref:.4g} keV with unmasked pixels")
    log.info("pixels: %d used of %d; left out: %s", used, shape[0] * shape[1],
             ", ".join(f"{v} {k}" for k, v in reasons.items() if v) or "none")
    pixel_count = _check_coverage(detector, binning, q, scale, e_ref)
    empty = None if centres is None else _sector_gaps(binning, q, scale, detector["energy_aware"], centres, warnings)
    layout = curves.CurveLayout(binning, q, detector["energy_aware"], detector.get("variance"), empty)
    return _Setup(layout, scale, e_ref, reasons, used, pixel_count, centres, geo, mask, factor)


def _geometry_check(info, detector, setup, warnings) -> dict:
    """How round the strongest ring of the first frames is with the configured geometry.

    A cheap sanity test (:func:`movieproc.detector.ringcheck.ring_check`) that catches a
    swapped beam-centre row/column or wrong pixel sizes; it cannot see a uniform scale
    error (distance, photon energy). A "suspect" verdict becomes a warning.
    """
    if not detector["geometry_check"]:
        return {"verdict": "not run", "message": "detector.geometry_check is false"}
    frames = runfile.read_frames(info, 0, min(CHECK_FRAMES, info.n_shots))
    mean = frames.mean(axis=0, dtype=np.float64)
    # the configured q range first; the whole frame when a wrong geometry moves the ring out of it
    check = ringcheck.ring_check(mean, setup.mask, setup.geometry, setup.reference_energy,
                                 q_range=(detector["q_min"], detector["q_max"]), correction=setup.factor)
    if check.verdict == "unusable":
        check = ringcheck.ring_check(mean, setup.mask, setup.geometry, setup.reference_energy,
                                     correction=setup.factor)
    log.info("geometry check (%d frames): %s", frames.shape[0], check.message)
    if check.verdict == "suspect":
        warnings.add(f"geometry check on the first {frames.shape[0]} frames: {check.message} "
                     "(a calibrant image gives them: movieproc calibrate)")
    return {"verdict": check.verdict, "message": check.message, "offset_px": check.offset_px,
            "ellipticity_px": check.ellipticity_px, "ring_q": check.ring_q}


def _create_store(tmp, info, setup, table, chunk, attrs):
    """The shots store with its curve arrays allocated; returns the group and the arrays' paths."""
    layout, q = setup.layout, setup.layout.q
    curve_units = {"curves": UNITS}
    if layout.binning.n_channels > 1:
        curve_units["curves_p2"] = UNITS
    if layout.variance is not None:
        curve_units["curves_var"] = f"({UNITS})^2"
    group = shotstore.create(tmp, q, table, chunk, curve_arrays=curve_units, attrs=attrs)
    store.write_array(group, "pixel_count", setup.pixel_count, ["q"], units="pixels",
                      attrs={"meaning": "effective number of valid pixels per q point at the reference energy"})
    if layout.variance is not None:
        group["curves_var"].attrs.update({
            "meaning": f"variance of each shot's mean intensity per q point ({layout.variance} statistics); "
                       "interpolated in q like the curves (exact on the reference grid, high between its points)",
            "mode": layout.variance})
    paths = {name: str(Path(tmp) / name) for name in curve_units}
    if setup.centres is not None:
        sectors = setup.centres.size
        store.write_array(group, "sector", setup.centres, ["sector"], units="deg", attrs={
            "meaning": "centre azimuth of each sector, from +x (columns) towards +y (rows)",
            "width_deg": 360.0 / sectors})
        store.create_array(group, "curves_sectors", (info.n_shots, sectors, q.size), ["shot", "sector", "q"],
                           "float32", chunks=(max(1, min(chunk, info.n_shots)), sectors, q.size), units=UNITS,
                           attrs={"meaning": "mean intensity of each azimuthal sector; NaN where a sector has "
                                             "no pixels (see the warnings)"})
        paths["curves_sectors"] = str(Path(tmp) / "curves_sectors")
    return group, paths


def _integrate_range(start, stop, info, setup, paths, block, map_files=True):
    """Integrate shots [start, stop) block by block into the store's arrays.

    Returns the counts to report and the checksum block digests of the frame bytes read
    (:class:`movieproc.io.shotstore.BlockDigests`): the run files are hashed from the bytes the
    integration reads, not read a second time.
    """
    targets = {name: zarr.open_array(path, mode="r+") for name, path in paths.items()}
    # the task's curves are written at once: its range is one store chunk, which a write per read
    # block would compress again for every block (a tenth of the integration's time)
    results = {name: np.empty((stop - start, *target.shape[1:]), np.float32) for name, target in targets.items()}
    excluded = lost_sector = lost_var = 0
    digests = shotstore.BlockDigests()
    with runfile.FrameReader(info, min(block, stop - start), digests, map_files) as reader:
        a = start
        while a < stop:
            frames = reader.read(a, min(a + block, stop))  # may stop short, where the frames lie apart
            b = a + frames.shape[0]
            res = curves.shot_curves(frames, setup.layout, setup.scale[a:b])
            for name, values in res.arrays.items():
                results[name][a - start:b - start] = values
            excluded, lost_sector, lost_var = (excluded + res.excluded, lost_sector + res.lost_sector,
                                               lost_var + res.lost_variance)
            a = b
    for name, values in results.items():
        targets[name][start:stop] = values
    return excluded, lost_sector, lost_var, digests


def _block_frames(info) -> int:
    """Frames read and integrated at once: about BLOCK_BYTES, a multiple of the kernel's lanes."""
    frame_bytes = int(np.prod(info.frame_shape)) * info.data_dtype.itemsize
    return max(integration.LANES, BLOCK_BYTES // frame_bytes // integration.LANES * integration.LANES)


def task_frames(n_shots: int, chunk_shots: int, workers: int, block: int) -> int:
    """Frames per task (and per store chunk): at most ``chunk_shots``, small enough for
    :data:`TASKS_PER_WORKER` tasks per worker, at least one read block."""
    want = -(-int(n_shots) // (TASKS_PER_WORKER * max(1, int(workers))))
    return max(1, min(int(chunk_shots), max(int(block), want)))


def _integrate_all(info, setup, paths, compute, chunk, warnings) -> tuple[int, shotstore.BlockDigests]:
    """Integrate every shot in parallel chunks; warn about lost values; the shot pixels left out and
    the checksum block digests of the frames read."""
    block = _block_frames(info)
    work = partial(_integrate_range, info=info, setup=setup, paths=paths, block=block,
                   map_files=compute.get("map_frames", True))
    results = map_ranges(work, chunk_ranges(info.n_shots, chunk), compute["workers"],
                         compute["scheduler"], compute["progress"], "integrate")
    excluded, lost_sector, lost_var = (int(sum(r[i] for r in results)) for i in range(3))
    digests = shotstore.BlockDigests()
    for r in results:
        digests.update(r[3])
    if lost_sector:
        warnings.add(f"{lost_sector} sector value(s) in curves_sectors are NaN beyond the q points named per "
                     "sector: every pixel there was left out of its shot (non-finite or saturated), or the "
                     "shot's photon energy reads them off a grid point the sector has no pixels at")
    if lost_var:
        warnings.add(f"{lost_var} value(s) of curves_var are NaN: no pixels, or (spread) too few to estimate "
                     "a spread (effective pixel count <= 1)")
    return excluded, digests


def run(inputs: dict, out: Path, config: dict) -> None:
    """Integrate the frames of a run into the shots store ``out``.

    Parameters
    ----------
    inputs : dict
        ``files``: the run files (HDF5, frames mode; docs/DESIGN.md section 4).
    out : Path
        Shots store to write (zarr), replaced atomically.
    config : dict
        Sections ``detector`` (validated, defaults filled) and ``compute``.

    Raises
    ------
    InputError, ConfigError
        Naming the file, dataset or config key; nothing is written.
    """
    detector, compute = config["detector"], config["compute"]
    info = runfile.inspect_run(inputs["files"])
    if info.mode != "frames":
        raise InputError(info.files[0], "pre-integrated curves",
                         "detector frames (N, ny, nx) for the integrate stage (curves go through ingest)")
    # Checksums: frames mapped or read with os.preadv are hashed from the bytes the integration
    # reads (a second read of the file cost as much as a third of the integration); the rest of those
    # files afterwards. Files read through HDF5 (compressed...) are hashed whole in a thread beside the
    # set-up and the integration (xxhash releases the GIL).
    direct = {str(f) for f in info.files if runfile.reads_directly(f, info.data_dtype)}
    with ThreadPoolExecutor(max_workers=1) as hashing:
        others = hashing.submit(lambda: {str(f): shotstore.file_checksum(f) for f in info.files
                                         if str(f) not in direct})
        warnings = Warnings("integrate", log)
        table = runfile.read_table(info)
        with config_keys(CONFIG_KEYS, config):
            photon, origins = _photon_energies(info, table, detector, warnings)
            log.info("run of %d shots in %d file(s), frames %s (%s); photon energy %.4f-%.4f keV (%s)",
                     info.n_shots, len(info.files), " x ".join(str(v) for v in info.frame_shape or ()), info.data_dtype,
                     photon.min(), photon.max(),
                     ", ".join(f"{v} from {k}" for k, v in origins.items() if v))
            setup = _setup(info, detector, photon, warnings)
            ring = _geometry_check(info, detector, setup, warnings)
        attrs = {
            "mode": "frames", "files": [str(f) for f in info.files],
            "counts": info.counts,
            "detector": detector, "reference_energy_kev": setup.reference_energy, "photon_energy_origin": origins,
            "pixels_left_out": setup.reasons, "pixels_used": setup.used, "geometry_check": ring,
            "written": now(), "versions": versions(),
        }
        chunk = task_frames(info.n_shots, compute["chunk_shots"], compute["workers"], _block_frames(info))
        with store.atomic_path(out) as tmp, config_keys(CONFIG_KEYS, config):
            group, paths = _create_store(tmp, info, setup, dict(table, photon_energy=photon), chunk, attrs)
            excluded, digests = _integrate_all(info, setup, paths, compute, chunk, warnings)
            hashed = others.result()
            checksums = {str(f): hashed[str(f)] if str(f) not in direct
                         else shotstore.file_checksum(f, digests=digests.of(f)) for f in info.files}
            store.update_attrs(group, {"shot_pixels_left_out": excluded, "warnings": list(warnings),
                                       "checksums": checksums})
    log.info("integrated %d shots onto %d q points (reference %.4f keV, energy-aware %s); %d shot pixels left "
             "out (non-finite or saturated); wrote %s", info.n_shots, setup.layout.q.size, setup.reference_energy,
             detector["energy_aware"], excluded, out)
