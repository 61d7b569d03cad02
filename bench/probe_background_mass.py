"""Fitted background disk and the planet mass (CI-sized recovery cases).

    python bench/probe_background_mass.py [--case small-near] [--seeds 51 31 41]
        [--swap] [--planet-free] [--free-position]

For each noise seed of a case of ``tests/recovery_cases.py`` (SMALL_CASES)
the generator writes the cube, :func:`kinkfit.trace.run_trace` traces it
and fits the background disk and the emission profile (the pipeline's
path), and the forward kink model (:func:`kinkfit.pipeline.forward_response`
machinery) is built on the *same* traced cuts with

(a) the true geometry and the true emission profile, no nuisance;
(b) the fitted geometry and fitted emission profile, no nuisance
    (``likelihood.background_prior = 0``);
(c) as (b) with the background marginalised (the pipeline default).

The log-probability is evaluated on a grid of planet masses at the
injected radius and azimuth, maximised over the jitter on a grid (a
profile); printed: the mass of the maximum (and in units of the injected
mass) and the masses where the profile has dropped by 0.5 (a rough 68%
range).  ``--free-position`` also maximises over radius and azimuth (a
small grid around the truth), which is closer to what the sampler sees.

``--swap`` evaluates (b) and (c) with single background quantities swapped
to their true values (stellar mass, inclination, PA, centre, vsys, layer
height; the emission profile), to find which one moves the mass.
``--posterior`` samples each variant as the pipeline does
(:func:`kinkfit.sampling.find_modes` + :func:`kinkfit.sampling.run_sampler`,
the case's walkers and steps) and prints posterior medians and 16/84%
quantiles of mass and radius instead of the mass profile.
``--mask-planet D`` refits the background without the points within D au
(disk plane) of the injected planet, starting from the pipeline's fit, and
evaluates the planet with that background (and its nuisance).
``--planet-free`` also fits the background to the cube of the same noise
without the planet: the difference of the two fits is the pull of the
planet's kinks on the background.

A diagnostic, not a speed benchmark.  Single process; run it niced with
OMP_NUM_THREADS=1.  Results: docs/physics/response.md, "Fitted background
and the mass".
"""

import argparse
import math
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))

from recovery_cases import SMALL_CASES, small_recovery_config  # noqa: E402

from kinkfit.diskfit import _get, _set  # noqa: E402
from kinkfit.likelihood import KinkLikelihood  # noqa: E402
from kinkfit.pipeline import background_nuisance  # noqa: E402
from kinkfit.response import build_ridge_response  # noqa: E402
from kinkfit.scenario import line_emission, synth_from_config, wake_disk  # noqa: E402
from kinkfit.synth import LineEmission  # noqa: E402
from kinkfit.trace import load_cube, run_trace  # noqa: E402
from kinkfit.wake.emulator import make_fit_model  # noqa: E402

GROUPS = {
    "mstar": ("mstar_msun",),
    "incl": ("inclination_deg",),
    "pa": ("position_angle_deg",),
    "centre": ("x0_arcsec", "y0_arcsec"),
    "vsys": ("vsys_kms",),
    "height": ("aspect", "flaring"),
}


def fitted_emission(dev):
    spec = dev.meta["bias"]["emission"]
    return LineEmission(**{k: float(v) for k, v in spec.items()})


def make_like(cfg, cube, ridges, dev, geom, emission, nuisance=None,
              wake_mstar=None):
    """Likelihood of the forward model with this background (and the wake
    scaled with ``wake_mstar``, default the geometry's stellar mass)."""
    resp = build_ridge_response(cube, ridges, geom, emission, node_stride=1,
                                back_layer=True, back_stride=2)
    d = replace(dev, offset_arcsec=resp.observed)
    damping = cfg.synth.truth.damping
    mstar = geom.mstar_msun if wake_mstar is None else wake_mstar
    model = make_fit_model(wake_disk(cfg, mstar_msun=mstar), damping)
    pset = cfg.parameter_set(damping, with_planet=True)
    return KinkLikelihood.from_deviations(d, model, pset, response=resp,
                                          nuisance=nuisance), pset


def profile(like, pset, truth, free_position=False):
    """Mass grid, log-probability profiled over jitter (and position)."""
    masses = np.linspace(0.4, 1.5, 45) * truth.mass_mjup
    jitters = np.geomspace(1.5e-3, 3e-2, 10)
    radii = [truth.radius_au]
    azims = [truth.azimuth_deg]
    if free_position:
        radii = truth.radius_au + np.array([-4.0, -2.0, 0.0, 2.0, 4.0])
        azims = truth.azimuth_deg + np.array([-3.0, -1.5, 0.0, 1.5, 3.0])
    vals = {"alpha": truth.alpha, "efold": truth.efold}
    rows = []
    for r in radii:
        for a in azims:
            for j in jitters:
                for m in masses:
                    v = {**vals, "mass": m, "radius": r, "azimuth": a,
                         "jitter": j}
                    rows.append([v[n] for n in pset.free])
    theta = np.array(rows)
    lp = like.log_prob(theta).reshape(-1, masses.size)
    prof = lp.max(axis=0)
    return masses, prof


def posterior(like, pset, cfg, folder, label):
    """Posterior median [16, 84%] of mass and radius, sampled as in
    :func:`kinkfit.pipeline.fit_assumption`."""
    from kinkfit.sampling import find_modes, run_sampler
    rng = np.random.default_rng(cfg.sampler.seed)
    start = find_modes(like.log_prob, pset, rng, n_tries=4096, n_polish=6)
    ck = Path(folder) / f"chain_{abs(hash(label))}.h5"
    out = run_sampler(like.log_prob, pset, cfg.sampler, ck, initial=start,
                      rng_seed=cfg.sampler.seed, resume=False)
    flat = out.flat_samples()
    cols = []
    for n in ("mass", "radius"):
        q = np.percentile(flat[:, list(out.param_names).index(n)], [16, 50, 84])
        cols.append(f"{n} {q[1]:.2f} [{q[0]:.2f}, {q[2]:.2f}]")
    return ", ".join(cols)


def summary(masses, prof, m_true):
    k = int(np.argmax(prof))
    fine = np.linspace(masses[0], masses[-1], 2001)
    pf = np.interp(fine, masses, prof)
    kk = int(np.argmax(pf))
    inside = fine[pf >= pf[kk] - 0.5]
    return (f"peak {fine[kk]:.2f} Mjup ({fine[kk] / m_true:.2f}x), "
            f"dlnP=0.5 range {inside.min():.2f}-{inside.max():.2f}, "
            f"lnP(truth)-max {np.interp(m_true, masses, prof) - prof[k]:+.1f}")


def geom_table(fit, true_geom):
    parts = []
    for n, v, e in zip(fit.names, fit.values, fit.errors):
        t = _get(true_geom, n)
        parts.append(f"{n} {v:.4g} (true {t:.4g}, {(v - t) / e:+.1f} sigma)")
    return "; ".join(parts)


def run_seed(name, seed, args, tmp):
    values = {k: v for k, v in SMALL_CASES[name].items() if k != "high_snr"}
    values["seed"] = seed
    folder = Path(tmp) / f"{name}_{seed}"
    folder.mkdir()
    cfg = small_recovery_config(folder, **values)
    synth_from_config(cfg, overwrite=True)
    cube = load_cube(cfg)
    t0 = time.perf_counter()
    ridges, fit, dev = run_trace(cfg, cube=cube)
    truth = cfg.synth.truth
    tgeom, tem = cfg.geometry(), line_emission(cfg)
    fgeom, fem = fit.geometry, fitted_emission(dev)
    print(f"\n== {name}, seed {seed}: truth {truth.mass_mjup} Mjup, "
          f"{truth.radius_au} au, {truth.azimuth_deg} deg; {len(ridges)} points, "
          f"trace {time.perf_counter() - t0:.0f} s", flush=True)
    print("fitted background: " + geom_table(fit, tgeom))
    print(f"emission: fitted sigma_v(100 au) {fem.line_sigma_kms(100.0):.4f} "
          f"(true {tem.line_sigma_kms(100.0):.4f}) km/s, back_ratio "
          f"{fem.back_ratio:.3f} (true {tem.back_ratio:.3f}), index "
          f"{fem.temperature_index:.3f} (true {tem.temperature_index:.3f})")
    nuis = background_nuisance(cfg, fit, dev)
    m0 = truth.mass_mjup

    def show(label, geom, em, nuisance=None, wake_mstar=None):
        like, pset = make_like(cfg, cube, ridges, dev, geom, em, nuisance,
                               wake_mstar)
        if args.posterior:
            print(f"{label:44s} {posterior(like, pset, cfg, folder, label)}",
                  flush=True)
            return
        masses, prof = profile(like, pset, truth, args.free_position)
        print(f"{label:44s} {summary(masses, prof, m0)}", flush=True)

    if not args.skip_abc:
        show("(a) true geometry + emission", tgeom, tem)
        show("(b) fitted, no nuisance", fgeom, fem)
        show("(c) fitted, nuisance (default)", fgeom, fem, nuis)
    if args.posterior_swap:
        show("    fitted, true height", _set(fgeom, {k: _get(tgeom, k) for k in
                                                 GROUPS["height"]}), fem, nuis)
        show("    fitted, true M* (geometry and wake)",
             _set(fgeom, {"mstar_msun": tgeom.mstar_msun}), fem, nuis)
        show("    fitted, true inclination",
             _set(fgeom, {"inclination_deg": tgeom.inclination_deg}), fem, nuis)
        show("    fitted, true height, M*, incl",
             _set(fgeom, {k: _get(tgeom, k) for k in
                          ("aspect", "flaring", "mstar_msun",
                           "inclination_deg")}), fem, nuis)
    if args.mask_planet:
        from kinkfit.diskfit import fit_background
        rp, pp = truth.radius_au, math.radians(truth.azimuth_deg)
        d2 = (dev.r_au ** 2 + rp ** 2
              - 2 * dev.r_au * rp * np.cos(dev.phi_rad - pp))
        keep = np.sqrt(np.maximum(d2, 0)) > args.mask_planet
        fit2 = fit_background(ridges.select(keep), fgeom,
                              bias=np.asarray(dev.bias_arcsec)[keep])
        print(f"background refit without {np.sum(~keep)} points within "
              f"{args.mask_planet:g} au of the planet: " + geom_table(fit2, tgeom))
        show("    masked refit, no nuisance", fit2.geometry, fem)
        show("    masked refit, nuisance", fit2.geometry, fem,
             background_nuisance(cfg, fit2, dev))
    if args.swap:
        show("    true geometry, fitted emission", tgeom, fem)
        show("    fitted geometry, true emission", fgeom, tem)
        show("    fitted geometry, true emission, nuisance", fgeom, tem, nuis)
        show("    fitted, wake with true M*", fgeom, fem, None,
             tgeom.mstar_msun)
        for g, keys in GROUPS.items():
            geo = _set(fgeom, {k: _get(tgeom, k) for k in keys})
            show(f"    fitted, true {g}", geo, fem)
        for g, keys in GROUPS.items():
            geo = _set(tgeom, {k: _get(fgeom, k) for k in keys})
            show(f"    true (fitted emission), fitted {g} only", geo, fem)
    if args.planet_free:
        cfg0 = replace(cfg, synth=replace(cfg.synth, truth=None))
        clean = folder / "noplanet.fits"
        from kinkfit.scenario import observing_setup
        from kinkfit.synth import write_synthetic_cube
        write_synthetic_cube(clean, tgeom, observing_setup(cfg0),
                             line_emission(cfg0), perturbation=None,
                             seed=cfg.synth.seed, overwrite=True)
        from kinkfit.cube import read_cube
        _, fit0, _ = run_trace(cfg0, cube=read_cube(clean))
        print("planet-free cube, fitted background: " + geom_table(fit0, tgeom))
        pull = (fit.values - fit0.values) / fit.errors
        print("pull of the planet (with - without, fitted sigmas): "
              + ", ".join(f"{n} {p:+.1f}" for n, p in zip(fit.names, pull)))
        show("    planet-free fit geometry (fitted em.)", fit0.geometry, fem)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--case", default="small-near", choices=list(SMALL_CASES))
    ap.add_argument("--seeds", type=int, nargs="*", default=None)
    ap.add_argument("--swap", action="store_true")
    ap.add_argument("--planet-free", action="store_true")
    ap.add_argument("--free-position", action="store_true")
    ap.add_argument("--skip-abc", action="store_true",
                    help="leave out the variants (a), (b), (c)")
    ap.add_argument("--mask-planet", type=float, default=0.0,
                    help="refit the background without points within this "
                         "many au of the planet")
    ap.add_argument("--posterior", action="store_true",
                    help="sample each variant (pipeline sampler) instead of "
                         "the mass profile")
    ap.add_argument("--posterior-swap", action="store_true",
                    help="with --posterior: fitted geometry with the true "
                         "height / M* / inclination (nuisance kept)")
    args = ap.parse_args(argv)
    seeds = args.seeds or [SMALL_CASES[args.case]["seed"]]
    with tempfile.TemporaryDirectory() as tmp:
        for s in seeds:
            run_seed(args.case, s, args, tmp)


if __name__ == "__main__":
    main()
