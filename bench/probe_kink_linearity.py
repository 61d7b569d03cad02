"""Do traced kinks grow with planet mass as the forward kink model says?

    python bench/probe_kink_linearity.py CONFIG [--masses 0.5 1 2 3 4 6]
        [--seeds 4] [--radius 110] [--azimuths -60 60] [--folder DIR]
        [--workers 2]

For a planet at a fixed radius and azimuth, synthesises the config's cube
(its noise, seeds 0..N-1, the same seeds for every mass so that the noise
cancels in the comparison across masses) with the background disk known
(``disk.fit_background = false``), traces it, builds the forward-model
likelihood as the known-background fit builds it, and measures at the true
planet

* ``a``  -- the weighted least-squares scale of the model kinks that best
  matches the traced kinks (data ~ a * model, jitter 0);
* ``M*`` -- the mass that maximises the likelihood with radius and azimuth
  held at the truth (a mass profile on a log grid, parabola-refined).

If the traced kinks follow the model, ``a`` and ``M* / M`` scatter around 1
at every mass; a drift with mass (e.g. traced kinks saturating at high mass)
is a model-vs-data difference that biases the fitted mass however well the
sampler works.  A diagnostic, not a speed benchmark; results:
docs/calibration.md.  Conditional on the wake model (PHYSICS.md section 8).
"""

import argparse
import dataclasses
import logging
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from probe_calibration_background import known_background_text  # noqa: E402
from probe_likelihood_sbc import traced_likelihood  # noqa: E402

from kinkfit.config import load_config, parse_config  # noqa: E402


def one_cube(job):
    """(mass, seed, azimuth, n, a, a_err, chi2/N at truth, M*/M)."""
    from kinkfit.config import SynthTruth
    from kinkfit.cube import read_cube
    from kinkfit.scenario import synth_from_config
    from kinkfit.trace import run_trace

    text, folder, mass, radius, azimuth, seed, noise = job
    cfg = parse_config(text)
    damping = cfg.wake.damping[0]
    path = Path(folder) / f"m{mass:g}_az{azimuth:g}_s{seed}.fits"
    cfg = dataclasses.replace(cfg, data=dataclasses.replace(cfg.data, cube=path))
    truth = SynthTruth(mass_mjup=mass, radius_au=radius, azimuth_deg=azimuth,
                       damping=damping, alpha=0.0, efold=np.inf)
    synth_from_config(cfg, output=path, overwrite=True, truth=truth, seed=1000 + seed,
                      noise=noise)
    cube = read_cube(path)
    like, pset = traced_likelihood(cfg, cube, run_trace(cfg, cube=cube), damping)
    d, s = like.data["offset_arcsec"], like.data["sigma_arcsec"]

    def pack(m):
        # the kinks do not depend on the jitter (a noise term); any prior value
        values = {"mass": m, "radius": radius, "azimuth": azimuth, "jitter": 0.01}
        return pset.pack({n: values[n] for n in pset.free})

    pred = like.predict_offset(pack(mass))[0]
    w = 1.0 / s ** 2
    a = np.sum(w * d * pred) / np.sum(w * pred ** 2)
    a_err = 1.0 / np.sqrt(np.sum(w * pred ** 2))
    chi2 = np.mean(w * (d - pred) ** 2)
    grid = mass * np.exp(np.linspace(np.log(0.5), np.log(2.0), 41))
    models = like.predict_offset(np.vstack([pack(m) for m in grid]))
    prof = np.sum(w * (d - models) ** 2, axis=1)
    prof = np.where(np.isfinite(prof), prof, np.inf)  # NaN: the model failed
    k = int(np.argmin(prof))
    best = grid[k]
    if 0 < k < grid.size - 1 and np.all(np.isfinite(prof[k - 1:k + 2])):
        x = np.log(grid[k - 1:k + 2])
        c = np.polyfit(x, prof[k - 1:k + 2], 2)
        if c[0] > 0:
            best = float(np.exp(-c[1] / (2 * c[0])))
    path.unlink(missing_ok=True)
    return mass, seed, azimuth, d.size, a, a_err, chi2, best / mass


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("config")
    ap.add_argument("--masses", type=float, nargs="+", default=[0.5, 1, 2, 3, 4, 6])
    ap.add_argument("--seeds", type=int, default=4)
    ap.add_argument("--radius", type=float, default=110.0)
    ap.add_argument("--azimuths", type=float, nargs="+", default=[-60.0, 60.0])
    ap.add_argument("--folder", default="probe_linearity")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--noise-free", action="store_true",
                    help="synthesise without noise (one cube per mass and azimuth)")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(asctime)s %(message)s")

    cfg = load_config(args.config)
    text = known_background_text(cfg.text)
    Path(args.folder).mkdir(parents=True, exist_ok=True)
    jobs = [(text, args.folder, m, args.radius, az, s, not args.noise_free)
            for az in args.azimuths for s in range(args.seeds) for m in args.masses]
    rows = []
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for row in pool.map(one_cube, jobs):
            rows.append(row)
            m, s, az, n, a, ea, chi2, ratio = row
            print(f"M {m:4.2f} M_J az {az:+5.0f} seed {s}: n {n:3d}  a {a:.3f} +- {ea:.3f}"
                  f"  chi2/N {chi2:.2f}  M*/M {ratio:.3f}", flush=True)
    r = np.array(rows)
    print("mass [M_J] | n cubes | a (weighted mean +- err) | M*/M (mean +- sem, median)")
    for m in args.masses:
        s = r[:, 0] == m
        a, ea, q = r[s, 4], r[s, 5], r[s, 7]
        wa = 1.0 / ea ** 2
        sem = q.std(ddof=1) / np.sqrt(q.size) if q.size > 1 else np.nan
        print(f"{m:5.2f} | {s.sum():2d} | {np.sum(wa * a) / np.sum(wa):.3f} +- "
              f"{1 / np.sqrt(np.sum(wa)):.3f} | {q.mean():.3f} +- {sem:.3f}, "
              f"{np.median(q):.3f}")


if __name__ == "__main__":
    main()
