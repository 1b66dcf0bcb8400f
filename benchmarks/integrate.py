"""Benchmark: batched integration of 1024 x 1024 float32 frames against the np.sum floor.

Per-frame time of :func:`movieproc.detector.integration.bin_sums` (500 q
points, solid-angle and polarization factors folded in, pixels split between
neighbouring q points) as a ratio to summing the same frames with np.sum in
the same run; and the throughput of 2 dask thread workers over 1.

    python benchmarks/integrate.py [--quick]

Prints ``name: value unit`` lines and ends with ``ratio: X (target 2.5)``.
Timings are the best of several interleaved repeats, since other processes
may share the CPUs.
"""

from __future__ import annotations

import argparse
import os
import time

import numba
import numpy as np

from movieproc.detector import anisotropy, corrections, geometry, integration
from movieproc.parallel import chunk_ranges, map_ranges
from clock import best as best_of


@numba.njit(nogil=True)
def _spin(n):  # pragma: no cover - compiled
    x = 0.0
    for i in range(n):
        x += np.sqrt(i)
    return x


def parallel_reference(work=100_000_000):
    """Speed-up of 2 threads over 1 on a pure compute loop: what the machine offers right now."""
    import threading

    _spin(10)
    t_one = best_of(lambda: (_spin(work), _spin(work)), 1)

    def two():
        threads = [threading.Thread(target=_spin, args=(work,)) for _ in range(2)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()

    return t_one / best_of(two, 1)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer frames and repeats (smoke run)")
    args = parser.parse_args()
    n_frames = 32 if args.quick else 96
    repeats = 3 if args.quick else 5
    shape = (1024, 1024)

    geo = geometry.Geometry(shape, 60.0, 0.1, (500.3, 520.7))
    factor = corrections.combined_factor(geo, polarization_fraction=0.99)
    q0 = geometry.q_map(geo, 12.0)
    grid = np.linspace(0.3, 5.0, 500)
    t0 = time.perf_counter()
    binning = integration.build_binning(q0, grid, factor=factor)
    build = time.perf_counter() - t0
    rng = np.random.default_rng(0)
    frames = rng.gamma(4.0, 25.0, (n_frames, *shape)).astype(np.float32)
    integration.bin_sums(frames[: integration.LANES], binning)  # compile outside the timing

    def floor():
        for f in frames:
            f.sum()

    def kernel():
        integration.bin_sums(frames, binning)

    t_sum = t_kernel = np.inf
    for _ in range(repeats):  # interleaved, so both see the same machine load
        t_sum = min(t_sum, best_of(floor, 1))
        t_kernel = min(t_kernel, best_of(kernel, 1))
    per_sum, per_kernel = t_sum / n_frames, t_kernel / n_frames

    saturating = integration.build_binning(q0, grid, factor=factor, saturation_level=1e6)
    integration.bin_sums(frames[:1], saturating)
    per_sat = best_of(lambda: integration.bin_sums(frames, saturating), repeats) / n_frames
    tt, phi = geometry.scattering_angles(geo)
    p2 = integration.build_binning(q0, grid, factor=factor, regressors=[anisotropy.p2_regressor(tt, phi, 0.0)])
    integration.bin_sums(frames[:1], p2)
    per_p2 = best_of(lambda: integration.bin_sums(frames, p2), repeats) / n_frames

    half = n_frames // 2
    ranges = chunk_ranges(n_frames, half)

    def work(a, b):
        integration.bin_sums(frames[a:b], binning)

    t_one = t_two = np.inf
    for _ in range(repeats):
        t_one = min(t_one, best_of(lambda: map_ranges(work, ranges, 1, "threads", False, "bench"), 1))
        t_two = min(t_two, best_of(lambda: map_ranges(work, ranges, 2, "threads", False, "bench"), 1))

    reference = parallel_reference()
    print(f"frames: {n_frames} count")
    print(f"frame_shape: {shape[0]}x{shape[1]} pixels")
    print(f"q_points: {grid.size} count")
    print(f"cpus_visible: {os.cpu_count()} count")
    print(f"layout_build: {build:.3f} s")
    print(f"np_sum_per_frame: {per_sum * 1e3:.3f} ms")
    print(f"integrate_per_frame: {per_kernel * 1e3:.3f} ms")
    print(f"integrate_with_saturation_check_per_frame: {per_sat * 1e3:.3f} ms")
    print(f"integrate_with_p2_channel_per_frame: {per_p2 * 1e3:.3f} ms")
    print(f"throughput_1_worker: {n_frames / t_one:.1f} frames/s")
    print(f"throughput_2_workers: {n_frames / t_two:.1f} frames/s")
    print(f"cpu_parallel_reference: {reference:.2f} (2 threads over 1 on a pure compute loop)")
    print(f"workers_2_over_1: {t_one / t_two:.2f} (target 1.6)")
    print(f"ratio: {per_kernel / per_sum:.2f} (target 2.5)")


if __name__ == "__main__":
    main()
