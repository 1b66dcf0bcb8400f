"""Stage ``render``: figures of the movie as PNG files."""

from __future__ import annotations

import logging
from pathlib import Path

from ..io import store
from ..render import figures

log = logging.getLogger("movieproc.render")


def run(movie_path, out_dir, config: dict):
    """Write ``difference_map.png`` and ``difference_curves.png`` into ``out_dir``."""
    rcfg = config["render"]
    m = store.open_group(movie_path, "movie")
    q, delay = store.read(m, "q"), store.read(m, "delay")
    diff, err = store.read(m, "diff"), store.read(m, "diff_err")
    units = m["diff"].attrs.get("units", "")
    name = config["run"]["name"]
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    fig = figures.difference_map(q, delay, diff, q_weighted=rcfg["q_weighted"], low_count=store.read(m, "low_count"),
                                 title=f"{name}: difference map", units=units)
    figures.save(fig, out / "difference_map.png", rcfg["dpi"])
    written.append(out / "difference_map.png")
    model = m["model"][...] if "model" in m else None
    fig = figures.difference_curves(q, delay, diff, err, rcfg["delays_ps"], rcfg["q_weighted"], model=model,
                                    title=f"{name}: difference curves (band ±1 s.e.)", units=units)
    figures.save(fig, out / "difference_curves.png", rcfg["dpi"])
    written.append(out / "difference_curves.png")
    log.info("figures: %s", ", ".join(str(p) for p in written))
    return written
