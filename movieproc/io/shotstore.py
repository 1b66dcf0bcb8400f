"""The per-shot store (``shots.zarr``): curves and the shot table of a run.

Written once by the ``ingest`` stage (pre-integrated curves) or the
``integrate`` stage (detector frames); read by every later stage. Layout:

=================  ============  ==========  =====================================
array              dims          dtype       meaning
=================  ============  ==========  =====================================
q                  (q)           float64     momentum transfer, 1/Å
curves             (shot, q)     float32     isotropic I(q) per shot, detector units
pulse_id ...       (shot)        per field   the shot table (see io.runfile)
=================  ============  ==========  =====================================

Frames-mode stores may hold more: ``curves_p2`` (shot, q), the P2 part after
polarized excitation; ``curves_sectors`` (shot, sector, q) with the ``sector``
centre azimuths (deg); ``curves_var`` (shot, q), the variance of each shot's
mean intensity per q point; ``pixel_count`` (q). Group attrs hold the run files, their checksums and the
settings that produced the store.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from . import store
from .runfile import SHOT_FIELDS


#: Chunks per worker handed to the scheduler at once when streaming: enough to keep every
#: worker busy, few enough that the chunks' results in flight stay small whatever the run length.
CHUNKS_PER_WORKER = 4


def batches(ranges, workers):
    """Consecutive groups of ``CHUNKS_PER_WORKER * workers`` chunk ranges.

    A stage that maps chunks and reduces their results takes one group at a
    time, so only one group's results are held at once.

    Parameters
    ----------
    ranges : list of (int, int)
        Chunk ranges (:func:`movieproc.parallel.chunk_ranges`).
    workers : int
        Workers of the scheduler.

    Returns
    -------
    list of list of (int, int)
    """
    size = CHUNKS_PER_WORKER * max(1, int(workers))
    return [ranges[a:a + size] for a in range(0, len(ranges), size)]


#: Checksum of run files: XXH3 (128 bit), a non-cryptographic hash that runs at memory speed (~7 GB/s
#: here, against ~0.65 GB/s for SHA-256, which cost as much CPU as integrating the frames), applied as
#: a block list: the XXH3-128 of the concatenated 16-byte XXH3-128 digests of the file's consecutive
#: DIGEST_BLOCK-byte blocks (the last one may be shorter; an empty file has no blocks). Blocks hash
#: independently, so the integrate stage hashes the frames from the bytes it has just read for the
#: integration (:class:`BlockDigests`) and reads only the rest of the file again. It detects changed or
#: swapped run files; it is not a defence against deliberate tampering. Stores written before record
#: ``xxh3_128`` (the whole file in one XXH3-128) or ``sha256``; those are still recomputed as recorded.
CHECKSUM_ALGORITHM = "xxh3_128_blocks"
#: Bytes per block of :data:`CHECKSUM_ALGORITHM`.
DIGEST_BLOCK = 1 << 20
#: Bytes read at once while hashing.
HASH_BLOCK = 1 << 24


def _hasher(algorithm: str):
    if algorithm == "xxh3_128":
        import xxhash

        return xxhash.xxh3_128()
    try:
        return hashlib.new(algorithm)
    except ValueError:
        raise ValueError(f"unknown checksum algorithm {algorithm!r}: expected {CHECKSUM_ALGORITHM}, "
                         "xxh3_128 or a name hashlib knows") from None


class BlockDigests:
    """Digests of whole :data:`DIGEST_BLOCK` blocks of files, gathered from bytes read for another purpose.

    ``add(path, offset, data)`` hashes every block that ``data`` (the bytes of ``path`` from
    ``offset``) holds whole, and carries a block cut at the end of ``data`` over to the next call
    that starts where it ended, so reading a file in order in pieces of any size hashes all its
    blocks but the last. :func:`file_checksum` with ``digests=collected.of(path)`` then reads only
    the blocks no one added. Instances are small (16 bytes per MiB of file) and pickle without the
    block in progress, so a worker process can return its digests with its results; :meth:`update`
    merges them.
    """

    block = DIGEST_BLOCK

    def __init__(self):
        self.digests: dict[str, dict[int, bytes]] = {}
        self._pending: dict[str, tuple] = {}  # path -> (block index, next offset, XXH3 state)

    def __getstate__(self):
        return {"digests": self.digests, "_pending": {}}

    def add(self, path, offset: int, data) -> None:
        import xxhash

        key, view = str(path), memoryview(data).cast("B")
        seen = self.digests.setdefault(key, {})
        pos, end, i = int(offset), int(offset) + view.nbytes, 0
        pending = self._pending.pop(key, None)
        if pending is not None and pending[1] == pos:  # the rest of the block the last call cut
            k, _, state = pending
            take = min(end, (k + 1) * DIGEST_BLOCK) - pos
            state.update(view[:take])
            pos, i = pos + take, take
            if pos < (k + 1) * DIGEST_BLOCK:
                self._pending[key] = (k, pos, state)
                return
            seen[k] = state.digest()
        first = -(-pos // DIGEST_BLOCK) * DIGEST_BLOCK  # the next block starting inside data
        if first >= end:
            return
        i, pos = i + first - pos, first
        while pos + DIGEST_BLOCK <= end:
            seen[pos // DIGEST_BLOCK] = xxhash.xxh3_128_digest(view[i:i + DIGEST_BLOCK])
            pos, i = pos + DIGEST_BLOCK, i + DIGEST_BLOCK
        if pos < end:
            state = xxhash.xxh3_128()
            state.update(view[i:])
            self._pending[key] = (pos // DIGEST_BLOCK, end, state)

    def update(self, other: "BlockDigests") -> None:
        for path, blocks in other.digests.items():
            self.digests.setdefault(path, {}).update(blocks)

    def of(self, path) -> dict[int, bytes]:
        return self.digests.get(str(path), {})


def _block_list_checksum(path, known: Mapping[int, bytes]) -> str:
    import xxhash

    size = Path(path).stat().st_size
    n_blocks = -(-size // DIGEST_BLOCK)
    digests = [known.get(k) for k in range(n_blocks)]
    buf = bytearray(HASH_BLOCK)
    view = memoryview(buf)
    per_read = HASH_BLOCK // DIGEST_BLOCK
    with open(path, "rb", buffering=0) as fh:
        k = 0
        while k < n_blocks:
            if digests[k] is not None:
                k += 1
                continue
            stop = k + 1  # a run of missing blocks, read at once
            while stop < n_blocks and stop - k < per_read and digests[stop] is None:
                stop += 1
            want = min((stop - k) * DIGEST_BLOCK, size - k * DIGEST_BLOCK)
            got = 0
            while got < want and (n := os.preadv(fh.fileno(), [view[got:want]], k * DIGEST_BLOCK + got)) > 0:
                got += n
            if got < want:
                raise OSError(f"{path} became shorter while it was hashed")
            for j in range(k, stop):
                a = (j - k) * DIGEST_BLOCK
                digests[j] = xxhash.xxh3_128_digest(view[a:min(a + DIGEST_BLOCK, want)])
            k = stop
    return xxhash.xxh3_128_hexdigest(b"".join(d for d in digests if d is not None))  # all set by now


def file_checksum(path, algorithm: str = CHECKSUM_ALGORITHM, digests: Mapping[int, bytes] | None = None) -> str:
    """``'ALGORITHM:hexdigest'`` of a whole file.

    ``algorithm`` is ``'xxh3_128_blocks'`` (default, see :data:`CHECKSUM_ALGORITHM`), ``'xxh3_128'``
    (the whole file in one XXH3-128) or any name of :func:`hashlib.new` (e.g. ``'sha256'``).
    ``digests`` (block index -> digest, from :class:`BlockDigests`) are block digests already
    computed from the file's bytes; only the other blocks are read.
    """
    if algorithm == CHECKSUM_ALGORITHM:
        return f"{algorithm}:{_block_list_checksum(path, digests or {})}"
    h = _hasher(algorithm)
    buf = bytearray(HASH_BLOCK)
    view = memoryview(buf)
    with open(path, "rb", buffering=0) as fh:
        while n := fh.readinto(buf):
            h.update(view[:n])
    return f"{algorithm}:{h.hexdigest()}"


def checksum_algorithm(digest: str) -> str:
    """The algorithm named by a recorded ``'ALGORITHM:hexdigest'`` (stores written before the block
    list say xxh3_128 or sha256); :data:`CHECKSUM_ALGORITHM` for anything else."""
    name, sep, _ = str(digest).partition(":")
    return name if sep and name else CHECKSUM_ALGORITHM


def create(path, q, table, chunk_shots, curve_arrays=None, attrs=None):
    """Create a shots store with its table written and empty curve arrays.

    Parameters
    ----------
    path : path
        Store to create (normally a temporary path inside ``store.atomic_path``).
    q : ndarray (nq,)
        q axis, 1/Å.
    table : dict of str -> ndarray (N,)
        The shot table.
    chunk_shots : int
        Shots per chunk of the curve arrays.
    curve_arrays : dict of str -> str, optional
        Names and units of per-shot curve arrays to create (default
        ``{"curves": "detector units"}``).
    attrs : dict, optional
        Group attributes (provenance).

    Returns
    -------
    zarr.Group
    """
    curve_arrays = curve_arrays or {"curves": "detector units"}
    n = len(table["pulse_id"])
    group = store.new_group(path, attrs)
    store.write_array(group, "q", np.asarray(q, dtype=np.float64), ["q"], units="1/Å")
    for name, values in table.items():
        units = SHOT_FIELDS.get(name, (None, None))[1]
        store.write_array(group, name, values, ["shot"], units=units,
                          chunks=(max(1, min(n, 1 << 20)),))
    for name, units in curve_arrays.items():
        store.create_array(group, name, (n, len(q)), ["shot", "q"], "float32",
                           chunks=(max(1, min(chunk_shots, n)), len(q)), units=units)
    return group


class ShotTable(Mapping):
    """The shot table of a store, read one field at a time on first use.

    A stage that needs two fields of a 10-million-shot run reads those two
    (80 MB each as int64/float64), not all eight. Behaves as a read-only dict
    of str -> ndarray (N,).

    Parameters
    ----------
    group : zarr.Group
        The shots store.
    names : list of str
        Fields present in the store.
    """

    def __init__(self, group, names):
        self._group = group
        self._names = list(names)
        self._cache: dict = {}

    def __getitem__(self, name):
        if name not in self._names:
            raise KeyError(name)
        if name not in self._cache:
            self._cache[name] = self._group[name][...]
        return self._cache[name]

    def __iter__(self):
        return iter(self._names)

    def __len__(self):
        return len(self._names)

    @property
    def n_shots(self) -> int:
        """Shots in the run, from the stored shape (reads no data)."""
        return int(self._group["pulse_id"].shape[0])

    def drop(self, name):
        """Forget a field read earlier (it is read again on the next use)."""
        self._cache.pop(name, None)


@dataclass
class ShotStore:
    """Read access to a shots store.

    Attributes
    ----------
    path : Path
    group : zarr.Group
    q : ndarray (nq,) float64, 1/Å
    table : ShotTable
        The shot table, str -> ndarray (N,), fields read on first use.
    chunk : int
        Shots per stored chunk: the natural unit of streaming.
    """

    path: Path
    group: Any
    q: np.ndarray
    table: ShotTable
    chunk: int

    @property
    def n_shots(self) -> int:
        return self.table.n_shots

    def curves(self, start: int, stop: int, name: str = "curves") -> np.ndarray:
        """Per-shot curves of shots [start, stop), float32 (n, nq)."""
        return self.group[name][start:stop]

    def rows(self, index, name: str = "curves") -> np.ndarray:
        """Per-shot curves of the shots ``index`` (increasing ints), float32 (len(index), nq).

        Reads only the chunks holding those shots, not the whole range between them.
        """
        return self.group[name].get_orthogonal_selection((np.asarray(index, dtype=np.int64), slice(None)))

    def has(self, name: str) -> bool:
        return name in self.group


def open_shots(path) -> ShotStore:
    """Open a shots store written by ``ingest`` or ``integrate``."""
    path = Path(path)
    group = store.open_group(path, "shots store")
    q = store.read(group, "q", path)
    table = ShotTable(group, [name for name in SHOT_FIELDS if name in group])
    if "curves" not in group:
        from ..errors import InputError

        raise InputError(f"{path}:curves", "no such array", "per-shot curves (shot, q)")
    chunk = int(group["curves"].chunks[0])
    return ShotStore(path=path, group=group, q=q, table=table, chunk=chunk)
