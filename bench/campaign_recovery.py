"""Injected-planet recovery on demo-like synthetic cubes (not run in CI).

    python bench/campaign_recovery.py [--folder DIR] [--cases a,b,c]

Three fictional planets (different mass, radius and azimuth, one on the far
side of the disk) are injected into synthetic cubes of a demo-like
observation (100 pc, 0.075" x 0.065" beam, 36 channels of 0.15 km/s) and
fitted through the whole pipeline (`kinkfit.pipeline.run_fit`, damping
"none", forward kink model, background disk fitted).  Prints each case's
16/50/84 and 2.5/97.5 percentiles next to the truth and whether the truth
lies inside the 68% and 95% intervals, and the wall time.  The same cases
at this size are the slow test ``tests/test_pipeline.py::
test_injected_planet_recovered``.  Results are conditional on the wake
model: the injections use the same model as the fit (PHYSICS.md s8).
"""

import argparse
import logging
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from recovery_cases import CASES, recovery_config  # noqa: E402

from kinkfit.pipeline import run_fit  # noqa: E402
from kinkfit.results import read_result  # noqa: E402
from kinkfit.scenario import synth_from_config  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--folder", default="recovery_out")
    ap.add_argument("--cases", default=",".join(CASES))
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING)
    root = Path(args.folder)
    for case in args.cases.split(","):
        t0 = time.perf_counter()
        folder = root / case
        folder.mkdir(parents=True, exist_ok=True)
        cfg = recovery_config(folder, **CASES[case])
        if not Path(cfg.data.cube).exists():
            synth_from_config(cfg)
        run = run_fit(cfg, progress=False)
        res = read_result(run.results["none"])
        wall = time.perf_counter() - t0
        truth = {k: CASES[case][k] for k in ("mass", "radius", "azimuth")}
        print(f"{case}: {wall:.0f} s, converged={res.converged}", flush=True)
        for name, value in truth.items():
            s = res.samples[:, res.param_names.index(name)]
            q = np.percentile(s, [2.5, 16, 50, 84, 97.5])
            in68 = q[1] <= value <= q[3]
            in95 = q[0] <= value <= q[4]
            print(f"  {name:8s} truth {value:8.3f}  median {q[2]:8.3f}  "
                  f"68% [{q[1]:.3f}, {q[3]:.3f}]  95% [{q[0]:.3f}, {q[4]:.3f}]"
                  f"  in68={in68} in95={in95}", flush=True)


if __name__ == "__main__":
    main()
