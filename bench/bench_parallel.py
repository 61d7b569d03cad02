"""Parallel speed-ups, measured side by side in one run (asserts nothing).

1. Within one fit: throughput of ``KinkLikelihood.log_prob`` (samples per
   second) with the sampler's evaluator at ``workers = 1`` and ``workers = 2``
   (``multiprocessing.Pool`` splitting each vectorised batch, as
   ``kinkfit.sampling.run_sampler`` does), on the real whole-disk wake model
   (``kinkfit.wake.model.wake_perturbations``, one call per sample, viscous
   damping) at ``--npts`` traced points.
2. The same with a full short sampler run (``run_sampler``, ``--steps``
   steps, checkpoint written every step).
3. Across fits: a batch of ``--tasks`` independent stand-in fits
   (``tests/standin.py``, real emcee runs and result files) through
   :func:`kinkfit.batch.run_batch` on a ``LocalCluster`` of 1 and 2 workers.

Run: ``python bench/bench_parallel.py [--npts 300] [--batch 32] [--steps 20]
[--tasks 4] [--skip-batch]``.  The machine is shared: compare the columns of
one run only.
"""

from __future__ import annotations

import argparse
import math
import multiprocessing
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "error")

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve()
sys.path.insert(0, str(HERE.parents[1] / "tests"))

from kinkfit.config import SamplerSettings  # noqa: E402
from kinkfit.likelihood import KinkLikelihood  # noqa: E402
from kinkfit.params import parameters_for  # noqa: E402
from kinkfit.priors import Fixed, LogUniform, Uniform  # noqa: E402
from kinkfit.sampling import _Evaluator, _pool_init, run_sampler  # noqa: E402
from kinkfit.wake.model import (Damping, Planet, WakeDisk,  # noqa: E402
                                wake_perturbations)

# fictional disk: 1 M_sun star, h/r = 0.08, disk 20-300 au
DISK = dict(mstar_msun=1.0, q=0.25, p=1.0, gamma=1.4, r_in_au=20.0,
            r_out_au=300.0)


def wake_model(params, r_au, phi_rad):
    """``(dv_r, dv_phi)`` (m, npts) km/s of the real wake model, per sample.

    Top-level so the pool can pickle it.  Invalid physics -> NaN rows
    (the likelihood turns them into -inf).
    """
    m = len(params["mass"])
    dv_r = np.zeros((m, r_au.size))
    dv_phi = np.zeros((m, r_au.size))
    for k in range(m):
        disk = WakeDisk(aspect_p=float(params["aspect_ratio"][k]), **DISK)
        damp = Damping(kind="viscous", alpha=float(params["alpha"][k]))
        planet = Planet(mass_mjup=float(params["mass"][k]),
                        r_au=float(params["radius"][k]),
                        phi_rad=math.radians(float(params["azimuth"][k])))
        vr, vp, _ = wake_perturbations(r_au, phi_rad, planet, disk, damp)
        dv_r[k], dv_phi[k] = vr, vp
    return dv_r, dv_phi


def param_set():
    return parameters_for("viscous", {
        "mass": LogUniform(0.2, 1.5), "radius": Uniform(80.0, 160.0),
        "azimuth": Uniform(-180.0, 180.0), "aspect_ratio": Fixed(0.08),
        "alpha": LogUniform(1e-3, 1e-2), "jitter": LogUniform(1e-3, 0.1)})


def likelihood(npts, seed=0):
    rng = np.random.default_rng(seed)
    ps = param_set()
    r = rng.uniform(40.0, 280.0, npts)
    phi = rng.uniform(-np.pi, np.pi, npts)
    data = dict(r_au=r, phi_rad=phi, a_r=rng.uniform(-0.6, 0.6, npts),
                a_phi=rng.uniform(-0.6, 0.6, npts),
                grad_kms_per_arcsec=rng.uniform(2.0, 6.0, npts),
                offset_arcsec=rng.normal(0.0, 0.01, npts),
                sigma_arcsec=np.full(npts, 0.01))
    return KinkLikelihood(model=wake_model, param_set=ps, **data)


def bench_throughput(npts, batch, repeat):
    lik = likelihood(npts)
    rng = np.random.default_rng(1)
    # fresh draws for every repeat, the same for both worker counts: the
    # wake skeleton is memoised per (radius, alpha), so re-evaluating one
    # batch would time cache hits that a sampler never gets
    thetas = [lik.param_set.sample_prior(rng, batch) for _ in range(repeat)]
    lik.log_prob(lik.param_set.sample_prior(rng, 2))   # numba / sheet warm-up
    rates = {}
    for workers in (1, 2):
        pool = None
        if workers > 1:
            pool = multiprocessing.get_context("spawn").Pool(
                workers, initializer=_pool_init, initargs=(lik.log_prob,))
            pool.map(_pool_init_warm, range(workers))
            _Evaluator(lik.log_prob, pool=pool, workers=workers)(
                lik.param_set.sample_prior(rng, 2 * workers))
        ev = _Evaluator(lik.log_prob, pool=pool, workers=workers)
        best = math.inf
        for theta in thetas:
            t0 = time.perf_counter()
            lp = ev(theta)
            best = min(best, time.perf_counter() - t0)
        rates[workers] = batch / best
        if pool is not None:
            pool.close()
            pool.join()
        print(f"   workers={workers}: {1e3 * best / batch:7.2f} ms/sample, "
              f"{rates[workers]:7.1f} samples/s (batch {batch}, best of "
              f"{repeat} fresh batches; finite: {int(np.isfinite(lp).sum())}/{batch})")
    print(f"1. log-prob throughput speed-up, wake model, {npts} points, "
          f"{os.cpu_count()} CPUs: {rates[2] / rates[1]:.2f}x")


def _pool_init_warm(_):
    return os.getpid()


def bench_sampler(npts, steps, walkers=16):
    lik = likelihood(npts)
    ps = lik.param_set
    start = ps.pack({"mass": 0.8, "radius": 120.0, "azimuth": 30.0,
                     "alpha": 3e-3, "jitter": 0.01})[0]
    walls = {}
    with tempfile.TemporaryDirectory() as tmp:
        for workers in (1, 2):
            s = SamplerSettings(walkers=walkers, max_steps=steps,
                                check_every=10, autocorr_multiple=1e6,
                                tau_tolerance=0.01, seed=1, workers=workers,
                                progress=False)
            t0 = time.perf_counter()
            out = run_sampler(lik, ps, s, Path(tmp) / f"w{workers}.h5",
                              initial=start)
            walls[workers] = time.perf_counter() - t0
            print(f"   workers={workers}: {walls[workers]:.2f} s wall for "
                  f"{steps} steps, {out.timings['ms_per_evaluation']:.2f} ms "
                  f"per sample inside log_prob")
    print(f"2. sampler wall-time speed-up ({walkers} walkers, {steps} steps): "
          f"{walls[1] / walls[2]:.2f}x")


def bench_batch(ntasks):
    from kinkfit.batch import run_batch
    import test_batch as tb
    walls = {}
    for workers in (1, 2):
        with tempfile.TemporaryDirectory() as tmp:
            tmp = Path(tmp)
            path = tb._survey(tmp, [{"name": f"d{i}", "config": "disk.toml",
                                     "seed": i, "max_steps": 400}
                                    for i in range(ntasks)])
            t0 = time.perf_counter()
            run = run_batch(path, workers=workers, fit_fn=tb.standin_fit)
            walls[workers] = time.perf_counter() - t0
            assert not run.failed, run.failed
            print(f"   workers={workers}: {walls[workers]:.2f} s wall for "
                  f"{ntasks} fits (cluster start-up included)")
    print(f"3. batch speed-up, {ntasks} independent fits: "
          f"{walls[1] / walls[2]:.2f}x")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--npts", type=int, default=300)
    ap.add_argument("--batch", type=int, default=32)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--tasks", type=int, default=4)
    ap.add_argument("--skip-batch", action="store_true")
    args = ap.parse_args()
    import logging
    import warnings
    logging.basicConfig(level=logging.ERROR)
    logging.getLogger("distributed").setLevel(logging.ERROR)
    warnings.filterwarnings("ignore", message="Port 8787")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average (1 min) at start: {load:.2f}")
    bench_throughput(args.npts, args.batch, args.repeat)
    bench_sampler(args.npts, args.steps)
    if not args.skip_batch:
        bench_batch(args.tasks)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average (1 min) at end: {load:.2f}  (a load above the CPU "
          f"count makes every speed-up above meaningless)")


if __name__ == "__main__":
    main()
