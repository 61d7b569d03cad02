"""Analytic stand-in for the wake model, shared by the inference tests.

Not physics: a smooth localised velocity bump whose amplitude, radius and
azimuth play the roles of the planet mass, radius and azimuth, so that the
likelihood / sampler / results code can be tested without the wake model.
"""

import numpy as np

from kinkfit.params import parameters_for
from kinkfit.priors import Fixed, LogUniform, Uniform

WIDTH_AU = 25.0


def standin_model(params, r_au, phi_rad):
    """dv_r, dv_phi (m, npts) km/s: amplitude 0.1 km/s per Jupiter mass."""
    amp = 0.1 * params["mass"][:, None]
    dr = (r_au[None, :] - params["radius"][:, None]) / WIDTH_AU
    dphi = phi_rad[None, :] - np.deg2rad(params["azimuth"])[:, None]
    env = amp * np.exp(-0.5 * dr ** 2)
    return env * np.cos(dphi), 0.5 * env * np.sin(dphi)


def standin_params(mass=(0.1, 10.0), radius=(50.0, 200.0)):
    """ParameterSet (mass, radius, azimuth, jitter free; h/r fixed)."""
    return parameters_for("none", {
        "mass": LogUniform(*mass), "radius": Uniform(*radius),
        "azimuth": Uniform(-180.0, 180.0), "aspect_ratio": Fixed(0.08),
        "jitter": LogUniform(1e-3, 0.1)})


TRUTH = {"mass": 2.0, "radius": 120.0, "azimuth": 30.0, "jitter": 0.004}


def standin_data(rng, npts=150, truth=TRUTH, sigma=0.01):
    """Synthetic traced points with Gaussian noise around the stand-in."""
    r = rng.uniform(60.0, 190.0, npts)
    phi = rng.uniform(-np.pi, np.pi, npts)
    a_r = rng.uniform(-0.6, 0.6, npts)
    a_phi = rng.uniform(-0.6, 0.6, npts)
    grad = rng.uniform(2.0, 6.0, npts)
    sig = np.full(npts, sigma) * rng.uniform(0.8, 1.2, npts)
    p = {k: np.array([v]) for k, v in truth.items()}
    dv_r, dv_phi = standin_model(p, r, phi)
    off = -(a_r * dv_r[0] + a_phi * dv_phi[0]) / grad
    noise = rng.normal(size=npts) * np.sqrt(sig ** 2 + truth["jitter"] ** 2)
    return dict(r_au=r, phi_rad=phi, a_r=a_r, a_phi=a_phi,
                grad_kms_per_arcsec=grad, offset_arcsec=off + noise,
                sigma_arcsec=sig, channel=rng.integers(0, 40, npts))


def standin_result(folder, *, seed=5, npts=60, max_steps=300, baseline=False,
                   walkers=10):
    """A small real fit (sampler run + assemble_result) on stand-in data."""
    from kinkfit.config import SamplerSettings
    from kinkfit.likelihood import KinkLikelihood
    from kinkfit.results import assemble_result
    from kinkfit.sampling import run_sampler

    rng = np.random.default_rng(seed)
    data = standin_data(rng, npts=npts)
    if baseline:
        ps = parameters_for("none", {"jitter": LogUniform(1e-3, 0.1)},
                            with_planet=False)
        lik = KinkLikelihood(model=None, param_set=ps, **data)
        start = np.array([0.02])
    else:
        lik = KinkLikelihood(model=standin_model, param_set=standin_params(),
                             **data)
        start = lik.param_set.pack(TRUTH)[0]
    settings = SamplerSettings(walkers=walkers, max_steps=max_steps,
                               check_every=50, autocorr_multiple=50.0,
                               tau_tolerance=0.01, seed=3, workers=1,
                               progress=False)
    out = run_sampler(lik.log_prob, lik.param_set, settings,
                      folder / f"ck{'0' if baseline else ''}.h5",
                      initial=start)
    res = assemble_result(
        out, lik, damping="none", config_text="title = 'fictional'\n",
        title="fictional test disk", background={"stellar_mass": 1.1},
        background_sigma={"stellar_mass": 0.02},
        truths={} if baseline else TRUTH, max_pointwise=100)
    return res, lik, out
