"""Benchmark of the Poisson bootstrap over shots against one pass of the difference reduction.

    python benchmarks/bootstrap.py [--quick]

A synthetic stage scan: 40,000 shots of 600 q points (float32), every fourth
shot pump-off, 50 contiguous stage positions with a timing jitter of 1.5 bin
widths, 50 delay bins, k = 2 references per pump-on shot, 50 replicates,
chunks of 2,000 pump-on shots (the default ``compute.chunk_shots``).

* Floor: one pass of the reduction the way the ``difference`` stage runs it,
  chunk by chunk: gather the chunk's pump-on and reference rows, normalize
  (:func:`movieproc.signals.normalize.normalize`), reference each pump-on shot
  to the mean of its k references and add the differences, pump-on and
  reference curves into per-bin sums (:func:`movieproc.shots.binning.accumulate`).
  Reading the shots store is left out (the same for both).
* New bootstrap: :func:`movieproc.signals.covariance.bootstrap_chunk` on every
  chunk's normalized curves (as the stage has them after the floor's
  normalization), the running sums and
  :func:`~movieproc.signals.covariance.bootstrap_replicates`; plus, separately,
  drawing the weights.
* Old bootstrap, for comparison: the stage's loop over replicates that
  re-averages each shot's references with an einsum and re-accumulates, timed
  for a few replicates and extrapolated linearly to all of them.

Figures (``name: value unit``), with checks: the largest difference of a
unit-weight replicate from the reduction's own bin difference (relative to the
median bin error), and the mean ratio of the bootstrap's neighbour-bin
correlation to the analytic one. ``ratio`` is the new bootstrap's time over the
floor's. BLAS is held to one thread (like the numba reduction) unless
``OPENBLAS_NUM_THREADS`` is set. ``--quick``: 10,000 shots, 10 replicates.
"""

from __future__ import annotations

import argparse
import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy loads BLAS
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from clock import best  # noqa: E402
from movieproc.shots.binning import BinSums, accumulate, accumulate_weighted, assign_bins  # noqa: E402
from movieproc.signals import covariance as C  # noqa: E402
from movieproc.signals.differences import bin_errors, nearest_references, shared_reference_factor  # noqa: E402
from movieproc.signals.normalize import normalize  # noqa: E402

TARGET = 3.0
NORM_RANGE = (3.5, 4.5)  # 1/Å, normalization window of the synthetic curves


def scan(n_shots, n_q, n_bins, positions, rng):
    """Synthetic raw curves (n_shots, n_q) float32, pulse ids, pump-off mask and bin of every shot."""
    q = np.linspace(0.5, 5.0, n_q)
    pid = 10_000 + np.arange(n_shots)
    off = np.arange(n_shots) % 4 == 3
    position = np.minimum(np.arange(n_shots) * positions // n_shots, positions - 1)
    delay = (position + 0.5) * n_bins / positions + 1.5 * rng.standard_normal(n_shots)  # bin widths
    index = assign_bins(delay, np.arange(n_bins + 1.0))
    index[off] = -1
    base = 100.0 * (1.0 + np.exp(-((q - 2.0) / 0.5) ** 2))
    scale = rng.uniform(0.8, 1.2, (n_shots, 1))  # shot-to-shot intensity
    curves = (scale * base * (1.0 + 0.01 * rng.standard_normal((n_shots, n_q)))).astype(np.float32)
    return q, curves, pid, off, index


def chunks(on_idx, refs, size):
    """(start, stop, rows) of each chunk of pump-on shots; rows: the run indices it reads."""
    out = []
    for a in range(0, on_idx.size, size):
        b = min(a + size, on_idx.size)
        out.append((a, b, np.unique(np.concatenate([on_idx[a:b], refs[a:b].ravel()]))))
    return out


def reduction(curves, q, on_idx, on_bin, refs, parts, nb, keep=None):
    """One pass of the stage's reduction; returns the difference sums (and keeps normalized chunks)."""
    total = [BinSums.zeros(nb, q.size) for _ in range(3)]
    for a, b, rows in parts:
        norm = normalize(curves[rows], q, "window", NORM_RANGE)
        c_on = norm[np.searchsorted(rows, on_idx[a:b])]
        c_ref = norm[np.searchsorted(rows, refs[a:b])].mean(axis=1, dtype=np.float64)
        accumulate(on_bin[a:b], c_on - c_ref, nb, into=total[0])
        accumulate(on_bin[a:b], c_on, nb, into=total[1])
        accumulate(on_bin[a:b], c_ref, nb, into=total[2])
        if keep is not None:
            keep.append(norm)
    return total[0]


def new_bootstrap(weights, on_idx, on_bin, refs, parts, norms, nb, nq):
    """Bootstrap replicates from the chunks' normalized curves."""
    sums = C.BootstrapSums.zeros(weights.shape[0], nb, nq)
    for (a, b, rows), norm in zip(parts, norms, strict=True):
        sums.add(C.bootstrap_chunk(weights, on_idx[a:b], on_bin[a:b], refs[a:b], rows, norm))
    return C.bootstrap_replicates(sums)


def old_bootstrap(weights, on_idx, on_bin, refs, parts, norms, nb, nq):
    """The stage's per-replicate loop (einsum re-averaging of references, weighted re-accumulation)."""
    n_boot, k = weights.shape[0], refs.shape[1]
    w_sum, sums = np.zeros((n_boot, nb)), np.zeros((n_boot, nb, nq))
    for (a, b, rows), norm in zip(parts, norms, strict=True):
        idx, r = on_idx[a:b], refs[a:b]
        pos_ref = np.searchsorted(rows, r)
        c_on = norm[np.searchsorted(rows, idx)]
        for rep in range(n_boot):
            w_ref = weights[rep][r].astype(np.float64)
            w_tot = w_ref.sum(axis=1)
            w_ref = np.where(w_tot[:, None] > 0, w_ref / np.maximum(w_tot, 1)[:, None], 1.0 / k)
            ref_rep = np.einsum("nk,nkq->nq", w_ref, norm[pos_ref], dtype=np.float64)
            accumulate_weighted(on_bin[a:b], weights[rep][idx], c_on - ref_rep, nb, into=(w_sum[rep], sums[rep]))
    return sums / w_sum[:, :, None]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="10,000 shots and 10 replicates, for a smoke run")
    args = parser.parse_args(argv)
    n_shots, n_q, nb, positions, k, n_boot, chunk, repeats, old_reps = 40_000, 600, 50, 50, 2, 50, 2_000, 5, 3
    if args.quick:
        n_shots, n_boot, repeats, old_reps = 10_000, 10, 2, 2
    rng = np.random.default_rng(0)
    q, curves, pid, off, index = scan(n_shots, n_q, nb, positions, rng)
    on = index >= 0
    refs, _ = nearest_references(pid, on, off, k)
    on_idx = np.flatnonzero(on)
    on_bin = index[on_idx]
    parts = chunks(on_idx, refs, chunk)

    norms: list[np.ndarray] = []
    dsum = reduction(curves, q, on_idx, on_bin, refs, parts, nb, keep=norms)  # warm-up (numba), keeps chunks
    t_floor = best(lambda: reduction(curves, q, on_idx, on_bin, refs, parts, nb), repeats)
    weights = C.ReplicateWeights(1, n_boot, n_shots)

    def drawn_afresh(fn):
        """Time ``fn`` with the weight blocks drawn anew (as in a run), not taken from the cache."""
        def call():
            C._weight_block.cache_clear()
            return fn()
        return call

    t_weights = best(drawn_afresh(weights.array), repeats)
    # the stage's bootstrap draws the weight blocks on demand: their drawing is part of its time
    t_new = best(drawn_afresh(lambda: new_bootstrap(weights, on_idx, on_bin, refs, parts, norms, nb, n_q)), repeats)
    few = weights.array()[:old_reps]
    t_old = best(lambda: old_bootstrap(few, on_idx, on_bin, refs, parts, norms, nb, n_q), 1) * n_boot / old_reps

    # checks: unit weights give the reduction's difference; replicate correlation vs analytic
    diff = dsum.mean()
    err = bin_errors(dsum.variance(), dsum.count, k, shared_reference_factor(on_bin, refs, nb))
    unit = new_bootstrap(np.ones((1, n_shots), np.uint8), on_idx, on_bin, refs, parts, norms, nb, n_q)[0]
    unit_dev = float(np.nanmax(np.abs(unit - diff)) / np.nanmedian(err))
    reps = new_bootstrap(weights, on_idx, on_bin, refs, parts, norms, nb, n_q)
    R = C.bin_correlation(C.bin_coefficient_overlap(on_bin, refs, nb))
    nbr_ratio = float(np.nanmean(np.diag(C.replicate_correlation(reps), 1) / np.diag(R, 1)))

    print(f"shots: {n_shots} count")
    print(f"pump_on_binned: {on_idx.size} count")
    print(f"q_points: {n_q} count")
    print(f"bins: {nb} count")
    print(f"references: {k} count")
    print(f"replicates: {n_boot} count")
    print(f"chunk: {chunk} shots")
    print(f"blas_threads: {os.environ.get('OPENBLAS_NUM_THREADS')} count")
    print(f"reduction_floor: {t_floor * 1e3:.1f} ms")
    print(f"bootstrap_weights: {t_weights * 1e3:.1f} ms")
    print(f"bootstrap_new: {t_new * 1e3:.1f} ms")
    print(f"bootstrap_new_per_replicate: {t_new / n_boot * 1e3:.2f} ms")
    print(f"bootstrap_old_extrapolated: {t_old * 1e3:.1f} ms")
    print(f"old_over_new: {t_old / t_new:.1f} 1")
    print(f"unit_weight_max_deviation: {unit_dev:.1e} median bin errors")
    print(f"neighbour_correlation_bootstrap_over_analytic: {nbr_ratio:.3f} 1")
    print(f"ratio: {t_new / t_floor:.2f} (target {TARGET:g})")


if __name__ == "__main__":
    main()
