"""Benchmark of the Debye histogram path.

    python benchmarks/debye.py [--quick]

Figures (one ``name: value unit`` line each):

- per-frame time of the histogram path (distance histograms with linear sharing and
  the product with a sinc table computed once per q grid, as in a trajectory) for
  2,000 atoms and 400 q points, and scipy.spatial.distance.pdist on the same
  coordinates (the pair-distance floor); their ratio is the figure the issue sets
  (target <= 4);
- wall time for 1,000 frames of a 200-atom trajectory on 2 dask workers;
- speed-up of the histogram path (single structure, sinc table included) over the
  exact pair sum at 2,000 atoms.

Minimum over repeats for the short timings (the machine's cores are shared).
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.spatial.distance import pdist

from movieproc.scattering import debye as D
from movieproc.scattering import model
from clock import best

TARGET = 4.0


def cluster(n_atoms, rng):
    """A liquid-density droplet (0.1 atoms/Å^3) of an Ir/Cl/C/O/H mixture, Å."""
    radius = (3 * n_atoms / (4 * np.pi * 0.1)) ** (1 / 3)
    pts = rng.normal(size=(n_atoms, 3))
    pts *= (radius * rng.uniform(size=n_atoms) ** (1 / 3) / np.linalg.norm(pts, axis=1))[:, None]
    elements = list(rng.choice(["Ir", "Cl", "C", "O", "H"], n_atoms, p=[0.02, 0.04, 0.3, 0.3, 0.34]))
    return elements, pts


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    args = parser.parse_args(argv)
    rng = np.random.default_rng(0)
    n_atoms, n_frames, n_traj_atoms, repeats = (2000, 1000, 200, 7)
    if args.quick:  # same structure sizes (the ratio depends on them), fewer frames and repeats
        n_frames, repeats = 100, 3
    q = np.linspace(0.1, 8.0, 400)
    elements, pos = cluster(n_atoms, rng)
    r_max = D.default_r_max(pos, 0.01)

    # warm up: compile the kernel, load BLAS
    D.distance_histograms(pos[:50], elements[:50], r_max=r_max)
    pdist(pos)

    hist = D.distance_histograms(pos, elements, r_max=r_max)
    _, table = D.effective_form_factors(q, list(hist.elements))
    sinc = D.sinc_table(q, hist.r)
    t_table = best(lambda: D.sinc_table(q, hist.r), 3)

    def per_frame():
        h = D.distance_histograms(pos, elements, r_max=r_max)
        return D.debye_from_histograms(q, h, table, sinc=sinc)

    t_hist = best(per_frame, repeats)
    t_pdist = best(lambda: pdist(pos), repeats)

    t_single = best(lambda: D.debye_histogram(q, pos, elements), 3)
    t0 = time.perf_counter()
    exact = D.debye(q, pos, elements)
    t_exact = time.perf_counter() - t0
    s_hist = per_frame()
    accuracy = np.abs(s_hist - exact).max() / np.abs(exact).max()

    tel, tpos = cluster(n_traj_atoms, rng)
    traj = tpos[None] + rng.normal(scale=0.05, size=(n_frames, n_traj_atoms, 3))
    model.trajectory_curves(q, traj[:4], tel, workers=2)  # warm up threads
    t0 = time.perf_counter()
    model.trajectory_curves(q, traj, tel, workers=2)
    t_traj = time.perf_counter() - t0

    ratio = t_hist / t_pdist
    print(f"atoms: {n_atoms} count")
    print(f"q_points: {q.size} count")
    print(f"histogram_path_per_frame: {t_hist * 1e3:.2f} ms")
    print(f"pdist_floor: {t_pdist * 1e3:.2f} ms")
    print(f"sinc_table_once: {t_table * 1e3:.2f} ms")
    print(f"exact_path: {t_exact * 1e3:.0f} ms")
    print(f"histogram_path_single_structure: {t_single * 1e3:.2f} ms")
    print(f"speedup_histogram_over_exact: {t_exact / t_single:.1f} x")
    print(f"histogram_vs_exact_max_error: {accuracy:.1e} of max S")
    print(f"trajectory_{n_frames}_frames_{n_traj_atoms}_atoms_2_workers: {t_traj:.2f} s")
    print(f"ratio: {ratio:.2f} (target {TARGET:g})")


if __name__ == "__main__":
    main()
