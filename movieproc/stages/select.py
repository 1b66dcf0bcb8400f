"""Stage ``select``: which shots to keep, with counts per reason."""

from __future__ import annotations

import logging
from functools import partial
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from .. import progress
from ..parallel import chunk_ranges, map_ranges
from ..shots import selection
from ..signals.normalize import normalize
from .keys import config_keys
from .common import Warnings, now

log = logging.getLogger("movieproc.select")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"low": "selection.pulse_energy.min", "high": "selection.pulse_energy.max",
               "min_fraction_of_median": "selection.pulse_energy.min_fraction_of_median",
               "min_amplitude": "selection.timing.min_amplitude", "edge_range": "selection.timing.edge_range_px",
               "threshold": "selection.outliers.threshold", "chunk": "selection.outliers.window",
               "mode": "differences.normalization", "q_range": "differences.norm_q_range",
               "scheduler": "compute.scheduler"}
#: A reason that drops more than this fraction of the run is worth a warning.
WARN_DROPPED_FRACTION = 0.2


def _block_scores(start, stop, shots, flags, normalization):
    """Outlier scores of shots [start, stop) not already cut for their pulse energy."""
    ok = np.flatnonzero((flags[start:stop] & selection.REASONS["pulse_energy"]) == 0)
    if ok.size == 0:
        return start, ok, np.full(0, np.nan)
    curves = normalize(shots.curves(start, stop)[ok], shots.q, normalization["normalization"],
                       normalization["norm_q_range"])
    return start, ok.astype(np.int32), selection.block_scores(curves, shots.table["pump_on"][start + ok],
                                                              shots.table["stage_delay"][start + ok])


def _flags(shots, sel, normalization, compute, warnings):
    """Reason bits (shot) uint8 and the outlier scores (shot) float32."""
    table, n = shots.table, shots.n_shots
    flags = np.zeros(n, np.uint8)
    pe, tim, outliers = sel["pulse_energy"], sel["timing"], sel["outliers"]
    cut = selection.pulse_energy_flags(table["pulse_energy"], pe["min"], pe["max"], pe["min_fraction_of_median"])
    flags[cut] |= selection.REASONS["pulse_energy"]
    del cut
    table.drop("pulse_energy")  # not needed again here: frees 8 bytes per shot
    flags |= selection.timing_flags(table["timing_edge"], table.get("timing_amplitude"), tim["require_edge"],
                                    tim["min_amplitude"], tim["edge_range_px"])
    if tim["min_amplitude"] is not None and "timing_amplitude" not in table:
        warnings.add("selection.timing.min_amplitude is set but the run has no shots/timing_amplitude; cut not applied")
    score = np.full(n, np.nan, np.float32)  # a robust z score: 7 digits are plenty
    if outliers["enabled"]:
        work = partial(_block_scores, shots=shots, flags=flags, normalization=normalization)
        ranges = chunk_ranges(n, outliers["window"])
        with progress.bar(len(ranges), "select", "chunks", compute["progress"]) as bar:  # one bar, all batches
            for batch in shotstore.batches(ranges, compute["workers"]):
                for start, ok, s in map_ranges(work, batch, compute["workers"], compute["scheduler"], bar, "select"):
                    score[start + ok] = s
        flags[selection.robust_outliers(score, outliers["threshold"])] |= selection.REASONS["outlier"]
    return flags, score


def _counts(flags, pump_on, warnings):
    """Shots dropped per reason, kept and outliers per pump state; errors when nothing can be differenced."""
    n = flags.size
    counts = selection.reason_counts(flags)
    keep, outlier = flags == 0, (flags & selection.REASONS["outlier"]) != 0
    counts.update(kept_pump_on=int(np.sum(keep & pump_on)), kept_pump_off=int(np.sum(keep & ~pump_on)),
                  outlier_pump_on=int(np.sum(outlier & pump_on)), outlier_pump_off=int(np.sum(outlier & ~pump_on)))
    log.info("kept %d of %d shots (%d pump-on, %d pump-off); dropped: %s", counts["kept"], n,
             counts["kept_pump_on"], counts["kept_pump_off"],
             ", ".join(f"{k} {v}" for k, v in counts.items() if k in selection.REASONS))
    if counts["kept"] == 0:
        raise DataError(f"every one of the {n} shots was cut ({counts}); check the selection section of the config")
    if counts["kept_pump_off"] == 0:
        raise DataError("no pump-off shot survived the selection (or shots/pump_on is never False): "
                        "differences need pump-off references")
    if counts["kept_pump_on"] == 0:
        raise DataError("no pump-on shot survived the selection: nothing to difference")
    for name in selection.REASONS:
        if counts[name] > WARN_DROPPED_FRACTION * n:
            warnings.add(f"{counts[name]} of {n} shots ({100 * counts[name] / n:.0f} %) dropped for '{name}'")
    return counts


def run(inputs: dict, out: Path, config: dict) -> None:
    """Flag shots by pulse energy, timing-tool quality and outlier curves.

    Writes ``out`` (zarr) with ``keep`` (shot) bool, ``reasons`` (shot) uint8
    bit flags (see :data:`movieproc.shots.selection.REASONS`) and ``score``
    (shot), the outlier score; attrs ``counts`` per reason.

    Parameters
    ----------
    inputs : dict
        ``shots``: the shots store.
    out : Path
        Store to write (zarr).
    config : dict
        Sections ``selection``, ``differences`` (only ``normalization`` and
        ``norm_q_range``, which the outlier scores use) and ``compute``.
    """
    sel = config["selection"]
    warnings = Warnings("select", log)
    shots = shotstore.open_shots(inputs["shots"])
    with config_keys(CONFIG_KEYS, config):
        flags, score = _flags(shots, sel, config["differences"], config["compute"], warnings)
    counts = _counts(flags, shots.table["pump_on"], warnings)
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"counts": counts, "reasons": selection.REASONS, "config": sel,
                                  "written": now(), "warnings": list(warnings)})
        store.write_array(g, "keep", flags == 0, ["shot"])
        store.write_array(g, "reasons", flags, ["shot"], attrs={"bits": selection.REASONS})
        store.write_array(g, "score", score, ["shot"], units="robust rms z")
