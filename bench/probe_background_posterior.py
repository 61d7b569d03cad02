"""Posterior planet mass with the background disk fitted or known (run_fit).

    python bench/probe_background_posterior.py [--case small-near]
        [--seeds 51 31 41] [--variants default prior0 known prior10]
        [--steps 1500]

Runs the whole pipeline (:func:`kinkfit.pipeline.run_fit`, the path of
tests/test_pipeline.py::test_injected_planet_recovered_small) on a CI-sized
recovery case of ``tests/recovery_cases.py`` for each noise seed, in the
variants

``default``  background fitted, background marginalised with a prior of
             ``likelihood.background_prior`` = 3 fitted sigmas;
``prior0``   background fitted, no marginalisation (prior width 0);
``priorN``   background fitted, prior width N fitted sigmas (N a number);
``refitN``   background fitted, then refitted N times with the best
             planet's kinks taken out (``disk.refit_with_planet = N``);
``known``    ``disk.fit_background = false``: the true geometry (the
             emission profile is still fitted to the cube, at that geometry).

and prints the posterior median and 16/84% quantiles of mass, radius and
azimuth, the fitted stellar mass and layer aspect, and the wall time.  A
diagnostic, not a speed benchmark (single process, nice it, set
OMP_NUM_THREADS=1).  Results: docs/physics/response.md, "Fitted background
and the mass".
"""

import argparse
import logging
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from recovery_cases import SMALL_CASES, small_recovery_config  # noqa: E402

from kinkfit.config import parse_config  # noqa: E402
from kinkfit.pipeline import run_fit  # noqa: E402
from kinkfit.results import read_result  # noqa: E402
from kinkfit.scenario import synth_from_config  # noqa: E402


def variant_config(folder, values, variant, steps):
    """Config of one variant (the case's text with one change)."""
    base = small_recovery_config(folder, steps=steps, **values)
    text = base.text
    if variant == "known":
        key = "surface_flaring = 1.2\n"
        assert key in text
        text = text.replace(key, key + "fit_background = false\n", 1)
    elif variant.startswith("refit"):
        rounds = int(variant[len("refit"):] or 1)
        key = "surface_flaring = 1.2\n"
        assert key in text
        text = text.replace(key, key + f"refit_with_planet = {rounds}\n", 1)
    elif variant.startswith("prior"):
        width = float(variant[len("prior"):])
        text += f"\n[likelihood]\nbackground_prior = {width}\n"
    elif variant != "default":
        raise SystemExit(f"unknown variant {variant!r}")
    path = folder / "disk.toml"
    path.write_text(text)
    return parse_config(text, path)


def quantiles(s):
    q = np.percentile(s, [16, 50, 84])
    return f"{q[1]:6.2f} [{q[0]:.2f}, {q[2]:.2f}]"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--case", default="small-near", choices=list(SMALL_CASES))
    ap.add_argument("--seeds", type=int, nargs="*", default=None)
    ap.add_argument("--variants", nargs="*",
                    default=["default", "prior0", "known"])
    ap.add_argument("--steps", type=int, default=1500)
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING)
    case = {k: v for k, v in SMALL_CASES[args.case].items() if k != "high_snr"}
    seeds = args.seeds or [case["seed"]]
    print(f"{args.case}: truth {case['mass']} Mjup, {case['radius']} au, "
          f"{case['azimuth']} deg")
    print("seed variant   mass [16,84]            radius [16,84]          "
          "azimuth [16,84]         M*     aspect  s")
    with tempfile.TemporaryDirectory() as tmp:
        for seed in seeds:
            values = {**case, "seed": seed}
            cube_dir = Path(tmp) / f"cube_{seed}"
            cube_dir.mkdir()
            cfg0 = small_recovery_config(cube_dir, steps=args.steps, **values)
            cube = synth_from_config(cfg0, overwrite=True)
            for variant in args.variants:
                folder = Path(tmp) / f"{seed}_{variant}"
                folder.mkdir()
                cfg = variant_config(folder, values, variant, args.steps)
                (folder / "cube.fits").symlink_to(cube)
                t0 = time.perf_counter()
                run = run_fit(cfg, progress=False)
                res = read_result(run.results["none"])
                cols = [quantiles(res.samples[:, res.param_names.index(n)])
                        for n in ("mass", "radius", "azimuth")]
                bg = res.background or {}
                print(f"{seed:4d} {variant:8s} {cols[0]:22s} {cols[1]:22s} "
                      f"{cols[2]:22s} {bg.get('mstar_msun', np.nan):.3f}  "
                      f"{bg.get('aspect', np.nan):.3f}  "
                      f"{time.perf_counter() - t0:.0f}", flush=True)


if __name__ == "__main__":
    main()
