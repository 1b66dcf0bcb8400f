"""Stage ``bin``: delay bins of the kept pump-on shots."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..shots.binning import bin_delays, make_edges
from .keys import config_keys
from .common import Warnings, now

log = logging.getLogger("movieproc.bin")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"mode": "binning.mode", "width": "binning.width_ps", "start": "binning.start_ps",
               "stop": "binning.stop_ps", "count": "binning.count", "edges": "binning.edges_ps"}


def run(inputs: dict, out: Path, config: dict) -> None:
    """Assign kept pump-on shots to delay bins.

    Writes ``out`` (zarr): ``edges`` (edge) ps, ``index`` (shot) int32 bin of
    each shot (-1: pump-off, dropped, no delay or outside the bins),
    ``n_shots``, ``delay_mean``, ``delay_spread`` (bin).

    Parameters
    ----------
    inputs : dict
        ``shots``, ``selection``, ``delays``: the stores of those stages.
    out : Path
        Store to write (zarr).
    config : dict
        Sections ``binning`` and ``compute``.
    """
    binning = config["binning"]
    warnings = Warnings("bin", log)
    shots = shotstore.open_shots(inputs["shots"])
    keep = store.read(store.open_group(inputs["selection"], "selection"), "keep", inputs["selection"])
    use = keep & shots.table["pump_on"]
    del keep
    delay = store.read(store.open_group(inputs["delays"], "delays"), "delay", inputs["delays"])[use]
    with config_keys(CONFIG_KEYS, config):
        edges = make_edges(delay, binning["mode"], width=binning.get("width_ps"), start=binning.get("start_ps"),
                           stop=binning.get("stop_ps"), count=binning.get("count"), edges=binning.get("edges_ps"))
    bins = bin_delays(delay, edges)
    index = np.full(shots.n_shots, -1, np.int32)
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
        warnings.add(f"{bins.n_nan} kept pump-on shots have no corrected delay (no timing-tool edge) "
                     "and are not binned")
    if bins.n_outside:
        warnings.add(f"{bins.n_outside} kept pump-on shots lie outside the bin edges "
                     f"[{edges[0]:.4g}, {edges[-1]:.4g}] ps and are not binned")
    low = np.flatnonzero(bins.count < binning["min_shots"])
    if low.size:
        warnings.add(f"{low.size} of {bins.count.size} bins have fewer than binning.min_shots = "
                     f"{binning['min_shots']} pump-on shots; their differences are flagged (too_few_shots): "
                     + _list_bins(low, edges, bins.count))
    centre = 0.5 * (edges[1:] + edges[:-1])
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"config_yaml": store.yaml_text({"binning": binning}), "n_nan": bins.n_nan,
                                  "n_outside": bins.n_outside, "written": now(),
                                  "warnings": store.lines_text(warnings)})
        _write(g, edges, index, bins, centre)


#: Bins named one by one in the too-few-shots warning before it says how many more.
NAMED_BINS = 8


def _list_bins(low, edges, count) -> str:
    """``bin 3 [0.1, 0.2) ps: 4 shots; ...`` for the first NAMED_BINS bins of ``low``, then how many more."""
    named = "; ".join(f"bin {b} [{edges[b]:.4g}, {edges[b + 1]:.4g}) ps: {count[b]} shots" for b in low[:NAMED_BINS])
    return named + (f"; and {low.size - NAMED_BINS} more (see too_few_shots in the movie)"
                    if low.size > NAMED_BINS else "")


def _write(g, edges, index, bins, centre):
    """The arrays of the bins store."""
    store.write_array(g, "edges", edges, ["edge"], units=store.PS, long_name="edges of the delay bins")
    store.write_array(g, "index", index, ["shot"], units=store.DIMENSIONLESS,
                      long_name="delay bin of each shot (-1: pump-off, dropped, no delay or outside the bins)")
    store.write_array(g, "edge", np.arange(edges.size), ["edge"], units=store.DIMENSIONLESS,
                      long_name="number of the bin edge")
    store.write_array(g, "bin", np.arange(edges.size - 1), ["bin"], units=store.DIMENSIONLESS,
                      long_name="number of the delay bin")
    store.write_array(g, "n_shots", bins.count, ["bin"], units=store.DIMENSIONLESS,
                      long_name="pump-on shots in the bin")
    store.write_array(g, "delay_mean", np.where(bins.count > 0, bins.mean, centre), ["bin"], units=store.PS,
                      long_name="mean corrected delay of the bin's pump-on shots (bin centre where empty)")
    store.write_array(g, "delay_spread", bins.std, ["bin"], units=store.PS,
                      long_name="standard deviation of the corrected delays of the bin's pump-on shots")
