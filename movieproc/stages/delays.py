"""Stage ``time``: corrected delay per shot from the timing-tool calibration."""

from __future__ import annotations

import logging

import numpy as np

from ..io import shotstore, store
from ..shots.timing import corrected_delay
from .common import Warnings, now

log = logging.getLogger("movieproc.time")


def run(shots_path, out, config: dict):
    """Write ``out`` (zarr) with ``delay`` (shot), the corrected delay in ps.

    NaN where the timing tool is in use and found no edge for that shot.
    """
    tim = config["timing"]
    warnings = Warnings("time", log)
    shots = shotstore.open_shots(shots_path)
    t = shots.table
    delay = corrected_delay(t["stage_delay"], t["timing_edge"], tim["calibration_fs"], tim["time_zero_ps"],
                            tim["sign"], tim["edge_at_time_zero_px"], tim["use_timing_tool"])
    nominal = t["stage_delay"] - tim["time_zero_ps"]
    corr = delay - nominal
    finite = np.isfinite(corr)
    rms = float(np.std(corr[finite]) * 1000) if finite.any() else float("nan")
    log.info("corrected delays: %d shots, %d without a timing correction; correction rms %.1f fs",
             delay.size, int((~finite).sum()), rms)
    if tim["use_timing_tool"] and finite.any() and rms > 1000:
        warnings.add(f"timing-tool correction has an rms of {rms:.0f} fs: check timing.calibration_fs and the edge units")
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"timing": tim, "correction_rms_fs": rms, "written": now(),
                                  "warnings": list(warnings),
                                  "convention": "delay = stage_delay - time_zero + sign * (P(edge) - P(edge0)) / 1000; "
                                                "positive delay: probe after pump"})
        store.write_array(g, "delay", delay, ["shot"], units="ps")
        store.write_array(g, "correction", corr * 1000, ["shot"], units="fs")
