"""Time kinkfit.synth.make_cube and kinkfit.geometry.sky_to_disk side by side.

Run: ``python bench/bench_synth.py [npix nchan]`` (default 128 40).  Prints
seconds (best of 3); no assertion (timings never go into tests).
"""

from __future__ import annotations

import sys
import time

import numpy as np

from kinkfit.geometry import DiskGeometry, EmittingSurface, sky_to_disk
from kinkfit.synth import LineEmission, ObservingSetup, make_cube, sky_grid


def _best(fn, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(npix=128, nchan=40):
    flat = DiskGeometry(1.0, 140.0, 45.0, 37.0, vsys_kms=5.0, r_max_au=300.0)
    flared = DiskGeometry(1.0, 140.0, 45.0, 37.0, vsys_kms=5.0, r_max_au=300.0,
                          front=EmittingSurface(0.3, 1.25))
    emission = LineEmission()
    print(f"make_cube {npix}x{npix}x{nchan} (seconds, best of 3)")
    print(f"{'oversample':>10} {'flat':>8} {'flared':>8} {'no noise':>9}")
    for os_ in (1, 2, 3):
        setup = ObservingSetup(npix=npix, nchan=nchan, oversample=os_)
        t_flat = _best(lambda: make_cube(flat, setup, emission,
                                         rng=np.random.default_rng(0)))
        t_flared = _best(lambda: make_cube(flared, setup, emission,
                                           rng=np.random.default_rng(0)))
        t_clean = _best(lambda: make_cube(flared, setup, emission, noise=False))
        print(f"{os_:>10d} {t_flat:8.3f} {t_flared:8.3f} {t_clean:9.3f}")
    setup = ObservingSetup(npix=npix, oversample=3)
    x, y = sky_grid(setup, 3)
    xs, ys = np.meshgrid(x, y)
    print(f"sky_to_disk on {xs.size} positions (seconds, best of 3)")
    for inc in (20.0, 45.0, 70.0):
        g = DiskGeometry(1.0, 140.0, inc, 37.0, r_max_au=300.0,
                         front=EmittingSurface(0.3, 1.25))
        t_front = _best(lambda: sky_to_disk(g, xs, ys, "front"))
        t_back = _best(lambda: sky_to_disk(g, xs, ys, "back"))
        gflat = DiskGeometry(1.0, 140.0, inc, 37.0, r_max_au=300.0)
        t_flat = _best(lambda: sky_to_disk(gflat, xs, ys, "front"))
        print(f"  i = {inc:4.0f} deg: front {t_front:.3f}  back {t_back:.3f}  "
              f"flat {t_flat:.3f}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
