"""Reading and validating run files (HDF5) against the input contract.

A run is one or more HDF5 files; shots are concatenated in file-name order.
Per-shot datasets live under ``shots/`` and share one length N per file. The
detector data are either ``frames`` (N, ny, nx) or pre-integrated ``curves``
(N, nq) with their ``q`` axis (nq,). See docs/DESIGN.md section 4.
"""

from __future__ import annotations

import functools
import os
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
        dtype of curves or frames (native; the common type of the files' when they differ).
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
    def curve_q(self) -> np.ndarray:
        """The q axis (nq,) of a curves-mode run, 1/Å.

        Raises
        ------
        InputError
            If the run holds frames, not curves.
        """
        if self.q is None:
            raise InputError(self.files[0], "detector frames", "pre-integrated curves with their q axis")
        return self.q

    @property
    def frames_shape(self) -> tuple:
        """(ny, nx) of a frames-mode run.

        Raises
        ------
        InputError
            If the run holds curves, not frames.
        """
        if self.frame_shape is None:
            raise InputError(self.files[0], "pre-integrated curves", "detector frames (N, ny, nx)")
        return tuple(self.frame_shape)

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


#: What h5py and numpy raise on a damaged or unexpected HDF5 file (truncated, flipped bytes, a group
#: where a dataset belongs, a string dtype...); every one is reported as an InputError naming the file.
_H5_ERRORS = (OSError, KeyError, RuntimeError, ValueError, TypeError, AttributeError, IndexError)


def _open(path: Path):
    if not path.exists():
        raise InputError(path, "no such file", "an HDF5 run file")
    if path.is_dir():
        raise InputError(path, "a folder", "an HDF5 run file")
    try:
        return h5py.File(path, "r")
    except _H5_ERRORS as exc:
        raise InputError(path, f"a file HDF5 cannot open ({_short(exc)})", "an HDF5 run file") from None


def _short(exc: Exception) -> str:
    """An exception as one short line."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


def _dataset(h5, key: str, path: Path):
    """``h5[key]`` if it is a dataset, else None when absent; an InputError when it is something else."""
    if key not in h5:
        return None
    ds = h5[key]
    if not isinstance(ds, h5py.Dataset):
        raise InputError(f"{path}:{key}", f"a {type(ds).__name__}", f"a dataset '{key}'")
    return ds


@dataclass
class _FileInfo:
    """What one run file holds (see :class:`RunInfo`)."""

    n: int
    present: set
    mode: str
    q: np.ndarray | None
    frame_shape: tuple | None
    dtype: np.dtype


def _shot_fields(h5, path: Path):
    """Check the per-shot datasets of one file; return (N, names present)."""
    n, present = None, set()
    for name, (required, _units, kinds) in SHOT_FIELDS.items():
        key = f"shots/{name}"
        ds = _dataset(h5, key, path)
        if ds is None:
            if required:
                raise InputError(f"{path}:{key}", "no such dataset", f"a per-shot dataset '{key}' of shape (N,)")
            continue
        if ds.ndim != 1:
            raise InputError(f"{path}:{key}", f"shape {ds.shape}", "a 1-D per-shot dataset of shape (N,)")
        if ds.dtype.kind not in kinds:
            raise InputError(f"{path}:{key}", f"dtype {ds.dtype}", f"a numeric dtype of kind {kinds!r}")
        if n is None:
            n = ds.shape[0]
        elif ds.shape[0] != n:
            raise InputError(f"{path}:{key}", f"length {ds.shape[0]}", f"length {n}, the same as shots/pulse_id")
        present.add(name)
    assert n is not None  # shots/pulse_id is required, so its length was read
    return int(n), present


def _frames(ds, path: Path, n: int):
    if ds.ndim != 3 or ds.shape[0] != n:
        raise InputError(f"{path}:frames", f"shape {ds.shape}", f"(N, ny, nx) with N = {n} shots")
    if ds.dtype.kind not in "fiu":
        raise InputError(f"{path}:frames", f"dtype {ds.dtype}", "an integer or float dtype")
    return tuple(ds.shape[1:])


def _curves(h5, ds, path: Path, n: int):
    qds = _dataset(h5, "q", path)
    if qds is None:
        raise InputError(f"{path}:q", "no such dataset", "a (nq,) q axis in 1/Å beside 'curves'")
    if qds.dtype.kind not in "fiu":
        raise InputError(f"{path}:q", f"dtype {qds.dtype}", "a numeric (nq,) q axis in 1/Å")
    if ds.dtype.kind not in "fiu":
        raise InputError(f"{path}:curves", f"dtype {ds.dtype}", "an integer or float dtype")
    q = np.asarray(qds[...], dtype=np.float64)
    if q.ndim != 1 or ds.ndim != 2 or ds.shape != (n, q.size):
        raise InputError(f"{path}:curves", f"shape {ds.shape} with q of shape {q.shape}", f"(N, nq) = ({n}, {q.size})")
    if q.size < 2 or not np.all(np.isfinite(q)) or np.any(np.diff(q) <= 0):
        raise InputError(f"{path}:q", "a q axis that is not finite and increasing",
                         "finite, strictly increasing q in 1/Å (at least two points)")
    return q


def _inspect_file(path: Path) -> _FileInfo:
    with _open(path) as h5:
        try:
            n, present = _shot_fields(h5, path)
            frames, curves = _dataset(h5, "frames", path), _dataset(h5, "curves", path)
            if frames is not None:
                return _FileInfo(n, present, "frames", None, _frames(frames, path, n), frames.dtype)
            if curves is not None:
                return _FileInfo(n, present, "curves", _curves(h5, curves, path, n), None, curves.dtype)
        except _H5_ERRORS as exc:
            raise InputError(path, f"a damaged or unreadable HDF5 file ({_short(exc)})",
                             "an intact run file (input contract, docs/DESIGN.md section 4)") from None
    raise InputError(path, "neither 'frames' nor 'curves'",
                     "detector data: 'frames' (N, ny, nx) or 'curves' (N, nq) with 'q'")


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
        dtype, unequal lengths, files that disagree on the detector data,
        a damaged file, or a run of 0 shots.
    """
    if isinstance(paths, (str, Path)):
        paths = [paths]
    files = sorted((Path(p) for p in paths), key=lambda p: p.name)
    if not files:
        raise InputError("run.files", "an empty list", "at least one HDF5 run file")
    parts = [_inspect_file(path) for path in files]
    first = parts[0]
    for path, part in zip(files[1:], parts[1:], strict=True):
        if part.mode != first.mode:
            raise InputError(path, f"{part.mode} data", f"{first.mode} data like {files[0]}")
        if part.mode == "frames" and part.frame_shape != first.frame_shape:
            raise InputError(f"{path}:frames", f"frames of shape {part.frame_shape}",
                             f"the frame shape {first.frame_shape} of {files[0]}")
        if part.q is not None and first.q is not None and (
                part.q.shape != first.q.shape or not np.allclose(first.q, part.q, rtol=1e-9)):
            raise InputError(f"{path}:q", "a q axis different from the first file's", f"the q axis of {files[0]}")
    counts = [p.n for p in parts]
    if sum(counts) == 0:
        where = files[0] if len(files) == 1 else f"{files[0]} (and {len(files) - 1} more file(s))"
        raise InputError(f"{where}:shots/pulse_id", "0 shots", "a run with at least one shot")
    optional = set.intersection(*(p.present for p in parts))
    return RunInfo(files=files, counts=counts, mode=first.mode, q=first.q, frame_shape=first.frame_shape,
                   data_dtype=np.result_type(*(np.dtype(p.dtype) for p in parts)), optional=optional)


def read_table(info: RunInfo, check: bool = True) -> dict:
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
        With ``check`` (the default): on pulse ids that are not increasing, or
        non-finite stage delays or pulse energies.
    """
    parts: dict[str, list] = {name: [] for name in SHOT_FIELDS if SHOT_FIELDS[name][0] or name in info.optional}
    for path in info.files:
        with _open(path) as h5:
            for name in parts:
                parts[name].append(_read(h5, f"shots/{name}", path, ()))
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
    if check:
        _check_table(info, table)
    return table


def _check_table(info: RunInfo, table: dict):
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


def _read(h5, key: str, path: Path, index):
    """``h5[key][index]``; a read error of a damaged file is an InputError naming file and dataset."""
    try:
        return h5[key][index]
    except _H5_ERRORS as exc:
        raise InputError(f"{path}:{key}", f"data that cannot be read ({_short(exc)})",
                         "an intact run file (copy it again from the source)") from None


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
    out = np.empty((stop - start, info.curve_q.size), dtype=np.float32)
    for path, lo, hi, g in info.locate(start, stop):
        with _open(path) as h5:
            block = _read(h5, "curves", path, slice(lo, hi))
        if block.dtype.kind == "f":
            finite = np.isfinite(block)
            if not finite.all():
                row, col = np.argwhere(~finite)[0]
                raise InputError(f"{path}:curves",
                                 f"a non-finite value {block[row, col]} at shot {lo + row}, q index {col}",
                                 "finite intensities (mask bad points before writing curves)")
        out[g - start:g - start + (hi - lo)] = block
    return out


def read_curves_raw(info: RunInfo, start: int, stop: int) -> np.ndarray:
    """Read curves of shots [start, stop) as float32 (n, nq) without checking their values."""
    out = np.empty((stop - start, info.curve_q.size), dtype=np.float32)
    for path, lo, hi, g in info.locate(start, stop):
        with _open(path) as h5:
            out[g - start:g - start + (hi - lo)] = _read(h5, "curves", path, slice(lo, hi))
    return out


@functools.lru_cache(maxsize=64)
def _frame_offsets(path: Path, stat_key: tuple, dtype: str | None = None) -> np.ndarray | None:
    """File offset (bytes) of every frame of an uncompressed, native-endian ``frames`` dataset whose
    frames each lie whole in one place (contiguous layout, or chunks of whole frames); None otherwise.

    Reading those bytes with ``os.preadv`` gives the values HDF5 would return, without HDF5's
    library-wide lock, so threads read frames in parallel. ``stat_key`` (size, mtime, inode) makes
    a changed file planned again. With ``dtype``, frames stored in another dtype are not planned
    (HDF5 converts them to the run's dtype when it reads them).
    """
    with _open(path) as h5:
        ds = h5["frames"]
        if ds.id.get_create_plist().get_nfilters() > 0:  # compression, shuffle, checksums...
            return None
        if not ds.dtype.isnative or ds.ndim != 3 or ds.shape[0] == 0 or ds.external:
            return None
        if dtype is not None and ds.dtype != np.dtype(dtype):
            return None
        frame_bytes = int(np.prod(ds.shape[1:])) * ds.dtype.itemsize
        n = ds.shape[0]
        if ds.chunks is None:
            base = ds.id.get_offset()
            return None if base is None else base + np.arange(n, dtype=np.int64) * frame_bytes
        if tuple(ds.chunks[1:]) != tuple(ds.shape[1:]):
            return None
        per = ds.chunks[0]
        offsets = np.empty(n, np.int64)
        for first in range(0, n, per):
            info = ds.id.get_chunk_info_by_coord((first, 0, 0))
            if info.byte_offset is None or info.filter_mask != 0 or info.size != per * frame_bytes:
                return None  # a chunk never written (fill value) or stored differently
            count = min(per, n - first)
            offsets[first:first + count] = info.byte_offset + np.arange(count, dtype=np.int64) * frame_bytes
        return offsets


def _plan(path: Path, dtype=None) -> np.ndarray | None:
    st = path.stat()
    try:
        key = (st.st_size, st.st_mtime_ns, st.st_ino)
        return _frame_offsets(path, key, None if dtype is None else np.dtype(dtype).str)
    except _H5_ERRORS:
        return None  # read through HDF5, which reports the problem with the file


def _read_planned(path: Path, offsets: np.ndarray, dest: np.ndarray, digests=None) -> None:
    """Read frames at ``offsets`` into ``dest`` (C-contiguous, (len(offsets), ny, nx)), joining adjacent ones.

    With ``digests``, each joined run is read in pieces that end on multiples of ``digests.block`` in
    the file, and every piece is handed to ``digests.add`` straight after it is read.
    """
    frame_bytes = dest[0].nbytes
    raw = memoryview(dest.reshape(-1).view(np.uint8).data)
    breaks = np.flatnonzero(np.diff(offsets) != frame_bytes) + 1
    with open(path, "rb", buffering=0) as fh:
        for a, b in zip(np.r_[0, breaks], np.r_[breaks, offsets.size], strict=True):
            base, stop = int(offsets[a]), int(offsets[a]) + (b - a) * frame_bytes
            cut = base
            while cut < stop:
                end = stop if digests is None else min(stop, (cut // digests.block + 1) * digests.block)
                piece = raw[a * frame_bytes + cut - base:a * frame_bytes + end - base]
                done = 0
                while done < piece.nbytes:
                    got = os.preadv(fh.fileno(), [piece[done:]], cut + done)
                    if got <= 0:
                        raise InputError(f"{path}:frames", "a file shorter than its frames dataset says",
                                         "an intact run file (copy it again from the source)")
                    done += got
                if digests is not None:
                    digests.add(path, cut, piece)
                cut = end


def reads_directly(path, dtype) -> bool:
    """Whether :func:`read_frames` reads this file's frames with ``os.preadv`` or maps them
    (uncompressed, stored whole, in the run's ``dtype``), so that their bytes can be hashed as they are read."""
    return _plan(Path(path), dtype) is not None


def read_frames(info: RunInfo, start: int, stop: int, out: np.ndarray | None = None, digests=None) -> np.ndarray:
    """Read detector frames of shots [start, stop) in their stored dtype (n, ny, nx).

    Uncompressed frames stored whole (contiguous, or chunked by whole frames) are read with
    ``os.preadv`` straight into the destination: no copy, and no HDF5 lock, so dask threads read
    in parallel; other layouts (compressed, partial-frame chunks) go through HDF5's ``read_direct``.
    ``out`` (C-contiguous, the stored dtype, at least ``stop - start`` frames) lets a caller reuse
    one buffer for every block; the returned array is its first ``stop - start`` frames.
    ``digests`` (a :class:`movieproc.io.shotstore.BlockDigests`) is handed the bytes of frames read
    with ``os.preadv``, piece by piece while they are in the CPU's cache, for the run file's checksum.
    """
    n = stop - start
    if out is None:
        out = np.empty((n, *info.frames_shape), dtype=info.data_dtype)
    elif out.dtype != info.data_dtype or out.shape[1:] != tuple(info.frames_shape) or out.shape[0] < n \
            or not out.flags.c_contiguous:
        raise ValueError(f"out: expected a C-contiguous {info.data_dtype} array of at least "
                         f"({n}, {', '.join(map(str, info.frames_shape))}), found {out.dtype} {out.shape}")
    for path, lo, hi, g in info.locate(start, stop):
        dest = out[g - start:g - start + (hi - lo)]
        offsets = _plan(Path(path), info.data_dtype)
        if offsets is not None:
            _read_planned(Path(path), offsets[lo:hi], dest, digests)
            continue
        with _open(path) as h5:
            try:
                h5["frames"].read_direct(out, np.s_[lo:hi], np.s_[g - start:g - start + (hi - lo)])
            except _H5_ERRORS as exc:
                raise InputError(f"{path}:frames", f"data that cannot be read ({_short(exc)})",
                                 "an intact run file (copy it again from the source)") from None
    return out[:n]


class FrameReader:
    """Blocks of frames, one after another, for one task of a stage; each block is valid until the next.

    Frames stored whole and uncompressed in one run of bytes of one file are mapped from the file
    (``mmap``) and handed to the caller as a read-only array: the integration reads the page cache
    directly, with no copy (a copy costs about half as much as integrating the frame). Other blocks
    are read with :func:`read_frames` into a buffer reused for every block. With ``digests`` (a
    :class:`movieproc.io.shotstore.BlockDigests`) the bytes of every mapped or directly read block
    are hashed for the run file's checksum, a mapped block when the next one is asked for (after
    the caller has used it, while it is still in the CPU's cache).

    A mapped file that is truncated or becomes unreadable (a network file system failing) while a
    block is in use stops the process with a bus error (SIGBUS) instead of an error message:
    ``map_files=False`` reads every block with read calls, which report such faults as errors.
    """

    def __init__(self, info: RunInfo, block: int, digests=None, map_files: bool = True):
        self.info, self.block, self.digests, self.map_files = info, int(block), digests, bool(map_files)
        self._buffer: np.ndarray | None = None
        self._held: tuple | None = None  # (path, file offset, bytes) of the mapped block handed out last

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self) -> None:
        """Hash the block handed out last (when mapped) and drop this reader's reference to it."""
        held, self._held = self._held, None
        if held is not None and self.digests is not None:
            path, offset, region = held
            self.digests.add(path, offset, region)

    def read(self, start: int, stop: int) -> np.ndarray:
        """Frames of shots from ``start`` (n, ny, nx) in their stored dtype: those of [start, stop)
        (at most ``block`` frames), or fewer, from ``start`` on, when they lie apart in the file or
        in two files (mapped blocks stop there; ask again from ``start + n``)."""
        self.close()
        if stop - start > self.block:
            raise ValueError(f"at most {self.block} frames at once, asked for {stop - start}")
        mapped = self._map(start, stop) if self.map_files else None
        if mapped is not None:
            return mapped
        if self._buffer is None:
            self._buffer = np.empty((min(self.block, self.info.n_shots), *self.info.frames_shape),
                                    dtype=self.info.data_dtype)
        return read_frames(self.info, start, stop, out=self._buffer, digests=self.digests)

    def _map(self, start: int, stop: int) -> np.ndarray | None:
        import mmap

        parts = list(self.info.locate(start, stop))
        if not parts:
            return None
        path, lo, hi, _ = parts[0]  # the frames in the file of the first: up to its end
        offsets = _plan(Path(path), self.info.data_dtype)
        if offsets is None:
            return None
        frame_bytes = int(np.prod(self.info.frames_shape)) * self.info.data_dtype.itemsize
        first = int(offsets[lo])
        apart = np.flatnonzero(np.diff(offsets[lo:hi]) != frame_bytes)
        if apart.size:  # frames in chunks apart: up to the end of the first run of adjacent ones
            hi = lo + int(apart[0]) + 1
        size = (hi - lo) * frame_bytes
        page = first // mmap.ALLOCATIONGRANULARITY * mmap.ALLOCATIONGRANULARITY
        with open(path, "rb", buffering=0) as fh:
            if os.fstat(fh.fileno()).st_size < first + size:
                raise InputError(f"{path}:frames", "a file shorter than its frames dataset says",
                                 "an intact run file (copy it again from the source)")
            try:
                region = mmap.mmap(fh.fileno(), first - page + size, access=mmap.ACCESS_READ, offset=page)
            except (OSError, ValueError):  # a file system that cannot map files (some FUSE mounts)
                self.map_files = False
                return None
        if hasattr(region, "madvise"):
            region.madvise(mmap.MADV_WILLNEED)  # the whole block read ahead at once when it is not cached
        frames = np.frombuffer(region, dtype=self.info.data_dtype, count=size // self.info.data_dtype.itemsize,
                               offset=first - page).reshape(hi - lo, *self.info.frames_shape)
        self._held = (path, first, memoryview(region)[first - page:])
        return frames
