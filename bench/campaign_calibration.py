"""The full injection-recovery campaign (>= 100 injections; not run in CI).

    python bench/campaign_calibration.py CONFIG [--injections 100] [--workers 2]
        [--resume] [--seed 0] [--folder DIR]

Runs :func:`kinkfit.calibrate.run_calibration` through the real pipeline,
then prints the coverage table and the wall time per injection.  Resumable:
rerun with ``--resume`` after an interruption.  The config must have a
``[synth]`` section (the observing setup) and the ``[planet]`` priors the
planets are drawn from.  Results are conditional on the wake model: the
injections use the same model as the fit (PHYSICS.md section 8).
"""

import argparse
import logging
import time

import numpy as np

from kinkfit.calibrate import coverage_table, run_calibration
from kinkfit.config import load_config


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("config")
    ap.add_argument("--injections", type=int, default=100)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--resume", action="store_true")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--folder", default=None)
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(message)s")
    cfg = load_config(args.config)
    t0 = time.perf_counter()
    run = run_calibration(cfg, injections=args.injections, seed=args.seed,
                          workers=args.workers, resume=args.resume, folder=args.folder)
    wall = time.perf_counter() - t0
    secs = [r["seconds"] for r in run.records.values() if r.get("status") == "done"]
    print(f"{len(run.ran)} run, {len(run.skipped)} skipped, {len(run.failed)} failed "
          f"in {wall:.0f} s wall; per injection median "
          f"{np.median(secs) if secs else float('nan'):.0f} s (process time)")
    if run.names:
        coverage_table(run).pprint(max_width=200)
    for p in run.products:
        print(f"wrote {p}")


if __name__ == "__main__":
    main()
