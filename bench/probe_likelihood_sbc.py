"""Is the campaign's low mass in the sampler/posterior or in the data?
Refit injections whose kinks are drawn from the likelihood itself.

    python bench/probe_likelihood_sbc.py CONFIG STATE.json RUN_FOLDER
        [--inj 0 4 5 ...] [--replicas 1] [--first-replica 0] [--jitter-truth zero|prior|FLOAT]
        [--prior-truth] [--workers 2] [--out DIR] [--max-steps N]

``RUN_FOLDER`` holds the known-background refits of
``bench/probe_calibration_background.py`` (``inj_NNNN/cube.fits`` and
``trace.h5``).  For each chosen injection its cube and traced points are
reused and the forward kink model is built exactly as the known-background
fit builds it (true geometry, fitted emission profile, the config's nodes);
then the *data* kinks are replaced by the model kinks of the injection's true
planet plus Gaussian noise of each point's own sigma (and a jitter: 0 as in
the campaign's cubes, the injection's prior draw, or a fixed value in arcsec),
and the posterior is sampled exactly as ``kinkfit fit`` samples it (mode
search, emcee, same settings).  The data then follow the likelihood by
construction, so a posterior that is still low in mass points at the
sampler, the start or the prior volume; one that is centred points at the
difference between traced and modelled kinks.  Prints per fit the posterior
median / truth and the normalised bias of mass, radius and azimuth; on
average with the standard error.  A diagnostic, not a speed benchmark;
results: docs/calibration.md.  Conditional on the wake model (PHYSICS.md
section 8).
"""

import argparse
import dataclasses
import json
import logging
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from probe_calibration_background import known_background_text  # noqa: E402

from kinkfit.calibrate import (Posterior, _injection_config, draw_injections,  # noqa: E402
                               truth_statistics)
from kinkfit.config import load_config, parse_config  # noqa: E402

NAMES = ("mass", "radius", "azimuth")


def traced_likelihood(cfg, cube, traced, damping):
    """The known-background forward-model likelihood of one traced cube
    (true geometry, fitted emission profile, the config's nodes): ``(like,
    pset)``; ``traced`` is ``(ridges, background_fit, deviations)``."""
    from kinkfit.likelihood import KinkLikelihood
    from kinkfit.pipeline import adapted_forward_response, config_forward_response
    from kinkfit.scenario import wake_disk
    from kinkfit.wake.emulator import make_fit_model

    ridges, _, deviations = traced
    geometry = cfg.geometry()
    response, deviations = config_forward_response(cfg, cube, ridges, geometry,
                                                    deviations)
    cfg, response, deviations = adapted_forward_response(
        cfg, cube, ridges, geometry, deviations, planet=None,
        current=(response, deviations))
    pset = cfg.parameter_set(damping, with_planet=True)
    model = make_fit_model(wake_disk(cfg, mstar_msun=geometry.mstar_msun), damping)
    like = KinkLikelihood.from_deviations(deviations, model, pset,
                                          kind=cfg.likelihood.kind,
                                          dof=cfg.likelihood.dof, response=response)
    return like, pset


def known_background_likelihood(inj, run_folder):
    """The forward-model likelihood of one injection as its known-background
    fit builds it: ``(like, pset, cfg)`` (data: the traced kinks)."""
    from kinkfit.cube import read_cube
    from kinkfit.pipeline import _reuse_trace
    from kinkfit.results import file_sha256

    cfg = _injection_config(parse_config(inj.cfg_text), inj)
    cube_path = Path(run_folder) / f"inj_{inj.index:04d}" / "cube.fits"
    cfg = dataclasses.replace(cfg, data=dataclasses.replace(cfg.data, cube=cube_path))
    cube = read_cube(cube_path)
    traced = _reuse_trace(cube_path.parent / "trace.h5", cfg, file_sha256(cube_path))
    if traced is None:
        raise SystemExit(f"{cube_path.parent / 'trace.h5'}: no matching trace")
    like, pset = traced_likelihood(cfg, cube, traced, inj.damping)
    return like, pset, cfg


def replace_with_model_draw(like, pset, inj, replica, jitter_truth,
                            prior_truth=False):
    """Replace the likelihood's data kinks by the model kinks of the
    injection's truth (or, with ``prior_truth``, of a planet drawn from the
    prior) plus Gaussian noise (sigma_i, jitter); returns the truths."""
    truths = dict(inj.values)
    if prior_truth:
        draw = pset.sample_prior(np.random.default_rng([inj.noise_seed, replica, 1]), 1)
        truths.update({n: float(v) for n, v in zip(pset.free, draw[0])})
    if jitter_truth == "zero":
        jit = 0.0
    elif jitter_truth == "prior":
        jit = float(truths["jitter"])
    else:
        jit = float(jitter_truth)
    theta = pset.pack({n: truths[n] for n in pset.free})
    clean = like.predict_offset(theta)[0]
    rng = np.random.default_rng([inj.noise_seed, replica])
    sigma = np.sqrt(like.data["sigma_arcsec"] ** 2 + jit ** 2)
    data = dict(like.data)
    data["offset_arcsec"] = clean + rng.normal(0.0, sigma)
    like.data = data
    return truths


def sbc_fit(job):
    """One fit of likelihood-drawn kinks: (index, replica, stats, converged)."""
    from kinkfit.sampling import find_modes, run_sampler

    inj, run_folder, replica, jitter_truth, out, max_steps, prior_truth = job
    like, pset, cfg = known_background_likelihood(inj, run_folder)
    truths = replace_with_model_draw(like, pset, inj, replica, jitter_truth,
                                     prior_truth)

    seed = int(inj.sampler_seed) + 7919 * replica
    settings = dataclasses.replace(cfg.sampler, seed=seed, workers=1, progress=False)
    if max_steps:
        settings = dataclasses.replace(settings, max_steps=max_steps)
    start = find_modes(like.log_prob, pset, np.random.default_rng(seed),
                       n_tries=4096, n_polish=6)
    folder = Path(out) / f"inj_{inj.index:04d}_r{replica}"
    folder.mkdir(parents=True, exist_ok=True)
    outcome = run_sampler(like.log_prob, pset, settings, folder / "chain.h5",
                          initial=start, rng_seed=seed, resume=False)
    post = Posterior(tuple(outcome.param_names), outcome.flat_samples(),
                     bool(outcome.converged), str(folder / "chain.h5"))
    stats = truth_statistics(post, {n: truths[n] for n in NAMES}, seed=seed)
    return inj.index, replica, stats, outcome.converged


def campaign_parser(doc):
    """Parser with ``CONFIG STATE RUN_FOLDER`` and the campaign's
    ``--injections`` / ``--seed`` (shared by the known-background probes)."""
    ap = argparse.ArgumentParser(description=doc,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("config")
    ap.add_argument("state")
    ap.add_argument("run_folder")
    ap.add_argument("--injections", type=int, default=100)
    ap.add_argument("--seed", type=int, default=0)
    return ap


def known_background_injections(args, wanted):
    """The campaign's injections with index in ``wanted``, each with the
    known-background config text (same draws as the campaign, checked
    against the state file)."""
    cfg = load_config(args.config)
    done = json.loads(Path(args.state).read_text())["injections"]
    text = known_background_text(cfg.text)
    chosen = [dataclasses.replace(inj, cfg_path=None, cfg_text=text)
              for inj in draw_injections(cfg, args.injections, seed=args.seed)
              if inj.index in wanted]
    for inj in chosen:
        assert abs(done[str(inj.index)]["truths"]["mass"] - inj.truths["mass"]) < 1e-9
    return chosen


def main(argv=None):
    ap = campaign_parser(__doc__)
    ap.add_argument("--inj", type=int, nargs="*", default=None,
                    help="injection indices (default: every inj_NNNN in RUN_FOLDER)")
    ap.add_argument("--replicas", type=int, default=1)
    ap.add_argument("--first-replica", type=int, default=0)
    ap.add_argument("--prior-truth", action="store_true",
                    help="a planet drawn from the prior for each fit (a full "
                         "simulation-based calibration on the injections' points)")
    ap.add_argument("--jitter-truth", default="zero")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--out", default="probe_likelihood_sbc")
    ap.add_argument("--max-steps", type=int, default=0,
                    help="override sampler.max_steps (0: the config's)")
    args = ap.parse_args(argv)
    logging.basicConfig(level=logging.WARNING, format="%(asctime)s %(message)s")

    run = Path(args.run_folder)
    wanted = (set(args.inj) if args.inj is not None else
              {int(p.name[4:]) for p in run.glob("inj_*") if (p / "trace.h5").exists()})
    chosen = known_background_injections(args, wanted)
    jobs = [(inj, str(run), k, args.jitter_truth, args.out,
             args.max_steps, args.prior_truth)
            for k in range(args.first_replica, args.first_replica + args.replicas)
            for inj in chosen]
    kind = " (planets from the prior)" if args.prior_truth else ""
    print(f"{len(jobs)} fits{kind}: injections {[i.index for i in chosen]} x "
          f"{args.replicas} replicas, jitter truth {args.jitter_truth}", flush=True)
    rows = []
    with ProcessPoolExecutor(max_workers=args.workers) as pool:
        for index, replica, stats, converged in pool.map(sbc_fit, jobs):
            m = stats["mass"]
            rows.append([m["median"] / m["truth"]] + [stats[n]["bias"] for n in NAMES]
                        + [stats[n]["quantile"] for n in NAMES])
            print(f"inj {index:3d} r{replica} truth {m['truth']:.2f} M_J: mass "
                  f"median/truth {rows[-1][0]:.3f} z {m['bias']:+.2f} | radius z "
                  f"{stats['radius']['bias']:+.2f} | azimuth z "
                  f"{stats['azimuth']['bias']:+.2f} (converged {converged})", flush=True)
    a = np.array(rows)
    n = len(a)
    sem = a.std(axis=0, ddof=1) / np.sqrt(n) if n > 1 else np.full(a.shape[1], np.nan)
    q = a[:, 4:]
    in68 = np.mean((q > 0.16) & (q < 0.84), axis=0)
    in95 = np.mean((q > 0.025) & (q < 0.975), axis=0)
    spread = a[:, 1:4].std(axis=0, ddof=1) if n > 1 else np.full(3, np.nan)
    print(f"mean over {n}: mass median/truth {a[:, 0].mean():.3f} +- {sem[0]:.3f}; z "
          + ", ".join(f"{nm} {a[:, 1 + j].mean():+.2f} +- {sem[1 + j]:.2f}"
                      for j, nm in enumerate(NAMES))
          + "; 68% / 95% coverage " + ", ".join(f"{nm} {in68[j]:.2f} / {in95[j]:.2f}"
                                                for j, nm in enumerate(NAMES))
          + "; z spread " + ", ".join(f"{nm} {spread[j]:.2f}"
                                      for j, nm in enumerate(NAMES)))
    Path(args.out).mkdir(parents=True, exist_ok=True)
    (Path(args.out) / f"rows_{args.first_replica}_{args.jitter_truth}"
     f"{'_prior' if args.prior_truth else ''}.json").write_text(json.dumps(rows))


if __name__ == "__main__":
    main()
