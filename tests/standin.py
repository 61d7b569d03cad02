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
