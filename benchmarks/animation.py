"""Benchmark of the movie's animated GIF.

    python benchmarks/animation.py [--quick]

Writes the GIF of a synthetic movie (42 delays x 200 q points, a 10-atom structure
per delay: the demo's sizes) with :func:`movieproc.render.figures.animation`, which
draws the static parts once and only the changing artists per frame (blitting).
Two comparisons, measured in the same run:

- the floor: one full draw of the same figure (``canvas.draw``) times one; the
  animation's ratio to it is the figure followed (target 10: the frames cost
  a few full draws, not one full draw each);
- a reference: the same frames through matplotlib's ``FuncAnimation`` with
  ``PillowWriter``, re-drawing the whole figure (and its layout) per frame and
  re-creating the error band, the way the GIF was made before.

``--quick`` uses 12 delays.
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from clock import best  # noqa: E402
from movieproc.render import figures  # noqa: E402

TARGET = 10.0


def movie(n_delay, n_q=200, n_atom=10, seed=0):
    rng = np.random.default_rng(seed)
    q = np.linspace(0.5, 5.0, n_q)
    delay = np.geomspace(0.05, 100, n_delay)
    shape = np.sin(2.8 * q)[None, :] * np.exp(-delay / 30)[:, None]
    data = shape + 0.05 * rng.standard_normal((n_delay, n_q))
    err = np.full_like(data, 0.05)
    positions = rng.normal(0, 2, (1, n_atom, 3)) + 0.01 * rng.standard_normal((n_delay, n_atom, 3))
    elements = ["Ir", "Ir"] + ["C"] * (n_atom - 2)
    value = 2.8 + 0.1 * np.exp(-delay / 30)
    label = {"Ir-Ir": (value, value - 0.01, value + 0.01, "Å")}
    return q, delay, data, err, shape, positions, elements, label


def reference(path, q, delay, data, err, model, fps=4, dpi=80):
    """The earlier way: FuncAnimation without blitting, the band re-created each frame."""
    from matplotlib.animation import FuncAnimation, PillowWriter

    fig, axes = plt.subplots(1, 2, figsize=(7.5, 3.3), layout="constrained", gridspec_kw={"width_ratios": [3, 2]})
    ax = axes[0]
    band = [ax.fill_between(q, 0 * q, 0 * q, alpha=0.3)]
    (line,) = ax.plot(q, 0 * q)
    (fit,) = ax.plot(q, 0 * q)
    text = ax.text(0.02, 0.95, "", transform=ax.transAxes)

    def draw(i):
        band[0].remove()
        band[0] = ax.fill_between(q, data[i] - err[i], data[i] + err[i], alpha=0.3)
        line.set_ydata(data[i])
        fit.set_ydata(model[i])
        text.set_text(f"{delay[i]:.3g} ps")
        return ()

    anim = FuncAnimation(fig, draw, frames=len(delay), blit=False)
    anim.save(str(path), writer=PillowWriter(fps=fps), dpi=dpi)
    plt.close(fig)


def one_draw(q, data):
    fig, axes = plt.subplots(1, 2, figsize=(7.5, 3.3), layout="constrained")
    axes[0].plot(q, data[0])
    fig.set_dpi(80)
    fig.canvas.draw()
    plt.close(fig)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="12 delays, for a smoke run")
    args = parser.parse_args(argv)
    n_delay, repeats = (12, 1) if args.quick else (42, 2)
    q, delay, data, err, model, positions, elements, label = movie(n_delay)
    with tempfile.TemporaryDirectory() as tmp:
        gif, old = Path(tmp) / "movie.gif", Path(tmp) / "old.gif"
        t_new = best(lambda: figures.animation(gif, q, delay, data, err, model, positions, elements, label,
                                               q_weighted=False, units="u"), repeats)
        t_old = best(lambda: reference(old, q, delay, data, err, model), repeats)
        t_floor = best(lambda: one_draw(q, data), repeats + 1)
        size_new, size_old = os.path.getsize(gif), os.path.getsize(old)
    print(f"frames: {n_delay} count")
    print(f"animation_blitted: {t_new:.2f} s")
    print(f"animation_funcanimation_reference: {t_old:.2f} s")
    print(f"one_full_draw_floor: {t_floor:.3f} s")
    print(f"gif_size_blitted: {size_new / 1e3:.0f} kB")
    print(f"gif_size_reference: {size_old / 1e3:.0f} kB")
    print(f"speedup_vs_reference: {t_old / t_new:.1f} x")
    print(f"ratio: {t_new / t_floor:.2f} (target {TARGET:g})")


if __name__ == "__main__":
    main()
