"""Timing of the whole-disk wake model (prints numbers; no assertions).

Run: python bench/bench_wake_model.py
"""

import time

import numpy as np

from kinkfit.wake import Damping, Planet, WakeDisk, wake_perturbations
from kinkfit.wake.linear import get_sheet_solution


def main():
    t0 = time.perf_counter()
    get_sheet_solution()
    print(f"linear sheet (solve or cache load): {time.perf_counter() - t0:.2f} s")
    disk = WakeDisk(mstar_msun=1.0, aspect_p=0.07, r_in_au=10.0, r_out_au=250.0)
    for npix in (256, 512):
        g = np.linspace(-250, 250, npix)
        X, Y = np.meshgrid(g, g)
        r, phi = np.hypot(X, Y), np.arctan2(Y, X)
        for k, mass in enumerate((0.1, 0.3)):
            for dmp in (Damping(), Damping("viscous", alpha=1e-3)):
                t0 = time.perf_counter()
                wake_perturbations(r, phi, Planet(mass, 100.0, 0.5), disk, dmp)
                print(f"{npix}^2 pixels, {mass} M_jup, {dmp.kind:8s}: "
                      f"{time.perf_counter() - t0:.2f} s"
                      f"{' (first call: builds the skeleton)' if npix == 256 and k == 0 else ''}")


if __name__ == "__main__":
    main()
