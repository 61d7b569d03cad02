"""Wake emulator vs direct model, measured side by side (prints numbers; no assertions).

Run: python bench/bench_emulator.py [--npts 3000] [--walkers 32]

Rates are point evaluations (walkers x points) per second of *process CPU
time* (one thread: numba and the direct model are single-threaded here), so
they are per core even on a shared machine; wall times are printed too.
Errors are max |emulator - direct| / peak |dv| of the direct model, with the
direct model evaluated exactly in time (``_N_TIME`` raised above the number
of points) and, for information, with its default time grid.
"""

import argparse
import math
import time

import numpy as np

import kinkfit.wake.model as wm
from kinkfit.constants import MJUP_PER_MSUN
from kinkfit.wake import emulator as em
from kinkfit.wake.linear import get_sheet_solution


def timed(func, *args, repeat=1):
    c0, w0 = time.process_time(), time.perf_counter()
    for _ in range(repeat):
        out = func(*args)
    return out, (time.process_time() - c0) / repeat, (time.perf_counter() - w0) / repeat


def walkers(rng, disk, m, kind):
    amp = 10 ** rng.uniform(math.log10(0.03), math.log10(3.0), m)
    par = dict(mass=amp * disk.aspect_p ** 3 * disk.mstar_msun / MJUP_PER_MSUN,
               radius=rng.uniform(90.0, 110.0, m), azimuth=rng.uniform(-180, 180, m),
               aspect_ratio=np.full(m, disk.aspect_p), jitter=np.zeros(m))
    if kind == "viscous":
        par["alpha"] = 10 ** rng.uniform(-5, -2, m)
    if kind == "efold":
        par["efold"] = 10 ** rng.uniform(-1, 1, m)
    return par


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--npts", type=int, default=3000)
    ap.add_argument("--walkers", type=int, default=32)
    ap.add_argument("--direct-walkers", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(5)

    _, c, w = timed(get_sheet_solution)
    print(f"linear sheet (other module; solve or cache load): cpu {c:.2f} s, wall {w:.2f} s")
    disk = wm.WakeDisk(mstar_msun=1.0, aspect_p=0.1, q=0.25, r_in_au=20.0, r_out_au=300.0)
    for kind in ("none", "viscous"):
        _, c, w = timed(lambda: em.build_tables(disk, kind, use_cache=False))
        print(f"emulator tables from a cold cache ({kind}, universal interior + disk): "
              f"cpu {c:.2f} s, wall {w:.2f} s")
    _, c, w = timed(lambda: em.build_tables(disk, "viscous"))
    print(f"emulator tables from the warm cache: cpu {c:.2f} s, wall {w:.2f} s")

    # traced-like points: radii 0.3-2.9 r_p, all azimuths
    r = rng.uniform(30.0, 290.0, args.npts)
    phi = rng.uniform(-np.pi, np.pi, args.npts)
    for kind in ("none", "viscous", "efold"):
        model = em.make_fit_model(disk, kind, method="emulator")
        par = walkers(rng, disk, args.walkers, kind)
        _, c, w = timed(model, par, r, phi)           # first call: numba compile / load
        print(f"\n[{kind}] first emulator call (compile or load): cpu {c:.2f} s, wall {w:.2f} s")
        _, c_emu, w_emu = timed(model, par, r, phi, repeat=5)
        n_eval = args.walkers * args.npts
        rate_emu = n_eval / c_emu
        print(f"  emulator: {args.walkers} walkers x {args.npts} points: cpu {c_emu * 1e3:.1f} ms "
              f"(wall {w_emu * 1e3:.1f} ms) -> {rate_emu:.3g} point evaluations / s / core")

        direct = em.make_fit_model(disk, kind, method="direct")
        md = args.direct_walkers
        sub = {k: v[:md] for k, v in par.items()}
        direct(sub, r, phi)                           # skeleton builds
        ref_default, c_dir, w_dir = timed(direct, sub, r, phi)
        rate_dir = md * args.npts / c_dir
        print(f"  direct:   {md} walkers x {args.npts} points: cpu {c_dir:.2f} s "
              f"(wall {w_dir:.2f} s) -> {rate_dir:.3g} point evaluations / s / core")
        print(f"  ratio emulator / direct (per core, equal points): {rate_emu / rate_dir:.0f}x")
        saved = wm._N_TIME
        wm._N_TIME = 10 ** 7
        try:
            ref_exact = direct(sub, r, phi)
        finally:
            wm._N_TIME = saved
        got = model(sub, r, phi)
        for label, ref in (("exact in time", ref_exact), ("default time grid", ref_default)):
            errs = []
            for i in range(md):
                peak = max(np.abs(ref[0][i]).max(), np.abs(ref[1][i]).max())
                errs.append(max(np.abs(got[0][i] - ref[0][i]).max(),
                                np.abs(got[1][i] - ref[1][i]).max()) / peak)
            print(f"  max |emulator - direct ({label})| / peak |dv|: "
                  + ", ".join(f"{e:.2e}" for e in errs))
        blend = []
        for i in range(md):
            peak = max(np.abs(ref_exact[0][i]).max(), np.abs(ref_exact[1][i]).max())
            blend.append(np.abs(ref_default[0][i] - ref_exact[0][i]).max() / peak)
        print("  (direct default grid vs exact, dv_r, same walkers: "
              + ", ".join(f"{e:.2e}" for e in blend) + ")")


if __name__ == "__main__":
    main()
