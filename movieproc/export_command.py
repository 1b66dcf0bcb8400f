"""``movieproc export``: a movie as a netCDF-4 file, for tools that do not read zarr.

    movieproc export results/demo/movie.zarr --netcdf movie.nc

Every variable, coordinate and attribute of the movie goes into the file as it is
(xarray, h5netcdf engine): the movie's attributes are already strings and numbers,
its config YAML text in ``config_yaml``. The file is written atomically.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from .errors import InputError

#: Variables every movie has (written by the stages difference and assemble).
MOVIE_VARIABLES = ("delay", "q", "difference", "difference_error")


def open_movie(path):
    """The movie at ``path`` as an xarray Dataset (lazy), or an InputError saying what it is instead."""
    import xarray as xr

    from .io import store

    group = store.open_group(path, "movie")
    missing = [name for name in MOVIE_VARIABLES if name not in group]
    if missing:
        raise InputError(path, f"a zarr store without {', '.join(missing)}",
                         "a movie.zarr written by 'movieproc run' (stage assemble)")
    return xr.open_zarr(str(path))


def export_netcdf(movie, netcdf) -> Path:
    """Write the movie store ``movie`` to the netCDF-4 file ``netcdf`` (atomically); returns its path."""
    from .io.store import atomic_path

    netcdf = Path(netcdf)
    if netcdf.is_dir():
        raise InputError(netcdf, "a folder", "a file name for the netCDF output (--netcdf)")
    try:
        import h5netcdf  # noqa: F401  (the engine xarray writes with)
    except ImportError:
        raise InputError("h5netcdf", "not installed", "the h5netcdf package (pip install h5netcdf)") from None
    ds = open_movie(movie)
    with atomic_path(netcdf) as tmp:
        ds.to_netcdf(tmp, engine="h5netcdf")
    return netcdf


def add_parser(subparsers):
    """Add the ``export`` command to an argparse subparsers object."""
    p = subparsers.add_parser("export", help="write a movie as a netCDF-4 file",
                              description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("movie", help="movie store (results/<run>/movie.zarr)")
    p.add_argument("--netcdf", required=True, metavar="FILE", help="netCDF-4 file to write")
    p.set_defaults(func=main)
    return p


def main(args) -> int:
    """Run the ``export`` command from parsed arguments; 0 on success (errors raise MovieprocError)."""
    out = export_netcdf(args.movie, args.netcdf)
    print(f"netCDF written to {out}")
    return 0
