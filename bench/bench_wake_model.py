"""Timing of the whole-disk wake model and the matching-distance diagnostic
(prints numbers; no assertions).

Run: python bench/bench_wake_model.py [--matching]
"""

import sys
import time

import numpy as np

import kinkfit.wake.model as wm
from kinkfit.wake import Damping, Planet, WakeDisk, wake_perturbations
from kinkfit.wake.burgers import burgers_solution
from kinkfit.wake.linear import get_sheet_solution, solve_cuts


def exact_vs_blend():
    """Direct model on a 512^2 image: exact (snapped) default vs blend vs unsnapped."""
    disk = WakeDisk(mstar_msun=1.0, aspect_p=0.07, r_in_au=10.0, r_out_au=250.0)
    g = np.linspace(-250, 250, 512)
    X, Y = np.meshgrid(g, g)
    r, phi = np.hypot(X, Y), np.arctan2(Y, X)
    p = Planet(1.0, 100.0, 0.5)
    wake_perturbations(r, phi, p, disk)
    saved = wm._N_TIME
    out = {}
    try:
        for label, nt in (("unsnapped exact", 10 ** 7), ("default (snapped exact)", None),
                          ("blend of 400 times", 400)):
            wm._N_TIME = nt
            t0 = time.perf_counter()
            out[label] = wake_perturbations(r, phi, p, disk)[0]
            print(f"512^2, 1 M_jup, {label:24s}: {time.perf_counter() - t0:.2f} s")
    finally:
        wm._N_TIME = saved
    ref = out["unsnapped exact"]
    peak = np.max(np.abs(ref))
    for label in ("default (snapped exact)", "blend of 400 times"):
        err = np.abs(out[label] - ref)
        print(f"  {label:24s}: max err {err.max() / peak:.3g} of peak, "
              f"pixels > 1 % of peak {np.mean(err > 0.01 * peak):.2e}")


def matching_table():
    """Local sheet + Burgers (planet clock): far field at 30 h_p vs matching distance."""
    xs = np.array([2, 3, 3.5, 4, 5, 6, 7, 8, 10, 12, 14, 20, 28.0])
    t0 = time.perf_counter()
    cuts = solve_cuts(xs, period_h=480.0, k_max_h=12.0)
    print(f"linear cuts at {xs.size} distances: {time.perf_counter() - t0:.1f} s")
    gam = 1.4
    t30 = 0.6 * 30.0 ** 2.5
    masses = (0.003, 0.01, 0.03, 0.1, 0.3, 1.0, 3.0)
    eo = np.linspace(-400, 400, 16001)
    w = np.clip((220 - np.abs(cuts.s_h)) / 20, 0, 1)
    w = 0.5 * (1 - np.cos(np.pi * w))
    rows = []
    print(" x_m   amp   F_WKB  F_uv  minU   (profile: peak dSigma/Sigma/|x|^1/2, flux, lobe)")
    for j, x in enumerate(xs):
        chi = 0.5 * (gam + 1) * cuts.sigma[j] * w / np.sqrt(x)
        u = np.concatenate([[0], np.cumsum(0.5 * (chi[1:] + chi[:-1]) * np.diff(cuts.s_h))])
        fw = (2 / 3) * (2 / (gam + 1)) ** 2 * np.trapezoid(chi ** 2, cuts.s_h)
        print(f"{x:5.1f} {cuts.sigma[j].max() / np.sqrt(x):.3f} {fw:.3f} "
              f"{cuts.flux[j]:.3f} {u.min():.3f}")
        rows.append([np.trapezoid(np.abs(burgers_solution(cuts.s_h, m * chi, t30, eo)[0]), eo)
                     for m in masses])
    rows = np.array(rows)
    i7 = list(xs).index(7.0)
    print("far field at 30 h_p, integral of |dSigma/Sigma| across the wake, relative to "
          "x_m = 7;  Mp/M_th =", masses)
    for j, x in enumerate(xs):
        print(f"{x:5.1f} " + " ".join(f"{v:.3f}" for v in rows[j] / rows[i7]))


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
    if "--matching" in sys.argv:
        matching_table()
    else:
        main()
        exact_vs_blend()
