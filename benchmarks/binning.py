"""Benchmark of the streamed binning core.

    python benchmarks/binning.py [--quick]

Bins 100,000 x 1,000 float32 per-shot curves into 50 delay bins the way the
``difference`` stage does: chunk by chunk (5,000 shots per chunk) through
:func:`movieproc.shots.binning.accumulate`, which adds each chunk into per-bin
float64 count, sum and sum of squares. The floor is one ``np.sum`` pass over the
same float32 array (a memory-bound read of every value once), measured in the
same run. Their ratio is the figure the issue sets (target 5).

Figures (one ``name: value unit`` line each): sizes, both timings, the
throughput of each, the largest relative difference of the per-bin sums from a
float64 ``np.add.at`` reference (on a slice, to keep the check cheap), and the
ratio. Minimum over repeats for both timings (the machine's cores are shared).
``--quick`` uses 20,000 shots.
"""

from __future__ import annotations

import argparse

import numpy as np

from movieproc.shots.binning import BinSums, accumulate
from clock import best

TARGET = 5.0


def streamed(index, curves, nbins, chunk):
    """Per-bin sums of ``curves`` accumulated over chunks of ``chunk`` shots."""
    sums = BinSums.zeros(nbins, curves.shape[1])
    for a in range(0, curves.shape[0], chunk):
        accumulate(index[a:a + chunk], curves[a:a + chunk], nbins, into=sums)
    return sums


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20,000 shots, for a smoke run")
    args = parser.parse_args(argv)
    n_shots, n_q, n_bins, chunk, repeats = 100_000, 1_000, 50, 5_000, 5
    if args.quick:
        n_shots, repeats = 20_000, 3
    rng = np.random.default_rng(0)
    curves = rng.standard_normal((n_shots, n_q), dtype=np.float32)
    curves += np.float32(1.0)
    index = rng.integers(-1, n_bins, n_shots)  # about 2 % of shots unbinned (-1)

    # warm up: compile (or load) the numba kernel, touch every page of the array
    accumulate(index[:10], curves[:10], n_bins)
    np.sum(curves)

    t_bin = best(lambda: streamed(index, curves, n_bins, chunk), repeats)
    t_floor = best(lambda: np.sum(curves), repeats)

    # correctness on a slice: float64 np.add.at reference
    m = min(n_shots, 5_000)
    got = streamed(index[:m], curves[:m], n_bins, 1_000)
    ok = index[:m] >= 0
    ref = np.zeros((n_bins, n_q))
    np.add.at(ref, index[:m][ok], curves[:m][ok].astype(np.float64))
    err = float(np.max(np.abs(got.sum - ref)) / np.max(np.abs(ref)))

    gbytes = curves.nbytes / 1e9
    ratio = t_bin / t_floor
    print(f"shots: {n_shots} count")
    print(f"q_points: {n_q} count")
    print(f"bins: {n_bins} count")
    print(f"chunk: {chunk} shots")
    print(f"streamed_binning: {t_bin * 1e3:.1f} ms")
    print(f"np_sum_floor: {t_floor * 1e3:.1f} ms")
    print(f"binning_throughput: {gbytes / t_bin:.2f} GB/s")
    print(f"floor_throughput: {gbytes / t_floor:.2f} GB/s")
    print(f"sum_vs_add_at_max_relative_difference: {err:.1e} 1")
    print(f"ratio: {ratio:.2f} (target {TARGET:g})")


if __name__ == "__main__":
    main()
