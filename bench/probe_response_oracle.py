"""The forward kink model against the generator's noise-free cube (oracle).

    python bench/probe_response_oracle.py demo [--variant S:OS:BS ...]
    python bench/probe_response_oracle.py small --inj 12 5 1 [--campaign DIR]
        [--variant S:OS:BS ...] [--fitted] [--emulator] [--gen-oversample N]
        [--wake-at-centre]

``--variant SEARCH:OVERSAMPLE:BACKSTRIDE`` builds the response with
``search_beams``, ``node_oversample`` and ``back_stride`` (repeatable;
default ``1.5:1:2``, the model before sub-pixel nodes).

For each case the generator (:func:`kinkfit.scenario.synth_from_config`, the
path the calibration injections use) writes the *noise-free* cube with the
injected planet; the traced cuts are those of the noisy cube (the
campaign's ``trace.h5`` for an injection, a fresh trace with the true
geometry for the demo).  On the noise-free cube the response's own
estimator (soft maximum along the cut, relative to the background model's)
gives the "traced" kinks -- what a perfect forward model must reproduce --
and :class:`kinkfit.response.RidgeResponse` at the true planet (the exact
wake, :func:`kinkfit.wake.model.wake_perturbations`, at its nodes; with
``--emulator`` also the fit's tabulated wake model) gives the model kinks.
Printed per case and per response variant: number of points, the slope of
traced on model (least squares through 0), the correlation, the rms
residual and the signal rms (mas), and how many model peaks sit on the
last inner sample of their cut (clipped).

Geometry and emission are the generator's truth, or with ``--fitted`` the
campaign's fitted background disk and emission profile.  A diagnostic, not
a benchmark of speed; single process (set OMP_NUM_THREADS=1 and nice it).
"""

import argparse
import math
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from kinkfit.config import SynthTruth, load_config
from kinkfit.cube import read_cube
from kinkfit.response import build_ridge_response
from kinkfit.scenario import (line_emission, observing_setup,
                              planet_perturbation, synth_from_config, wake_disk)
from kinkfit.synth import LineEmission, write_synthetic_cube
from kinkfit.trace import load_cube, read_trace_file, trace_ridges

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo.toml"
SMALL = ROOT / "bench" / "calibration_small.toml"
CAMPAIGN = Path("/work/campaigns/calibration_small")


def _stats(traced, model):
    ok = np.isfinite(traced) & np.isfinite(model)
    t, m = traced[ok], model[ok]
    slope = float(np.sum(t * m) / np.sum(m ** 2))
    corr = float(np.corrcoef(t, m)[0, 1])
    resid = float(np.sqrt(np.mean((t - m) ** 2)))
    sig = float(np.sqrt(np.mean(t ** 2)))
    return ok.sum(), slope, corr, resid, sig


def _clipped(resp, peaks):
    """Points whose model peak is within half a step of the first or last
    inner sample of the kept run."""
    n = resp.n_points
    out = np.zeros(n, bool)
    for i in range(n):
        s = resp.s_grid[i][resp.inner[i]]
        if s.size < 2:
            continue
        step = s[1] - s[0]
        out[i] = (peaks[i] <= s[0] + 0.5 * step) | (peaks[i] >= s[-1] - 0.5 * step)
    return out


def _pixel_centre_positions(resp, cube, geom):
    """Disk positions of the pixel centres under each node (front nodes
    first, then back nodes; a diagnostic of sub-pixel nodes whose wake is
    taken at their pixel's centre)."""
    from kinkfit.geometry import disk_to_sky, sky_to_disk, surface_point
    nf = resp.meta["n_front_nodes"]
    x = np.asarray(cube.x_arcsec, float)
    y = np.asarray(cube.y_arcsec, float)
    r_out, p_out = resp.node_r_au.copy(), resp.node_phi_rad.copy()
    for sl, name in ((slice(0, nf), "front"), (slice(nf, None), "back")):
        r, p = resp.node_r_au[sl], resp.node_phi_rad[sl]
        sx, sy, _ = disk_to_sky(geom, r, p, surface_point(geom, r, p, name))
        cx = x[np.argmin(np.abs(sx[:, None] - x[None, :]), axis=1)]
        cy = y[np.argmin(np.abs(sy[:, None] - y[None, :]), axis=1)]
        rc, pc, _ = sky_to_disk(geom, cx, cy, name)
        r_out[sl], p_out[sl] = rc, pc
    return r_out, p_out


def _variants(args):
    """(search_beams, node_oversample, back_stride) of each response."""
    out = []
    for v in args.variant or ["1.5:1:2"]:
        parts = v.split(":")
        if len(parts) != 3:
            raise SystemExit(f"--variant needs SEARCH:OVERSAMPLE:BACKSTRIDE, got {v!r}")
        out.append((float(parts[0]), int(parts[1]), int(parts[2])))
    return out


def run_case(label, cfg, truth, ridges, geom, emission, variants, tmp,
             emulator=False, gen_oversample=None, wake_at_centre=False):
    """Print the model-vs-generator statistics of one planet, per variant."""
    path = Path(tmp) / f"{label.replace(' ', '_')}_clean.fits"
    pert = planet_perturbation(cfg, truth)
    background = None
    if gen_oversample is None:
        synth_from_config(cfg, output=path, overwrite=True, truth=truth,
                          noise=False)
        clean = read_cube(path)
    else:
        # generator and background model both at this many sub-pixels
        from kinkfit.deviations import model_cube
        setup = replace(observing_setup(cfg), oversample=int(gen_oversample))
        write_synthetic_cube(path, cfg.geometry(), setup, line_emission(cfg),
                             perturbation=pert, noise=False, overwrite=True)
        clean = read_cube(path)
        background = model_cube(clean, geom, emission,
                                oversample=int(gen_oversample))
    print(f"\n== {label}: {truth.mass_mjup:.2f} Mjup, {truth.radius_au:.1f} au, "
          f"{truth.azimuth_deg:.1f} deg; {len(ridges)} points", flush=True)
    for search, nos, bstride in variants:
        resp = build_ridge_response(clean, ridges, geom, emission,
                                    background=background, node_stride=1,
                                    back_layer=True, back_stride=bstride,
                                    search_beams=search, node_oversample=nos)
        nr, nphi = resp.node_r_au, resp.node_phi_rad
        if wake_at_centre:
            nr, nphi = _pixel_centre_positions(resp, clean, geom)
        dvr, dvp, _ = pert(nr, nphi, np.ones_like(nr))
        s0 = resp._layout()["s0"]
        resp.peaks_from_wake(dvr[None], dvp[None])         # compile / warm
        t0 = time.process_time()
        peaks = resp.peaks_from_wake(np.repeat(dvr[None], 6, 0),
                                     np.repeat(dvp[None], 6, 0))[0]
        t_kern = (time.process_time() - t0) / 6
        model = resp.kappa * (peaks - s0)
        traced = resp.observed
        clip = _clipped(resp, peaks)
        clip_d = _clipped(resp, resp.s_data)
        n, slope, corr, resid, sig = _stats(traced, model)
        print(f"search {search:3.1f} FWHM (M={resp.meta['samples_per_cut']}), "
              f"sub-nodes {nos}x{nos}, back stride {bstride}: {resp.n_nodes} nodes, "
              f"kernel {1e3 * t_kern:.2f} ms/walker | n {n}, slope {slope:.3f}, "
              f"corr {corr:.3f}, resid {1e3 * resid:.2f} mas, signal "
              f"{1e3 * sig:.2f} mas, max |model| {1e3 * np.nanmax(np.abs(model)):.1f}"
              f" mas, clipped model/data {clip.sum()}/{clip_d.sum()}", flush=True)
        if emulator:
            from kinkfit.wake.emulator import make_fit_model
            fm = make_fit_model(wake_disk(cfg, mstar_msun=geom.mstar_msun),
                                truth.damping)
            params = {"mass": np.array([truth.mass_mjup] * 6),
                      "radius": np.array([truth.radius_au] * 6),
                      "azimuth": np.array([truth.azimuth_deg] * 6),
                      "alpha": np.array([truth.alpha] * 6),
                      "efold": np.array([truth.efold] * 6)}
            fm(params, nr, nphi)                              # compile / warm
            t0 = time.process_time()
            er, ep = fm(params, nr, nphi)
            t_wake = (time.process_time() - t0) / 6
            model_e = resp.offsets_from_wake(er[:1], ep[:1])[0]
            dlos = resp.node_a_r * (er[0] - dvr) + resp.node_a_phi * (ep[0] - dvp)
            n, slope, corr, resid, sig = _stats(traced, model_e)
            print(f"   emulator wake ({1e3 * t_wake:.2f} ms/walker): slope "
                  f"{slope:.3f}, corr {corr:.3f}, resid {1e3 * resid:.2f} mas; "
                  f"node dv_los rms diff {np.std(dlos):.4f} km/s", flush=True)


def mass_scan(cfg, truth, folder, geom, emission, variants):
    """Mass of the log-probability maximum at the injected radius and
    azimuth on the campaign's noisy cube and cuts (given geometry and
    emission profile, no background nuisance), per response variant."""
    from dataclasses import replace as dc_replace

    from kinkfit.likelihood import KinkLikelihood
    from kinkfit.wake.emulator import make_fit_model
    cube = read_cube(folder / "cube.fits")
    ridges, _, dev = read_trace_file(folder / "trace.h5")
    pset = cfg.parameter_set(truth.damping, with_planet=True)
    model = make_fit_model(wake_disk(cfg, mstar_msun=geom.mstar_msun),
                           truth.damping)
    values = {"mass": truth.mass_mjup, "radius": truth.radius_au,
              "azimuth": truth.azimuth_deg, "alpha": truth.alpha,
              "efold": truth.efold, "jitter": 0.005}
    base = np.array([values[n] for n in pset.free])
    masses = np.linspace(0.4, 1.4, 201) * truth.mass_mjup
    theta = np.repeat(base[None], masses.size, axis=0)
    theta[:, pset.free.index("mass")] = masses
    for search, nos, bstride in variants:
        resp = build_ridge_response(cube, ridges, geom, emission,
                                    node_stride=1, back_layer=True,
                                    back_stride=bstride, search_beams=search,
                                    node_oversample=nos)
        d = dc_replace(dev, offset_arcsec=resp.observed)
        like = KinkLikelihood.from_deviations(d, model, pset, response=resp)
        lp = like.log_prob(theta)
        best = masses[int(np.argmax(lp))]
        print(f"   mass scan, sub-nodes {nos}x{nos}, back stride {bstride}: "
              f"maximum at {best:.2f} Mjup ({best / truth.mass_mjup:.2f}x)",
              flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("setup", choices=["demo", "small"])
    ap.add_argument("--inj", type=int, nargs="*", default=[12, 5, 1])
    ap.add_argument("--campaign", type=Path, default=CAMPAIGN)
    ap.add_argument("--variant", action="append",
                    help="SEARCH:OVERSAMPLE:BACKSTRIDE of a response (repeatable)")
    ap.add_argument("--fitted", action="store_true",
                    help="the campaign's fitted geometry and emission profile")
    ap.add_argument("--emulator", action="store_true",
                    help="also the fit's tabulated wake model at the nodes")
    ap.add_argument("--gen-oversample", type=int, default=None,
                    help="generator (and background model) sub-pixels per axis "
                         "(default: the setup's 3)")
    ap.add_argument("--mass-scan", action="store_true",
                    help="also the log-probability along mass on the noisy cube")
    ap.add_argument("--wake-at-centre", action="store_true",
                    help="diagnostic: the wake of each node taken at its pixel centre")
    args = ap.parse_args(argv)
    variants = _variants(args)
    with tempfile.TemporaryDirectory() as tmp:
        if args.setup == "demo":
            cfg = load_config(DEMO)
            cube = load_cube(cfg)
            geom, em = cfg.geometry(), line_emission(cfg)
            ridges = trace_ridges(cube, geom, cfg.trace)
            run_case("demo", cfg, cfg.synth.truth, ridges, geom, em, variants,
                     tmp, args.emulator, args.gen_oversample, args.wake_at_centre)
            return
        from astropy.io import fits
        cfg = load_config(SMALL)
        for i in args.inj:
            folder = args.campaign / f"inj_{i:04d}"
            h = fits.getheader(folder / "cube.fits")
            truth = SynthTruth(mass_mjup=float(h["KFMASS"]),
                               radius_au=float(h["KFRADIUS"]),
                               azimuth_deg=float(h["KFAZIM"]),
                               damping=str(h["KFDAMP"]).strip(),
                               alpha=float(h["KFALPHA"]), efold=math.inf)
            ridges, bg, dev = read_trace_file(folder / "trace.h5")
            if args.fitted:
                # a fit with the background known has no background result
                geom = cfg.geometry() if bg is None else bg["geometry"]
                em = LineEmission(**{k: float(v) for k, v in
                                     dev.meta["bias"]["emission"].items()})
            else:
                geom, em = cfg.geometry(), line_emission(cfg)
            run_case(f"inj {i}", cfg, truth, ridges, geom, em, variants, tmp,
                     args.emulator, args.gen_oversample, args.wake_at_centre)
            if args.mass_scan:
                mass_scan(cfg, truth, folder, geom, em, variants)


if __name__ == "__main__":
    main()
