"""Timing of the Burgers t-history (prints numbers; no assertions).

Run: python bench/bench_wake_burgers.py
"""

import time

import numpy as np

from kinkfit.wake.burgers import burgers_history, burgers_nodes, pad_profile


def main():
    eta = np.linspace(-15, 15, 4001)
    chi0 = eta * np.exp(-0.5 * eta ** 2)
    burgers_nodes(eta, chi0, 1.0)          # numba compile / cache load
    eta_out = np.linspace(-60, 60, 4001)
    for nt in (100, 300):
        times = np.geomspace(1e-2, 300.0, nt)
        t0 = time.perf_counter()
        burgers_history(eta, chi0, times, eta_out)
        dt = time.perf_counter() - t0
        npad = pad_profile(eta, chi0, times[-1])[0].size
        print(f"history: {nt} times, {eta.size} samples ({npad} padded), "
              f"{eta_out.size} outputs: {dt:.3f} s")


if __name__ == "__main__":
    main()
