"""``movieproc calibrate``: detector geometry from a calibrant image.

    movieproc calibrate IMAGE --calibrant LaB6 --energy-kev 12 --pixel-size-mm 0.1 --out geometry.yaml

IMAGE is a .npy or .tif/.tiff file, or 'file.h5:dataset' (a stack of frames is
averaged). The YAML holds a ``detector:`` section with the config keys of
config/schemas/detector.schema.yaml (copy it into a run config) and a
``calibration:`` section with the errors and ring residuals; a PNG with the
fitted rings and the residuals is written beside it.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import yaml

from .errors import DataError, InputError, MovieprocError

HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".nxs")
TIFF_SUFFIXES = (".tif", ".tiff")
#: Core parameter -> command-line option, for error messages.
OPTIONS = {"centre_guess": "--center-px", "distance_guess": "--distance-mm", "fix_distance": "--fix-distance",
           "refine_energy": "--refine-energy", "max_residual_deg": "--max-residual-deg",
           "pixel_size": "--pixel-size-mm", "photon_energy": "--energy-kev", "d_spacings": "--d-spacings",
           "calibrant": "--calibrant", "mask": "--mask", "image": "IMAGE"}
#: Every n-th pixel along each axis of the 2theta map for drawing the fitted rings (speed only).
CONTOUR_STRIDE = 2


def read_image(spec: str, what: str = "IMAGE") -> np.ndarray:
    """A 2-D frame from 'file.npy', 'file.tif(f)' or 'file.h5:dataset'; a stack (n, ny, nx) is averaged.

    Raises
    ------
    InputError
        Naming the file (and dataset) when missing, unreadable or not 2-D/3-D numeric.
    """
    text = str(spec)
    head, sep, tail = text.rpartition(":")
    expected = f"a 2-D frame or 3-D stack in .npy, .tif/.tiff or 'file.h5:dataset' ({what})"
    if sep and head.lower().endswith(HDF5_SUFFIXES):
        data = _read_h5(Path(head), tail, expected)
    else:
        path = Path(text)
        if not path.exists():
            raise InputError(str(path), "no such file", expected)
        try:
            if path.suffix.lower() in TIFF_SUFFIXES:
                import tifffile

                data = tifffile.imread(path)
            else:
                data = np.load(path, allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise InputError(str(path), f"a file that cannot be read ({exc})", expected) from None
    data = np.asarray(data)
    if data.dtype.kind not in "biuf" or data.ndim not in (2, 3):
        raise InputError(text, f"an array of shape {data.shape} and dtype {data.dtype}", expected)
    return data.astype(np.float64).mean(axis=0) if data.ndim == 3 else data.astype(np.float64)


def _read_h5(path: Path, dataset: str, expected: str):
    import h5py

    if not path.exists():
        raise InputError(str(path), "no such file", expected)
    try:
        with h5py.File(path, "r") as h5:
            if dataset not in h5 or not isinstance(h5[dataset], h5py.Dataset):
                raise InputError(f"{path}:{dataset}", "no such dataset", expected)
            return h5[dataset][...]
    except OSError as exc:
        raise InputError(str(path), f"a file HDF5 cannot open ({exc})", expected) from None


def detector_section(cal) -> dict:
    """The ``detector`` config keys of a calibration (plain Python values)."""
    g = cal.geometry
    pix = g.pixel_size_mm
    return {"shape_px": [int(v) for v in g.shape], "distance_mm": round(g.distance_mm, 6),
            "pixel_size_mm": float(pix[0]) if pix[0] == pix[1] else [float(v) for v in pix],
            "beam_center_px": [round(v, 4) for v in g.beam_center_px],
            "tilt_deg": [round(v, 5) for v in g.tilt_deg], "photon_energy_kev": round(cal.photon_energy, 6)}


def calibration_section(cal, image: str, figure: str) -> dict:
    """Errors, residuals and provenance of a calibration (the ``calibration`` section)."""
    e = cal.errors
    return {
        "image": image, "calibrant": cal.calibrant.name, "calibrant_source": cal.calibrant.source,
        "refined": list(cal.refined), "rounds": cal.rounds, "figure": figure,
        "errors": {"distance_mm": e["distance_mm"], "beam_center_px": [e["beam_row_px"], e["beam_col_px"]],
                   "tilt_deg": [e["tilt_x_deg"], e["tilt_y_deg"]], "photon_energy_kev": e["photon_energy_kev"]},
        "max_residual_deg": cal.max_residual_deg,
        "points": int(cal.point_rows.size), "inliers": int(cal.inlier.sum()),
        "rings": [{"reflection": r.label, "d_angstrom": r.d_spacing, "two_theta_deg": round(r.two_theta_deg, 6),
                   "points": r.points, "inliers": r.inliers, "rms_deg": r.rms_deg,
                   "median_abs_deg": r.median_abs_deg, "systematic_deg": r.systematic_deg} for r in cal.rings],
    }


def plot(cal, image: np.ndarray, mask, path: Path):
    """Figure: the image (log scale) with the fitted rings; residual 2theta per ring against azimuth."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .detector import geometry as geom

    fig, (ax0, ax1) = plt.subplots(1, 2, figsize=(13, 6), gridspec_kw={"width_ratios": [1, 1.2]})
    shown = np.where(np.isfinite(image) & (image > 0), image, np.nan)
    if mask is not None:
        shown = np.where(mask, np.nan, shown)
    im = ax0.imshow(np.log10(shown), cmap="gray", origin="upper", interpolation="nearest")
    fig.colorbar(im, ax=ax0, shrink=0.8, label="log10(counts)")
    g = cal.geometry
    s = CONTOUR_STRIDE
    rows, cols = np.mgrid[0:g.shape[0]:s, 0:g.shape[1]:s].astype(float)
    tt = np.rad2deg(geom.scattering_angles(g, rows, cols)[0])
    levels = sorted(r.two_theta_deg for r in cal.rings)
    ax0.contour(cols, rows, tt, levels=levels, colors="tab:red", linewidths=0.6)
    ax0.plot(g.beam_center_px[1], g.beam_center_px[0], "+", color="tab:red", ms=12)
    ax0.set_xlabel("column (px)")
    ax0.set_ylabel("row (px)")
    ax0.set_title(f"{cal.calibrant.name}: fitted rings (red), beam centre (+)")
    for j, ring in enumerate(cal.rings):
        sel = cal.point_ring == j
        ax1.plot(cal.point_azimuth_deg[sel], 1e3 * cal.point_residual_deg[sel], ".", ms=2,
                 label=f"{ring.label} ({ring.two_theta_deg:.2f} deg)")
    ax1.axhline(0.0, color="k", lw=0.5)
    for sign in (1, -1):
        ax1.axhline(sign * 1e3 * cal.max_residual_deg, color="tab:gray", ls="--", lw=0.8)
    ax1.set_xlabel("azimuth phi (deg)")
    ax1.set_ylabel("residual 2theta - 2theta_hkl (millidegrees)")
    ax1.set_xlim(-180, 180)
    ax1.set_title(f"D = {g.distance_mm:.3f} mm, tilt = ({g.tilt_deg[0]:.3f}, {g.tilt_deg[1]:.3f}) deg\n"
                  "points: single ring pixels; dashed: threshold (applies to ring sector medians)", fontsize=10)
    ax1.legend(fontsize=7, markerscale=4, ncol=2, loc="upper right")
    fig.tight_layout()
    fig.savefig(path, dpi=110, format="png")
    plt.close(fig)


def add_parser(subparsers):
    """Add the ``calibrate`` command to an argparse subparsers object."""
    p = subparsers.add_parser("calibrate", help="detector geometry from a calibrant powder image",
                              description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("image", help="calibrant image: file.npy, file.tif(f) or file.h5:dataset (a stack is averaged)")
    p.add_argument("--calibrant", required=True,
                   help="LaB6 (NIST SRM 660c), CeO2 (NIST SRM 674b), AgBe (silver behenate) or 'd' with --d-spacings")
    p.add_argument("--d-spacings", type=float, nargs="+", metavar="D", help="d-spacings in Å for --calibrant d")
    p.add_argument("--energy-kev", type=float, required=True, help="photon energy, keV")
    p.add_argument("--pixel-size-mm", type=float, nargs="+", required=True, metavar="P",
                   help="pixel pitch, mm: one value or row col")
    p.add_argument("--mask", help="mask (nonzero = leave out): file.npy, file.tif or file.h5:dataset")
    p.add_argument("--distance-mm", type=float, help="rough sample-detector distance, mm (recommended)")
    p.add_argument("--center-px", type=float, nargs=2, metavar=("ROW", "COL"),
                   help="rough beam centre, px (default the image centre)")
    p.add_argument("--max-residual-deg", type=float,
                   help="largest accepted systematic ring residual, degrees (default: a quarter of one pixel's "
                        "angular size); above it no geometry is written")
    p.add_argument("--fix-distance", action="store_true", help="hold the distance at --distance-mm")
    p.add_argument("--refine-energy", action="store_true", help="fit the photon energy too (needs --fix-distance)")
    p.add_argument("--out", required=True, help="output YAML; the figure goes beside it (.png)")
    p.set_defaults(func=main)
    return p


def _calibrant(args):
    from .detector import calibrants

    if args.calibrant.strip().lower() in ("d", "user", "spacings"):
        if not args.d_spacings:
            raise InputError("--d-spacings", "nothing", "d-spacings in Å with --calibrant d")
        return calibrants.from_spacings(args.d_spacings)
    return calibrants.get(args.calibrant)


def _option_error(exc: ValueError) -> InputError:
    text = str(exc)
    for name, option in OPTIONS.items():
        if text.startswith(name) or f"{name} " in text.split(":")[0]:
            return InputError(option, text, "a valid value (see movieproc calibrate --help)")
    return InputError("movieproc calibrate", text, "valid arguments (see movieproc calibrate --help)")


def main(args) -> int:
    """Run the ``calibrate`` command from parsed arguments; 0 on success (errors raise MovieprocError)."""
    from .detector.calibrate import calibrate
    from .io.store import atomic_path

    out = Path(args.out)
    if not (np.isfinite(args.energy_kev) and args.energy_kev > 0):
        raise InputError("--energy-kev", f"{args.energy_kev}", "a positive photon energy in keV")
    image = read_image(args.image)
    mask = None if args.mask is None else read_image(args.mask, "--mask") != 0
    if mask is not None and mask.shape != image.shape:
        raise InputError(args.mask, f"a mask of shape {mask.shape}", f"the image shape {image.shape} (--mask)")
    if mask is not None and mask.all():
        raise DataError(f"--mask {args.mask} hides every pixel of {args.image}")
    pixel = args.pixel_size_mm[0] if len(args.pixel_size_mm) == 1 else tuple(args.pixel_size_mm[:2])
    try:
        cal = calibrate(image, mask, _calibrant(args), args.energy_kev, pixel, distance_guess=args.distance_mm,
                        centre_guess=args.center_px, max_residual_deg=args.max_residual_deg,
                        fix_distance=args.fix_distance, refine_energy=args.refine_energy)
    except ValueError as exc:
        raise _option_error(exc) from None
    except DataError as exc:
        raise DataError(f"{args.image}: {exc}") from None
    figure = out.with_suffix(".png")
    doc = {"detector": detector_section(cal), "calibration": calibration_section(cal, str(args.image), figure.name)}
    with atomic_path(figure) as tmp:
        plot(cal, image, mask, tmp)
    with atomic_path(out) as tmp:
        tmp.write_text(yaml.safe_dump(doc, sort_keys=False))
    g = cal.geometry
    print(f"distance {g.distance_mm:.4f} +- {cal.errors['distance_mm']:.4f} mm, beam centre (row, col) "
          f"({g.beam_center_px[0]:.3f}, {g.beam_center_px[1]:.3f}) px, tilt ({g.tilt_deg[0]:.4f}, "
          f"{g.tilt_deg[1]:.4f}) deg; {len(cal.rings)} rings, {cal.point_rows.size} points")
    print(f"wrote {out} and {figure}")
    return 0


if __name__ == "__main__":
    parser = argparse.ArgumentParser(prog="movieproc")
    add_parser(parser.add_subparsers(dest="command", required=True))
    parsed = parser.parse_args(["calibrate"] + sys.argv[1:])
    try:
        sys.exit(parsed.func(parsed))
    except MovieprocError as error:
        print(f"movieproc: error: {error}", file=sys.stderr)
        sys.exit(2)
