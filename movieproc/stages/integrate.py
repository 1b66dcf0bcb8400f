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
  (:func:`integration.mean_variance`), read at the shot's q like the curves by
  interpolating the variance curve: exact on the grid nodes; between nodes
  the interpolated mean averages neighbouring grid values whose noise is
  only partly shared, so its true variance is lower (by up to about a quarter
  midway for pixel noise): ``curves_var`` errs on the high side there.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import h5py
import numpy as np
import zarr

from ..detector import anisotropy, corrections, energy, geometry, integration, masks
from ..errors import ConfigError, InputError
from ..io import runfile, shotstore, store
from ..parallel import chunk_ranges, map_ranges
from .common import Warnings, now, versions

log = logging.getLogger("movieproc.integrate")

#: Frames read and integrated at once inside a task: about this many bytes.
BLOCK_BYTES = 256 * 2**20
HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".nxs")
ORIGIN_NAMES = {energy.FROM_RUN: "run", energy.FROM_ELECTRON: "electron energy",
                energy.FROM_CONFIG: "detector.photon_energy_kev"}


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
        off = info.offsets
        i = int(np.searchsorted(off, first, side="right") - 1)
        path, local = info.files[i], first - int(off[i])
        fallbacks = ("detector.photon_energy_kev, or shots/electron_energy (GeV) with "
                     "detector.undulator.period_mm and k")
        if "photon_energy" in table:
            found = f"{table['photon_energy'][first]!r} at shot {local} ({missing.size} shot(s) without a usable energy)"
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


def _grid(q, scale, energy_aware):
    """Reference grid covering q / scale for every shot, with room for the 4-point stencil."""
    if not energy_aware:
        return q.copy()
    step = (q[-1] - q[0]) / (q.size - 1)
    below = max(0.0, q[0] - q[0] / scale.max())
    above = max(0.0, q[-1] / scale.min() - q[-1])
    lo = int(math.ceil(below / step - 1e-9)) + 2
    hi = int(math.ceil(above / step - 1e-9)) + 3
    return q[0] + step * np.arange(-lo, q.size + hi)


def _sector_layout(phi, sectors):
    """Sector edges (radians), azimuths wrapped into them, and the centres (degrees).

    Sector k covers azimuths [k - 1/2, k + 1/2) * 360 / S degrees, so sector 0 is
    centred on the +x (column) direction; azimuth runs from +x towards +y (rows).
    """
    width = 2.0 * np.pi / sectors
    edges = width * (np.arange(sectors + 1) - 0.5)
    wrapped = np.mod(phi - edges[0], 2.0 * np.pi) + edges[0]
    wrapped = np.where(wrapped >= edges[-1], edges[0], wrapped)  # rounding at the seam
    return edges, wrapped, 360.0 * np.arange(sectors) / sectors


def _q_ranges(q, points):
    """'a-b, c' for runs of consecutive q points (1/Å)."""
    idx = np.flatnonzero(points)
    runs = np.split(idx, np.flatnonzero(np.diff(idx) > 1) + 1)
    return ", ".join(f"{q[r[0]]:.4g}" if r.size == 1 else f"{q[r[0]]:.4g}-{q[r[-1]]:.4g}" for r in runs)


def _uncovered(moments0, grid, q, scale, aware):
    """q points (..., nq) whose interpolation stencil meets a grid point without pixels,
    at the lowest or the highest shot energy; ``moments0`` (..., ng) pixel weights."""
    covered = np.where(moments0 > 0, 1.0, np.nan).reshape(-1, grid.size)
    if not aware:
        probe = [covered]
    else:
        probe = [energy.rescale_curves(covered, grid, q, np.full(covered.shape[0], s))
                 for s in (scale.min(), scale.max())]
    return (~np.all(np.isfinite(np.stack(probe)), axis=0)).reshape(moments0.shape[:-1] + (q.size,))


def run(files, out, detector: dict, compute: dict) -> dict:
    """Integrate the frames of a run into the shots store ``out``.

    Parameters
    ----------
    files : list of str or Path
        Run files (HDF5, frames mode; docs/DESIGN.md section 4).
    out : path
        Shots store to write (zarr), replaced atomically.
    detector : dict
        Validated ``detector`` config section (defaults filled).
    compute : dict
        ``compute`` section: ``workers``, ``scheduler``, ``chunk_shots``, ``progress``.

    Returns
    -------
    dict
        Summary: shots, reference energy, pixels left out per reason, shot
        pixels left out (non-finite or saturated), sectors, variance mode.

    Raises
    ------
    InputError, ConfigError
        Naming the file, dataset or config key; nothing is written.
    """
    info = runfile.inspect_run(files)
    if info.mode != "frames":
        raise InputError(info.files[0], "pre-integrated curves",
                         "detector frames (N, ny, nx) for the integrate stage (curves go through ingest)")
    warnings = Warnings("integrate", log)
    shape = tuple(info.frame_shape)
    if detector.get("shape_px") is not None and tuple(detector["shape_px"]) != shape:
        raise ConfigError("detector.shape_px", f"{list(detector['shape_px'])}",
                          f"the frame shape {list(shape)} of {info.files[0]}")
    geo = geometry.from_config(detector, shape)
    if not detector["q_max"] > detector["q_min"]:
        raise ConfigError("detector.q_max", f"{detector['q_max']}", f"a value above detector.q_min = {detector['q_min']}")
    table = runfile.read_table(info)
    photon, origins = _photon_energies(info, table, detector, warnings)
    log.info("run of %d shots in %d file(s), frames %d x %d (%s); photon energy %.4f-%.4f keV (%s)",
             info.n_shots, len(info.files), shape[0], shape[1], info.data_dtype, photon.min(), photon.max(),
             ", ".join(f"{v} from {k}" for k, v in origins.items() if v))

    aware = detector["energy_aware"]
    if aware or detector["photon_energy_kev"] is None:
        e_ref = float(np.median(photon))
    else:
        e_ref = float(detector["photon_energy_kev"])
    scale = photon / e_ref if aware else np.ones_like(photon)
    q = np.linspace(detector["q_min"], detector["q_max"], detector["q_count"])
    grid = _grid(q, scale, aware)

    mask, dark, reasons = _static_mask(detector, shape, info.files[0], warnings)
    factor = corrections.factor_from_config(geo, detector)
    regressors = []
    aniso = detector["anisotropy"]["enabled"]
    sectors = int(detector.get("sectors") or 1)
    variance = detector.get("variance")
    if variance is not None and aniso:
        raise ConfigError("detector.variance", repr(variance),
                          "null while detector.anisotropy.enabled is true (the variance of the isotropic part "
                          "of the P2 fit is not computed)")
    if aniso or sectors > 1:
        two_theta, phi = geometry.scattering_angles(geo)
    if aniso:
        regressors = [anisotropy.p2_regressor(two_theta, phi, np.deg2rad(detector["anisotropy"]["pump_polarization_deg"]))]
    edges = azimuth = centres = None
    if sectors > 1:
        edges, azimuth, centres = _sector_layout(phi, sectors)
    binning = integration.build_binning(geometry.q_map(geo, e_ref), grid, factor=factor, mask=mask, dark=dark,
                                        azimuth=azimuth, sector_edges=edges, regressors=regressors,
                                        splitting=detector["pixel_splitting"],
                                        saturation_level=detector["saturation_level"])
    # Whole-ring moments: with sectors, the sums over them (every valid pixel lies in one).
    ring_moments = binning.moments.sum(axis=1) if sectors > 1 else binning.moments[:, 0]
    reasons["bad_factor"] = int(((~np.isfinite(factor) | ~(factor > 0)) & ~mask).sum())
    used = int(binning.valid.sum())
    reasons["outside_q_range"] = int(shape[0] * shape[1] - used - sum(reasons.values()))
    if used == 0:
        raise ConfigError("detector.q_min", f"q range [{detector['q_min']}, {detector['q_max']}] 1/Å",
                          f"a q range the detector reaches at {e_ref:.4g} keV with unmasked pixels")
    log.info("pixels: %d used of %d; left out: %s", used, shape[0] * shape[1],
             ", ".join(f"{v} {k}" for k, v in reasons.items() if v) or "none")
    count = energy.rescale_curves(ring_moments[None, 0], grid, q, np.ones(1))[0]
    # A q point whose curve would be NaN: some grid point of its interpolation stencil has
    # no valid pixel, for the lowest or the highest shot energy.
    empty = _uncovered(ring_moments[0], grid, q, scale, aware)
    if np.any(empty):
        # Curves must be finite everywhere downstream: name the q points and the range that works.
        covered = q[~empty]
        hint = (f"a q grid inside the covered range, e.g. detector.q_min={covered.min():.4g} and "
                f"detector.q_max={covered.max():.4g}" if covered.size else "a q range the detector reaches")
        raise ConfigError("detector.q_min/q_max",
                          f"{int(empty.sum())} q point(s) with no unmasked pixels at {e_ref:.4g} keV "
                          f"(q = {', '.join(f'{v:.3g}' for v in q[empty][:6])}{' ...' if empty.sum() > 6 else ''} 1/Å)",
                          hint)

    sector_empty = None
    if sectors > 1:
        # Sectors may miss q points the whole rings reach (a beamstop holder, a detector
        # edge): those stay NaN in curves_sectors, and the warning says where.
        sector_empty = _uncovered(binning.moments[0], grid, q, scale, aware)
        for k in np.flatnonzero(sector_empty.any(axis=1)):
            lo, hi = (centres[k] - 180.0 / sectors) % 360.0, (centres[k] + 180.0 / sectors) % 360.0
            warnings.add(f"sector {k} (azimuth {lo:.4g}-{hi:.4g} deg, centre {centres[k]:.4g} deg) lacks pixels "
                         f"for {int(sector_empty[k].sum())} q point(s), q = {_q_ranges(q, sector_empty[k])} 1/Å "
                         "(at the run's lowest or highest photon energy): curves_sectors is NaN there")

    chunk = int(compute["chunk_shots"])
    frame_bytes = shape[0] * shape[1] * info.data_dtype.itemsize
    block = max(integration.LANES, BLOCK_BYTES // frame_bytes // integration.LANES * integration.LANES)
    names = ["curves"] + (["curves_p2"] if aniso else [])
    units = "detector units / (solid angle and polarization factors)"
    curve_units = {name: units for name in names}
    if variance is not None:
        curve_units["curves_var"] = f"({units})^2"
    table = dict(table)
    table["photon_energy"] = photon
    attrs = {
        "mode": "frames", "files": [str(f) for f in info.files],
        "checksums": {str(f): shotstore.file_checksum(f) for f in info.files}, "counts": info.counts,
        "detector": detector, "reference_energy_kev": e_ref, "photon_energy_origin": origins,
        "pixels_left_out": reasons, "pixels_used": used, "written": now(), "versions": versions(),
    }

    with store.atomic_path(out) as tmp:
        group = shotstore.create(tmp, q, table, chunk, curve_arrays=curve_units, attrs=attrs)
        store.write_array(group, "pixel_count", count, ["q"], units="pixels",
                          attrs={"meaning": "effective number of valid pixels per q point at the reference energy"})
        if variance is not None:
            group["curves_var"].attrs.update({
                "meaning": f"variance of each shot's mean intensity per q point ({variance} statistics); "
                           "interpolated in q like the curves (exact on the reference grid, high between its points)",
                "mode": variance})
        if sectors > 1:
            store.write_array(group, "sector", centres, ["sector"], units="deg", attrs={
                "meaning": "centre azimuth of each sector, from +x (columns) towards +y (rows)",
                "width_deg": 360.0 / sectors})
            store.create_array(group, "curves_sectors", (info.n_shots, sectors, q.size), ["shot", "sector", "q"],
                               "float32", chunks=(max(1, min(chunk, info.n_shots)), sectors, q.size), units=units,
                               attrs={"meaning": "mean intensity of each azimuthal sector; NaN where a sector has "
                                                 "no pixels (see the warnings)"})
        paths = {name: str(Path(tmp) / name) for name in curve_units}
        if sectors > 1:
            paths["curves_sectors"] = str(Path(tmp) / "curves_sectors")

        def rescale(values, a, b):
            return energy.rescale_curves(values, grid, q, scale[a:b]) if aware else values

        def work(start, stop):
            targets = {name: zarr.open_array(path, mode="r+") for name, path in paths.items()}
            excluded = lost_sector = lost_var = 0
            for a in range(start, stop, block):
                b = min(a + block, stop)
                frames = runfile.read_frames(info, a, b)
                res = integration.bin_sums(frames, binning)
                excluded += int(res.excluded.sum())
                if sectors > 1:
                    sums, moments = res.sums.sum(axis=2), res.moments.sum(axis=2)
                else:
                    sums, moments = res.sums[:, :, 0], res.moments[:, :, 0]
                if aniso:
                    parts = anisotropy.solve(sums, moments)
                else:
                    with np.errstate(invalid="ignore", divide="ignore"):
                        parts = (sums[:, 0] / moments[:, 0],)
                for name, values in zip(names, parts):
                    targets[name][a:b] = rescale(values, a, b).astype(np.float32)
                if variance is not None:
                    var = integration.mean_variance(frames, binning, variance, sums=res, whole_rings=True)[:, 0]
                    var = np.maximum(rescale(var, a, b), 0.0)  # interpolation overshoot; NaN stays NaN
                    lost_var += int(np.sum(~np.isfinite(var)))
                    targets["curves_var"][a:b] = var.astype(np.float32)
                if sectors > 1:
                    with np.errstate(invalid="ignore", divide="ignore"):
                        per = res.sums[:, 0] / res.moments[:, 0]  # (n, S, ng)
                    n = b - a
                    if aware:
                        per = energy.rescale_curves(per.reshape(n * sectors, -1), grid, q,
                                                    np.repeat(scale[a:b], sectors)).reshape(n, sectors, q.size)
                    lost_sector += int(np.sum(~np.isfinite(per) & ~sector_empty[None]))
                    targets["curves_sectors"][a:b] = per.astype(np.float32)
            return excluded, lost_sector, lost_var

        results = map_ranges(work, chunk_ranges(info.n_shots, chunk), compute["workers"], compute["scheduler"],
                             compute["progress"], "integrate")
        shot_excluded = int(sum(r[0] for r in results))
        lost_sector, lost_var = int(sum(r[1] for r in results)), int(sum(r[2] for r in results))
        if lost_sector:
            warnings.add(f"{lost_sector} sector value(s) in curves_sectors are NaN beyond the q points named per "
                         "sector: every pixel there was left out of its shot (non-finite or saturated), or the "
                         "shot's photon energy reads them off a grid point the sector has no pixels at")
        if lost_var:
            warnings.add(f"{lost_var} value(s) of curves_var are NaN: no pixels, or (spread) too few to estimate "
                         "a spread (effective pixel count <= 1)")
        store.update_attrs(group, {"shot_pixels_left_out": shot_excluded, "warnings": list(warnings)})
    log.info("integrated %d shots onto %d q points (reference %.4f keV, energy-aware %s); %d shot pixels left "
             "out (non-finite or saturated); wrote %s", info.n_shots, q.size, e_ref, aware, shot_excluded, out)
    return {"shots": info.n_shots, "reference_energy_kev": e_ref, "pixels_used": used,
            "pixels_left_out": reasons, "shot_pixels_left_out": shot_excluded, "sectors": sectors,
            "variance": variance, "warnings": list(warnings)}
