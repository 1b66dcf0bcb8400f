"""The movie other tools read: plain xarray opening, CF-style attributes, units pint parses, netCDF export.

Checks against the outside: pint's unit registry (``pint.UnitRegistry().parse_units``) is the judge
of every unit string; the CF conventions (section 7.1, cell boundaries: a boundary variable takes its
units from its parent coordinate, named in the parent's ``bounds`` attribute) for ``delay_bounds``;
xarray's own netCDF writer and reader (h5netcdf engine) for the export.
"""

import warnings

import numpy as np
import pytest
import xarray as xr

from movieproc import cli
from movieproc.errors import InputError
from movieproc.export_command import export_netcdf
from movieproc.io import store

pytestmark = [pytest.mark.slow, pytest.mark.xdist_group("demo-run")]


@pytest.fixture(scope="module")
def movie(demo_run):
    assert demo_run.proc.returncode == 0, demo_run.proc.stderr[-3000:]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a plain open, no consolidated=False, and no warning of any kind
        ds = xr.open_zarr(demo_run.movie)
    return ds


def _bounds_of(ds):
    """Boundary variable name -> its parent coordinate (CF 7.1)."""
    return {v.attrs["bounds"]: k for k, v in ds.variables.items() if "bounds" in v.attrs}


def test_every_variable_has_long_name_and_units_that_pint_parses(movie):
    pint = pytest.importorskip("pint")
    registry = pint.UnitRegistry()
    bounds = _bounds_of(movie)
    for name, var in movie.variables.items():
        assert var.attrs.get("long_name"), name
        assert "meaning" not in var.attrs, name
        if var.dtype.kind in "OUT":  # labels (strings) carry no unit
            continue
        if name in bounds:  # CF 7.1: the boundary variable's units are its parent's
            assert "units" not in var.attrs, name
            continue
        units = var.attrs.get("units")
        assert isinstance(units, str) and units, name
        registry.parse_units(units)  # raises on a string pint cannot read
    # the units of the main axes, as pint reads them
    assert registry.parse_units(movie["q"].attrs["units"]) == registry.parse_units("1/angstrom")
    assert registry.parse_units(movie["delay"].attrs["units"]) == registry.parse_units("picosecond")
    assert registry.parse_units(movie["geometry"].attrs["units"]) == registry.parse_units("angstrom")
    # normalized units are a pure number with a description of what 1 is
    assert registry.parse_units(movie["difference"].attrs["units"]).dimensionless
    assert "normalized units" in movie["difference"].attrs["description"]


def test_every_dimension_has_a_coordinate_and_names_are_plain(movie):
    for dim in movie.dims:
        assert dim in movie.coords, dim
    for name in movie.variables:
        assert name.isidentifier(), name  # e.g. no 'geometry_Ir-Ir'
    assert list(movie["axis"].values) == ["x", "y", "z"]
    assert movie["positions"].dims == ("delay", "atom", "axis")
    assert list(movie["parameter"].values) == ["Ir-Ir"]
    assert movie["geometry"].dims == ("delay", "parameter")
    assert set(movie["fit_parameter"].values) >= {"t0", "sigma", "lifetime", "alpha"}
    assert movie["fit_error"].dims == ("fit_parameter",)


def test_delay_bounds_contain_each_delay(movie):
    assert movie["delay"].attrs["bounds"] == "delay_bounds"
    b = movie["delay_bounds"].values
    assert movie["delay_bounds"].dims == ("delay", "bound") and list(movie["bound"].values) == ["lower", "upper"]
    d = movie["delay"].values
    assert np.all((b[:, 0] <= d) & (d <= b[:, 1]))
    np.testing.assert_array_equal(b[1:, 0], b[:-1, 1])  # contiguous bins


def test_attributes_are_strings_and_numbers(movie):
    for key, value in movie.attrs.items():
        assert isinstance(value, (str, int, float)) and not isinstance(value, bool), (key, type(value))
    for name, var in movie.variables.items():
        for key, value in var.attrs.items():
            flat = value if isinstance(value, list) else [value]
            assert all(isinstance(v, (str, int, float)) for v in flat), (name, key)


def test_netcdf_round_trip_is_identical(movie, tmp_path):
    pytest.importorskip("h5netcdf")
    loaded = movie.load()
    path = tmp_path / "movie.nc"
    loaded.to_netcdf(path, engine="h5netcdf")
    with xr.open_dataset(path, engine="h5netcdf") as back:
        xr.testing.assert_identical(loaded, back.load())


def test_export_command_writes_the_same_dataset(demo_run, movie, tmp_path, capsys):
    pytest.importorskip("h5netcdf")
    out = tmp_path / "sub" / "movie.nc"
    assert cli.main(["export", str(demo_run.movie), "--netcdf", str(out)]) == 0
    assert str(out) in capsys.readouterr().out
    assert [p.name for p in out.parent.iterdir()] == ["movie.nc"]  # atomic: no temporary left beside it
    with xr.open_dataset(out, engine="h5netcdf") as back:
        xr.testing.assert_identical(movie.load(), back.load())


def test_export_refuses_a_store_that_is_not_a_movie(demo_run, tmp_path, capsys):
    with pytest.raises(InputError) as err:
        export_netcdf(demo_run.out / "bins.zarr", tmp_path / "x.nc")
    assert "bins.zarr" in str(err.value) and "movie" in str(err.value)
    assert cli.main(["export", str(tmp_path / "absent.zarr"), "--netcdf", str(tmp_path / "x.nc")]) == 2
    assert "absent.zarr" in capsys.readouterr().err
    assert not (tmp_path / "x.nc").exists()


def test_intermediate_stores_open_plainly_with_labelled_arrays(demo_run):
    for name in ("binned.zarr", "bins.zarr", "analysis.zarr", "models.zarr"):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            ds = xr.open_zarr(demo_run.out / name)
        for var_name, var in ds.variables.items():
            assert var.attrs.get("long_name"), (name, var_name)
    # the binned store's config is YAML text
    g = store.open_group(demo_run.out / "binned.zarr")
    assert store.yaml_value(g.attrs, "config_yaml")["differences"]["references"] >= 1
