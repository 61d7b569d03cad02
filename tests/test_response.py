"""The forward model of traced kinks (kinkfit.response) and the emission fit.

Oracles:
* a uniform radial flow ``dv_r`` moves every iso-velocity curve by exactly
  ``-a_r dv_r / |grad V|`` (the first-order shift of PHYSICS.md section 7 is
  exact for a uniform shift of a straight ridge, and a uniform shift is not
  smeared by the beam);
* the synthetic generator (:func:`kinkfit.synth.make_cube`, an independent
  code path: sub-pixel sampling, FFT beam convolution) with an injected
  perturbation, traced by the tracer: the response must predict what the
  tracer measures on it;
* the generator's own emission parameters (analytic truth of a synthetic
  observation) for :func:`kinkfit.deviations.fit_emission`;
* for the compiled evaluation (``RidgeResponse.peaks``): the channel
  profiles from ``scipy.stats.norm`` and the soft maximum of
  docs/physics/response.md evaluated point by point, and the numpy
  reference ``peaks_reference`` (scipy.special.erf, einsum) to round-off.
"""

import math

import numpy as np
import pytest

from kinkfit.config import parse_config
from kinkfit.deviations import (estimate_emission, estimate_smearing_bias,
                                fit_emission, measure_deviations)
from kinkfit.geometry import projection_coefficients, sky_to_disk
from kinkfit.response import build_ridge_response
from kinkfit.trace import trace_ridges

from synthcases import config_text, emission, make_case, truth_geometry

FRONT = parse_config(config_text(surfaces=("front",))).trace


def front_only(pert):
    """The perturbation on the front layer only (``z > 0``), for the
    response built with ``back_layer=False`` (the front layer's kink
    alone); both layers are checked in
    :func:`test_back_layer_kink_matches_generator`."""
    def f(r, phi, z):
        out = pert(r, phi, z)
        on = np.asarray(z) > 0
        return tuple(np.where(on, c, 0.0) for c in out)
    return f


def gaussian_blob(r0, phi0, amp, wid):
    def f(r, phi, z):
        dphi = np.angle(np.exp(1j * (np.asarray(phi) - phi0)))
        d2 = (np.asarray(r) - r0) ** 2 + (r0 * dphi) ** 2
        return (np.zeros_like(d2), amp * np.exp(-0.5 * d2 / wid ** 2),
                np.zeros_like(d2))
    return f


def _traced_kinks(pert_cube, ridges, geom, em):
    """Kinks measured on the generator's perturbed cube at the cuts of
    ``ridges`` (the response's own estimator: half-maximum centroid along
    the cut, relative to the noise-free background model), and the
    response built for that cube."""
    resp = build_ridge_response(pert_cube, ridges, geom, em)
    return resp.observed, resp


def em_of(case):
    return case[4]


@pytest.fixture(scope="module")
def clean_case():
    geom = truth_geometry(inclination_deg=40.0)
    _, clean, _, em = make_case(geom, peak_snr=50.0, seed=3, npix=112,
                                nchan=36)
    ridges = trace_ridges(clean, geom, FRONT)
    resp = build_ridge_response(clean, ridges, geom, em, back_layer=False)
    return geom, clean, ridges, resp, em


def _node_dv_los(resp, pert):
    # the nodes are on the front layer (z > 0 for front_only)
    dvr, dvp, _ = pert(resp.node_r_au, resp.node_phi_rad,
                       np.ones_like(resp.node_r_au))
    return resp.node_a_r * dvr + resp.node_a_phi * dvp


def test_no_wake_no_kink(clean_case):
    _, _, _, resp, _ = clean_case
    out = resp.offsets(np.zeros((2, resp.n_nodes)))
    assert out.shape == (2, resp.n_points)
    assert np.all(out == 0.0)


def test_uniform_radial_flow_matches_generator_and_first_order(clean_case):
    geom, clean, ridges, resp, _ = clean_case
    dvr = 0.03     # km/s: a fifth of the channel, well inside the window
    flow = front_only(lambda r, phi, z: (np.full_like(r, dvr),
                                         np.zeros_like(r), np.zeros_like(r)))
    model = resp.offsets(_node_dv_los(resp, flow)[None])[0]
    # the generator's cube with the flow, traced at the same cuts
    _, pert_cube, _, _ = make_case(geom, peak_snr=50.0, seed=3, npix=112,
                                   nchan=36, perturbation=flow)
    traced, _ = _traced_kinks(pert_cube, ridges, geom, em_of(clean_case))
    slope = np.sum(traced * model) / np.sum(model ** 2)
    assert slope == pytest.approx(1.0, abs=0.03)
    assert np.corrcoef(traced, model)[0, 1] > 0.98
    # and the order of magnitude of PHYSICS.md section 7's first-order
    # shift -a_r dv_r / |grad V| (not exact: the ridge has a finite width
    # across which V is not linear; measured slope ~1.1-1.2 here)
    dev = measure_deviations(ridges, geom)
    analytic = -(dev.a_r * dvr) / dev.grad_kms_per_arcsec
    s1 = np.sum(model * analytic) / np.sum(analytic ** 2)
    assert 0.8 < s1 < 1.35


def test_predicts_what_the_tracer_measures_on_a_local_wake_like_blob(clean_case):
    # a blob of dv_phi about one beam wide: the traced kink is smeared; the
    # response must follow the tracer on the generator's cube, where the
    # point-wise first-order shift does not
    geom, clean, ridges, resp, _ = clean_case
    dev = measure_deviations(ridges, geom)
    centre = np.argsort(dev.r_au)[len(ridges) // 2]   # on a traced ridge
    # 12 au ~ 0.9 beam at 140 pc
    blob = front_only(gaussian_blob(float(dev.r_au[centre]),
                                    float(dev.phi_rad[centre]), 0.12, 12.0))
    _, pert_cube, _, _ = make_case(geom, peak_snr=50.0, seed=3, npix=112,
                                   nchan=36, perturbation=blob)
    model = resp.offsets(_node_dv_los(resp, blob)[None])[0]
    traced, _ = _traced_kinks(pert_cube, ridges, geom, em_of(clean_case))
    _, dvp, _ = blob(dev.r_au, dev.phi_rad, np.ones_like(dev.r_au))
    first_order = -(dev.a_phi * dvp) / dev.grad_kms_per_arcsec
    sig = np.abs(traced) > 0.002
    assert sig.sum() >= 4
    rms_model = np.sqrt(np.mean((traced - model)[sig] ** 2))
    rms_first = np.sqrt(np.mean((traced - first_order)[sig] ** 2))
    assert np.corrcoef(traced[sig], model[sig])[0, 1] > 0.9
    assert rms_model < 0.35 * np.sqrt(np.mean(traced[sig] ** 2))
    assert rms_model < 0.5 * rms_first


def test_fit_emission_recovers_the_generator_line_width_and_back_ratio():
    geom = truth_geometry(inclination_deg=40.0)
    _, clean, _, em_true = make_case(geom, npix=96, nchan=30)
    ridges = trace_ridges(clean, geom, FRONT)
    start = estimate_emission(ridges, geom, clean)
    fitted = fit_emission(clean, geom, start, max_nfev=12)
    for r in (60.0, 100.0, 160.0):
        assert fitted.line_sigma_kms(r) == pytest.approx(
            em_true.line_sigma_kms(r), rel=0.03), r
    # the generator's back/front ratio, not the estimate's default
    assert fitted.back_ratio == pytest.approx(em_true.back_ratio, abs=0.05)


@pytest.mark.parametrize("kind", ["uniform", "blob"])
def test_back_layer_kink_matches_generator(clean_case, kind):
    # the generator moves both layers (kinkfit.synth.make_cube applies the
    # perturbation to every sub-pixel of each layer); the response with
    # back_layer=True must follow the tracer on that cube, and the
    # front-only response must not (the back layer's own kink seen through
    # the front layer; oracle: the generator's cube traced at the same cuts)
    geom, clean, ridges, _, em = clean_case
    dev = measure_deviations(ridges, geom)
    if kind == "uniform":
        pert = lambda r, phi, z: (np.full_like(r, 0.03), np.zeros_like(r),  # noqa: E731
                                  np.zeros_like(r))
    else:
        centre = np.argsort(dev.r_au)[len(ridges) // 2]
        pert = gaussian_blob(float(dev.r_au[centre]),
                             float(dev.phi_rad[centre]), 0.12, 12.0)
    _, pert_cube, _, _ = make_case(geom, peak_snr=50.0, seed=3, npix=112,
                                   nchan=36, perturbation=pert)
    traced, both = _traced_kinks(pert_cube, ridges, geom, em)
    assert both.meta["back_layer"] and both.n_nodes > both.meta["n_front_nodes"]
    dvr, dvp, _ = pert(both.node_r_au, both.node_phi_rad,
                       np.ones_like(both.node_r_au))
    model = both.offsets((both.node_a_r * dvr + both.node_a_phi * dvp)[None])[0]
    front = build_ridge_response(clean, ridges, geom, em, back_layer=False)
    front_model = front.offsets(_node_dv_los(front, front_only(pert))[None])[0]
    sig = np.abs(traced) > (0.0 if kind == "uniform" else 0.002)
    assert sig.sum() >= 4
    t, mb, mf = traced[sig], model[sig], front_model[sig]
    slope = np.sum(t * mb) / np.sum(mb ** 2)
    assert slope == pytest.approx(1.0, abs=0.03)
    rms_both = np.sqrt(np.mean((t - mb) ** 2))
    rms_front = np.sqrt(np.mean((t - mf) ** 2))
    assert rms_both < 0.5 * rms_front


# --------------------------------------------------------------------------
# the compiled evaluation (RidgeResponse.peaks / peaks_from_wake) against an
# independent evaluation of the documented formulas and against the numpy
# reference (RidgeResponse.peaks_reference)
# --------------------------------------------------------------------------

def _random_response(rng, n=7, Q=9, M=11, u=25):
    """A response of random numbers with the builder's padding conventions:
    per point ``q_i <= Q`` real pairs (a node may appear in several points,
    in the same or another channel), zero weights beyond ``nk_i <= M``
    samples, a contiguous run of inner samples."""
    node_index = np.zeros((n, Q), dtype=np.int64)
    weight = np.zeros((n, M, Q))
    v_bg = np.zeros((n, Q))
    s2 = np.ones((n, Q))
    lo = np.zeros((n, Q))
    hi = np.ones((n, Q))
    scale = np.zeros((n, Q))
    inner = np.zeros((n, M), dtype=bool)
    v_node = rng.uniform(-0.6, 0.6, u)
    s2_node = rng.uniform(0.15, 0.35, u)
    width = 0.15
    for i in range(n):
        q = int(rng.integers(3, Q + 1))
        nk = int(rng.integers(M - 3, M + 1))
        centre = rng.choice([-0.15, 0.0, 0.15])       # the point's channel
        nodes = rng.choice(u, q, replace=False)
        node_index[i, :q] = nodes
        v_bg[i, :q] = v_node[nodes]
        s2[i, :q] = s2_node[nodes]
        lo[i, :q], hi[i, :q] = centre - width / 2, centre + width / 2
        scale[i, :q] = math.sqrt(math.pi) / 2 * s2[i, :q] / width
        weight[i, :nk, :q] = rng.uniform(0.0, 1.0, (nk, q))
        inner[i, 2:nk - 2] = True
    s_grid = np.linspace(-0.2, 0.2, M)[None, :] + rng.normal(0, 0.01, (n, 1))
    f0 = 3.0 * np.exp(-0.5 * (s_grid / 0.08) ** 2) + rng.uniform(0, 0.2, (n, M))
    from kinkfit.response import RidgeResponse
    return RidgeResponse(
        node_r_au=rng.uniform(50, 150, u), node_phi_rad=rng.uniform(-3, 3, u),
        node_a_r=rng.uniform(-0.6, 0.6, u), node_a_phi=rng.uniform(-0.6, 0.6, u),
        node_index=node_index, weight=weight, v_bg=v_bg, s2=s2, lo=lo, hi=hi,
        scale=scale, f0=f0, s_grid=s_grid, inner=inner, s_ref=np.zeros(n),
        s_data=np.zeros(n), s0=rng.normal(0, 0.01, n),
        kappa=rng.uniform(0.5, 1.5, n))


def _peaks_oracle(resp, dv):
    """Peaks from the formulas of docs/physics/response.md with
    scipy.stats.norm: the channel-averaged Gaussian line
    ``(Phi((hi - v)/sigma) - Phi((lo - v)/sigma)) sigma sqrt(2 pi) / width``
    (the scale of the model is ``sqrt(pi)/2 s2/width``, ``s2 = sqrt2
    sigma``) and the soft maximum ``sum s w / sum w``, ``w = exp(6 (F -
    max F) / max F)`` over the inner samples; pair by pair, point by
    point."""
    from scipy import stats
    m = dv.shape[0]
    n, Q = resp.node_index.shape
    out = np.empty((m, n))
    for k in range(m):
        for i in range(n):
            f = resp.f0[i].copy()
            for q in range(Q):
                if resp.scale[i, q] == 0:
                    continue
                sig = resp.s2[i, q] / math.sqrt(2.0)
                width = math.sqrt(math.pi) / 2 * resp.s2[i, q] / resp.scale[i, q]

                def prof(v):
                    return (stats.norm.cdf((resp.hi[i, q] - v) / sig)
                            - stats.norm.cdf((resp.lo[i, q] - v) / sig)) \
                        * sig * math.sqrt(2.0 * math.pi) / width
                v = resp.v_bg[i, q]
                f += resp.weight[i, :, q] * (prof(v + dv[k, resp.node_index[i, q]])
                                             - prof(v))
            sel = resp.inner[i]
            top = f[sel].max()
            w = np.exp(6.0 * (f[sel] - top) / abs(top))
            out[k, i] = np.sum(w * resp.s_grid[i, sel]) / np.sum(w)
    return out


def test_compiled_peaks_equal_the_formula_and_the_numpy_reference(rng):
    resp = _random_response(rng)
    dv = rng.normal(0.0, 0.05, (4, resp.n_nodes))
    dv[0] = 0.0                                   # no wake: the background peak
    dv[1, :5] = 0.0                               # some nodes exactly unperturbed
    got = resp.peaks(dv)
    # oracle: scipy.stats.norm profiles (norm.cdf differences round
    # differently from erf: 1e-10 relative)
    np.testing.assert_allclose(got, _peaks_oracle(resp, dv), rtol=1e-10,
                               atol=1e-13)
    # the numpy reference (scipy.special.erf, einsum): equal to round-off
    ref = resp.peaks_reference(dv)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-15)
    # a wake changes the peaks, and none is NaN
    assert np.all(np.isfinite(got)) and np.any(np.abs(got[2] - got[0]) > 1e-4)


def test_projection_inside_the_kernel_equals_dv_los(rng):
    # dv_los = a_r dv_r + a_phi dv_phi (DEVELOPERS.md, Deviations), node by node
    resp = _random_response(rng)
    dr = rng.normal(0.0, 0.05, (3, resp.n_nodes))
    dp = rng.normal(0.0, 0.05, (3, resp.n_nodes))
    dv = dr * resp.node_a_r + dp * resp.node_a_phi
    np.testing.assert_allclose(resp.offsets_from_wake(dr, dp),
                               resp.kappa * (_peaks_oracle(resp, dv) - resp.s0),
                               rtol=1e-10, atol=1e-13)
    assert np.array_equal(resp.offsets_from_wake(dr, dp), resp.offsets(dv))
    with pytest.raises(ValueError, match="nodes"):
        resp.peaks(dv[:, :-1])


def test_nan_excess_makes_only_its_points_nan(rng):
    # the soft maximum of a profile with a NaN sample has no value (np.max
    # propagates NaN, IEEE 754); points that do not use the node keep theirs
    resp = _random_response(rng)
    dv = rng.normal(0.0, 0.05, (1, resp.n_nodes))
    bad = int(resp.node_index[0, 0])
    dv[0, bad] = np.nan
    got = resp.peaks(dv)[0]
    uses = np.array([bad in resp.node_index[i][resp.scale[i] != 0]
                     for i in range(resp.n_points)])
    assert np.all(np.isnan(got[uses]))
    assert np.all(np.isfinite(got[~uses]))


def test_compiled_peaks_on_a_real_response_and_after_pickling(clean_case):
    import pickle
    _, _, _, resp, _ = clean_case
    blob = front_only(gaussian_blob(float(np.median(resp.node_r_au)),
                                    float(np.median(resp.node_phi_rad)), 0.12, 12.0))
    dv = np.stack([_node_dv_los(resp, blob), 0.5 * _node_dv_los(resp, blob)])
    got = resp.peaks(dv)
    ref = resp.peaks_reference(dv)
    ok = np.isfinite(ref)
    assert np.array_equal(ok, np.isfinite(got)) and ok.sum() > 10
    np.testing.assert_allclose(got[ok], ref[ok], rtol=1e-12, atol=1e-15)
    # the response sent to worker processes: its caches are not pickled and
    # are rebuilt there, with the same numbers
    state = resp.__getstate__()
    assert "_layout_cache" not in state and "_phi0_cache" not in state
    again = pickle.loads(pickle.dumps(resp))
    assert np.array_equal(again.peaks(dv), got, equal_nan=True)
