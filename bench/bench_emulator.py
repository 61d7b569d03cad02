"""Wake emulator vs direct model, measured side by side (prints numbers; no assertions).

Run: python bench/bench_emulator.py [--npts 3000] [--walkers 32] [--direct-walkers 8]
     python bench/bench_emulator.py --nodes demo [--walkers 24] [--repeat 25]

Rates are point evaluations (walkers x points) per second of *process CPU
time* (one thread: numba and the direct model are single-threaded here), so
they are per core even on a shared machine; wall times and the load average
are printed too (other processes still share caches and memory bandwidth).

For each damping option:

* emulator: one vectorised call for ``--walkers`` parameter sets (emcee's
  ``vectorize`` mode), median of 7 calls after a warm-up;
* direct: :func:`kinkfit.wake.model.wake_perturbations` as it is in the tree
  (its default time treatment), walker by walker, on the first
  ``--direct-walkers`` of the same sets and the same points, after a warm-up
  call that builds its per-damping skeletons (a fit would rebuild them for
  every new damping value; the warm call favours the direct model);
* ratio at equal points and the same sets: the emulator's rate on those
  ``--direct-walkers`` sets over the direct model's;
* error: max |emulator - direct| / peak |dv| per set, against the direct model
  exact in time (``_N_TIME`` raised above the number of points, so that each
  point is solved at its own time) and against its default.

``--nodes demo``: the demo's forward-model nodes instead (the 6,239 disk
positions of the ridge response of ``configs/demo.toml``, both emitting
layers; built by ``bench/bench_forward.py`` and read from its pickle under
/tmp), posterior-like walker clouds (``--walkers`` sets scattered 1 % around
1.5 M_jup, 110 au, 40 deg, alpha 0.003) for damping none and viscous, and the
emulator before and after the interior fast path (``_fast_interior`` False
= every interior look-up through the general ``_eval_local``), timed
interleaved in one process (best CPU time of ``--repeat`` calls each);
also the largest difference between the two on clouds of 1 %, 10 % and 30 %.
"""

import argparse
import math
import os
import sys
import time
from pathlib import Path

import numpy as np

import kinkfit.wake.model as wm
from kinkfit.constants import MJUP_PER_MSUN
from kinkfit.wake import emulator as em
from kinkfit.wake.linear import get_sheet_solution


def timed(func, *args, repeat=1):
    """Result, median CPU seconds and median wall seconds of ``repeat`` calls."""
    cpu, wall = [], []
    for _ in range(repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        out = func(*args)
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - w0)
    return out, float(np.median(cpu)), float(np.median(wall))


def walkers(rng, disk, m, kind):
    """Prior-like parameter sets: Mp/M_th 0.03-3, r_p 90-110 au, any azimuth."""
    amp = 10 ** rng.uniform(math.log10(0.03), math.log10(3.0), m)
    par = dict(mass=amp * disk.aspect_p ** 3 * disk.mstar_msun / MJUP_PER_MSUN,
               radius=rng.uniform(90.0, 110.0, m), azimuth=rng.uniform(-180, 180, m),
               aspect_ratio=np.full(m, disk.aspect_p), jitter=np.zeros(m))
    if kind == "viscous":
        par["alpha"] = 10 ** rng.uniform(-5, -2, m)
    if kind == "efold":
        par["efold"] = 10 ** rng.uniform(-1, 1, m)
    return par


def cloud(rng, disk, m, kind):
    """Posterior-like sets: a walker cloud around one solution (0.5 % in mass, 0.2 au, 0.5 deg)."""
    par = walkers(rng, disk, 1, kind)
    out = {k: np.repeat(v, m) for k, v in par.items()}
    out["mass"] = out["mass"] * (1 + 0.005 * rng.standard_normal(m))
    out["radius"] = out["radius"] + 0.2 * rng.standard_normal(m)
    out["azimuth"] = out["azimuth"] + 0.5 * rng.standard_normal(m)
    for k in ("alpha", "efold"):
        if k in out:
            out[k] = out[k] * (1 + 0.02 * rng.standard_normal(m))
    return out


def rel_errors(got, ref):
    errs = []
    for i in range(ref[0].shape[0]):
        peak = max(np.abs(ref[0][i]).max(), np.abs(ref[1][i]).max())
        errs.append(max(np.abs(got[0][i] - ref[0][i]).max(),
                        np.abs(got[1][i] - ref[1][i]).max()) / max(peak, 1e-300))
    return np.array(errs)


def demo_nodes(args):
    """Before/after on the demo's forward-model nodes (see the module docstring)."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import bench_forward

    from kinkfit.scenario import wake_disk

    cfg, got = bench_forward.build(1)
    resp = got["resp"]
    r, phi = resp.node_r_au, resp.node_phi_rad
    disk = wake_disk(cfg, mstar_msun=cfg.geometry().mstar_msun)
    rng = np.random.default_rng(7)

    def demo_cloud(m, kind, spread):
        par = dict(mass=1.5 * (1 + spread * rng.standard_normal(m)),
                   radius=110.0 * (1 + spread * rng.standard_normal(m)),
                   azimuth=40.0 * (1 + spread * rng.standard_normal(m)),
                   aspect_ratio=np.full(m, disk.aspect_p))
        par["mass"] = np.abs(par["mass"])
        par["radius"] = np.clip(par["radius"], disk.r_in_au + 5, disk.r_out_au - 5)
        if kind == "viscous":
            par["alpha"] = np.abs(0.003 * (1 + spread * rng.standard_normal(m)))
        return par

    m = args.walkers
    x = np.abs(r / 110.0 - 1.0) / disk.aspect_p
    print(f"demo forward-model nodes: {r.size} (r {r.min():.1f}-{r.max():.1f} au; "
          f"{np.count_nonzero(x <= em.default_match_h(disk.aspect_p))} within x_match h_p "
          f"of 110 au); {m} walkers scattered 1 % around 1.5 Mjup, 110 au, 40 deg, "
          f"alpha 0.003; best CPU time of {args.repeat} interleaved calls")
    print(f"{'damping':8s} {'before ms/walker':>16s} {'after ms/walker':>16s} {'speed-up':>9s} "
          f"{'before /s/core':>15s} {'after /s/core':>14s} {'max |after - before| km/s':>26s}")
    for kind in ("none", "viscous"):
        new = em.make_fit_model(disk, kind)
        old = em.make_fit_model(disk, kind, tables=new.tables)
        old._fast_interior = False
        worst = 0.0
        for spread, mm in ((0.01, 200), (0.1, 200), (0.3, 200)):
            par = demo_cloud(mm, kind, spread)
            a, b = new(par, r, phi), old(par, r, phi)
            worst = max(worst, float(np.abs(a[0] - b[0]).max()),
                        float(np.abs(a[1] - b[1]).max()))
        par = demo_cloud(m, kind, 0.01)
        t_old = t_new = float("inf")
        for _ in range(args.repeat):
            t_old = min(t_old, timed(old, par, r, phi)[1])
            t_new = min(t_new, timed(new, par, r, phi)[1])
        print(f"{kind:8s} {t_old * 1e3 / m:16.3f} {t_new * 1e3 / m:16.3f} "
              f"{t_old / t_new:8.2f}x {m * r.size / t_old:15.3g} {m * r.size / t_new:14.3g} "
              f"{worst:26.2e}")
    print("load average at end (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--npts", type=int, default=3000)
    ap.add_argument("--walkers", type=int, default=32)
    ap.add_argument("--direct-walkers", type=int, default=8)
    ap.add_argument("--nodes", choices=("random", "demo"), default="random",
                    help="random points (default) or the demo's forward-model nodes")
    ap.add_argument("--repeat", type=int, default=25, help="timed calls (--nodes demo)")
    args = ap.parse_args()
    if args.nodes == "demo":
        if "--walkers" not in sys.argv:
            args.walkers = 24
        print("load average at start (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())
        return demo_nodes(args)
    rng = np.random.default_rng(5)
    print("load average at start (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())

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
    n_eval = args.walkers * args.npts
    md = min(args.direct_walkers, args.walkers)
    print(f"\n{args.npts} points at r 30-290 au, any azimuth; h/r = 0.1, planet at 90-110 au")
    print(f"{'damping':8s} {'emulator /s/core':>17s} {'(posterior-like)':>17s} "
          f"{'direct /s/core':>15s} {'ratio':>7s} {'max err (exact)':>16s} "
          f"{'max err (default)':>18s}")
    rows = []
    for kind in ("none", "viscous", "efold"):
        model = em.make_fit_model(disk, kind, method="emulator")
        par = walkers(rng, disk, args.walkers, kind)
        _, c0, _ = timed(model, par, r, phi)           # first call: numba compile / load
        _, c_emu, w_emu = timed(model, par, r, phi, repeat=7)
        post = cloud(rng, disk, args.walkers, kind)
        model(post, r, phi)
        _, c_post, _ = timed(model, post, r, phi, repeat=7)
        sub = {k: v[:md] for k, v in par.items()}
        _, c_sub, _ = timed(model, sub, r, phi, repeat=7)

        direct = em.make_fit_model(disk, kind, method="direct")
        direct(sub, r, phi)                           # skeleton builds
        ref_default, c_dir, w_dir = timed(direct, sub, r, phi)
        saved = wm._N_TIME
        wm._N_TIME = 10 * args.npts                   # > number of distinct times: exact
        try:
            ref_exact = direct(sub, r, phi)
        finally:
            wm._N_TIME = saved
        got = model(sub, r, phi)
        e_exact = rel_errors(got, ref_exact)
        e_default = rel_errors(got, ref_default)
        rate_emu = n_eval / c_emu
        rate_post = n_eval / c_post
        rate_sub = md * args.npts / c_sub
        rate_dir = md * args.npts / c_dir
        rows.append((kind, rate_emu, rate_post, rate_dir, rate_sub / rate_dir,
                     e_exact.max(), e_default.max()))
        print(f"{kind:8s} {rate_emu:17.3g} {rate_post:17.3g} {rate_dir:15.3g} "
              f"{rate_sub / rate_dir:6.0f}x {e_exact.max():16.2e} {e_default.max():18.2e}")
        print(f"         (first call {c0:.2f} s; emulator {c_emu * 1e3:.1f} ms cpu / "
              f"{w_emu * 1e3:.1f} ms wall for {args.walkers} walkers; on the {md} direct "
              f"sets {rate_sub:.3g} /s; direct {c_dir:.2f} s cpu / {w_dir:.2f} s wall)")
    print("load average at end (1, 5, 15 min): %.2f %.2f %.2f" % os.getloadavg())
    print(f"direct model time grid: _N_TIME = {wm._N_TIME!r} (None = exact at snapped times)")


if __name__ == "__main__":
    main()
