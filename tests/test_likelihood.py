"""Tests of kinkfit.likelihood against scipy.stats densities."""

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from scipy import stats

from kinkfit.errors import KinkfitError, PhysicsRangeError
from kinkfit.likelihood import KinkLikelihood, null_model
from kinkfit.params import parameters_for
from kinkfit.priors import LogUniform

from standin import TRUTH, standin_data, standin_model, standin_params


def _lik(rng, **kw):
    d = standin_data(rng)
    ps = standin_params()
    return KinkLikelihood(model=standin_model, param_set=ps, **d, **kw), d, ps


def _theta(ps, n, rng):
    return ps.sample_prior(rng, n)


def _expected_offsets(d, theta, ps):
    p = ps.unpack(theta)
    dv_r, dv_phi = standin_model(p, d["r_au"], d["phi_rad"])
    return -(d["a_r"] * dv_r + d["a_phi"] * dv_phi) / d["grad_kms_per_arcsec"]


def test_gaussian_equals_scipy_norm(rng):
    lik, d, ps = _lik(rng)
    theta = _theta(ps, 7, rng)
    got = lik.log_likelihood(theta)
    pred = _expected_offsets(d, theta, ps)
    jit = ps.unpack(theta)["jitter"]
    scale = np.sqrt(d["sigma_arcsec"][None] ** 2 + jit[:, None] ** 2)
    # oracle: scipy.stats.norm.logpdf summed over independent points
    want = stats.norm.logpdf(d["offset_arcsec"][None], loc=pred,
                             scale=scale).sum(axis=1)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    # pointwise rows sum to the total
    np.testing.assert_allclose(lik.pointwise(theta).sum(axis=1), got,
                               rtol=1e-12)


@pytest.mark.parametrize("dof", [1.0, 4.0, 30.0])
def test_student_t_equals_scipy_t(rng, dof):
    lik, d, ps = _lik(rng, kind="student-t", dof=dof)
    theta = _theta(ps, 5, rng)
    pred = _expected_offsets(d, theta, ps)
    jit = ps.unpack(theta)["jitter"]
    scale = np.sqrt(d["sigma_arcsec"][None] ** 2 + jit[:, None] ** 2)
    # oracle: scipy.stats.t.logpdf with scale sqrt(sigma^2 + s^2)
    want = stats.t.logpdf(d["offset_arcsec"][None], dof, loc=pred,
                          scale=scale)
    np.testing.assert_allclose(lik.pointwise(theta), want, rtol=1e-10)


def test_log_prob_is_prior_plus_likelihood(rng):
    lik, d, ps = _lik(rng)
    theta = _theta(ps, 6, rng)
    # oracle: the priors' own log densities (kinkfit.priors, checked in
    # test_config) plus the scipy-checked likelihood
    np.testing.assert_allclose(lik.log_prob(theta),
                               ps.log_prior(theta) + lik.log_likelihood(theta),
                               rtol=1e-12)


def test_vectorised_equals_loop(rng):
    lik, d, ps = _lik(rng)
    theta = _theta(ps, 16, rng)
    batch = lik.log_prob(theta)
    loop = np.array([lik.log_prob(t[None])[0] for t in theta])
    # self-consistency: a batch equals walker-by-walker evaluation
    np.testing.assert_allclose(batch, loop, rtol=0, atol=1e-9)


def test_never_nan_inside_prior(rng):
    lik, d, ps = _lik(rng)
    theta = _theta(ps, 2000, rng)
    lp = lik.log_prob(theta)
    assert not np.any(np.isnan(lp))
    assert np.all(np.isfinite(lp))
    assert lik.counters["evaluated"] == 2000
    assert sum(v for k, v in lik.counters.items() if k != "evaluated") == 0


def test_outside_prior_is_counted_minus_inf(rng):
    lik, d, ps = _lik(rng)
    theta = _theta(ps, 4, rng)
    theta[0, ps.free.index("mass")] = 50.0      # above log-uniform(0.1, 10)
    theta[2, ps.free.index("jitter")] = -1.0    # negative jitter
    lp = lik.log_prob(theta)
    assert np.isneginf(lp[0]) and np.isneginf(lp[2])
    assert np.all(np.isfinite(lp[[1, 3]]))
    assert lik.counters["out_of_prior"] == 2
    assert lik.counters["evaluated"] == 4
    lik.reset_counters()
    assert lik.counters["out_of_prior"] == 0


def test_model_failures_are_counted(rng):
    d = standin_data(rng)
    ps = standin_params()

    def model(params, r, phi):
        dv_r, dv_phi = standin_model(params, r, phi)
        dv_r[params["mass"] > 5.0] = np.nan          # non-finite output
        if np.any(params["radius"] > 190.0):         # range error
            raise PhysicsRangeError("radius beyond model table")
        return dv_r, dv_phi

    lik = KinkLikelihood(model=model, param_set=ps, **d)
    theta = ps.pack({"mass": [1.0, 6.0, 1.0, 2.0],
                     "radius": [100.0, 100.0, 195.0, 150.0],
                     "azimuth": [0.0, 0.0, 0.0, 0.0],
                     "jitter": [0.01] * 4})
    lp = lik.log_prob(theta)
    assert np.all(np.isfinite(lp[[0, 3]]))
    assert np.isneginf(lp[1]) and np.isneginf(lp[2])
    assert lik.counters["non_finite_model"] == 1
    assert lik.counters["model_range"] == 1
    assert not np.any(np.isnan(lik.pointwise(theta)))


def test_baseline_is_zero_model(rng):
    d = standin_data(rng)
    ps0 = parameters_for("none", {"jitter": LogUniform(1e-3, 0.1)},
                         with_planet=False)
    assert ps0.free == ("jitter",)
    lik0 = KinkLikelihood(model=None, param_set=ps0, **d)
    assert lik0.is_baseline
    theta = np.array([[0.01], [0.05]])
    scale = np.sqrt(d["sigma_arcsec"][None] ** 2 + theta ** 2)
    # oracle: scipy.stats.norm.logpdf with zero model displacement
    want = stats.norm.logpdf(d["offset_arcsec"][None], 0.0, scale).sum(1)
    np.testing.assert_allclose(lik0.log_likelihood(theta), want, rtol=1e-12)
    z = null_model({"jitter": np.ones(3)}, d["r_au"], d["phi_rad"])
    assert z[0].shape == (3, d["r_au"].size) and not z[0].any()


def test_truth_beats_no_planet(rng):
    # a planet signal of ~0.1 km/s / 4 km/s/arcsec = 0.025" vs sigma 0.01":
    # the injected truth must be far more likely than zero mass
    lik, d, ps = _lik(rng)
    t = ps.pack(TRUTH)
    t_small = ps.pack({**TRUTH, "mass": 0.1})
    assert lik.log_likelihood(t)[0] > lik.log_likelihood(t_small)[0] + 20


def test_bad_inputs_raise_kinkfit_errors(rng):
    d = standin_data(rng)
    ps = standin_params()
    bad = dict(d, sigma_arcsec=np.zeros_like(d["sigma_arcsec"]))
    with pytest.raises(KinkfitError, match="sigma_arcsec"):
        KinkLikelihood(model=standin_model, param_set=ps, **bad)
    bad = dict(d, offset_arcsec=d["offset_arcsec"][:-1])
    with pytest.raises(KinkfitError, match="offset_arcsec"):
        KinkLikelihood(model=standin_model, param_set=ps, **bad)
    with pytest.raises(KinkfitError, match="likelihood.kind"):
        KinkLikelihood(model=standin_model, param_set=ps, kind="cauchy", **d)


def test_inputs_not_modified(rng):
    d = standin_data(rng)
    copy = {k: v.copy() for k, v in d.items()}
    lik = KinkLikelihood(model=standin_model, param_set=standin_params(), **d)
    lik.log_prob(standin_params().sample_prior(rng, 3))
    for k in d:
        np.testing.assert_array_equal(d[k], copy[k])


def test_from_deviations_uses_documented_fields(rng):
    from types import SimpleNamespace
    d = standin_data(rng)
    # field names of deviations.Deviations as written in DEVELOPERS.md
    dev = SimpleNamespace(r_au=d["r_au"], phi_rad=d["phi_rad"], a_r=d["a_r"],
                          a_phi=d["a_phi"],
                          grad_v_kms_per_arcsec=d["grad_kms_per_arcsec"],
                          offset_arcsec=d["offset_arcsec"],
                          sigma_arcsec=d["sigma_arcsec"], channel=d["channel"])
    ps = standin_params()
    a = KinkLikelihood.from_deviations(dev, standin_model, ps,
                                       kind="student-t", dof=3.0)
    b = KinkLikelihood(model=standin_model, param_set=ps, kind="student-t",
                       dof=3.0, **d)
    theta = ps.sample_prior(rng, 5)
    np.testing.assert_array_equal(a.pointwise(theta), b.pointwise(theta))
    np.testing.assert_array_equal(a.channel, d["channel"])


def test_predict_offset_sign_convention(rng):
    # DEVELOPERS.md: offset = -dv_los / |grad V_bg|, dv_los = a_r dv_r +
    # a_phi dv_phi; a single point with a_r = 1, a_phi = 0, grad = 2 km/s/"
    ps = standin_params()

    def model(params, r, phi):
        m = len(params["mass"])
        return np.full((m, 1), 0.3), np.full((m, 1), 5.0)

    lik = KinkLikelihood([100.0], [0.0], [1.0], [0.0], [2.0], [0.0], [0.01],
                         model, ps)
    off = lik.predict_offset(ps.pack(TRUTH))
    assert off.shape == (1, 1) and np.isclose(off[0, 0], -0.15)


@settings(max_examples=60, deadline=None)
@given(u=st.lists(st.floats(0.0, 1.0), min_size=4, max_size=4),
       scale=st.sampled_from([1e-6, 1.0, 1e6]),
       kind=st.sampled_from(["gaussian", "student-t"]))
def test_never_nan_property(u, scale, kind):
    # any point of the prior box (edges included) with tiny or huge data
    # offsets gives a finite log-probability, never NaN
    rng = np.random.default_rng(0)
    d = standin_data(rng, npts=40)
    d["offset_arcsec"] = d["offset_arcsec"] * scale
    ps = standin_params()
    lo = np.array([ps.prior(n).support[0] for n in ps.free])
    hi = np.array([ps.prior(n).support[1] for n in ps.free])
    theta = (lo + np.array(u) * (hi - lo))[None]
    lik = KinkLikelihood(model=standin_model, param_set=ps, kind=kind, **d)
    lp = lik.log_prob(theta)
    assert np.isfinite(lp[0])


def test_background_nuisance_equals_the_gaussian_marginal(rng):
    """Offsets J dg with a Gaussian prior N(0, P^-1) on dg, integrated out:
    the linear-Gaussian marginal N(r; 0, C + J P^-1 J^T) (Bishop 2006,
    *Pattern Recognition and Machine Learning*, eq. 2.115), evaluated with
    scipy.stats.multivariate_normal; kinkfit drops the constant
    0.5 ln det P."""
    d = standin_data(rng)
    ps = standin_params()
    n = d["r_au"].size
    J = rng.normal(scale=0.01, size=(n, 3))
    prior_sd = np.array([0.5, 2.0, 1.0])
    prec = np.diag(prior_sd ** -2.0)
    lik = KinkLikelihood(model=standin_model, param_set=ps, **d,
                         nuisance=(J, prec))
    theta = _theta(ps, 4, rng)
    got = lik.log_likelihood(theta)
    pred = _expected_offsets(d, theta, ps)
    jit = ps.unpack(theta)["jitter"]
    for k in range(len(theta)):
        cov = (np.diag(d["sigma_arcsec"] ** 2 + jit[k] ** 2)
               + J @ np.diag(prior_sd ** 2) @ J.T)
        want = stats.multivariate_normal(mean=pred[k], cov=cov).logpdf(
            d["offset_arcsec"])
        const = 0.5 * np.linalg.slogdet(prec)[1]
        assert got[k] + const == pytest.approx(want, rel=1e-9, abs=1e-8)
    # a broad prior removes what J can absorb: a pure J-pattern in the data
    # costs (almost) nothing
    d2 = dict(d)
    d2["offset_arcsec"] = _expected_offsets(d, theta[:1], ps)[0] + J @ [0.3, -1, 0.5]
    a = KinkLikelihood(model=standin_model, param_set=ps, **d2,
                       nuisance=(J, prec * 1e-6)).log_likelihood(theta[:1])
    b = KinkLikelihood(model=standin_model, param_set=ps, **d2,
                       nuisance=(J, prec * 1e-6))
    d2["offset_arcsec"] = _expected_offsets(d, theta[:1], ps)[0]
    c = KinkLikelihood(model=standin_model, param_set=ps, **d2,
                       nuisance=(J, prec * 1e-6)).log_likelihood(theta[:1])
    assert a[0] == pytest.approx(c[0], abs=1e-6)


def test_background_nuisance_with_eight_correlated_parameters(rng):
    """The pipeline's size of nuisance (the eight background parameters of
    kinkfit.diskfit, with a correlated prior) over a batch of samples: each
    sample's value is the linear-Gaussian marginal N(r; 0, C + J P^-1 J^T)
    (Bishop 2006, eq. 2.115) from scipy.stats.multivariate_normal, less the
    dropped constant 0.5 ln det P."""
    d = standin_data(rng)
    ps = standin_params()
    n = d["r_au"].size
    J = rng.normal(scale=0.02, size=(n, 8))
    L = np.tril(rng.normal(scale=0.3, size=(8, 8))) + np.diag(np.full(8, 1.5))
    cov_g = L @ L.T                       # prior covariance of dg
    prec = np.linalg.inv(cov_g)
    lik = KinkLikelihood(model=standin_model, param_set=ps, **d,
                         nuisance=(J, prec))
    theta = _theta(ps, 16, rng)
    got = lik.log_likelihood(theta)
    pred = _expected_offsets(d, theta, ps)
    jit = ps.unpack(theta)["jitter"]
    const = 0.5 * np.linalg.slogdet(prec)[1]
    for k in range(len(theta)):
        cov = np.diag(d["sigma_arcsec"] ** 2 + jit[k] ** 2) + J @ cov_g @ J.T
        want = stats.multivariate_normal(mean=pred[k], cov=cov).logpdf(
            d["offset_arcsec"])
        assert got[k] + const == pytest.approx(want, rel=1e-9, abs=1e-8)
