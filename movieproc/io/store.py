"""Labelled zarr v3 stores: every array carries dimension names, ``long_name`` and ``units``.

Stores written here open with a plain ``xarray.open_zarr(path)`` with named
dimensions: their metadata is consolidated into the root ``zarr.json`` when the
store is complete. Coordinate arrays are named after their dimension. Units are
strings a unit library parses (pint, UDUNITS: ``1/angstrom``, ``ps``, ``1``);
what a dimensionless number means (normalized units, electron units) is said in
the array's ``description`` and, for figure labels, ``display_units``.
Attributes hold only strings, numbers and lists of them (netCDF-safe); nested
structures go in as YAML text (:func:`yaml_text`).
Writes are atomic: a store is built in a temporary sibling folder and renamed
into place, so an interrupted run never leaves a half-written store under the
final name.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import uuid
import warnings
from pathlib import Path

import numpy as np
import yaml
import zarr

from ..errors import InputError

#: Unit strings of the stores: pint's registry and UDUNITS both parse them.
INVERSE_ANGSTROM = "1/angstrom"
ANGSTROM = "angstrom"
PS = "ps"
DEGREE = "degree"
DIMENSIONLESS = "1"
#: What "e.u." (a pure number) means, for the description of arrays on the absolute scale.
ELECTRON_UNITS = ("electron units (e.u.): scattering relative to the Thomson scattering of one free electron, "
                  "a pure number")


@contextlib.contextmanager
def atomic_path(path):
    """Yield a temporary sibling path; on success rename it to ``path``.

    An existing ``path`` is replaced only after the new content is complete.
    On any exception the temporary is removed and ``path`` is left untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.tmp-{uuid.uuid4().hex[:8]}")
    try:
        yield tmp
        if (tmp / "zarr.json").is_file():
            consolidate(tmp)
        if path.exists():
            old = path.with_name(f".{path.name}.old-{uuid.uuid4().hex[:8]}")
            os.replace(path, old)
            os.replace(tmp, path)
            _remove(old)
        else:
            os.replace(tmp, path)
    finally:
        _remove(tmp)


def consolidate(path):
    """Copy the metadata of every array into the root ``zarr.json`` (one read opens the store).

    zarr-python writes consolidated metadata for format 3 with a warning that it is not
    yet part of the format 3 specification; xarray reads it and then opens the store
    without its "failed to open with consolidated metadata" warning.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Consolidated metadata is currently not part")
        zarr.consolidate_metadata(str(path))


def yaml_text(value) -> str:
    """A nested structure (dicts, lists, numbers, strings, paths) as YAML text for one string attribute."""
    return yaml.safe_dump(_jsonable(value), sort_keys=False, allow_unicode=True, width=100)


def _remove(p: Path):
    if p.is_dir():
        shutil.rmtree(p, ignore_errors=True)
    elif p.exists():
        p.unlink()


def _jsonable(value):
    """Convert numpy scalars/arrays and paths inside attrs to JSON types."""
    return json.loads(json.dumps(value, default=_default))


def _default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"cannot store {type(o).__name__} in attrs")


def write_array(group, name, data, dims, units=None, chunks=None, attrs=None, dtype=None, long_name=None):
    """Write a numpy array into ``group`` with dimension names and units.

    Parameters
    ----------
    group : zarr.Group
        Open, writable group.
    name : str
        Array name.
    data : array_like
        Values to write.
    dims : sequence of str
        One dimension name per axis of ``data``.
    units : str, optional
        Stored as ``attrs['units']``: a string pint parses (``"1/angstrom"``, ``"ps"``, ``"1"``).
    chunks : tuple of int, optional
        Chunk shape; default one chunk (or zarr's choice for large arrays).
    attrs : dict, optional
        Further attributes (JSON-serialisable).
    dtype : numpy dtype, optional
        Storage dtype; default that of ``data``.
    long_name : str, optional
        What the array holds, in words (``attrs['long_name']``).
    """
    data = np.asarray(data) if dtype is None else np.asarray(data, dtype=dtype)
    if data.ndim != len(dims):
        raise ValueError(f"array '{name}' has {data.ndim} axes but {len(dims)} dimension names")
    zdtype: object = data.dtype
    fill: object
    if data.dtype.kind in "UOT":
        # variable-length UTF-8 strings: the string type zarr v3 specifies
        zdtype, fill = str, ""
        data = data.astype(np.dtypes.StringDType())
    elif data.dtype == bool:
        fill = False
    elif data.dtype.kind in "iu":
        fill = 0
    else:
        fill = np.nan
    arr = group.create_array(
        name,
        shape=data.shape,
        dtype=zdtype,
        chunks=chunks if chunks is not None else (data.shape if data.size and data.nbytes < 2**26 else "auto"),
        dimension_names=list(dims),
        fill_value=fill,
        overwrite=True,
        attributes=_label(units, attrs, long_name),
    )
    if data.size:
        arr[...] = data
    return arr


def create_array(group, name, shape, dims, dtype, chunks, units=None, attrs=None, long_name=None):
    """Create an empty labelled array to be filled chunk by chunk (arguments as :func:`write_array`)."""
    arr = group.create_array(
        name, shape=shape, dtype=dtype, chunks=chunks, dimension_names=list(dims),
        fill_value=np.nan if np.dtype(dtype).kind == "f" else 0, overwrite=True,
        attributes=_label(units, attrs, long_name),
    )
    return arr


def _label(units, attrs, long_name=None) -> dict:
    """long_name, units and further attributes of an array, JSON-ready (given when the array is
    created: one metadata write per array instead of two)."""
    meta = dict(attrs or {})
    if long_name is not None:
        meta["long_name"] = long_name
    if units is not None:
        meta["units"] = units
    return _jsonable(meta)


def new_group(path, attrs=None):
    """Create a new zarr v3 group at ``path`` (which must not exist yet)."""
    group = zarr.open_group(str(path), mode="w", zarr_format=3)
    if attrs:
        group.attrs.update(_jsonable(attrs))
    return group


def open_group(path, what="store"):
    """Open an existing zarr group read-only, with a clear error if absent."""
    path = Path(path)
    if not path.exists():
        raise InputError(path, "no such store", f"a zarr {what} written by an earlier stage")
    try:
        return zarr.open_group(str(path), mode="r")
    except Exception as exc:  # zarr raises several types for non-stores
        raise InputError(path, f"not a readable zarr group ({exc})", f"a zarr {what}") from exc


def read(group, name, source=None):
    """Read a whole array from a group, naming the store on a missing key."""
    try:
        return group[name][...]
    except KeyError:
        raise InputError(f"{source or group.store}:{name}", "no such array",
                         "an array written by the producing stage") from None


def update_attrs(obj, attrs):
    """Update zarr attrs with JSON-safe values."""
    obj.attrs.update(_jsonable(attrs))


def lines_text(items) -> str:
    """Strings (warnings, file names) as one attribute, one per line (netCDF-safe, empty when none)."""
    return "\n".join(str(i) for i in items)


def text_list(attrs, key) -> list[str]:
    """The strings of an attribute written by :func:`lines_text` (an older list is taken as it is)."""
    value = attrs.get(key)
    if not value:
        return []
    if isinstance(value, str):
        return value.split("\n")
    return [str(v) for v in value]


def yaml_value(attrs, key, default=None):
    """The structure of an attribute written by :func:`yaml_text` (an older nested value as it is)."""
    value = attrs.get(key)
    if value is None:
        return default
    return yaml.safe_load(value) if isinstance(value, str) else value
