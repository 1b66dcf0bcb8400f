"""Benchmark: the whole workflow at beam-time scale (wall time, peak memory, frames per second).

    python benchmarks/scaling.py [--quick] [--max-shots N] [--skip curves,frames,workers] [--dir DIR]

(a) ``curves``: curves-mode runs of 0.1, 1 and 10 million shots (200 q points)
    through ``movieproc process`` in a subprocess. Wall time and peak resident
    memory summed over the whole process tree (psutil, sampled every 0.1 s;
    Snakemake runs each stage in a child process). The fixed overhead is the
    wall time of a tiny run (5000 shots); the time exponent is the slope of
    log(time - overhead) against log(shots) over the runs whose time beyond
    the overhead exceeds its scatter (target 0.9-1.1), and the peak
    memory of the largest run is compared with 1 GB.
(b) ``frames``: a run of 4800 1-Mpixel uint16 frames (9.4 GiB on disk, >= 6 GB)
    through the whole workflow: frames per second beyond the fixed cost of a
    run (the marginal rate against a 400-frame run with the same 10 delay bins,
    the two alternating three times) and of the whole run, against the
    integration floor of ``benchmarks/integrate.py`` run in the same session
    (its 2-worker throughput; target >= 0.6), and the peak memory (target < 1.5 GB).
(c) ``workers``: integrating 2048 frames read from that run file (in the integrate
    stage's tasks) with 1 and 2 dask threads and with a 2-process dask.distributed LocalCluster
    (target >= 1.6x over 1 thread).

The synthetic runs are written here, not by the forward model: curves and
frames are drawn from a small bank of precomputed noisy ones, so that setting
up 10 million shots or 6 GB of frames takes seconds, not hours. Needs free
disk of about 9 GB per 10 million shots (run file and shots store) plus 11 GB
for the frames (``--dir``, default a temporary folder, removed at the end).
Prints ``name: value unit`` lines; ``--quick`` runs 0.01 and 0.1 million
shots and 480 frames (a smoke run).
"""

from __future__ import annotations

import argparse
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from functools import lru_cache, partial
from pathlib import Path

import h5py
import numpy as np
import psutil
import yaml

ROOT = Path(__file__).resolve().parents[1]
#: q points of the curves runs: enough for a realistic difference, little disk.
N_Q = 200
#: Shots written to the run file at once.
WRITE_BLOCK = 1 << 17
#: Noisy curves (or frames) drawn once and tiled over the run.
BANK = 64
#: Stage positions of the synthetic scan, each held for a contiguous block of shots.
POSITIONS = 40
#: Shots of the tiny run whose wall time is the fixed overhead of a workflow run.
TINY_SHOTS = 5000
#: Runs whose time beyond the fixed overhead is below this (s), or below this fraction of the
#: overhead, are left out of the exponent fit: their net time is within the overhead's scatter.
MIN_NET_S = 5.0
MIN_NET_FRACTION = 0.2
#: Frames of the small frames run whose wall time is the fixed cost of a frames run: 200 pump-on
#: shots fill the 10 delay bins of both runs with binning.min_shots = 20 each, so the two runs differ
#: in their frames only (not in the bins, fits and figures).
TINY_FRAMES = 400
#: Delay bins of both frames runs.
FRAME_BINS = 10
#: Alternating runs of the small and the large frames run; each keeps its shortest wall time.
FRAME_REPEATS = 3
#: Frames of the large frames run: 9.4 GiB of 2 MiB frames (>= 6 GB), 4400 frames beyond the small
#: run, about 2 s of work on 2 cores: well above the few tenths of a second the walls scatter by.
FRAMES = 4800
#: Frame shape of the frames run (1 Mpixel).
FRAME_SHAPE = (1024, 1024)
#: Frames integrated by part (c): a short run (512 frames in tasks of 64) measured 1.47-1.66x for the
#: LocalCluster, its per-task latency showing; 2048 frames in the stage's tasks of 256 are a run.
WORKER_FRAMES = 2048
#: Frames per HDF5 chunk of the frames run.
FRAME_CHUNK = 16
#: A timing tool of 30 fs per pixel around edge 500 px: the edges' 30 px spread is a 0.9 ps rms
#: jitter, so shots of one stage position spread over neighbouring bins (and share references).
TIMING = ["timing.use_timing_tool=true", "timing.calibration_fs=[0.0, 30.0]", "timing.edge_at_time_zero_px=500.0"]
#: Sampling period of the process-tree memory, s.
SAMPLE_S = 0.1
#: Geometry of the frames run: 60 mm, 0.1 mm pixels (as benchmarks/integrate.py).
DETECTOR = {"distance_mm": 60.0, "pixel_size_mm": 0.1, "beam_center_px": [500.3, 520.7],
            "photon_energy_kev": 12.0, "polarization_fraction": 0.99, "q_min": 0.3, "q_max": 4.0,
            "q_count": 400}


# ----------------------------------------------------------------------------- synthetic runs

def _table(a, b, rng):
    """Shot table of shots [a, b): every second shot pump-off, stage positions in contiguous blocks."""
    n = b - a
    idx = np.arange(a, b)
    return {"pulse_id": idx.astype(np.int64) + 1000, "pump_on": idx % 2 == 0,
            "pulse_energy": 1.0 + 0.05 * rng.standard_normal(n), "timing_edge": 500.0 + 30 * rng.standard_normal(n)}


def write_curves_run(path, n_shots, seed=0):
    """A curves-mode run file of ``n_shots`` shots (N_Q q points), written block by block."""
    rng = np.random.default_rng(seed)
    q = np.linspace(0.5, 4.5, N_Q)
    base = 1.0 + 2.0 * np.exp(-0.5 * q) + 0.3 * np.sin(2.5 * q) ** 2
    bank = (base * (1 + 0.01 * rng.standard_normal((BANK, N_Q)))).astype(np.float32)
    delays = np.linspace(-2.0, 50.0, POSITIONS)
    signal = (0.01 * np.sin(3 * q)[None, :] * (1 - np.exp(-np.maximum(delays, 0) / 5))[:, None]).astype(np.float32)
    with h5py.File(path, "w") as h5:
        h5.create_dataset("q", data=q)
        ds = h5.create_dataset("curves", (n_shots, N_Q), "f4", chunks=(min(8192, n_shots), N_Q))
        shots = {name: h5.create_dataset(f"shots/{name}", (n_shots,), dtype)
                 for name, dtype in (("pulse_id", "i8"), ("pump_on", "?"), ("pulse_energy", "f8"),
                                     ("timing_edge", "f8"), ("stage_delay", "f8"))}
        for a in range(0, n_shots, WRITE_BLOCK):
            b = min(a + WRITE_BLOCK, n_shots)
            t = _table(a, b, rng)
            pos = np.arange(a, b) * POSITIONS // n_shots
            t["stage_delay"] = delays[pos]
            for name, values in t.items():
                shots[name][a:b] = values
            block = bank[rng.integers(0, BANK, b - a)] * t["pulse_energy"].astype(np.float32)[:, None]
            block[t["pump_on"]] += signal[pos[t["pump_on"]]]
            ds[a:b] = block
    return path


def write_frames_run(path, n_frames, seed=0):
    """A frames-mode run file of 1-Mpixel uint16 frames, tiled from a bank of 8 Poisson-noisy frames."""
    from movieproc.detector import corrections, geometry

    rng = np.random.default_rng(seed)
    geo = geometry.Geometry(FRAME_SHAPE, DETECTOR["distance_mm"], DETECTOR["pixel_size_mm"],
                            tuple(DETECTOR["beam_center_px"]))
    q = geometry.q_map(geo, DETECTOR["photon_energy_kev"])
    mean = 200.0 * (1.0 + 2.0 * np.exp(-0.5 * q)) / corrections.combined_factor(geo, polarization_fraction=0.99)
    bank = np.stack([rng.poisson(mean).astype(np.uint16) for _ in range(8)])
    with h5py.File(path, "w") as h5:
        ds = h5.create_dataset("frames", (n_frames, *FRAME_SHAPE), "u2", chunks=(FRAME_CHUNK, *FRAME_SHAPE))
        t = _table(0, n_frames, rng)
        t["stage_delay"] = np.linspace(-2.0, 50.0, POSITIONS)[np.arange(n_frames) * POSITIONS // n_frames]
        for name, values in t.items():
            h5.create_dataset(f"shots/{name}", data=values)
        for a in range(0, n_frames, FRAME_CHUNK):
            b = min(a + FRAME_CHUNK, n_frames)
            ds[a:b] = bank[np.arange(a, b) % bank.shape[0]]
    return path


# ----------------------------------------------------------------------------- measuring

def measure(cmd, env, cwd):
    """Run ``cmd`` in ``cwd``; wall time (s), peak RSS summed over its process tree (bytes), exit status, output."""
    t0 = time.perf_counter()
    with tempfile.TemporaryFile() as log:
        proc = psutil.Popen(cmd, env=env, stdout=log, stderr=subprocess.STDOUT, cwd=cwd)
        peak = 0
        while proc.poll() is None:
            total = 0
            try:
                procs = [proc] + proc.children(recursive=True)
            except psutil.NoSuchProcess:
                procs = []
            for p in procs:
                try:
                    total += p.memory_info().rss
                except psutil.Error:
                    pass
            peak = max(peak, total)
            time.sleep(SAMPLE_S)
        wall = time.perf_counter() - t0
        log.seek(0)
        text = log.read().decode(errors="replace")
    return wall, peak, proc.returncode, text


def workflow(files, out, env, extra=(), geometry=None):
    """``movieproc process`` on ``files`` into ``out``: (wall s, peak tree RSS bytes)."""
    cmd = [sys.executable, "-c", "from movieproc.cli import main; raise SystemExit(main())", "process",
           *map(str, files), "--out", str(out), "--cores", "2"]
    if geometry:
        cmd += ["--geometry", str(geometry)]
    cmd += ["--set", "compute.progress=false", *TIMING, *extra]
    wall, peak, rc, text = measure(cmd, env, Path(out).parent)
    if rc != 0:
        raise SystemExit(f"workflow failed (exit {rc}) on {files}:\n{text[-4000:]}")
    return wall, peak


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env.setdefault("MPLBACKEND", "Agg")
    env["XDG_CACHE_HOME"] = env.get("XDG_CACHE_HOME") or tempfile.mkdtemp(prefix="movieproc-bench-cache-")
    return env


def mb(n_bytes):
    return n_bytes / 2**20


# ----------------------------------------------------------------------------- (a) curves

def curves_scaling(work, sizes, env):
    """Wall time and peak memory of curves runs; the time exponent after the fixed overhead."""
    tiny = write_curves_run(work / "tiny.h5", TINY_SHOTS)
    # twice, the shorter kept: the first run of a session also builds caches (numba's compiled
    # kernels, matplotlib's font list) that no later run pays for
    runs = []
    for _ in range(2):
        runs.append(workflow([tiny], work / "tiny_out", env))
        shutil.rmtree(work / "tiny_out")
    overhead, overhead_rss = min(runs)
    print(f"fixed_overhead_wall: {overhead:.1f} s ({TINY_SHOTS} shots)")
    print(f"fixed_overhead_peak_rss: {mb(overhead_rss):.0f} MB")
    walls = []
    for n in sizes:
        t0 = time.perf_counter()
        path = write_curves_run(work / f"curves_{n}.h5", n)
        print(f"curves_{n}_setup: {time.perf_counter() - t0:.1f} s ({path.stat().st_size / 2**30:.2f} GiB)")
        wall, peak = workflow([path], work / f"curves_{n}_out", env)
        walls.append(wall)
        print(f"curves_{n}_wall: {wall:.1f} s")
        print(f"curves_{n}_peak_rss: {mb(peak):.0f} MB")
        print(f"curves_{n}_per_shot_after_overhead: {(wall - overhead) / n * 1e6:.2f} us")
        path.unlink()
        shutil.rmtree(work / f"curves_{n}_out")
    net = np.array(walls) - overhead
    # a run whose time beyond the overhead is within the run-to-run scatter of the overhead
    # (a few s on a shared machine) says nothing about the exponent: fit the others only
    use = net > max(MIN_NET_S, MIN_NET_FRACTION * overhead)
    for i in range(len(sizes) - 1):
        (n0, t0), (n1, t1) = (sizes[i], net[i]), (sizes[i + 1], net[i + 1])
        if t0 > 0 and t1 > 0:
            print(f"time_exponent_{n0}_to_{n1}: {np.log(t1 / t0) / np.log(n1 / n0):.2f}")
    slope = np.polyfit(np.log(np.array(sizes)[use]), np.log(net[use]), 1)[0] if use.sum() > 1 else float("nan")
    print(f"time_exponent: {slope:.2f} (target 0.9-1.1; runs of {np.array(sizes)[use].tolist()} shots)")
    print(f"peak_rss_at_{sizes[-1]}_shots: {mb(peak):.0f} MB (target < 1024)")


# ----------------------------------------------------------------------------- (b) frames and (c) workers

def integrate_floor(env):
    """Integration-only throughput of 2 dask threads from benchmarks/integrate.py, frames/s."""
    out = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "integrate.py")], env=env,
                         capture_output=True, text=True, check=True, cwd=ROOT / "benchmarks").stdout
    values = dict(re.findall(r"^(\w+): ([0-9.]+)", out, re.M))
    return float(values["throughput_2_workers"]), float(values["integrate_per_frame"]), out


def _write_frames(work, name, n_frames):
    t0 = time.perf_counter()
    path = write_frames_run(work / f"{name}.h5", n_frames)
    os.sync()  # the file on disk before the timing: no write-back of it competes with the workflow
    print(f"{name}_setup: {time.perf_counter() - t0:.1f} s ({path.stat().st_size / 2**30:.2f} GiB, {n_frames} "
          f"frames {FRAME_SHAPE[0]}x{FRAME_SHAPE[1]} uint16)")
    return path


def frames_run(work, n_frames, env, repeats=FRAME_REPEATS):
    """The frames workflow end to end: frames per second against the integration floor, peak memory.

    The marginal rate leaves out the fixed cost of a run (start-up, layout, geometry check, the
    other stages, fits, figures, report): (n_frames - n_small) / (wall - wall of the small run),
    both runs with the same delay bins, so that they differ in their frames only. The two runs
    alternate ``repeats`` times and each keeps its shortest wall time: the first run of a session
    also fills numba's and matplotlib's caches, and alternating lets both see the same machine.
    """
    tiny_frames = TINY_FRAMES if n_frames >= 3 * TINY_FRAMES else n_frames // 3
    bins = max(2, min(FRAME_BINS, tiny_frames // 40))  # binning.min_shots = 20 pump-on shots per bin
    runs = {"frames_tiny": (_write_frames(work, "frames_tiny", tiny_frames), tiny_frames),
            "frames": (_write_frames(work, "frames", n_frames), n_frames)}
    geometry = work / "geometry.yaml"
    geometry.write_text(yaml.safe_dump({"detector": DETECTOR}))
    walls = {name: [] for name in runs}
    peak = 0
    for _ in range(repeats):
        for name, (path, _) in runs.items():
            wall, top = workflow([path], work / f"{name}_out", env, extra=[f"binning.count={bins}"],
                                 geometry=geometry)
            shutil.rmtree(work / f"{name}_out")
            walls[name].append(wall)
            if name == "frames":
                peak = max(peak, top)
    runs["frames_tiny"][0].unlink()
    tiny_wall, wall = min(walls["frames_tiny"]), min(walls["frames"])
    floor, per_frame, text = integrate_floor(env)
    extra = n_frames - tiny_frames
    marginal = extra / (wall - tiny_wall) if wall - tiny_wall > 0.5 else float("nan")
    pairs = sorted(extra / (b - a) for a, b in zip(walls["frames_tiny"], walls["frames"], strict=True) if b - a > 0.5)
    print(f"frames_bins: {bins} count (both runs)")
    print(f"frames_tiny_wall: {tiny_wall:.1f} s ({tiny_frames} frames: the fixed cost of a frames run; "
          f"runs {' '.join(f'{w:.1f}' for w in walls['frames_tiny'])})")
    print(f"frames_wall: {wall:.1f} s (runs {' '.join(f'{w:.1f}' for w in walls['frames'])})")
    print(f"frames_peak_rss: {mb(peak):.0f} MB (target < 1536)")
    print(f"frames_workflow_rate: {n_frames / wall:.1f} frames/s")
    print(f"frames_marginal_rate: {marginal:.1f} frames/s (beyond the fixed cost; run by run "
          f"{' '.join(f'{r:.0f}' for r in pairs)})")
    print(f"integration_floor_2_threads: {floor:.1f} frames/s (benchmarks/integrate.py, float32 frames in memory)")
    print(f"integration_floor_1_thread: {1e3 / per_frame:.1f} frames/s")
    reference = re.search(r"^cpu_parallel_reference: .*$", text, re.M)
    if reference:
        print(reference.group(0))
    print(f"marginal_ratio: {marginal / floor:.2f} (target 0.6)")
    print(f"ratio: {n_frames / wall / floor:.2f} (whole run, fixed cost included)")
    return runs["frames"][0]


@lru_cache(maxsize=1)
def _binning():
    from movieproc.detector import corrections, geometry, integration

    geo = geometry.Geometry(FRAME_SHAPE, DETECTOR["distance_mm"], DETECTOR["pixel_size_mm"],
                            tuple(DETECTOR["beam_center_px"]))
    grid = np.linspace(DETECTOR["q_min"], DETECTOR["q_max"], DETECTOR["q_count"])
    return integration.build_binning(geometry.q_map(geo, DETECTOR["photon_energy_kev"]), grid,
                                     factor=corrections.combined_factor(geo, polarization_fraction=0.99))


def _integrate_range(a, b, path):
    """Integrate frames [a, b) of the run file in blocks of FRAME_CHUNK, read as the integrate stage
    reads them (:class:`movieproc.io.runfile.FrameReader`, mapped and hashed): what a worker does."""
    from movieproc.detector import integration
    from movieproc.io import runfile, shotstore

    binning = _binning()
    info = runfile.inspect_run([Path(path)])
    with runfile.FrameReader(info, 2 * FRAME_CHUNK, shotstore.BlockDigests()) as reader:
        while a < b:
            frames = reader.read(a, min(a + 2 * FRAME_CHUNK, b))
            integration.bin_sums(frames, binning)
            a += frames.shape[0]


def workers_scaling(path, n_frames):
    """Integration of frames from the run file with 1 and 2 threads and 2 LocalCluster processes."""
    from dask.distributed import LocalCluster

    from movieproc.parallel import chunk_ranges, map_ranges

    from movieproc.stages.integrate import task_frames

    # tasks as the integrate stage cuts them for 2 workers (default compute.chunk_shots = 2000)
    ranges = chunk_ranges(n_frames, task_frames(n_frames, 2000, 2, 2 * FRAME_CHUNK))
    work = partial(_integrate_range, path=str(path))
    work(0, FRAME_CHUNK)  # compile and build the layout outside the timing

    def timed(workers, scheduler):
        t0 = time.perf_counter()
        map_ranges(work, ranges, workers, scheduler, False, "bench")
        return time.perf_counter() - t0

    one = min(timed(1, "threads") for _ in range(2))
    two = min(timed(2, "threads") for _ in range(2))
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        timed(2, cluster.scheduler_address)  # warm the workers (compile, layout)
        procs = min(timed(2, cluster.scheduler_address) for _ in range(2))
    print(f"workers_frames: {n_frames} count")
    print(f"workers_1_thread: {n_frames / one:.1f} frames/s")
    print(f"workers_2_threads: {n_frames / two:.1f} frames/s")
    print(f"workers_2_processes_localcluster: {n_frames / procs:.1f} frames/s")
    print(f"threads_2_over_1: {one / two:.2f} (target 1.6)")
    print(f"processes_2_over_1_thread: {one / procs:.2f} (target 1.6)")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="0.01 and 0.1 million shots, 480 frames")
    parser.add_argument("--max-shots", type=float, default=None, help="largest curves run, shots (e.g. 1e6)")
    parser.add_argument("--skip", default="", help="comma-separated parts to skip: curves, frames, workers")
    parser.add_argument("--dir", default=None, help="folder for the synthetic runs (default: a temporary one)")
    args = parser.parse_args()
    sizes = [10_000, 100_000] if args.quick else [100_000, 1_000_000, 10_000_000]
    if args.max_shots:
        sizes = [n for n in sizes if n <= args.max_shots] or [int(args.max_shots)]
    n_frames = 480 if args.quick else FRAMES
    skip = {s.strip() for s in args.skip.split(",") if s.strip()}
    env = _env()
    print(f"cpus_visible: {os.cpu_count()} count")
    print(f"memory_total: {psutil.virtual_memory().total / 2**30:.1f} GiB")
    work = Path(tempfile.mkdtemp(prefix="movieproc-scaling-", dir=args.dir))
    try:
        if "curves" not in skip:
            curves_scaling(work, sizes, env)
        if "frames" not in skip or "workers" not in skip:
            if "frames" not in skip:
                path = frames_run(work, n_frames, env)
            else:
                path = write_frames_run(work / "frames.h5", n_frames)
            if "workers" not in skip:
                workers_scaling(path, min(n_frames, WORKER_FRAMES))
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(f"log10_shots_sizes: {' '.join(f'{math.log10(n):.0f}' for n in sizes)}")


if __name__ == "__main__":
    main()
