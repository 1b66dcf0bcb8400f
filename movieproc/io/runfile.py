"""Reading and validating run files (HDF5) against the input contract.

A run is one or more HDF5 files; shots are concatenated in file-name order.
Per-shot datasets live under ``shots/`` and share one length N per file. The
detector data are either ``frames`` (N, ny, nx) or pre-integrated ``curves``
(N, nq) with their ``q`` axis (nq,). See docs/DESIGN.md section 4.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from ..errors import InputError

#: Per-shot datasets: name -> (required, units, numpy kind codes accepted).
SHOT_FIELDS = {
    "pulse_id": (True, "1", "iu"),
    "stage_delay": (True, "ps", "fiu"),
    "pump_on": (True, "1", "bui"),
    "pulse_energy": (True, "arb", "fiu"),
    "timing_edge": (True, "px", "fiu"),
    "timing_amplitude": (False, "arb", "fiu"),
    "photon_energy": (False, "keV", "fiu"),
    "electron_energy": (False, "GeV", "fiu"),
}


@dataclass
class RunInfo:
    """What a run holds, checked against the contract.

    Attributes
    ----------
    files : list of Path
        The run files in the order their shots are concatenated.
    counts : list of int
        Shots per file.
    mode : str
        ``"curves"`` or ``"frames"``.
    q : ndarray or None
        (nq,) float64, 1/Å, for curves mode.
    frame_shape : tuple or None
        (ny, nx) for frames mode.
    data_dtype : numpy.dtype
        dtype of curves or frames.
    optional : set of str
        Optional per-shot datasets present in every file.
    """

    files: list
    counts: list
    mode: str
    q: np.ndarray | None
    frame_shape: tuple | None
    data_dtype: np.dtype
    optional: set = field(default_factory=set)

    @property
    def n_shots(self) -> int:
        return int(sum(self.counts))

    @property
    def offsets(self) -> np.ndarray:
        """Index of the first shot of each file in the concatenated run."""
        return np.concatenate([[0], np.cumsum(self.counts)]).astype(np.int64)

    def locate(self, start: int, stop: int):
        """Yield (file, local_start, local_stop, global_start) covering [start, stop)."""
        off = self.offsets
        for i, path in enumerate(self.files):
            lo, hi = max(start, off[i]), min(stop, off[i + 1])
            if lo < hi:
                yield path, int(lo - off[i]), int(hi - off[i]), int(lo)


def _open(path: Path):
    if not path.exists():
        raise InputError(path, "no such file", "an HDF5 run file")
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise InputError(path, f"a file HDF5 cannot open ({exc})", "an HDF5 run file") from None


def inspect_run(paths) -> RunInfo:
    """Check run files against the contract without reading the bulk data.

    Parameters
    ----------
    paths : str, Path or sequence of them
        Run files; they are sorted by file name before concatenation.

    Returns
    -------
    RunInfo

    Raises
    ------
    InputError
        Naming the file and dataset on a missing dataset, wrong shape or
        dtype, unequal lengths, or files that disagree on the detector data.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    files = sorted((Path(p) for p in paths), key=lambda p: p.name)
    if not files:
        raise InputError("run.files", "an empty list", "at least one HDF5 run file")
    counts, mode, q, frame_shape, dtype = [], None, None, None, None
    optional = None
    for path in files:
        with _open(path) as h5:
            n = None
            present = set()
            for name, (required, _units, kinds) in SHOT_FIELDS.items():
                key = f"shots/{name}"
                if key not in h5:
                    if required:
                        raise InputError(f"{path}:{key}", "no such dataset",
                                         f"a per-shot dataset '{key}' of shape (N,)")
                    continue
                ds = h5[key]
                if not isinstance(ds, h5py.Dataset) or ds.ndim != 1:
                    raise InputError(f"{path}:{key}", f"shape {getattr(ds, 'shape', '?')}",
                                     "a 1-D per-shot dataset of shape (N,)")
                if ds.dtype.kind not in kinds:
                    raise InputError(f"{path}:{key}", f"dtype {ds.dtype}",
                                     f"a numeric dtype of kind {kinds!r}")
                if n is None:
                    n = ds.shape[0]
                elif ds.shape[0] != n:
                    raise InputError(f"{path}:{key}", f"length {ds.shape[0]}",
                                     f"length {n}, the same as shots/pulse_id")
                present.add(name)
            optional = present if optional is None else optional & present
            if "frames" in h5:
                this_mode = "frames"
                ds = h5["frames"]
                if ds.ndim != 3 or ds.shape[0] != n:
                    raise InputError(f"{path}:frames", f"shape {ds.shape}",
                                     f"(N, ny, nx) with N = {n} shots")
                if ds.dtype.kind not in "fiu":
                    raise InputError(f"{path}:frames", f"dtype {ds.dtype}", "an integer or float dtype")
                if frame_shape is not None and tuple(ds.shape[1:]) != frame_shape:
                    raise InputError(f"{path}:frames", f"frames of shape {tuple(ds.shape[1:])}",
                                     f"the frame shape {frame_shape} of {files[0]}")
                frame_shape = tuple(ds.shape[1:])
                dtype = ds.dtype
            elif "curves" in h5:
                this_mode = "curves"
                if "q" not in h5:
                    raise InputError(f"{path}:q", "no such dataset", "a (nq,) q axis in 1/Å beside 'curves'")
                this_q = np.asarray(h5["q"][...], dtype=np.float64)
                ds = h5["curves"]
                if this_q.ndim != 1 or ds.ndim != 2 or ds.shape != (n, this_q.size):
                    raise InputError(f"{path}:curves", f"shape {ds.shape} with q of shape {this_q.shape}",
                                     f"(N, nq) = ({n}, {this_q.size})")
                if not np.all(np.isfinite(this_q)) or np.any(np.diff(this_q) <= 0):
                    raise InputError(f"{path}:q", "a q axis that is not finite and increasing",
                                     "finite, strictly increasing q in 1/Å")
                if q is not None and (q.shape != this_q.shape or not np.allclose(q, this_q, rtol=1e-9)):
                    raise InputError(f"{path}:q", "a q axis different from the first file's",
                                     f"the q axis of {files[0]}")
                q = this_q
                dtype = ds.dtype
            else:
                raise InputError(path, "neither 'frames' nor 'curves'",
                                 "detector data: 'frames' (N, ny, nx) or 'curves' (N, nq) with 'q'")
            if mode is not None and this_mode != mode:
                raise InputError(path, f"{this_mode} data", f"{mode} data like {files[0]}")
            mode = this_mode
            counts.append(int(n))
    return RunInfo(files=files, counts=counts, mode=mode, q=q, frame_shape=frame_shape,
                   data_dtype=np.dtype(dtype), optional=optional or set())


def read_table(info: RunInfo) -> dict:
    """Read and concatenate the per-shot table of a run.

    Returns
    -------
    dict of str -> ndarray
        Every field of :data:`SHOT_FIELDS` present in all files, each (N,):
        pulse_id int64, pump_on bool, the rest float64. Optional fields absent
        from the run are omitted.

    Raises
    ------
    InputError
        On pulse ids that are not increasing, or non-finite stage delays or
        pulse energies.
    """
    parts = {name: [] for name in SHOT_FIELDS if SHOT_FIELDS[name][0] or name in info.optional}
    for path in info.files:
        with _open(path) as h5:
            for name in parts:
                parts[name].append(h5[f"shots/{name}"][...])
    table = {}
    for name, chunks in parts.items():
        arr = np.concatenate(chunks) if chunks else np.empty(0)
        if name == "pulse_id":
            arr = arr.astype(np.int64)
        elif name == "pump_on":
            arr = arr.astype(bool)
        else:
            arr = arr.astype(np.float64)
        table[name] = arr
    pid = table["pulse_id"]
    if pid.size > 1 and np.any(np.diff(pid) <= 0):
        bad = int(np.argmax(np.diff(pid) <= 0)) + 1
        path, local = shot_file(info, bad)
        raise InputError(f"{path}:shots/pulse_id", f"pulse_id {pid[bad]} after {pid[bad - 1]} at shot {local}",
                         "strictly increasing pulse ids across the run (files in name order)")
    for name in ("stage_delay", "pulse_energy"):
        finite = np.isfinite(table[name])
        if not finite.all():
            bad = int(np.argmin(finite))
            path, local = shot_file(info, bad)
            raise InputError(f"{path}:shots/{name}", f"a non-finite value at shot {local}",
                             "finite values for every shot")
    return table


def shot_file(info: RunInfo, index: int):
    """The file holding run shot ``index`` and the shot's index within that file."""
    off = info.offsets
    i = int(np.searchsorted(off, index, side="right") - 1)
    return info.files[i], int(index - off[i])


def read_curves(info: RunInfo, start: int, stop: int) -> np.ndarray:
    """Read pre-integrated curves of shots [start, stop) as float32 (n, nq).

    Raises
    ------
    InputError
        If any value is NaN or infinite, naming file, dataset and shot.
    """
    out = np.empty((stop - start, info.q.size), dtype=np.float32)
    for path, lo, hi, g in info.locate(start, stop):
        with _open(path) as h5:
            block = h5["curves"][lo:hi]
        if block.dtype.kind == "f":
            finite = np.isfinite(block)
            if not finite.all():
                row, col = np.argwhere(~finite)[0]
                raise InputError(f"{path}:curves", f"a non-finite value {block[row, col]} at shot {lo + row}, q index {col}",
                                 "finite intensities (mask bad points before writing curves)")
        out[g - start:g - start + (hi - lo)] = block
    return out


def read_frames(info: RunInfo, start: int, stop: int) -> np.ndarray:
    """Read detector frames of shots [start, stop) in their stored dtype (n, ny, nx)."""
    out = np.empty((stop - start, *info.frame_shape), dtype=info.data_dtype)
    for path, lo, hi, g in info.locate(start, stop):
        with _open(path) as h5:
            out[g - start:g - start + (hi - lo)] = h5["frames"][lo:hi]
    return out
