"""Stage ``time``: corrected delay per shot from the timing-tool calibration."""

from __future__ import annotations

import logging

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..shots.timing import corrected_delay, sign_check
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


def check_sign(shots_path, selection_path, config: dict, window_ps=1.0):
    """Which sign of the timing correction sharpens the onset, measured on the data.

    Each kept pump-on shot with a nominal delay within ``window_ps`` of time zero
    is referenced to its nearest kept pump-off shots (as in the ``difference``
    stage) and projected on the mean difference of the shots after time zero:
    a scalar that steps at time zero. Its onset width is measured with nominal
    delays and with both signs of the correction.

    Returns
    -------
    dict
        As :func:`movieproc.shots.timing.sign_check`, plus ``shots`` used.
    """
    import numpy as np

    from ..signals.differences import nearest_references
    from ..signals.normalize import normalize

    tim, dcfg = config["timing"], config["differences"]
    shots = shotstore.open_shots(shots_path)
    t = shots.table
    keep = store.read(store.open_group(selection_path, "selection"), "keep", selection_path)
    nominal = t["stage_delay"] - tim["time_zero_ps"]
    near = keep & t["pump_on"] & (np.abs(nominal) <= window_ps) & np.isfinite(t["timing_edge"])
    off = keep & ~t["pump_on"]
    refs, _ = nearest_references(t["pulse_id"], near, off, dcfg["references"])
    idx = np.flatnonzero(near)
    if idx.size < 50:
        raise DataError(f"{idx.size} kept pump-on shots within {window_ps} ps of time zero: too few to check the sign")
    rows = np.unique(np.concatenate([idx, refs.ravel()]))
    curves = normalize(shots.rows(rows), shots.q, dcfg["normalization"], dcfg["norm_q_range"])
    d = curves[np.searchsorted(rows, idx)] - curves[np.searchsorted(rows, refs)].mean(axis=1)
    after = nominal[idx] > 0.5 * window_ps
    if after.sum() < 10:
        raise DataError(f"too few shots later than {0.5 * window_ps} ps to define the signal for the sign check")
    template = d[after].mean(axis=0)
    values = d @ template / (template @ template)
    res = sign_check(t["stage_delay"][idx], t["timing_edge"][idx], values, tim["calibration_fs"],
                     tim["time_zero_ps"], tim["edge_at_time_zero_px"])
    res["shots"] = int(idx.size)
    return res
