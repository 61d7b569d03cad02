"""Cost of one planet log-probability with the forward kink model (demo).

    python bench/bench_forward.py [--repeat 15] [--stride 1] [--no-cache]

Builds the demo's forward likelihood once -- the demo cube traced with the
true geometry (no background fit), the ridge response
(:func:`kinkfit.response.build_ridge_response` with the node options of
``pipeline.forward_response``: front-layer nodes on every pixel, back-layer
nodes on every 2nd; ``--stride 2`` for every 2nd front pixel) with the
generator's emission profile, the
viscous wake emulator, and a background-disk nuisance like the pipeline's
(:func:`kinkfit.diskfit.offset_jacobian` at the true geometry, prior widths
3 x the default parameter scales of :data:`kinkfit.diskfit.PARAMETERS`) --
and caches the built objects in a pickle under /tmp (tracing takes ~1.5
min).  Then, for batches of 1, 6 (one pool worker's share of a demo step),
24 and 48 posterior-like walkers, prints the time per walker evaluation of
each part, the reference ("before") path and the current one side by side:

* emulator: the wake model at the response's nodes;
* projection: ``dv_los = a_r dv_r + a_phi dv_phi``;
* peaks: :meth:`RidgeResponse.peaks_reference` (numpy, before) and
  :meth:`RidgeResponse.peaks` (compiled kernel, after);
* likelihood: the rest of ``KinkLikelihood.log_prob`` (prior, Gaussian with
  the marginalised nuisance): the total minus the parts above;
* total: ``KinkLikelihood.log_prob`` itself.

Timings are the best CPU time of ``--repeat`` interleaved calls (old, new,
old, ...) on this shared 2-core machine (other jobs still compete for the
caches: absolute numbers move by ~50% between runs); compare them side by
side only.  Also prints
the largest differences between the two paths on 400 walkers (offsets in
arcsec, log-probability in nats) and the compile time of the kernel.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import pickle
import sys
import time
import types
from dataclasses import fields
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "demo.toml"
CACHE = Path("/tmp") / "kinkfit_bench_forward_{stride}.pkl"
BATCHES = (1, 6, 24, 48)


def _fingerprint(cfg) -> str:
    """Config text and cube file (size, time): a changed tracer or response
    builder is not seen, use ``--no-cache`` after such a change."""
    st = Path(cfg.data.cube).stat()
    return hashlib.sha256(f"{cfg.text}|{st.st_size}|{st.st_mtime_ns}".encode()
                          ).hexdigest()


def build(stride=1, use_cache=True):
    """The demo's traced data, ridge response and nuisance (cached)."""
    from kinkfit.config import load_config
    from kinkfit.diskfit import DEFAULT_FREE, PARAMETERS, _get, offset_jacobian
    from kinkfit.response import build_ridge_response
    from kinkfit.scenario import line_emission
    from kinkfit.trace import load_cube, run_trace

    cfg = load_config(DEMO)
    key = _fingerprint(cfg)
    cache = Path(str(CACHE).format(stride=stride))
    if use_cache and cache.exists():
        try:
            with open(cache, "rb") as fh:
                got = pickle.load(fh)
            if got.get("key") == key:
                print(f"built objects read from {cache}")
                return cfg, got
        except Exception as exc:  # a stale or partial cache: rebuild
            print(f"cache {cache} not used ({exc})")
    t0 = time.perf_counter()
    cube = load_cube(cfg)
    ridges, _, dev = run_trace(cfg, cube=cube, fit_background=False)
    geom, emission = cfg.geometry(), line_emission(cfg)
    resp = build_ridge_response(cube, ridges, geom, emission,
                                node_stride=stride, back_layer=True,
                                back_stride=2)
    fit = types.SimpleNamespace(
        geometry=geom, names=DEFAULT_FREE,
        values=np.array([_get(geom, n) for n in DEFAULT_FREE]),
        errors=np.array([PARAMETERS[n][1] for n in DEFAULT_FREE]))
    J = offset_jacobian(fit, ridges)
    prec = np.diag(1.0 / (3.0 * fit.errors) ** 2)
    got = {"key": key, "dev": dev, "resp": resp, "nuisance": (J, prec)}
    print(f"demo traced and response built in {time.perf_counter() - t0:.0f} s")
    if use_cache:
        tmp = cache.with_suffix(".tmp")
        with open(tmp, "wb") as fh:
            pickle.dump(got, fh)
        os.replace(tmp, cache)
    return cfg, got


def reference_response(resp):
    """A copy of ``resp`` evaluated as before: the projection in numpy and
    :meth:`RidgeResponse.peaks_reference`."""
    from kinkfit.response import RidgeResponse

    class ReferenceResponse(RidgeResponse):
        peaks = RidgeResponse.peaks_reference

        def offsets_from_wake(self, dv_r, dv_phi):
            dv = (np.asarray(dv_r, float) * self.node_a_r
                  + np.asarray(dv_phi, float) * self.node_a_phi)
            return self.offsets_reference(dv)

    return ReferenceResponse(**{f.name: getattr(resp, f.name)
                                for f in fields(resp)})


def reference_likelihood(*args, **kwargs):
    """``KinkLikelihood.from_deviations`` with the einsum marginalisation."""
    from kinkfit.likelihood import KinkLikelihood

    class ReferenceLikelihood(KinkLikelihood):
        _marginalise = KinkLikelihood._marginalise_reference

    return ReferenceLikelihood.from_deviations(*args, **kwargs)


class Precomputed:
    """Stand-in response returning fixed offsets (times the likelihood
    alone); ``model_for`` is the matching stand-in wake model."""

    def __init__(self, resp, offsets):
        for name in ("n_points", "observed", "node_r_au", "node_phi_rad",
                     "node_a_r", "node_a_phi"):
            setattr(self, name, getattr(resp, name))
        self._out = offsets

    def offsets_from_wake(self, dv_r, dv_phi):
        return self._out

    @staticmethod
    def model_for(dr, dp):
        def fixed(params, r_au, phi_rad):
            return dr, dp
        return fixed


def _best_pair(fa, fb, repeat):
    """Best CPU time (one thread: ``time.process_time``, not disturbed by
    the other jobs' scheduling) of ``repeat`` interleaved calls each."""
    ta = tb = float("inf")
    for _ in range(repeat):
        t0 = time.process_time()
        fa()
        ta = min(ta, time.process_time() - t0)
        t0 = time.process_time()
        fb()
        tb = min(tb, time.process_time() - t0)
    return ta, tb


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeat", type=int, default=15)
    ap.add_argument("--stride", type=int, default=1,
                    help="front-layer node stride (pipeline: 1)")
    ap.add_argument("--no-cache", action="store_true",
                    help=f"rebuild instead of reading {CACHE}")
    args = ap.parse_args(argv)

    from numba import njit

    from kinkfit.likelihood import KinkLikelihood
    from kinkfit.response import _peaks_kernel
    from kinkfit.scenario import wake_disk
    from kinkfit.wake.emulator import make_fit_model

    cfg, got = build(args.stride, use_cache=not args.no_cache)
    dev, resp = got["dev"], got["resp"]
    geom = cfg.geometry()
    damping = cfg.synth.truth.damping
    model = make_fit_model(wake_disk(cfg, mstar_msun=geom.mstar_msun), damping)
    pset = cfg.parameter_set(damping, with_planet=True)
    ref = reference_response(resp)
    new_like = KinkLikelihood.from_deviations(dev, model, pset, response=resp,
                                              nuisance=got["nuisance"])
    old_like = reference_likelihood(dev, model, pset, response=ref,
                                    nuisance=got["nuisance"])
    print(f"demo: {resp.n_points} points, {resp.n_nodes} nodes "
          f"(front stride {args.stride}, back stride 2), "
          f"{resp.meta['nodes_per_point_padded']} nodes per point (padded), "
          f"{resp.meta['samples_per_cut']} samples per cut; damping {damping}")

    # compile / load times
    t0 = time.perf_counter()
    resp._layout()
    resp.offsets_from_wake(np.zeros((1, resp.n_nodes)),
                           np.zeros((1, resp.n_nodes)))
    first = time.perf_counter() - t0
    fresh = njit(_peaks_kernel.py_func)       # same kernel, no disk cache
    lay = resp._layout()
    t0 = time.perf_counter()
    z = np.zeros((1, resp.n_nodes))
    fresh(z, z, lay["a_r"], lay["a_phi"], True, lay["e_node"], lay["e_v"],
          lay["e_s2"], lay["e_x"], lay["e_erf0"], lay["p_lo"], lay["p_hi"],
          lay["scale"], lay["phi0"], lay["ptr"], lay["pair"], lay["w"],
          lay["f0"], lay["s_grid"], lay["inner"], 6.0,
          np.empty((1, resp.n_points)))
    compile_s = time.perf_counter() - t0
    print(f"peaks kernel: first call {first:.2f} s (layout + numba cache "
          f"load or compile), compile without the cache {compile_s:.2f} s; "
          f"{lay['scale'].size} distinct (node, channel) pairs for "
          f"{lay['pair'].size} (point, node) pairs, {lay['e_x'].size} "
          f"distinct (node, channel edge) error functions")

    tr = cfg.synth.truth
    truth = {"mass": tr.mass_mjup, "radius": tr.radius_au,
             "azimuth": tr.azimuth_deg, "alpha": tr.alpha, "efold": tr.efold,
             "jitter": 0.005}
    base = np.array([truth[n] for n in pset.free])
    rng = np.random.default_rng(6)

    def walkers(m, spread=0.03):
        th = base[None] * (1.0 + spread * rng.standard_normal((m, base.size)))
        return th

    print("\nCPU ms per walker evaluation (best of %d interleaved calls; "
          "before | after)" % args.repeat)
    print(f"{'batch':>5} | {'emulator':>8} | {'projection':>15} | "
          f"{'peaks':>15} | {'likelihood':>15} | {'total log_prob':>23}")
    nr, nphi = resp.node_r_au, resp.node_phi_rad
    for m in BATCHES:
        theta = walkers(m)
        params = pset.unpack(theta)
        old_like.log_prob(theta)
        new_like.log_prob(theta)
        t_emu, _ = _best_pair(lambda: model(params, nr, nphi),
                              lambda: None, args.repeat)
        dr, dp = model(params, nr, nphi)
        t_proj, _ = _best_pair(lambda: dr * resp.node_a_r + dp * resp.node_a_phi,
                               lambda: None, args.repeat)
        dv = dr * resp.node_a_r + dp * resp.node_a_phi
        # after: the projection is inside the kernel (peaks_from_wake)
        t_pk_old, t_pk_new = _best_pair(lambda: ref.peaks(dv),
                                        lambda: resp.peaks_from_wake(dr, dp),
                                        args.repeat)
        # the likelihood alone: model and response replaced by their outputs
        stub = Precomputed(resp, new_like.predict_offset(theta))
        fixed = Precomputed.model_for(dr, dp)
        lk_old = reference_likelihood(dev, fixed, pset, response=stub,
                                      nuisance=got["nuisance"])
        lk_new = KinkLikelihood.from_deviations(dev, fixed, pset, response=stub,
                                                nuisance=got["nuisance"])
        t_lk_old, t_lk_new = _best_pair(lambda: lk_old.log_prob(theta),
                                        lambda: lk_new.log_prob(theta),
                                        args.repeat)
        t_old, t_new = _best_pair(lambda: old_like.log_prob(theta),
                                  lambda: new_like.log_prob(theta), args.repeat)
        ms = 1e3 / m
        print(f"{m:5d} | {ms * t_emu:8.3f} | {ms * t_proj:6.3f} | "
              f"{'(in peaks)':>6} | {ms * t_pk_old:6.3f} | {ms * t_pk_new:6.3f} | "
              f"{ms * t_lk_old:6.3f} | {ms * t_lk_new:6.3f} | "
              f"{ms * t_old:7.3f} | {ms * t_new:7.3f} ({t_old / t_new:.2f}x)")

    # differences between the two paths
    worst_off = worst_lp = 0.0
    for spread in (0.03, 0.3):
        theta = walkers(200, spread)
        theta = theta[np.isfinite(pset.log_prior(theta))]
        a = old_like.predict_offset(theta)
        b = new_like.predict_offset(theta)
        ok = np.isfinite(a)
        assert np.array_equal(ok, np.isfinite(b))
        worst_off = max(worst_off, float(np.max(np.abs(a[ok] - b[ok]))))
        la, lb = old_like.log_prob(theta), new_like.log_prob(theta)
        fin = np.isfinite(la)
        assert np.array_equal(fin, np.isfinite(lb))
        worst_lp = max(worst_lp, float(np.max(np.abs(la[fin] - lb[fin]))))
    print(f"\nlargest difference after - before on 400 walkers (posterior-"
          f"and prior-like): offsets {worst_off:.2e} arcsec, log-prob "
          f"{worst_lp:.2e}")


if __name__ == "__main__":
    sys.exit(main())
