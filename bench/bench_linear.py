"""Timings and flux table of the linear sheet solver (prints numbers only).

Run: python bench/bench_linear.py
"""

import os
import tempfile
import time

import numpy as np

from kinkfit.wake import linear as L


def main():
    os.environ["KINKFIT_CACHE_DIR"] = tempfile.mkdtemp(prefix="kinkfit-bench-")
    t = time.perf_counter()
    L.solve_sheet(softening_h=0.2, x_max_h=2.0, nx=21, y_max_h=8.0, ny=81)
    print(f"JIT warm-up (tiny grid, includes numba compile or cache load): "
          f"{time.perf_counter() - t:.2f} s")
    t = time.perf_counter()
    sol = L.get_sheet_solution()
    print(f"default solution, cold table cache: {time.perf_counter() - t:.2f} s"
          f"  (grid {sol.x_h.size} x {sol.y_h.size}, k_max {sol.k_max_h:.1f}/h,"
          f" period {sol.y_period_h:.1f} h)")
    t = time.perf_counter()
    L.get_sheet_solution()
    print(f"default solution, warm table cache: {time.perf_counter() - t:.2f} s")
    t = time.perf_counter()
    L.solve_cuts([3.5, 7.0, 10.0, 14.0])
    print(f"4 cuts at 3.5-14 h (solve_cuts, k_max 16/h, period 240 h): "
          f"{time.perf_counter() - t:.2f} s")
    t = time.perf_counter()
    L.solve_cuts([7.0, 14.0, 20.0, 28.0], period_h=480.0, k_max_h=12.0)
    print(f"4 cuts at 7-28 h (k_max 12/h, period 480 h): {time.perf_counter() - t:.2f} s")
    print("x/h   F_J (real space)   F_J (Fourier)")
    for x in (1.0, 2.0, 3.0, 4.0, 6.0, 8.0):
        i = int(np.argmin(np.abs(sol.x_h - x)))
        print(f"{x:4.1f}   {L.angular_momentum_flux(sol, x):.5f}"
              f"            {sol.flux_k[i]:.5f}")
    print("eps/h  F_J(x=3)   [units (G Mp)^2 Sigma r_p Omega / c^3]")
    for eps in (0.02, 0.03, 0.05, 0.1, 0.2, 0.3):
        s = L.solve_sheet(softening_h=eps, x_max_h=4.0, nx=41, y_max_h=32.0,
                          ny=321)
        i = int(np.argmin(np.abs(s.x_h - 3.0)))
        print(f"{eps:5.2f}  {s.flux_k[i]:.5f}")


if __name__ == "__main__":
    main()
