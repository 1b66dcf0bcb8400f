"""Benchmark: geometry from a 4-Mpixel LaB6 calibrant image (movieproc.detector.calibrate).

The image (2048 x 2048, 75 um pixels, 150 mm, 12 keV, 2.5 deg tilt, off-centre
beam, beam-stop shadow and a gap stripe, Poisson noise, polarization) is
rendered by the project's forward model; the benchmark times
:func:`movieproc.detector.calibrate.calibrate` from a rough start (image centre,
distance 15 % off). It runs on 2 cores as the project's machines have; the
fit itself is mostly single-threaded numpy/scipy.

    python benchmarks/calibrate.py [--quick]

Prints ``name: value unit`` lines and ends with ``ratio: X (target 1.0)``, the
calibration time over the 20 s a user should wait at most at a beam time (an
absolute target: the work is dominated by a fixed number of passes over the
image, so a floor such as one np.sum over the image, printed for the
machine's speed, would set no meaningful target). ``--quick`` uses a 1-Mpixel
image and one repeat.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from clock import best as best_of
from movieproc.detector import calibrants, forward
from movieproc.detector.calibrate import calibrate
from movieproc.xray import wavelength

TARGET_S = 20.0


def render(shape, pixel, distance, energy, rng):
    cal = calibrants.get("LaB6")
    det = dict(distance_mm=distance, pixel_size_mm=pixel, beam_center_px=[shape[0] * 0.46, shape[1] * 0.53],
               tilt_deg=[2.5, -1.2], polarization_fraction=0.99)
    q = np.arange(0.0, 12.0, 1e-4)
    sigma_q = 1.3 * 2 * np.pi / wavelength(energy) * pixel / distance
    curve = 0.3 + 0.3 * np.exp(-q / 3.0)
    for j, qk in enumerate(2 * np.pi / cal.d_spacings[:40]):
        curve += 3.0 * np.exp(-0.5 * ((q - qk) / sigma_q) ** 2) / (1.0 + 0.1 * j)
    shadow = forward.default_mask(det, shape)
    shadow[:, shape[1] // 3: shape[1] // 3 + 7] = True
    image = forward.render_frames(q, curve[None], [energy], det, rng, shape=shape, photons_per_pixel=150.0,
                                  masked_region=shadow, dtype=np.float32)[0]
    return cal, det, image, shadow


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1-Mpixel image, one repeat (smoke run)")
    args = parser.parse_args()
    shape = (1024, 1024) if args.quick else (2048, 2048)
    pixel, distance, energy = (0.15, 150.0, 12.0) if args.quick else (0.075, 150.0, 12.0)
    repeats = 1 if args.quick else 2
    cal, det, image, shadow = render(shape, pixel, distance, energy, np.random.default_rng(1))
    floor = best_of(lambda: np.sum(image), 5)
    result = {}

    def run():
        result["cal"] = calibrate(image, shadow, cal, energy, pixel, distance_guess=distance * 1.15)

    t0 = time.perf_counter()
    elapsed = best_of(run, repeats)
    g = result["cal"].geometry
    print(f"pixels: {image.size / 1e6:.2f} Mpixel")
    print(f"floor_np_sum: {1e3 * floor:.3f} ms")
    print(f"calibrate: {elapsed:.2f} s")
    print(f"calibrate_over_floor: {elapsed / floor:.0f} x")
    print(f"distance_error: {1e2 * (g.distance_mm / distance - 1):.5f} %")
    print(f"centre_error: {np.max(np.abs(np.subtract(g.beam_center_px, det['beam_center_px']))):.4f} px")
    print(f"tilt_error: {np.max(np.abs(np.subtract(g.tilt_deg, det['tilt_deg']))):.4f} deg")
    print(f"rings: {len(result['cal'].rings)} count")
    print(f"wall_total: {time.perf_counter() - t0:.1f} s")
    print(f"ratio: {elapsed / TARGET_S:.3f} (target 1.0)")


if __name__ == "__main__":
    main()
