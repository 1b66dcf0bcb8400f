"""Stage ``select``: which shots to keep, with counts per reason."""

from __future__ import annotations

import logging

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..parallel import chunk_ranges, map_ranges
from ..shots import selection
from ..signals.normalize import normalize
from .common import Warnings, now

log = logging.getLogger("movieproc.select")


def run(shots_path, out, config: dict):
    """Flag shots by pulse energy, timing-tool quality and outlier curves.

    Writes ``out`` (zarr) with ``keep`` (shot) bool, ``reasons`` (shot) uint8
    bit flags (see :data:`movieproc.shots.selection.REASONS`) and ``score``
    (shot), the outlier score; attrs ``counts`` per reason.
    """
    sel, diff_cfg, compute = config["selection"], config["differences"], config["compute"]
    warnings = Warnings("select", log)
    shots = shotstore.open_shots(shots_path)
    t = shots.table
    n = shots.n_shots
    flags = np.zeros(n, np.uint8)
    pe = sel["pulse_energy"]
    flags[selection.pulse_energy_flags(t["pulse_energy"], pe["min"], pe["max"], pe["min_fraction_of_median"])] |= \
        selection.REASONS["pulse_energy"]
    tim = sel["timing"]
    flags |= selection.timing_flags(t["timing_edge"], t.get("timing_amplitude"), tim["require_edge"],
                                    tim["min_amplitude"], tim["edge_range_px"])
    if tim["min_amplitude"] is not None and "timing_amplitude" not in t:
        warnings.add("selection.timing.min_amplitude is set but the run has no shots/timing_amplitude; cut not applied")
    score = np.full(n, np.nan)
    out_cfg = sel["outliers"]
    if out_cfg["enabled"]:
        pump = t["pump_on"]

        def block(start, stop):
            # pump-on and pump-off shots are scored against the median of their own kind, so
            # a strong pump signal is never mistaken for an outlier
            ok = np.flatnonzero((flags[start:stop] & selection.REASONS["pulse_energy"]) == 0)
            scores = np.full(ok.size, np.nan)
            if ok.size == 0:
                return start, ok, scores
            c = normalize(shots.curves(start, stop)[ok], shots.q, diff_cfg["normalization"], diff_cfg["norm_q_range"])
            for state in (True, False):
                same = pump[start + ok] == state
                if same.sum() >= 5:
                    scores[same] = selection.outlier_scores(c[same])
            return start, ok, scores

        for start, ok, s in map_ranges(block, chunk_ranges(n, out_cfg["window"]), compute["workers"],
                                       compute["scheduler"], compute["progress"], "select"):
            score[start + ok] = s
        flags[selection.robust_outliers(score, out_cfg["threshold"])] |= selection.REASONS["outlier"]
    counts = selection.reason_counts(flags)
    keep = flags == 0
    on = t["pump_on"]
    counts["kept_pump_on"] = int(np.sum(keep & on))
    counts["kept_pump_off"] = int(np.sum(keep & ~on))
    out_bit = (flags & selection.REASONS["outlier"]) != 0
    counts["outlier_pump_on"] = int(np.sum(out_bit & on))
    counts["outlier_pump_off"] = int(np.sum(out_bit & ~on))
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
        if counts[name] > 0.2 * n:
            warnings.add(f"{counts[name]} of {n} shots ({100 * counts[name] / n:.0f} %) dropped for '{name}'")
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"counts": counts, "reasons": selection.REASONS, "config": sel,
                                  "written": now(), "warnings": list(warnings)})
        store.write_array(g, "keep", keep, ["shot"])
        store.write_array(g, "reasons", flags, ["shot"], attrs={"bits": selection.REASONS})
        store.write_array(g, "score", score, ["shot"], units="robust rms z")
    return counts
