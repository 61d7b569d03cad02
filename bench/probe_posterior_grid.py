"""Does emcee sample the posterior the likelihood defines?  The marginal mass
posterior of one fit integrated on a grid, against the fit's chain.

    python bench/probe_posterior_grid.py CONFIG STATE.json RUN_FOLDER --inj N
        [--replica R [--prior-truth] | --traced] [--chain CHAIN.h5] [--jitter-mas 1.5]
        [--n 48] [--mass-range 0.55 1.6] [--radius-half 16] [--azimuth-half 24]

Builds the likelihood of injection ``N`` as ``bench/probe_likelihood_sbc.py``
does (known background, the config's nodes); its data are the traced kinks
(``--traced``) or the same likelihood draw as that probe's replica ``R``.
The log-posterior (prior included) is evaluated on a grid in log mass
(default 0.55-1.6 x truth), radius (truth +- 16 au) and azimuth (+- 24 deg)
at a fixed jitter (the chains put it at 1-2 mas, uncorrelated with the mass);
the marginal posterior of the mass is the sum over radius and azimuth times
the volume element ``m dlog m``.  Printed: the grid's median, 16/84%
percentiles and MAP of the mass, the mass of the profile-likelihood maximum
(max over radius and azimuth, prior excluded), the share of the grid's
posterior on its edges (must be small for the numbers to mean anything),
and with ``--chain`` the same percentiles of the chain (after the
sampler's own burn-in: a third of the steps).  A diagnostic of the sampler,
not a speed benchmark; results: docs/calibration.md.
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from probe_likelihood_sbc import (campaign_parser,  # noqa: E402
                                  known_background_injections,
                                  known_background_likelihood,
                                  replace_with_model_draw)



def weighted_percentiles(x, w, q):
    """Percentiles ``q`` (0-100) of values ``x`` with weights ``w`` (x sorted)."""
    c = np.cumsum(w)
    c = c / c[-1]
    return np.interp(np.asarray(q) / 100.0, c, x)


def main(argv=None):
    ap = campaign_parser(__doc__)
    ap.add_argument("--inj", type=int, required=True)
    ap.add_argument("--replica", type=int, default=0)
    ap.add_argument("--traced", action="store_true")
    ap.add_argument("--jitter-truth", default="zero")
    ap.add_argument("--prior-truth", action="store_true",
                    help="the planet drawn from the prior, as probe_likelihood_sbc.py "
                         "--prior-truth draws it for this replica")
    ap.add_argument("--chain", default=None)
    ap.add_argument("--jitter-mas", type=float, default=1.5)
    ap.add_argument("--n", type=int, default=48)
    ap.add_argument("--mass-range", type=float, nargs=2, default=(0.55, 1.6),
                    help="grid in mass, as factors of the truth")
    ap.add_argument("--radius-half", type=float, default=16.0, help="au")
    ap.add_argument("--azimuth-half", type=float, default=24.0, help="deg")
    args = ap.parse_args(argv)

    inj = known_background_injections(args, {args.inj})[0]
    like, pset, _ = known_background_likelihood(inj, args.run_folder)
    truths = dict(inj.values)
    if not args.traced:
        truths = replace_with_model_draw(like, pset, inj, args.replica, args.jitter_truth,
                                         prior_truth=args.prior_truth)

    n = args.n
    logm = np.log(truths["mass"]) + np.linspace(*np.log(args.mass_range), n)
    rad = truths["radius"] + np.linspace(-args.radius_half, args.radius_half, n)
    azi = truths["azimuth"] + np.linspace(-args.azimuth_half, args.azimuth_half, n)
    M, R, A = np.meshgrid(np.exp(logm), rad, azi, indexing="ij")
    vals = {"mass": M.ravel(), "radius": R.ravel(), "azimuth": A.ravel(),
            "jitter": np.full(M.size, args.jitter_mas / 1000.0)}
    theta = pset.pack(vals)
    lp = np.concatenate([like.log_prob(theta[k:k + 4096])
                         for k in range(0, len(theta), 4096)]).reshape(M.shape)
    lprior = pset.log_prior(theta).reshape(M.shape)
    lpost = lp + np.log(M)                      # volume element m dlog m
    w = np.exp(lpost - lpost[np.isfinite(lpost)].max())
    w[~np.isfinite(w)] = 0.0
    marg = w.sum(axis=(1, 2))
    edge = (w[0].sum() + w[-1].sum() + w[:, 0].sum() + w[:, -1].sum()
            + w[:, :, 0].sum() + w[:, :, -1].sum()) / w.sum()
    m = np.exp(logm)
    p16, p50, p84 = weighted_percentiles(m, marg, [16, 50, 84])
    profile = np.max(np.where(np.isfinite(lp - lprior), lp - lprior, -np.inf), axis=(1, 2))
    t = truths["mass"]
    print(f"inj {inj.index} {'traced' if args.traced else f'replica {args.replica}'}: "
          f"truth {t:.3f} M_J, {truths['radius']:.1f} au, {truths['azimuth']:.1f} deg, "
          f"jitter {truths['jitter'] * 1e3:.2f} mas; grid {n}^3, jitter {args.jitter_mas} mas, edge share "
          f"{edge:.1e}")
    print(f"  grid marginal: median/truth {p50 / t:.3f} [{p16 / t:.3f}, {p84 / t:.3f}], "
          f"MAP/truth {m[np.argmax(marg)] / t:.3f}; profile-likelihood max "
          f"{m[np.argmax(profile)] / t:.3f}; quantile of truth "
          f"{np.interp(np.log(t), logm, np.cumsum(marg) / marg.sum()):.2f}")
    if args.chain:
        from kinkfit.sampling import read_checkpoint
        chain, _, it = read_checkpoint(args.chain)
        s = chain[it // 3:].reshape(-1, chain.shape[-1])[:, pset.free.index("mass")]
        q16, q50, q84 = np.percentile(s, [16, 50, 84])
        print(f"  chain ({it} steps): median/truth {q50 / t:.3f} [{q16 / t:.3f}, "
              f"{q84 / t:.3f}]; quantile of truth {np.mean(s < t):.2f}")


if __name__ == "__main__":
    main()
