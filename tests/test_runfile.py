"""Tests of movieproc.io.runfile (the input contract) and of the ``ingest`` stage that copies
a run into the shots store: every bad input is a clear InputError naming the file and
dataset, and leaves no store and no temporary behind."""

import threading
import time

import numpy as np
import pytest
import xarray as xr

from conftest import leftovers, run_datasets, write_h5
from movieproc import config as C
from movieproc.errors import InputError
from movieproc.io import runfile, shotstore
from movieproc.stages import ingest


def _config(*extra):
    return C.load(overrides=["compute.progress=false", "compute.workers=1", "compute.chunk_shots=32", *extra])


# ------------------------------------------------------------------ valid runs

def test_inspect_and_read_two_files_in_name_order(tmp_path):
    a = run_datasets(n=100, seed=1)
    b = run_datasets(n=60, seed=2)
    b["shots/pulse_id"] = b["shots/pulse_id"] + 500  # later shots
    # written in the "wrong" order on purpose: shots are concatenated in file-name order
    fb = write_h5(tmp_path / "run_b.h5", b)
    fa = write_h5(tmp_path / "run_a.h5", a)
    info = runfile.inspect_run([fb, fa])
    assert [p.name for p in info.files] == ["run_a.h5", "run_b.h5"]
    assert info.counts == [100, 60] and info.n_shots == 160 and info.mode == "curves"
    np.testing.assert_array_equal(info.offsets, [0, 100, 160])
    np.testing.assert_array_equal(info.q, a["q"])
    assert "timing_amplitude" in info.optional and "photon_energy" not in info.optional
    t = runfile.read_table(info)
    np.testing.assert_array_equal(t["pulse_id"], np.r_[a["shots/pulse_id"], b["shots/pulse_id"]])
    np.testing.assert_array_equal(t["pump_on"], np.r_[a["shots/pump_on"], b["shots/pump_on"]])
    assert t["pulse_id"].dtype == np.int64 and t["pump_on"].dtype == bool and t["stage_delay"].dtype == np.float64
    assert "photon_energy" not in t
    # a read across the file boundary
    c = runfile.read_curves(info, 90, 110)
    np.testing.assert_array_equal(c, np.vstack([a["curves"][90:], b["curves"][:10]]))


def test_ingest_writes_a_labelled_shots_store(make_run, tmp_path):
    f = make_run(n=150)
    out = tmp_path / "out" / "shots.zarr"
    ingest.run({"files": [str(f)]}, out, _config())
    s = shotstore.open_shots(out)
    data = run_datasets(n=150)
    np.testing.assert_array_equal(s.curves(0, 150), data["curves"])
    np.testing.assert_array_equal(s.table["stage_delay"], data["shots/stage_delay"])
    assert s.chunk == 32 and s.n_shots == 150
    ds = xr.open_zarr(out, consolidated=False)
    assert ds["curves"].dims == ("shot", "q")
    assert ds["q"].attrs["units"] == "1/Å" and ds["stage_delay"].attrs["units"] == "ps"
    assert leftovers(tmp_path / "out") == []


# ------------------------------------------------------------------ the contract's errors

def _drop(name):
    def edit(d):
        d[name] = None
    return edit


@pytest.mark.parametrize("dataset", ["shots/pulse_id", "shots/stage_delay", "shots/pump_on",
                                     "shots/pulse_energy", "shots/timing_edge"])
def test_missing_required_dataset(make_run, dataset):
    f = make_run(edit=_drop(dataset))
    with pytest.raises(InputError) as exc:
        runfile.inspect_run(f)
    msg = str(exc.value)
    assert f"{f}:{dataset}" in msg and "no such dataset" in msg


def test_optional_dataset_may_be_missing(make_run):
    info = runfile.inspect_run(make_run(edit=_drop("shots/timing_amplitude")))
    assert "timing_amplitude" not in info.optional
    assert "timing_amplitude" not in runfile.read_table(info)


def test_datasets_of_different_lengths(make_run):
    def edit(d):
        d["shots/pulse_energy"] = d["shots/pulse_energy"][:-5]

    f = make_run(edit=edit)
    with pytest.raises(InputError, match=r"shots/pulse_energy: found length 235; expected length 240") as exc:
        runfile.inspect_run(f)
    assert str(f) in str(exc.value)


def test_curves_of_wrong_length(make_run):
    def edit(d):
        d["curves"] = d["curves"][:100]

    with pytest.raises(InputError, match=r":curves: found shape \(100, 40\).*\(240, 40\)"):
        runfile.inspect_run(make_run(edit=edit))


@pytest.mark.parametrize("edit, match", [
    (lambda d: d.update({"shots/stage_delay": d["shots/stage_delay"].astype("S8")}), r"shots/stage_delay: found dtype"),
    (lambda d: d.update({"shots/pulse_id": d["shots/pulse_id"].reshape(-1, 2)}), r"shots/pulse_id: found shape \(120, 2\)"),
    (lambda d: d.update({"q": d["q"][::-1].copy()}), r":q: found a q axis that is not finite and increasing"),
    (lambda d: d.update({"q": None}), r":q: found no such dataset"),
    (lambda d: d.update({"curves": None}), r"neither 'frames' nor 'curves'"),
])
def test_other_contract_violations(make_run, edit, match):
    with pytest.raises(InputError, match=match):
        runfile.inspect_run(make_run(edit=edit))


def test_files_that_disagree(tmp_path):
    a = write_h5(tmp_path / "a.h5", run_datasets(n=30, nq=40))
    b = write_h5(tmp_path / "b.h5", run_datasets(n=30, nq=41))
    with pytest.raises(InputError, match=r"b\.h5:q: found a q axis different from the first file's"):
        runfile.inspect_run([a, b])


def test_absent_and_non_hdf5_files(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        runfile.inspect_run(tmp_path / "absent.h5")
    p = tmp_path / "text.h5"
    p.write_text("not hdf5")
    with pytest.raises(InputError, match=r"text\.h5: found a file HDF5 cannot open"):
        runfile.inspect_run(p)
    with pytest.raises(InputError, match="run.files"):
        runfile.inspect_run([])


def test_pulse_ids_not_increasing_across_files(tmp_path):
    a = write_h5(tmp_path / "a.h5", run_datasets(n=30))
    b = write_h5(tmp_path / "b.h5", run_datasets(n=30))  # same pulse ids again
    info = runfile.inspect_run([a, b])
    with pytest.raises(InputError, match=r"b\.h5:shots/pulse_id: found pulse_id 1000 after 1029 at shot 0"):
        runfile.read_table(info)


@pytest.mark.parametrize("name", ["stage_delay", "pulse_energy"])
def test_non_finite_shot_values(make_run, name):
    def edit(d):
        d[f"shots/{name}"][37] = np.nan

    info = runfile.inspect_run(make_run(edit=edit))
    with pytest.raises(InputError, match=rf"shots/{name}: found a non-finite value at shot 37"):
        runfile.read_table(info)


# ------------------------------------------------------------------ non-finite curves through ingest

@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_curve_names_file_dataset_and_shot(tmp_path, bad):
    a = write_h5(tmp_path / "in" / "run_000.h5", run_datasets(n=100, seed=1))
    d = run_datasets(n=100, seed=2)
    d["shots/pulse_id"] = d["shots/pulse_id"] + 100
    d["curves"][71, 12] = bad  # shot 71 of the second file (run shot 171), q index 12
    b = write_h5(tmp_path / "in" / "run_001.h5", d)
    out = tmp_path / "out" / "shots.zarr"
    with pytest.raises(InputError) as exc:
        ingest.run({"files": [str(a), str(b)]}, out, _config())
    msg = str(exc.value)
    assert f"{b}:curves" in msg and "at shot 71" in msg and "q index 12" in msg and str(bad) in msg
    assert not out.exists()
    assert leftovers(tmp_path / "out") == []


def test_ingest_of_a_bad_run_keeps_the_previous_store(make_run, tmp_path):
    out = tmp_path / "out" / "shots.zarr"
    ingest.run({"files": [str(make_run("good.h5", n=90))]}, out, _config())

    def edit(d):
        d["curves"][5, 0] = np.nan

    with pytest.raises(InputError):
        ingest.run({"files": [str(make_run("bad.h5", edit=edit))]}, out, _config())
    assert shotstore.open_shots(out).n_shots == 90  # untouched
    assert leftovers(tmp_path / "out") == []


def test_failed_parallel_ingest_leaves_no_temporary(tmp_path, monkeypatch):
    d = run_datasets(n=256, nq=20)
    d["curves"][3, 0] = np.inf  # in the first of 8 chunks
    f = write_h5(tmp_path / "in" / "run.h5", d)
    read = runfile.read_curves
    bad_waiting, other_started = threading.Event(), threading.Event()

    def slow_disk(info, start, stop):
        # a slow disk: the bad chunk fails only once another chunk has started reading after it,
        # and that read takes 0.5 s, so a chunk is in flight when the error propagates
        if start == 0:
            bad_waiting.set()
            other_started.wait(5)
            return read(info, start, stop)
        if bad_waiting.is_set():
            other_started.set()
        time.sleep(0.5)
        return read(info, start, stop)

    monkeypatch.setattr(runfile, "read_curves", slow_disk)
    out = tmp_path / "out" / "shots.zarr"
    with pytest.raises(InputError, match="at shot 3"):
        ingest.run({"files": [str(f)]}, out, _config("compute.workers=2"))
    time.sleep(1.0)  # let any straggler finish
    assert not out.exists()
    assert leftovers(tmp_path / "out") == []


#: HDF5 layouts of a (n, 6, 5) frames dataset, and whether its frames are read with os.preadv
#: (or mapped) rather than through HDF5.
LAYOUTS = [
    ({}, True),                                            # contiguous: read with os.preadv
    ({"chunks": (3, 6, 5)}, True),                         # chunks of whole frames, last partial: preadv
    ({"chunks": (2, 3, 5)}, False),                        # chunks of part frames: through HDF5
    ({"chunks": (4, 6, 5), "compression": "gzip"}, False),  # compressed: through HDF5
    ({"chunks": (4, 6, 5), "shuffle": True}, False),       # a filter without compression: through HDF5
    ({"dtype": ">u2"}, False),                             # big-endian: through HDF5
]


def _frames_run(tmp_path, counts, shape, layout, name="run"):
    """Run files of random uint16 frames (one per count) in ``layout``; the paths and all frames."""
    import h5py

    rng = np.random.default_rng(5)
    layout = dict(layout)
    if "chunks" in layout:  # the layout's chunking of (n, 6, 5) frames, scaled to ``shape``
        c = layout["chunks"]
        layout["chunks"] = (c[0], shape[0] if c[1] == 6 else shape[0] // 2, shape[1] if c[2] == 5 else shape[1] // 2)
    frames = [rng.integers(0, 60000, (n, *shape), dtype=np.uint16) for n in counts]
    paths = []
    for i, block in enumerate(frames):
        base = run_datasets(n=block.shape[0], seed=i)
        base.pop("curves", None)
        base.pop("q", None)
        base["shots/pulse_id"] = base["shots/pulse_id"] + 1000 * i
        path = write_h5(tmp_path / f"{name}_{i}.h5", base)
        with h5py.File(path, "a") as h5:
            h5.create_dataset("frames", data=block, **layout)
        paths.append(path)
    return paths, np.concatenate(frames)


@pytest.mark.parametrize("layout, planned", LAYOUTS)
def test_frames_read_as_hdf5_reads_them_in_every_layout(tmp_path, layout, planned):
    # the reference is the frames written; blocks across the file boundary and into a reused buffer
    paths, whole = _frames_run(tmp_path, (11, 7), (6, 5), layout)
    info = runfile.inspect_run(paths)
    buffer = np.zeros((8, 6, 5), info.data_dtype)
    for a, b in [(0, 18), (2, 9), (9, 14), (10, 11), (17, 18)]:
        got = runfile.read_frames(info, a, b) if b - a > 8 else runfile.read_frames(info, a, b, out=buffer)
        np.testing.assert_array_equal(got, whole[a:b])
    assert (runfile._plan(paths[0]) is not None) == planned
    with pytest.raises(ValueError, match="out: expected"):
        runfile.read_frames(info, 0, 9, out=buffer)


@pytest.mark.parametrize("map_files", [True, False])
@pytest.mark.parametrize("layout, planned", LAYOUTS)
def test_frame_reader_gives_the_frames_and_hashes_the_bytes_it_reads(tmp_path, layout, planned, map_files):
    # 40 kB frames, 2.3 and 1.5 MiB of them per file: whole 1 MiB checksum blocks inside the frames
    paths, whole = _frames_run(tmp_path, (60, 37), (128, 160), layout)
    info = runfile.inspect_run(paths)
    digests = shotstore.BlockDigests()
    mapped = 0
    with runfile.FrameReader(info, 16, digests, map_files) as reader:
        for start, stop in [(0, 97), (3, 5)]:  # the whole run in order, then a block again
            a = start
            while a < stop:
                got = reader.read(a, min(a + 16, stop))
                assert 1 <= got.shape[0] <= min(16, stop - a)
                np.testing.assert_array_equal(got, whole[a:a + got.shape[0]])
                mapped += not got.flags.writeable  # mapped from the file, read-only
                a += got.shape[0]
        with pytest.raises(ValueError, match="at most 16 frames"):
            reader.read(0, 17)
    assert (mapped > 0) == (planned and map_files)
    for path in paths:
        # the checksum from the bytes read equals the one of the file read again; frames read
        # with os.preadv or mapped give most of their blocks' digests, HDF5 reads none
        assert shotstore.file_checksum(path, digests=digests.of(path)) == shotstore.file_checksum(path)
        frame_blocks = set(range(-(-int(runfile._plan(path)[0]) // shotstore.DIGEST_BLOCK),
                                 (int(runfile._plan(path)[-1]) + whole[0].nbytes) // shotstore.DIGEST_BLOCK)) \
            if planned else set()
        assert set(digests.of(path)) == frame_blocks


@pytest.mark.parametrize("map_files", [True, False])
def test_files_storing_frames_in_different_dtypes_read_as_their_common_type(tmp_path, map_files):
    # a uint16 file then an int32 one (40 kB and 80 kB frames): the run reads as int32; the first
    # file goes through HDF5, which converts, the second is mapped or read directly
    import h5py

    first, _ = _frames_run(tmp_path, (20,), (128, 160), {}, name="a")
    second, _ = _frames_run(tmp_path, (15,), (128, 160), {}, name="b")
    rng = np.random.default_rng(8)
    wide = rng.integers(-70000, 70000, (15, 128, 160), dtype=np.int32)
    with h5py.File(second[0], "a") as h5:
        del h5["frames"]
        h5.create_dataset("frames", data=wide)
    with h5py.File(first[0], "r") as h5:
        narrow = h5["frames"][...]
    info = runfile.inspect_run(first + second)
    assert info.data_dtype == np.int32
    assert not runfile.reads_directly(first[0], info.data_dtype) and runfile.reads_directly(second[0], info.data_dtype)
    whole = np.concatenate([narrow.astype(np.int32), wide])
    digests = shotstore.BlockDigests()
    got = []
    with runfile.FrameReader(info, 8, digests, map_files) as reader:
        a = 0
        while a < 35:
            block = reader.read(a, min(a + 8, 35))
            got.append(block.copy())
            a += block.shape[0]
    np.testing.assert_array_equal(np.concatenate(got), whole)
    for path in first + second:
        assert shotstore.file_checksum(path, digests=digests.of(path)) == shotstore.file_checksum(path)


def test_a_file_system_that_cannot_map_files_is_read_instead(tmp_path, monkeypatch):
    import mmap

    paths, whole = _frames_run(tmp_path, (30,), (128, 160), {})
    info = runfile.inspect_run(paths)

    def refuse(*args, **kwargs):
        raise OSError(19, "No such device")  # what mmap says on a file system without mapping

    monkeypatch.setattr(mmap, "mmap", refuse)
    digests = shotstore.BlockDigests()
    with runfile.FrameReader(info, 16, digests) as reader:
        got = reader.read(0, 16)
        assert got.flags.writeable and not reader.map_files
        np.testing.assert_array_equal(got, whole[:16])
        np.testing.assert_array_equal(reader.read(16, 30), whole[16:30])
    assert shotstore.file_checksum(paths[0], digests=digests.of(paths[0])) == shotstore.file_checksum(paths[0])


@pytest.mark.parametrize("size", [0, 1, 2**20 - 1, 2**20, 2**20 + 1, 3 * 2**20 + 12345])
def test_run_file_checksum_follows_its_published_definition(tmp_path, size):
    import hashlib

    import xxhash

    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    path = tmp_path / "run.h5"
    path.write_bytes(data)
    # the definition in docs/DESIGN.md, computed with python-xxhash directly: XXH3-128 of the
    # concatenated XXH3-128 digests of the file's consecutive 1 MiB blocks
    blocks = [data[i:i + 2**20] for i in range(0, size, 2**20)]
    expected = xxhash.xxh3_128_hexdigest(b"".join(xxhash.xxh3_128_digest(b) for b in blocks))
    assert shotstore.file_checksum(path) == f"xxh3_128_blocks:{expected}"
    # the algorithms earlier stores recorded are still computed as they were
    assert shotstore.file_checksum(path, "xxh3_128") == f"xxh3_128:{xxhash.xxh3_128_hexdigest(data)}"
    assert shotstore.file_checksum(path, "sha256") == f"sha256:{hashlib.sha256(data).hexdigest()}"
    assert shotstore.checksum_algorithm(shotstore.file_checksum(path)) == shotstore.CHECKSUM_ALGORITHM
    # digests handed in are used, not recomputed: a wrong one changes the result
    collected = shotstore.BlockDigests()
    collected.add(path, 7, memoryview(data)[7:])
    assert sorted(collected.of(path)) == list(range(1, size // 2**20))
    # read in order in pieces of any size, every whole block is hashed (and pickles without the rest)
    import pickle

    pieces = shotstore.BlockDigests()
    cuts = sorted({min(c, size) for c in (0, 5, 300_000, 2**20 + 3, 2**20 + 4, 3 * 2**20, size)})
    for a, b in zip(cuts, cuts[1:]):
        pieces.add(path, a, memoryview(data)[a:b])
    assert sorted(pickle.loads(pickle.dumps(pieces)).of(path)) == list(range(size // 2**20))
    assert shotstore.file_checksum(path, digests=pieces.of(path)) == f"xxh3_128_blocks:{expected}"
    assert shotstore.file_checksum(path, digests=collected.of(path)) == f"xxh3_128_blocks:{expected}"
    if collected.of(path):
        wrong = {**collected.of(path), 1: bytes(16)}
        assert shotstore.file_checksum(path, digests=wrong) != f"xxh3_128_blocks:{expected}"


@pytest.mark.parametrize("map_files", [True, False])
def test_a_run_file_cut_short_after_inspection_is_an_error_naming_it(tmp_path, map_files):
    import os

    paths, _ = _frames_run(tmp_path, (40,), (128, 160), {})
    info = runfile.inspect_run(paths)
    with runfile.FrameReader(info, 8, None, map_files) as reader:
        reader.read(0, 8)
        os.truncate(paths[0], paths[0].stat().st_size // 2)
        with pytest.raises(InputError, match="run_0.h5"):
            reader.read(32, 40)


def test_a_mapped_run_file_cut_short_while_in_use_stops_the_process_with_a_bus_error(tmp_path):
    # the documented limit of compute.map_frames: the process dies of SIGBUS (and faulthandler
    # names where), where read calls give an error; shown in a child process
    import signal
    import subprocess
    import sys
    import textwrap

    paths, _ = _frames_run(tmp_path, (40,), (128, 160), {})
    script = textwrap.dedent(f"""
        import faulthandler, os
        from movieproc.io import runfile
        faulthandler.enable()
        info = runfile.inspect_run([{str(paths[0])!r}])
        frames = runfile.FrameReader(info, 8).read(32, 40)
        os.truncate({str(paths[0])!r}, 4096)
        print(int(frames.sum()))
    """)
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert done.returncode == -signal.SIGBUS, done.stderr
    assert "Bus error" in done.stderr and "<module>" in done.stderr
