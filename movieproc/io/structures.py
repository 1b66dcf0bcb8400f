"""Structure and trajectory files: XYZ, extended XYZ and PDB, read with ASE.

Positions are float64 in Å, frame times float64 in ps.

Frame times come from the extended-XYZ comment line of each frame, with one of:

- ``time_ps=<value>``: picoseconds (what :func:`write_trajectory` writes);
- ``time_fs=<value>``: femtoseconds;
- ``time=<value> time_unit=fs`` or ``time_unit=ps``.

A bare ``time=`` without ``time_unit`` is refused as ambiguous. Files without any
time key (plain XYZ, PDB) give ``times = None``. Every frame must carry a time or
none may.
"""

from __future__ import annotations

from pathlib import Path
from typing import NamedTuple

import numpy as np

from ..errors import InputError
from .store import atomic_path

__all__ = ["Trajectory", "read_structure", "read_trajectory", "read_ensemble", "write_trajectory"]

_TIME_KEYS = {"time_ps": 1.0, "time_fs": 1e-3}
_UNITS = {"ps": 1.0, "fs": 1e-3}


class Trajectory(NamedTuple):
    """Frames of one molecule (or an ensemble of them).

    Attributes
    ----------
    elements : tuple of str, length N
        Element symbol per atom.
    positions : ndarray, float64, Å
        (F, N, 3) for one trajectory, (M, F, N, 3) for an ensemble of M.
    times : ndarray, shape (F,), float64, ps, or None
        Frame times where the file gives them.
    source : str or tuple of str
        File name(s) read.
    """

    elements: tuple
    positions: np.ndarray
    times: np.ndarray | None
    source: object


def _frames(path):
    """Read all frames with ASE, naming the frame where reading fails."""
    import ase.io

    path = Path(path)
    if not path.is_file():
        raise InputError(path, "no such file", "an XYZ, extended XYZ or PDB structure file")
    frames = []
    try:
        for atoms in ase.io.iread(str(path), index=":"):
            frames.append(atoms)
    except KeyError as exc:  # ASE raises KeyError for an unknown element symbol
        raise InputError(f"{path}, frame {len(frames)}", f"unknown element symbol {exc}",
                         "chemical element symbols") from None
    except Exception as exc:  # ASE's parsers raise many types on malformed files
        raise InputError(f"{path}, frame {len(frames)}", f"unreadable content ({exc})",
                         "an XYZ, extended XYZ or PDB structure file") from None
    while len(frames) > 1 and len(frames[-1]) == 0:  # multi-model PDB: trailing empty model
        frames.pop()
    return path, frames


def _frame_time(path, k, info):
    for key, scale in _TIME_KEYS.items():
        if key in info:
            return _as_time(path, k, key, info[key]) * scale
    if "time" in info:
        unit = str(info.get("time_unit", "")).strip().lower()
        if unit not in _UNITS:
            raise InputError(f"{path}, frame {k}",
                             f"time={info['time']} with time_unit={info.get('time_unit')!r}",
                             "time_ps=..., time_fs=..., or time=... with time_unit=fs or ps")
        return _as_time(path, k, "time", info["time"]) * _UNITS[unit]
    return None


def _as_time(path, k, key, value):
    try:
        t = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{path}, frame {k}", f"{key}={value!r}", "a number") from None
    if not np.isfinite(t):
        raise InputError(f"{path}, frame {k}", f"{key}={value!r}", "a finite time")
    return t


def read_trajectory(path):
    """Read every frame of a structure or trajectory file.

    Parameters
    ----------
    path : str or Path
        XYZ, extended XYZ or PDB file (multi-frame or multi-model allowed).

    Returns
    -------
    Trajectory
        ``positions`` (F, N, 3) float64 Å; ``times`` (F,) ps or None.

    Raises
    ------
    InputError
        Missing or unreadable file, unknown element symbol, an empty structure,
        frames differing in atom count or element order, non-finite coordinates,
        inconsistent or malformed frame times. The message names file and frame.
    """
    path, frames = _frames(path)
    if not frames or len(frames[0]) == 0:
        raise InputError(f"{path}, frame 0", "no atoms", "at least one atom")
    elements = tuple(frames[0].get_chemical_symbols())
    times = []
    positions = np.empty((len(frames), len(elements), 3))
    for k, atoms in enumerate(frames):
        where = f"{path}, frame {k}"
        if len(atoms) != len(elements):
            raise InputError(where, f"{len(atoms)} atoms", f"{len(elements)} atoms as in frame 0")
        symbols = tuple(atoms.get_chemical_symbols())
        if symbols != elements:
            i = next(i for i, (a, b) in enumerate(zip(symbols, elements, strict=True)) if a != b)
            raise InputError(where, f"element {symbols[i]} at atom {i}",
                             f"{elements[i]} (the element order of frame 0)")
        pos = atoms.get_positions()
        if not np.all(np.isfinite(pos)):
            i = int(np.argwhere(~np.isfinite(pos))[0, 0])
            raise InputError(where, f"non-finite coordinates at atom {i}", "finite positions (Å)")
        positions[k] = pos
        times.append(_frame_time(path, k, atoms.info))
    given = [t is not None for t in times]
    if any(given) and not all(given):
        k = given.index(not given[0])
        raise InputError(f"{path}, frame {k}",
                         "a frame " + ("without" if given[0] else "with") + " a time",
                         "a time on every frame or on none")
    return Trajectory(elements, positions, np.array(times, dtype=np.float64) if all(given) else None,
                      str(path))


def read_structure(path):
    """Read a single structure.

    Parameters
    ----------
    path : str or Path
        XYZ, extended XYZ or PDB file holding one structure.

    Returns
    -------
    elements : tuple of str, length N
        Element symbols.
    positions : ndarray, shape (N, 3), float64
        Positions, Å.

    Raises
    ------
    InputError
        As :func:`read_trajectory`, and if the file holds more than one frame.
    """
    traj = read_trajectory(path)
    if traj.positions.shape[0] != 1:
        raise InputError(path, f"{traj.positions.shape[0]} frames", "a single structure")
    return traj.elements, traj.positions[0]


def read_ensemble(paths):
    """Read several trajectories of one molecule, frame by frame aligned.

    The stack is returned as is; model curves are averaged over the ensemble by
    :func:`movieproc.scattering.model.ensemble_difference_curves`.

    Parameters
    ----------
    paths : sequence of str or Path, length M >= 1
        Trajectory files with the same atoms in the same order, the same number of
        frames and the same frame times (or none).

    Returns
    -------
    Trajectory
        ``positions`` (M, F, N, 3) float64 Å; ``times`` (F,) ps or None;
        ``source`` the tuple of file names.

    Raises
    ------
    InputError
        No paths, or members that differ in atoms, frame count or times.
    """
    paths = [Path(p) for p in paths]
    if not paths:
        raise InputError("trajectory ensemble", "no files", "at least one trajectory file")
    members = [read_trajectory(p) for p in paths]
    first = members[0]
    for p, m in zip(paths[1:], members[1:], strict=True):
        if m.elements != first.elements:
            raise InputError(p, f"atoms {''.join(m.elements)}",
                             f"the atoms of {paths[0]} ({''.join(first.elements)}) in the same order")
        if m.positions.shape[0] != first.positions.shape[0]:
            raise InputError(p, f"{m.positions.shape[0]} frames",
                             f"{first.positions.shape[0]} frames as in {paths[0]}")
        if (m.times is None) != (first.times is None) or (
                m.times is not None and not np.allclose(m.times, first.times, rtol=0, atol=1e-9)):
            raise InputError(p, "frame times that differ", f"the frame times of {paths[0]}")
    positions = np.stack([m.positions for m in members])
    return Trajectory(first.elements, positions, first.times, tuple(str(p) for p in paths))


def _checked_frames(path, elements, positions, times_ps):
    """Positions (F, N, 3) and times (F,) or None, checked; InputError naming ``path`` otherwise."""
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim == 2:
        positions = positions[None]
    if positions.ndim != 3 or positions.shape[2] != 3 or positions.shape[1] != len(elements):
        raise InputError(path, f"positions of shape {positions.shape} for {len(elements)} atoms",
                         "positions (F, N, 3) with one element symbol per atom")
    if len(elements) == 0:
        raise InputError(path, "no atoms", "at least one atom")
    if not np.all(np.isfinite(positions)):
        k = int(np.argwhere(~np.isfinite(positions))[0, 0])
        raise InputError(f"{path}, frame {k}", "non-finite coordinates", "finite positions (Å)")
    if times_ps is not None:
        times_ps = np.asarray(times_ps, dtype=np.float64)
        if times_ps.shape != (positions.shape[0],) or not np.all(np.isfinite(times_ps)):
            raise InputError(path, f"times of shape {times_ps.shape}",
                             f"{positions.shape[0]} finite frame times (ps)")
    return positions, times_ps


def _file_format(path, with_times):
    """The ASE format name for ``path``'s suffix."""
    suffix = path.suffix.lower()
    if suffix == ".pdb":
        if with_times:
            raise InputError(path, "frame times for a PDB file", "an .xyz file to hold frame times")
        return "proteindatabank"
    if suffix in (".xyz", ".extxyz"):
        return "extxyz"
    raise InputError(path, f"file suffix '{suffix}'", "'.xyz', '.extxyz' or '.pdb'")


def write_trajectory(path, elements, positions, times_ps=None):
    """Write frames to an extended XYZ file (atomically), with times in ps.

    Each frame's comment line carries ``time_ps=<value>`` when ``times_ps`` is given.

    Parameters
    ----------
    path : str or Path
        Output file; ``.xyz`` or ``.extxyz`` (or ``.pdb`` without times).
    elements : sequence of str, length N
        Element symbol per atom.
    positions : array_like, shape (F, N, 3) or (N, 3)
        Positions, Å.
    times_ps : array_like, shape (F,), optional
        Frame times, ps.
    """
    import ase.io
    from ase import Atoms

    path = Path(path)
    elements = [str(e) for e in elements]
    positions, times_ps = _checked_frames(path, elements, positions, times_ps)
    fmt = _file_format(path, times_ps is not None)
    try:
        frames = [Atoms(symbols=elements, positions=p) for p in positions]
    except KeyError as exc:
        raise InputError(path, f"unknown element symbol {exc}", "chemical element symbols") from None
    if times_ps is not None:
        for atoms, t in zip(frames, times_ps, strict=True):
            atoms.info["time_ps"] = float(t)
    with atomic_path(path) as tmp:
        ase.io.write(str(tmp), frames, format=fmt)
