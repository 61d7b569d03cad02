"""Does noise shrink the traced kinks?  Data kinks of noisy and noise-free
cubes against the forward model, on the calibration set-up.

    python bench/probe_kink_noise.py STATE.json [--inj 10 12 5] [--seeds 6]
        [--config bench/calibration_subpixel.toml]

For each chosen injection of a calibration campaign (its planet from the
state file) and each noise seed: the generator
(:func:`kinkfit.scenario.synth_from_config`) writes the noisy cube and the
noise-free one; the noisy cube is traced with the true geometry; on the same
cuts the response (:func:`kinkfit.response.build_ridge_response`, the
config's sub-pixel nodes and back-node stride, true geometry and emission)
gives the data kinks of the noisy cube, those of the noise-free cube, and
the model kinks of the true planet (exact wake at the nodes).  Printed:
slopes (least squares through 0, plain and weighted by the points' errors
as the likelihood weights them) of noisy-data on model, noise-free-data on
model, and noisy on noise-free data.  A slope below 1 of noisy on noise-free
data means the estimator shrinks kinks under noise, which a fit would
absorb by lowering the mass (kink ~ M^0.5 far from the planet, ~ M near it).
A diagnostic, not a speed benchmark (single process; nice it, set
OMP_NUM_THREADS=1).  Results: docs/calibration.md.
"""

import argparse
import json
import math
import tempfile
from pathlib import Path

import numpy as np

from kinkfit.config import SynthTruth, load_config
from kinkfit.cube import read_cube
from kinkfit.response import build_ridge_response
from kinkfit.scenario import (line_emission, planet_perturbation, synth_from_config,
                              wake_disk)
from kinkfit.trace import trace_ridges

ROOT = Path(__file__).resolve().parents[1]


def slope(y, x, w=None):
    """Least-squares slope of y on x through the origin (weights w)."""
    ok = np.isfinite(y) & np.isfinite(x)
    w = np.ones_like(x) if w is None else w
    y, x, w = y[ok], x[ok], w[ok]
    return float(np.sum(w * x * y) / np.sum(w * x * x))


def scan_masses(resp, truth, model_fn, data_sets, sigma, jitter=0.005):
    """Mass (M_J) of the chi2 minimum along mass at the true position, for
    each data vector in ``data_sets`` (the model along mass is computed once)."""
    masses = np.linspace(0.5, 1.5, 201) * truth.mass_mjup
    n = masses.size
    params = {"mass": masses, "radius": np.full(n, truth.radius_au),
              "azimuth": np.full(n, truth.azimuth_deg), "alpha": np.zeros(n),
              "efold": np.full(n, math.inf)}
    dvr, dvp = model_fn(params, resp.node_r_au, resp.node_phi_rad)
    model = resp.offsets_from_wake(np.asarray(dvr), np.asarray(dvp))
    out = []
    for data in data_sets:
        ok = np.isfinite(data)
        chi2 = np.nansum(((data - model)[:, ok]) ** 2 / (sigma[ok] ** 2 + jitter ** 2),
                         axis=1)
        out.append(float(masses[int(np.argmin(chi2))]))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("state")
    ap.add_argument("--inj", type=int, nargs="*", default=[10, 12, 5])
    ap.add_argument("--seeds", type=int, default=6)
    ap.add_argument("--config", default=str(ROOT / "bench" / "calibration_subpixel.toml"))
    ap.add_argument("--campaign-noise", action="store_true",
                    help="one realisation per injection: the campaign's own noise seed")
    ap.add_argument("--mass-scan", action="store_true",
                    help="also the mass of the chi2 minimum at the true position "
                         "(fit's wake emulator, jitter 5 mas), noisy and noise-free")
    args = ap.parse_args(argv)
    cfg = load_config(args.config)
    lk = cfg.likelihood
    kw = dict(node_stride=1, back_layer=True, back_stride=lk.back_node_stride,
              node_oversample=lk.node_subpixels)
    geom, emission = cfg.geometry(), line_emission(cfg)
    records = json.loads(Path(args.state).read_text())["injections"]
    tmp = Path(tempfile.mkdtemp())
    allrows, ratios = [], []
    model_fn = None
    if args.mass_scan:
        from kinkfit.wake.emulator import make_fit_model
        model_fn = make_fit_model(wake_disk(cfg, mstar_msun=geom.mstar_msun), "none")
    for i in args.inj:
        v = records[str(i)]["values"]
        truth = SynthTruth(mass_mjup=v["mass"], radius_au=v["radius"],
                           azimuth_deg=v["azimuth"], damping="none", alpha=0.0,
                           efold=math.inf)
        pert = planet_perturbation(cfg, truth)
        clean = read_cube(synth_from_config(cfg, output=tmp / f"clean{i}.fits",
                                            truth=truth, noise=False, overwrite=True))
        print(f"== inj {i}: {truth.mass_mjup:.2f} M_J, {truth.radius_au:.1f} au, "
              f"{truth.azimuth_deg:.1f} deg", flush=True)
        seeds = ([int(records[str(i)]["noise_seed"])] if args.campaign_noise
                 else [1000 + k for k in range(args.seeds)])
        for seed in seeds:
            noisy = read_cube(synth_from_config(cfg, output=tmp / f"n{i}_{seed}.fits",
                                                truth=truth, seed=seed, overwrite=True))
            ridges = trace_ridges(noisy, geom, cfg.trace)
            r_noisy = build_ridge_response(noisy, ridges, geom, emission, **kw)
            r_clean = build_ridge_response(clean, ridges, geom, emission, **kw)
            dvr, dvp, _ = pert(r_noisy.node_r_au, r_noisy.node_phi_rad,
                               np.ones_like(r_noisy.node_r_au))
            model = r_noisy.offsets_from_wake(dvr[None], dvp[None])[0]
            d_noisy, d_clean = r_noisy.observed, r_clean.observed
            w = None
            if r_noisy.n_points == len(ridges):
                w = 1.0 / np.asarray(ridges.sigma_arcsec, float) ** 2
            row = (slope(d_noisy, model), slope(d_clean, model), slope(d_noisy, d_clean),
                   slope(d_noisy, model, w), slope(d_noisy, d_clean, w))
            allrows.append(row)
            extra = ""
            if model_fn is not None and w is not None:
                sig = np.asarray(ridges.sigma_arcsec, float)
                mn, mc = np.array(scan_masses(r_noisy, truth, model_fn, (d_noisy, d_clean),
                                              sig)) / truth.mass_mjup
                ratios.append((mn, mc))
                extra = f" | chi2-min mass / truth: noisy {mn:.3f}, noise-free {mc:.3f}"
            print(f"seed {seed}: {len(ridges)} points | noisy/model {row[0]:.3f} "
                  f"(weighted {row[3]:.3f}), clean/model {row[1]:.3f}, "
                  f"noisy/clean {row[2]:.3f} (weighted {row[4]:.3f}){extra}", flush=True)
    a = np.array(allrows)
    m, e = a.mean(0), a.std(0, ddof=1) / np.sqrt(len(a))
    print(f"mean over {len(a)}: noisy/model {m[0]:.3f} +- {e[0]:.3f} (weighted "
          f"{m[3]:.3f} +- {e[3]:.3f}); clean/model {m[1]:.3f} +- {e[1]:.3f}; "
          f"noisy/clean {m[2]:.3f} +- {e[2]:.3f} (weighted {m[4]:.3f} +- {e[4]:.3f})")
    if len(ratios) > 1:
        r = np.array(ratios)
        print(f"chi2-min mass / truth over {len(r)}: noisy {r[:, 0].mean():.3f} +- "
              f"{r[:, 0].std(ddof=1) / np.sqrt(len(r)):.3f}, noise-free "
              f"{r[:, 1].mean():.3f} +- {r[:, 1].std(ddof=1) / np.sqrt(len(r)):.3f}")


if __name__ == "__main__":
    main()
