"""Self-describing prior distributions on single parameters.

Each prior is a small frozen object with a vectorised ``log_prob``, a
``sample`` method taking an explicit ``numpy.random.Generator``, and a
one-line ``describe`` that report tables print.  Values are in the
parameter's canonical unit (see :mod:`kinkfit.params`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import ConfigError

__all__ = ["Prior", "Uniform", "LogUniform", "Normal", "Fixed", "make_prior"]


class Prior:
    """Interface of a one-dimensional prior."""

    kind = "abstract"
    free = True

    def log_prob(self, x):  # pragma: no cover - interface
        raise NotImplementedError

    def sample(self, rng: np.random.Generator, size=None):  # pragma: no cover
        raise NotImplementedError

    def describe(self, unit: str = "") -> str:  # pragma: no cover
        raise NotImplementedError

    @property
    def support(self) -> tuple[float, float]:  # pragma: no cover
        raise NotImplementedError


@dataclass(frozen=True)
class Uniform(Prior):
    """Uniform density on ``[low, high]``."""

    low: float
    high: float
    kind = "uniform"

    def log_prob(self, x):
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        return np.where(inside, -np.log(self.high - self.low), -np.inf)

    def sample(self, rng, size=None):
        return rng.uniform(self.low, self.high, size)

    def describe(self, unit=""):
        return f"uniform({self.low:g}, {self.high:g}) {unit}".strip()

    @property
    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class LogUniform(Prior):
    """Density proportional to ``1/x`` on ``[low, high]``, ``0 < low``."""

    low: float
    high: float
    kind = "log-uniform"

    def log_prob(self, x):
        x = np.asarray(x, dtype=float)
        inside = (x >= self.low) & (x <= self.high)
        with np.errstate(divide="ignore", invalid="ignore"):
            lp = -np.log(x) - np.log(np.log(self.high / self.low))
        return np.where(inside, lp, -np.inf)

    def sample(self, rng, size=None):
        return np.exp(rng.uniform(np.log(self.low), np.log(self.high), size))

    def describe(self, unit=""):
        return f"log-uniform({self.low:g}, {self.high:g}) {unit}".strip()

    @property
    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class Normal(Prior):
    """Gaussian ``N(mean, sd)`` truncated to ``[low, high]`` (default: none).

    The truncation normalisation is included so that log-probabilities of
    differently truncated priors are comparable.
    """

    mean: float
    sd: float
    low: float = -np.inf
    high: float = np.inf
    kind = "normal"

    def log_prob(self, x):
        from scipy.special import log_ndtr
        x = np.asarray(x, dtype=float)
        a = (self.low - self.mean) / self.sd
        b = (self.high - self.mean) / self.sd
        # log of Phi(b) - Phi(a), computed stably
        log_norm = log_ndtr(b) + np.log1p(-np.exp(log_ndtr(a) - log_ndtr(b)))
        z = (x - self.mean) / self.sd
        lp = -0.5 * z * z - np.log(self.sd * np.sqrt(2 * np.pi)) - log_norm
        inside = (x >= self.low) & (x <= self.high)
        return np.where(inside, lp, -np.inf)

    def sample(self, rng, size=None):
        from scipy.stats import truncnorm
        a = (self.low - self.mean) / self.sd
        b = (self.high - self.mean) / self.sd
        return truncnorm.rvs(a, b, loc=self.mean, scale=self.sd, size=size,
                             random_state=rng)

    def describe(self, unit=""):
        text = f"normal({self.mean:g}, {self.sd:g}) {unit}".strip()
        if np.isfinite(self.low) or np.isfinite(self.high):
            text += f" on [{self.low:g}, {self.high:g}]"
        return text

    @property
    def support(self):
        return (self.low, self.high)


@dataclass(frozen=True)
class Fixed(Prior):
    """A parameter held at one value (not sampled)."""

    value: float
    kind = "fixed"
    free = False

    def log_prob(self, x):
        return np.zeros_like(np.asarray(x, dtype=float))

    def sample(self, rng, size=None):
        return np.full(size, self.value) if size is not None else self.value

    def describe(self, unit=""):
        return f"fixed at {self.value:g} {unit}".strip()

    @property
    def support(self):
        return (self.value, self.value)


def make_prior(kind: str, *, low=None, high=None, mean=None, sd=None,
               value=None, key: str = "prior", file=None) -> Prior:
    """Build a prior from its config description, validating it.

    Parameters
    ----------
    kind : {"uniform", "log-uniform", "normal", "fixed"}
    low, high, mean, sd, value : float, optional
        Numbers in the parameter's canonical unit.
    key, file : str
        Used in error messages.
    """
    def need(name, val):
        if val is None:
            raise ConfigError(f"{key}: '{kind}' prior needs '{name}'",
                              file=file, key=f"{key}.{name}")
        if not np.isfinite(val):
            raise ConfigError(f"{key}.{name} = {val} is not finite",
                              file=file, key=f"{key}.{name}", value=val)
        return float(val)

    if kind == "uniform":
        lo, hi = need("low", low), need("high", high)
        if not lo < hi:
            raise ConfigError(f"{key}: prior bounds inverted or empty "
                              f"(low={lo:g} >= high={hi:g})", file=file,
                              key=key, value=(lo, hi))
        return Uniform(lo, hi)
    if kind == "log-uniform":
        lo, hi = need("low", low), need("high", high)
        if lo <= 0:
            raise ConfigError(f"{key}: log-uniform prior needs low > 0 "
                              f"(got {lo:g})", file=file, key=key, value=lo)
        if not lo < hi:
            raise ConfigError(f"{key}: prior bounds inverted or empty "
                              f"(low={lo:g} >= high={hi:g})", file=file,
                              key=key, value=(lo, hi))
        return LogUniform(lo, hi)
    if kind == "normal":
        mu, s = need("mean", mean), need("sd", sd)
        if s <= 0:
            raise ConfigError(f"{key}: normal prior needs sd > 0 (got {s:g})",
                              file=file, key=f"{key}.sd", value=s)
        lo = -np.inf if low is None else float(low)
        hi = np.inf if high is None else float(high)
        if not lo < hi:
            raise ConfigError(f"{key}: prior bounds inverted or empty "
                              f"(low={lo:g} >= high={hi:g})", file=file,
                              key=key, value=(lo, hi))
        return Normal(mu, s, lo, hi)
    if kind == "fixed":
        return Fixed(need("value", value))
    raise ConfigError(f"{key}: unknown prior '{kind}' (expected uniform, "
                      f"log-uniform, normal or fixed)", file=file, key=key,
                      value=kind)
