"""Stage ``bin``: delay bins of the kept pump-on shots."""

from __future__ import annotations

import logging

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..shots.binning import bin_delays, make_edges
from .common import Warnings, now

log = logging.getLogger("movieproc.bin")


def run(shots_path, selection_path, delays_path, out, config: dict):
    """Assign kept pump-on shots to delay bins.

    Writes ``out`` (zarr): ``edges`` (edge) ps, ``index`` (shot) int64 bin of
    each shot (-1: pump-off, dropped, no delay or outside the bins),
    ``n_shots``, ``delay_mean``, ``delay_spread`` (bin).
    """
    binning = config["binning"]
    warnings = Warnings("bin", log)
    shots = shotstore.open_shots(shots_path)
    keep = store.read(store.open_group(selection_path, "selection"), "keep", selection_path)
    delay = store.read(store.open_group(delays_path, "delays"), "delay", delays_path)
    use = keep & shots.table["pump_on"]
    d = np.where(use, delay, np.nan)
    edges = make_edges(d[use], binning)
    bins = bin_delays(d[use], edges)
    index = np.full(shots.n_shots, -1, np.int64)
    index[np.flatnonzero(use)] = bins.index
    if np.all(bins.count == 0):
        raise DataError(f"no kept pump-on shot falls inside the bins {edges[0]:.4g}..{edges[-1]:.4g} ps; "
                        "check binning and timing in the config")
    log.info("%d bins from %.4g to %.4g ps; %d pump-on shots binned, %d without a delay, %d outside the bins",
             edges.size - 1, edges[0], edges[-1], int(bins.count.sum()), bins.n_nan, bins.n_outside)
    if binning["mode"] == "population" and edges.size - 1 < binning["count"]:
        warnings.add(f"{edges.size - 1} equal-population bins instead of binning.count = {binning['count']}: "
                     "many shots share the same delays (nominal stage positions?)")
    if bins.n_nan:
        warnings.add(f"{bins.n_nan} kept pump-on shots have no corrected delay (no timing-tool edge) and are not binned")
    if bins.n_outside:
        warnings.add(f"{bins.n_outside} kept pump-on shots lie outside the bin edges "
                     f"[{edges[0]:.4g}, {edges[-1]:.4g}] ps and are not binned")
    low = np.flatnonzero(bins.count < binning["min_shots"])
    for b in low:
        warnings.add(f"bin {b} [{edges[b]:.4g}, {edges[b + 1]:.4g}) ps has {bins.count[b]} pump-on shots "
                     f"(< binning.min_shots = {binning['min_shots']}); its difference is flagged")
    centre = 0.5 * (edges[1:] + edges[:-1])
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"binning": binning, "n_nan": bins.n_nan, "n_outside": bins.n_outside,
                                  "written": now(), "warnings": list(warnings)})
        store.write_array(g, "edges", edges, ["edge"], units="ps")
        store.write_array(g, "index", index, ["shot"])
        store.write_array(g, "n_shots", bins.count, ["bin"])
        store.write_array(g, "delay_mean", np.where(bins.count > 0, bins.mean, centre), ["bin"], units="ps")
        store.write_array(g, "delay_spread", bins.std, ["bin"], units="ps")
