"""Timings of the likelihood and the sampler (prints numbers, asserts nothing).

1. ``KinkLikelihood.log_prob`` per sample vs batch size and number of
   traced points, with the analytic stand-in model of the tests.
2. Sampler cost per step with a trivial log-probability (emcee + the HDF5
   checkpoint written every step).
3. Speed-up of ``workers=2`` over ``workers=1`` with a model that costs
   ~``--model-ms`` per sample (the pool splits each vectorised batch).

Run: ``python bench/bench_likelihood.py [--model-ms 2] [--steps 40]``.
Numbers depend on the machine load; compare them side by side only.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from standin import (TRUTH, standin_data, standin_model,  # noqa: E402
                     standin_params)

from kinkfit.config import SamplerSettings  # noqa: E402
from kinkfit.likelihood import KinkLikelihood  # noqa: E402
from kinkfit.sampling import run_sampler  # noqa: E402

MODEL_MS = 2.0


def slow_model(params, r_au, phi_rad):
    """Stand-in model burning ~MODEL_MS of CPU per sample."""
    m = len(params["mass"])
    t_end = time.process_time() + 1e-3 * MODEL_MS * m
    x = 0.0
    while time.process_time() < t_end:
        x += float(np.sum(np.sin(np.arange(200.0))))
    return standin_model(params, r_au, phi_rad)


def _best(fn, repeat=5):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def bench_likelihood():
    print("1. KinkLikelihood.log_prob, stand-in model (best of 5)")
    print(f"{'npts':>6} {'batch':>6} {'us/sample':>10}")
    for npts in (200, 2000):
        rng = np.random.default_rng(0)
        lik = KinkLikelihood(model=standin_model, param_set=standin_params(),
                             **standin_data(rng, npts=npts))
        for m in (1, 16, 64):
            theta = lik.param_set.sample_prior(rng, m)
            t = _best(lambda: lik.log_prob(theta))
            print(f"{npts:6d} {m:6d} {1e6 * t / m:10.1f}")
        theta = lik.param_set.sample_prior(rng, 64)
        tk = _best(lambda: lik.log_prob(theta))
        ts = _best(lambda: lik.param_set.log_prior(theta))
        print(f"       of which the prior at batch 64: "
              f"{1e6 * ts / 64:.1f} us/sample ({100 * ts / tk:.0f}%)")


def _settings(steps, workers, walkers=32):
    return SamplerSettings(walkers=walkers, max_steps=steps, check_every=100,
                           autocorr_multiple=1e6, tau_tolerance=0.01, seed=1,
                           workers=workers, progress=False)


def bench_sampler_overhead(steps):
    import emcee  # import time (~1-4 s) kept out of the timings
    rng = np.random.default_rng(1)
    ps = standin_params()

    def trivial(theta):
        return ps.log_prior(theta)

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        out = run_sampler(trivial, ps, _settings(steps, 1), Path(tmp) / "c.h5",
                          initial=ps.sample_prior(rng, 1)[0])
        wall = time.perf_counter() - t0
    sampler = emcee.EnsembleSampler(
        32, ps.ndim, trivial, vectorize=True,
        moves=[(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)])
    t0 = time.perf_counter()
    sampler.run_mcmc(out.chain[-1], steps)
    mem = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        be = emcee.backends.HDFBackend(str(Path(tmp) / "e.h5"))
        be.reset(32, ps.ndim)
        sampler = emcee.EnsembleSampler(
            32, ps.ndim, trivial, vectorize=True, backend=be,
            moves=[(emcee.moves.DEMove(), 0.8),
                   (emcee.moves.DESnookerMove(), 0.2)])
        t0 = time.perf_counter()
        sampler.run_mcmc(out.chain[-1], steps)
        hdf = time.perf_counter() - t0
    print(f"\n2. sampler cost per step, trivial log-prob, 32 walkers, {steps}"
          f" steps:\n   plain emcee in memory        {1e3 * mem / steps:6.2f} "
          f"ms\n   emcee HDFBackend every step  {1e3 * hdf / steps:6.2f} ms"
          f"\n   run_sampler (blocks of 10, tau check every 100) "
          f"{1e3 * wall / steps:.2f} ms ({1e3 * out.timings['log_prob_s'] / steps:.2f}"
          f" ms of it inside log_prob)")


def bench_pool(steps):
    rng = np.random.default_rng(2)
    ps = standin_params()
    data = standin_data(rng, npts=300)
    walls = {}
    with tempfile.TemporaryDirectory() as tmp:
        for workers in (1, 2):
            lik = KinkLikelihood(model=slow_model, param_set=ps, **data)
            t0 = time.perf_counter()
            out = run_sampler(lik, ps, _settings(steps, workers),
                              Path(tmp) / f"w{workers}.h5",
                              initial=ps.pack(TRUTH)[0])
            walls[workers] = time.perf_counter() - t0
            print(f"   workers={workers}: {walls[workers]:.2f} s wall, "
                  f"{out.timings['ms_per_evaluation']:.2f} ms per sample "
                  f"evaluation")
    print(f"3. pool speed-up (model ~{MODEL_MS:g} ms/sample, 32 walkers, "
          f"{steps} steps, {os.cpu_count()} CPUs): "
          f"{walls[1] / walls[2]:.2f}x")


def main(argv=None):
    global MODEL_MS
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model-ms", type=float, default=2.0)
    ap.add_argument("--steps", type=int, default=40)
    args = ap.parse_args(argv)
    MODEL_MS = args.model_ms
    bench_likelihood()
    bench_sampler_overhead(max(args.steps, 300))
    print()
    bench_pool(args.steps)


if __name__ == "__main__":
    main()
