"""Time the forecast: wake evaluation per mass, then the cost per grid point
(one beam x one channel width, all masses and channel offsets).

    python bench/bench_forecast.py [--config configs/demo.toml]

Prints the numbers measured side by side; nothing is asserted.
"""

import argparse
import math
import time
from pathlib import Path

import numpy as np

from kinkfit import scenario
from kinkfit.config import load_config
from kinkfit.forecast import (DEFAULT_OFFSETS_KMS, kink_amplitude, los_perturbation,
                              planet_los_velocity, sky_field)
from kinkfit.wake.model import Planet


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--config", default=str(Path(__file__).resolve().parents[1]
                                            / "configs" / "demo.toml"))
    ap.add_argument("--masses", type=int, default=11)
    args = ap.parse_args(argv)
    cfg = load_config(args.config)
    truth = cfg.synth.truth
    geom, em, disk = cfg.geometry(), scenario.line_emission(cfg), scenario.wake_disk(cfg)
    damp = scenario.damping_of(truth.damping, truth.alpha, truth.efold)
    phi = math.radians(truth.azimuth_deg)
    masses = np.geomspace(0.1, 10.0, args.masses)
    beams = [0.05, 0.08, 0.12, 0.2]
    cws = [0.05, 0.1, 0.2, 0.35]
    pix = min(0.3 * disk.aspect_p * truth.radius_au / geom.au_per_arcsec, min(beams) / 4)

    t0 = time.perf_counter()
    field = sky_field(geom, em, pixel_arcsec=pix)
    t1 = time.perf_counter()
    # warm the wake tables once (skeleton and sheet cache)
    los_perturbation(field, geom, Planet(1.0, truth.radius_au, phi), disk, damp)
    t2 = time.perf_counter()
    dv = np.stack([los_perturbation(field, geom, Planet(m, truth.radius_au, phi), disk, damp)
                   for m in masses])
    t3 = time.perf_counter()
    vp = planet_los_velocity(geom, truth.radius_au, phi)
    noise = em.peak_jy_beam / cfg.synth.peak_snr
    times = []
    for b in beams:
        for cw in cws:
            s = time.perf_counter()
            for off in DEFAULT_OFFSETS_KMS:
                kink_amplitude(field, dv, vp + off, beam=(b, b, 0.0), channel_width_kms=cw,
                               noise_jy_beam=noise)
            times.append(time.perf_counter() - s)
    print(f"sky grid {field.shape[0]}x{field.shape[1]} at {pix:.4f} arcsec: {t1 - t0:.2f} s")
    print(f"first wake evaluation (tables, cache): {t2 - t1:.2f} s")
    print(f"wake on the grid: {(t3 - t2) / masses.size:.3f} s per mass ({masses.size} masses)")
    print(f"per grid point (beam x channel width; {masses.size} masses x "
          f"{len(DEFAULT_OFFSETS_KMS)} offsets): median {np.median(times):.3f} s, "
          f"max {np.max(times):.3f} s, total {np.sum(times):.2f} s for "
          f"{len(beams)}x{len(cws)} points")


if __name__ == "__main__":
    main()
