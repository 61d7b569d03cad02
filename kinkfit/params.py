"""The planet-fit parameters, each described once.

The sampler vector, the config keys of ``[planet]``, the HDF5 layout, the
corner-plot labels and the summary-table columns all derive from
:data:`PARAMETERS`.  Values are held in the canonical unit given here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ConfigError
from .priors import Fixed, LogUniform, Prior, Uniform

__all__ = ["ParameterSpec", "PARAMETERS", "DAMPING_PARAMETER",
           "ParameterSet", "parameters_for"]


@dataclass(frozen=True)
class ParameterSpec:
    """Description of one fit parameter.

    Attributes
    ----------
    name : str
        Config key under ``[planet]`` and name in results.
    unit : str
        Canonical unit as an astropy-parsable string ("" = dimensionless).
    label : str
        Matplotlib/LaTeX axis label including the unit.
    bounds : tuple of float
        Physical support; priors must lie inside it.
    default_prior : Prior
        Used when the config does not mention the parameter.
    description : str
        One line for the config reference and report tables.
    """

    name: str
    unit: str
    label: str
    bounds: tuple[float, float]
    default_prior: Prior
    description: str


PARAMETERS: dict[str, ParameterSpec] = {
    spec.name: spec for spec in [
        ParameterSpec("mass", "jupiterMass", r"$M_p\ [M_{\rm J}]$",
                      (0.0, 100.0), LogUniform(0.1, 10.0),
                      "planet mass"),
        ParameterSpec("radius", "au", r"$r_p\ [\mathrm{au}]$",
                      (0.0, np.inf), Uniform(30.0, 300.0),
                      "planet orbital radius (deprojected)"),
        ParameterSpec("azimuth", "deg", r"$\phi_p\ [\mathrm{deg}]$",
                      (-360.0, 360.0), Uniform(-180.0, 180.0),
                      "planet azimuth in the disk plane from the red-shifted "
                      "major axis, in the sense of rotation"),
        ParameterSpec("aspect_ratio", "", r"$h_p/r_p$",
                      (0.0, 0.5), Fixed(0.08),
                      "disk aspect ratio at the planet"),
        ParameterSpec("alpha", "", r"$\alpha$", (0.0, 1.0), LogUniform(1e-4, 0.1),
                      "viscous damping strength (Shakura-Sunyaev alpha)"),
        ParameterSpec("efold", "", r"$\ell_{\rm d}/r_p$",
                      (0.0, np.inf), LogUniform(0.1, 10.0),
                      "e-folding length of the wake amplitude along the wake, "
                      "in units of the planet radius"),
        ParameterSpec("jitter", "arcsec", r"$s\ [\mathrm{arcsec}]$",
                      (0.0, np.inf), LogUniform(1e-3, 0.1),
                      "extra positional scatter added in quadrature to the "
                      "traced-point uncertainties"),
    ]
}

#: damping prescription -> name of its parameter (None: no parameter)
DAMPING_PARAMETER: dict[str, str | None] = {
    "none": None,
    "viscous": "alpha",
    "efold": "efold",
}

_ALWAYS = ("mass", "radius", "azimuth", "aspect_ratio", "jitter")


@dataclass(frozen=True)
class ParameterSet:
    """The parameters of one fit, in a fixed order, with their priors.

    ``names`` lists every parameter of the model (free and fixed);
    ``free`` the sampled ones, in sampler-vector order.
    """

    names: tuple[str, ...]
    priors: tuple[Prior, ...]

    @property
    def free(self) -> tuple[str, ...]:
        return tuple(n for n, p in zip(self.names, self.priors) if p.free)

    @property
    def ndim(self) -> int:
        return len(self.free)

    def prior(self, name: str) -> Prior:
        return self.priors[self.names.index(name)]

    def spec(self, name: str) -> ParameterSpec:
        return PARAMETERS[name]

    def labels(self) -> list[str]:
        return [PARAMETERS[n].label for n in self.free]

    def log_prior(self, theta):
        """Sum of log-priors of the free parameters.

        Parameters
        ----------
        theta : ndarray, shape (m, ndim) or (ndim,)
        """
        theta = np.atleast_2d(theta)
        total = np.zeros(theta.shape[0])
        for j, name in enumerate(self.free):
            total = total + self.prior(name).log_prob(theta[:, j])
        return total

    def unpack(self, theta) -> dict[str, np.ndarray]:
        """Sampler vector(s) -> dict of every parameter (fixed included).

        Parameters
        ----------
        theta : ndarray, shape (m, ndim) or (ndim,)

        Returns
        -------
        dict of str -> ndarray, shape (m,)
        """
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        out = {}
        j = 0
        for name, prior in zip(self.names, self.priors):
            if prior.free:
                out[name] = theta[:, j]
                j += 1
            else:
                out[name] = np.full(theta.shape[0], prior.value)
        return out

    def pack(self, values: dict) -> np.ndarray:
        """Dict of values -> sampler vector(s), shape (m, ndim)."""
        cols = [np.atleast_1d(np.asarray(values[n], dtype=float))
                for n in self.free]
        return np.stack(cols, axis=-1)

    def sample_prior(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """Draw ``n`` sampler vectors from the prior, shape (n, ndim)."""
        return np.stack([self.prior(nm).sample(rng, n) for nm in self.free],
                        axis=-1)


def parameters_for(damping: str, priors: dict[str, Prior] | None = None,
                   *, file=None, with_planet: bool = True) -> ParameterSet:
    """The parameter set of a fit with a given damping prescription.

    Parameters
    ----------
    damping : str
        Key of :data:`DAMPING_PARAMETER`.
    priors : dict, optional
        Priors from the config, overriding the defaults.
    with_planet : bool
        ``False`` gives the planet-free baseline (jitter only).
    """
    if damping not in DAMPING_PARAMETER:
        raise ConfigError(f"unknown damping '{damping}' (expected one of "
                          f"{', '.join(DAMPING_PARAMETER)})", file=file,
                          key="wake.damping", value=damping)
    priors = dict(priors or {})
    if with_planet:
        names = list(_ALWAYS)
        extra = DAMPING_PARAMETER[damping]
        if extra:
            names.insert(4, extra)
    else:
        names = ["jitter"]
    chosen = []
    for name in names:
        prior = priors.get(name, PARAMETERS[name].default_prior)
        lo, hi = PARAMETERS[name].bounds
        slo, shi = prior.support
        if slo < lo or shi > hi:
            raise ConfigError(
                f"planet.{name}: prior {prior.describe(PARAMETERS[name].unit)} "
                f"lies outside the physical range [{lo:g}, {hi:g}]",
                file=file, key=f"planet.{name}", value=(slo, shi))
        chosen.append(prior)
    return ParameterSet(tuple(names), tuple(chosen))
