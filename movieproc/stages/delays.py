"""Stage ``time``: corrected delay per shot from the timing-tool calibration."""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np

from ..errors import DataError
from ..io import shotstore, store
from ..shots.timing import FS_PER_PS, corrected_delay, projected_signal, sign_check
from ..signals.differences import nearest_references
from ..signals.normalize import normalize
from .keys import config_keys
from .common import Warnings, now

log = logging.getLogger("movieproc.time")

#: Core parameters set from the config, and their config keys.
CONFIG_KEYS = {"sign": "timing.sign", "calibration_fs": "timing.calibration_fs",
               "mode": "differences.normalization", "q_range": "differences.norm_q_range"}
#: Shots whose corrected delays are computed at once (bounds the float64 temporaries).
BLOCK_SHOTS = 1 << 20
#: A timing-tool correction spread above this (fs rms) is far beyond any set-up's jitter
#: (tens to a few hundred fs): most likely a wrong calibration or edge unit.
SUSPECT_CORRECTION_RMS_FS = 1000.0
#: Fewest pump-on shots near time zero for the sign check's onset fit to be worth reading.
MIN_SIGN_CHECK_SHOTS = 50
#: Fewest shots after the onset to define the signal the sign check projects on.
MIN_SIGNAL_SHOTS = 10
#: Shots later than this fraction of the check window define the signal: clear of the onset.
SIGNAL_AFTER_FRACTION = 0.5


def run(inputs: dict, out: Path, config: dict) -> None:
    """Write ``out`` (zarr) with ``delay`` (shot), the corrected delay in ps.

    NaN where the timing tool is in use and found no edge for that shot.

    Parameters
    ----------
    inputs : dict
        ``shots``: the shots store.
    out : Path
        Store to write (zarr).
    config : dict
        Sections ``timing`` and ``compute``.
    """
    timing = config["timing"]
    warnings = Warnings("time", log)
    table = shotstore.open_shots(inputs["shots"]).table
    stage_delay, edge = table["stage_delay"], table["timing_edge"]
    delay = np.empty(stage_delay.size)
    with config_keys(CONFIG_KEYS, config):
        for a in range(0, delay.size, BLOCK_SHOTS):  # elementwise: blocks bound the temporaries
            delay[a:a + BLOCK_SHOTS] = corrected_delay(stage_delay[a:a + BLOCK_SHOTS], edge[a:a + BLOCK_SHOTS],
                                                       timing["calibration_fs"], timing["time_zero_ps"],
                                                       timing["sign"], timing["edge_at_time_zero_px"],
                                                       timing["use_timing_tool"])
    del edge
    correction = (delay - (stage_delay - timing["time_zero_ps"])).astype(np.float32)
    del stage_delay
    finite = np.isfinite(correction)
    rms = float(np.std(correction[finite], dtype=np.float64) * FS_PER_PS) if finite.any() else float("nan")
    log.info("corrected delays: %d shots, %d without a timing correction; correction rms %.1f fs",
             delay.size, int((~finite).sum()), rms)
    if timing["use_timing_tool"] and finite.any() and rms > SUSPECT_CORRECTION_RMS_FS:
        warnings.add(f"timing-tool correction has an rms of {rms:.0f} fs: check timing.calibration_fs "
                     "and the edge units")
    with store.atomic_path(out) as tmp:
        g = store.new_group(tmp, {"timing": timing, "correction_rms_fs": rms, "written": now(),
                                  "warnings": list(warnings),
                                  "convention": "delay = stage_delay - time_zero + sign * (P(edge) - P(edge0)) / 1000; "
                                                "positive delay: probe after pump"})
        store.write_array(g, "delay", delay, ["shot"], units="ps")
        store.write_array(g, "correction", correction * np.float32(FS_PER_PS), ["shot"], units="fs")


def check_sign(shots_path, selection_path, config: dict, window_ps=1.0):
    """Which sign of the timing correction sharpens the onset, measured on the data.

    Each kept pump-on shot with a nominal delay within ``window_ps`` of time zero
    is referenced to its nearest kept pump-off shots (as in the ``difference``
    stage) and projected on the mean difference of the shots after time zero
    (:func:`movieproc.shots.timing.projected_signal`): a scalar that steps at
    time zero. Its onset width is measured with nominal delays and with both
    signs of the correction.

    Parameters
    ----------
    shots_path, selection_path : path
        The shots and selection stores.
    config : dict
        Sections ``timing`` and ``differences``.
    window_ps : float
        Half-width of the delay window around time zero, ps.

    Returns
    -------
    dict
        As :func:`movieproc.shots.timing.sign_check`, plus ``shots`` used.
    """
    timing, differences = config["timing"], config["differences"]
    shots = shotstore.open_shots(shots_path)
    table = shots.table
    keep = store.read(store.open_group(selection_path, "selection"), "keep", selection_path)
    nominal = table["stage_delay"] - timing["time_zero_ps"]
    near = keep & table["pump_on"] & (np.abs(nominal) <= window_ps) & np.isfinite(table["timing_edge"])
    refs, _ = nearest_references(table["pulse_id"], near, keep & ~table["pump_on"], differences["references"])
    idx = np.flatnonzero(near)
    if idx.size < MIN_SIGN_CHECK_SHOTS:
        raise DataError(f"{idx.size} kept pump-on shots within {window_ps} ps of time zero: too few to check the sign")
    after = nominal[idx] > SIGNAL_AFTER_FRACTION * window_ps
    if after.sum() < MIN_SIGNAL_SHOTS:
        raise DataError(f"too few shots later than {SIGNAL_AFTER_FRACTION * window_ps} ps to define the signal "
                        "for the sign check")
    rows = np.unique(np.concatenate([idx, refs.ravel()]))
    with config_keys(CONFIG_KEYS, config):
        curves = normalize(shots.rows(rows), shots.q, differences["normalization"], differences["norm_q_range"])
        values = projected_signal(curves[np.searchsorted(rows, idx)], curves[np.searchsorted(rows, refs)], after)
        res = sign_check(table["stage_delay"][idx], table["timing_edge"][idx], values, timing["calibration_fs"],
                         timing["time_zero_ps"], timing["edge_at_time_zero_px"])
    res["shots"] = int(idx.size)
    return res
