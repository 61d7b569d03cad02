"""Where the wall time of one sampler step goes on the demo posterior.

    python bench/bench_demo_sampler.py [--steps 150] [--workers 1 2]

Builds the demo's forward likelihood as ``bench/bench_forward.py`` does
(cached pickle under /tmp; the viscous wake emulator, background nuisance)
and runs :func:`kinkfit.sampling.run_sampler` for ``--steps`` steps with the
demo's sampler settings (24 walkers, DE + snooker moves, HDF5 checkpoint)
from a ball around the injected truth, once per ``--workers`` value, side by
side in one process.  Prints, per run: wall seconds per step, the seconds
spent inside the log-probability calls as the sampler sees them (pool
included) and the rest (emcee's proposal, the checkpoint), and the CPU cost
per walker evaluation measured in this process without the sampler.
Numbers depend on the machine load; compare the runs of one invocation.
Asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_forward import build  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--steps", type=int, default=150)
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    args = ap.parse_args(argv)

    from kinkfit.likelihood import KinkLikelihood
    from kinkfit.sampling import initial_ball, run_sampler
    from kinkfit.scenario import wake_disk
    from kinkfit.wake.emulator import make_fit_model

    cfg, got = build(1)
    geom = cfg.geometry()
    damping = cfg.synth.truth.damping
    model = make_fit_model(wake_disk(cfg, mstar_msun=geom.mstar_msun), damping)
    pset = cfg.parameter_set(damping, with_planet=True)
    like = KinkLikelihood.from_deviations(got["dev"], model, pset,
                                          response=got["resp"],
                                          nuisance=got["nuisance"])
    truth = cfg.synth.truth
    centre = []
    for name in pset.free:
        value = {"mass": truth.mass_mjup, "radius": truth.radius_au,
                 "azimuth": truth.azimuth_deg,
                 "alpha": truth.alpha, "efold": truth.efold}.get(name)
        centre.append(value if value is not None
                      else float(np.mean(pset.sample_prior(
                          np.random.default_rng(1), 64)[:, len(centre)])))
    centre = np.array(centre, float)
    print(f"free parameters {pset.free}, start {np.round(centre, 4)}")

    rng = np.random.default_rng(3)
    p = initial_ball(centre, pset, cfg.sampler.walkers, rng, like.log_prob)
    like.log_prob(p)                      # compile and warm the caches
    for m in (1, 6, 12, 24):
        best = np.inf
        for _ in range(5):
            t0 = time.process_time()
            like.log_prob(p[:m])
            best = min(best, time.process_time() - t0)
        print(f"log_prob CPU per walker, batch {m:2d}: "
              f"{1e3 * best / m:.3f} ms")

    print(f"\n{'workers':>7} | {'s/step':>7} | {'in log_prob':>11} | "
          f"{'rest':>6} | walker evals/s")
    for workers in args.workers:
        settings = replace(cfg.sampler, workers=workers,
                           max_steps=args.steps, check_every=10 ** 9,
                           progress=False)
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            out = run_sampler(like.log_prob, pset, settings,
                              Path(tmp) / "chain.h5", initial=centre[None],
                              rng_seed=5)
            wall = time.perf_counter() - t0
        ev = out.timings["log_prob_s"]
        n = args.steps
        print(f"{workers:7d} | {wall / n:7.4f} | {ev / n:11.4f} | "
              f"{(wall - ev) / n:6.4f} | {n * cfg.sampler.walkers / wall:.0f}")


if __name__ == "__main__":
    main()
