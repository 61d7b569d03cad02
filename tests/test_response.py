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
  observation) for :func:`kinkfit.deviations.fit_emission`.
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
