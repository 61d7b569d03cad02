"""Is the campaign's low mass the fitted background?  Refit chosen injections
of a calibration campaign with the background disk known.

    python bench/probe_calibration_background.py CONFIG STATE.json
        [--min-mass 1.6] [--count 10] [--injections 100] [--seed 0]
        [--workers 2] [--folder DIR]

Takes the planets and noise seeds of the campaign (``draw_injections`` with
the campaign's config, count and seed: the same draws), keeps the first
``--count`` injections with a true mass >= ``--min-mass`` that the state
file lists as done, and fits each again with ``disk.fit_background = false``
(the true geometry and stellar mass; the emission profile is still fitted)
on the same noisy cube (re-synthesised from its seed).  Prints, per
injection and on average, the posterior median / truth and the normalised
bias (median - truth) / half-width(16-84%) for both fits: the paired
difference removes most of the noise realisation.  A diagnostic, not a
speed benchmark; results: docs/calibration.md.  Conditional on the wake
model, as the campaign (PHYSICS.md section 8).
"""

import argparse
import dataclasses
import json
import logging
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

from kinkfit.calibrate import draw_injections, pipeline_posterior, truth_statistics
from kinkfit.config import load_config

_KEY = "[disk]\n"


def known_background_text(text: str) -> str:
    """The config text with ``fit_background = false`` in its [disk] table."""
    if text.count(_KEY) != 1:
        raise SystemExit("config: expected exactly one [disk] table")
    return text.replace(_KEY, _KEY + "fit_background = false\n", 1)


def refit_known(inj):
    post = pipeline_posterior(inj)
    stats = truth_statistics(post, inj.truths, seed=inj.sampler_seed)
    return inj.index, stats, post.converged


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("config")
    ap.add_argument("state")
    ap.add_argument("--min-mass", type=float, default=1.6)
    ap.add_argument("--count", type=int, default=10)
    ap.add_argument("--injections", type=int, default=100)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--folder", default="probe_known_background")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(asctime)s %(message)s")

    cfg = load_config(args.config)
    done = {int(k): r for k, r in json.loads(Path(args.state).read_text())["injections"].items()
            if r.get("status") == "done"}
    text = known_background_text(cfg.text)
    chosen = []
    for inj in draw_injections(cfg, args.injections, seed=args.seed):
        if inj.index in done and inj.truths["mass"] >= args.min_mass:
            chosen.append(dataclasses.replace(
                inj, cfg_path=None, cfg_text=text,
                folder=str(Path(args.folder) / f"inj_{inj.index:04d}")))
        if len(chosen) == args.count:
            break
    for inj in chosen:   # same draws as the campaign
        assert abs(done[inj.index]["truths"]["mass"] - inj.truths["mass"]) < 1e-9
    print(f"{len(chosen)} injections: {[i.index for i in chosen]}", flush=True)

    rows = []
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for index, stats, converged in pool.map(refit_known, chosen):
            d = done[index]["stats"]["mass"]
            k = stats["mass"]
            rows.append((d["median"] / d["truth"], k["median"] / k["truth"],
                         d["bias"], k["bias"]))
            print(f"inj {index:3d} truth {d['truth']:.2f} M_J | fitted background: "
                  f"median/truth {rows[-1][0]:.3f} z {d['bias']:+.2f} | known: "
                  f"{rows[-1][1]:.3f} z {k['bias']:+.2f} (converged {converged}) | "
                  f"radius z {done[index]['stats']['radius']['bias']:+.2f} -> "
                  f"{stats['radius']['bias']:+.2f}, azimuth z "
                  f"{done[index]['stats']['azimuth']['bias']:+.2f} -> "
                  f"{stats['azimuth']['bias']:+.2f}", flush=True)
    a = np.array(rows)
    n = len(a)
    sem = a.std(axis=0, ddof=1) / np.sqrt(n) if n > 1 else np.full(4, np.nan)
    diff = a[:, 3] - a[:, 2]
    print(f"mean over {n}: median/truth fitted {a[:, 0].mean():.3f} +- {sem[0]:.3f}, "
          f"known {a[:, 1].mean():.3f} +- {sem[1]:.3f}; z fitted {a[:, 2].mean():+.2f} "
          f"+- {sem[2]:.2f}, known {a[:, 3].mean():+.2f} +- {sem[3]:.2f}; paired "
          f"z(known) - z(fitted) {diff.mean():+.2f} +- "
          f"{diff.std(ddof=1) / np.sqrt(n) if n > 1 else float('nan'):.2f}")


if __name__ == "__main__":
    main()
