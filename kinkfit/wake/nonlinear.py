"""Coordinates of the nonlinear wake: ``t(r)``, ``eta(r, phi)``, ``g(r)`` and the
velocity relations of a tightly wound acoustic wave (GR01 locally, R02 globally).

Derivation (full text in ``docs/physics/nonlinear.md``).  With ``x = r/r_p``,
``c = c_p x^-q``, ``Sigma ∝ x^-p``, ``Omega = Omega_p x^-3/2``,
``a = h_p/r_p`` and ``delta = dSigma/Sigma``:

* Linear amplitude.  The angular-momentum flux of a tightly wound acoustic
  wave is ``F_J = (r Sigma c^3 / |Omega - Omega_p|) ∮ delta^2 dphi`` and the
  profile keeps its shape in ``phi - phi_w(r)``, so ``delta ∝ g(x)`` with ::

      g(x) = [ (2/3) |x^-3/2 - 1| x^(p + 3q - 1) / a ]^(1/2)   ->  |X/h_p|^(1/2)

  near the planet (``X = r - r_p``).
* Steepening.  A part of the profile with ``delta`` runs radially at
  ``c (1 + (gamma+1)/2 delta)``, so its azimuth relative to ``phi_w`` drifts;
  with ``eta = sgn(x-1) (phi - phi_w) / a`` (azimuthal distance from the
  crest in units of ``h_p``, ``= sgn(X) (y - y_w)/h_p`` near the planet) and
  ``chi = ((gamma+1)/2) delta / g`` one gets ``chi_t + chi chi_eta = 0`` with ::

      dt/d|x| = a^(-5/2) |x^-3/2 - 1| x^q [ (2/3) |x^-3/2 - 1| x^(p+3q-1) ]^(1/2)

  ``t ≈ (3/5) |X/h_p|^(5/2)`` near the planet (GR01's ``|x|^(5/2)`` law).
* Velocities.  The perturbation velocity is along the front normal ``n``
  (outward from the planet): ``u = c delta n``, ``n_r = sgn(x-1) M/sqrt(1+M^2)``,
  ``n_phi = sgn(x-1)/sqrt(1+M^2)``, with ``M = r |Omega - Omega_p| / c``.

Everything here is independent of the planet mass: the mass enters only as
the amplitude of ``chi`` (Burgers is invariant under ``chi -> A chi``,
``t -> t/A``).  GR01's ``M1 = (2/3) M_th`` never appears: the sheet and the
API use ``M_th = (h_p/r_p)^3 M*``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import PhysicsRangeError
from .burgers import shock_formation_time
from .locus import shear_mach_number, wake_azimuth, wrap_angle

__all__ = ["arm_integral", "amplitude_factor", "nonlinear_time",
           "cross_coordinate", "front_normal", "chi_from_sigma",
           "sigma_from_chi", "MatchProfile", "matching_profile",
           "profile_wavenumber_h", "shock_distance_h", "flux_from_chi"]


def arm_integral(x, rate, *, n_grid=4001):
    """Integral of ``rate(x')`` over ``|dx'|`` from the planet (``x' = 1``) to ``x``.

    Each arm (``x > 1`` outer, ``x < 1`` inner) is integrated separately with
    the trapezoid rule on a grid ``|x'-1| ∝ s^2`` (dense near the planet, where
    the integrands vanish like powers of ``|x'-1|``), then interpolated.

    Parameters
    ----------
    x : ndarray
        ``r / r_p`` (> 0).
    rate : callable
        Vectorised ``rate(xs) -> ndarray`` (finite on the arm).
    n_grid : int
        Grid points per arm.

    Returns
    -------
    ndarray
        Same shape as ``x``; zero at ``x = 1``.
    """
    x = np.asarray(x, dtype=float)
    out = np.zeros_like(x)
    for side in (1.0, -1.0):
        sel = (x - 1.0) * side > 0
        if not np.any(sel):
            continue
        far = float(np.max(np.abs(x[sel] - 1.0)))
        u = far * np.linspace(0.0, 1.0, n_grid) ** 2
        f = np.asarray(rate(1.0 + side * u), dtype=float)
        cum = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(u))])
        out[sel] = np.interp(np.abs(x[sel] - 1.0), u, cum)
    return out


def _check_disk(aspect_p, p, q):
    if not (0.0 < aspect_p < 0.5):
        raise PhysicsRangeError(f"aspect_p = h_p/r_p = {aspect_p!r} is outside (0, 0.5)",
                                key="aspect_p", value=aspect_p)
    for name, val in (("p", p), ("q", q)):
        if not np.isfinite(val):
            raise PhysicsRangeError(f"{name} = {val!r} must be finite", key=name, value=val)


def amplitude_factor(x, aspect_p, p, q):
    """Linear amplitude law ``g(x)`` of the wave (angular-momentum-flux conservation).

    ``g = [(2/3) |x^-3/2 - 1| x^(p+3q-1) / a]^(1/2)``, normalised so that
    ``g -> |X/h_p|^(1/2)`` near the planet.  In the linear limit
    ``dSigma/Sigma ∝ g`` along the wake (R02).

    Parameters
    ----------
    x : ndarray
        ``r / r_p``.
    aspect_p, p, q : float
        ``h_p/r_p``, surface-density and sound-speed power-law indices.

    Returns
    -------
    ndarray
        Dimensionless, same shape as ``x``.
    """
    _check_disk(aspect_p, p, q)
    x = np.asarray(x, dtype=float)
    return np.sqrt((2.0 / 3.0) * np.abs(x ** -1.5 - 1.0) * x ** (p + 3 * q - 1) / aspect_p)


def _dt_dx(x, aspect_p, p, q):
    # dt/dsigma = (r_p/h_p) |x^-3/2 - 1| x^q g with sigma = |r - r_p|/h_p
    return (np.abs(x ** -1.5 - 1.0) * x ** q / aspect_p ** 2) * amplitude_factor(x, aspect_p, p, q)


def nonlinear_time(x, aspect_p, p, q, *, weight=None):
    """Nonlinear clock ``t(x)`` counted from the planet (GR01 convention).

    ``t = ∫ a^-2 |x^-3/2 - 1| x^q g(x) |dx|`` from ``x = 1``; ``≈ (3/5) |X/h_p|^(5/2)``
    near the planet.

    Parameters
    ----------
    x : ndarray
        ``r / r_p``.
    aspect_p, p, q : float
        Disk parameters.
    weight : callable, optional
        ``weight(xs)`` multiplying the rate, e.g. the damping factor ``D`` for
        the damped clock ``t' = ∫ D dt``.

    Returns
    -------
    ndarray
        Dimensionless time, same shape as ``x``.
    """
    _check_disk(aspect_p, p, q)
    if weight is None:
        return arm_integral(x, lambda s: _dt_dx(s, aspect_p, p, q))
    return arm_integral(x, lambda s: _dt_dx(s, aspect_p, p, q) * weight(s))


def cross_coordinate(x, phi_rad, aspect_p, q, phi_p=0.0):
    """``eta = sgn(x-1) wrap(phi - phi_w(x)) / a``: distance across the wake / h_p.

    Positive ``eta`` is the side the wave steepens towards (ahead of the crest
    along its propagation: larger ``phi`` on the outer arm, smaller on the
    inner arm).  Near the planet ``eta = sgn(X) (y - y_w)/h_p``.
    """
    x = np.asarray(x, dtype=float)
    dphi = wrap_angle(np.asarray(phi_rad, dtype=float) - wake_azimuth(x, aspect_p, q, phi_p))
    return np.sign(x - 1.0) * dphi / aspect_p


def front_normal(x, aspect_p, q):
    """Unit normal of the wake front pointing away from the planet: ``(n_r, n_phi)``.

    ``n_r = sgn(x-1) M/sqrt(1+M^2)``, ``n_phi = sgn(x-1)/sqrt(1+M^2)`` with
    ``M`` from :func:`kinkfit.wake.locus.shear_mach_number`; so ``n_phi/n_r =
    c / (r |Omega - Omega_p|)``.
    """
    x = np.asarray(x, dtype=float)
    m = shear_mach_number(x, aspect_p, q)
    s = np.sign(x - 1.0)
    norm = np.sqrt(1.0 + m * m)
    return s * m / norm, s / norm


def chi_from_sigma(dsigma, x, aspect_p, p, q, gamma):
    """``chi = ((gamma+1)/2) (dSigma/Sigma) / g(x)``."""
    return 0.5 * (gamma + 1.0) * np.asarray(dsigma) / amplitude_factor(x, aspect_p, p, q)


def sigma_from_chi(chi, x, aspect_p, p, q, gamma):
    """Inverse of :func:`chi_from_sigma`: ``dSigma/Sigma = 2 g chi / (gamma+1)``."""
    return 2.0 * amplitude_factor(x, aspect_p, p, q) * np.asarray(chi) / (gamma + 1.0)


@dataclass(frozen=True)
class MatchProfile:
    """Linear wake profile at the matching distance, per unit ``Mp/M_th``.

    Attributes
    ----------
    x_match : float
        ``r/r_p`` of the matching radius.
    eta : ndarray, shape (n,)
        Cross-wake coordinate (increasing), h_p; origin on the sheet's crest
        parabola ``y = -(3/4) X|X|``, which the model lays onto the R02 crest
        ``phi_w(x_match)``.
    chi : ndarray, shape (n,)
        ``chi`` for ``Mp = M_th`` (multiply by ``Mp/M_th``).
    sigma, u, v : ndarray, shape (n,)
        dSigma/Sigma and radial / azimuthal velocities / c_p for ``Mp = M_th``.
    """

    x_match: float
    eta: np.ndarray
    chi: np.ndarray
    sigma: np.ndarray
    u: np.ndarray
    v: np.ndarray


def _taper(y, width):
    """Cosine taper to zero over ``width`` at both ends of a profile."""
    span = y - y[0]
    back = y[-1] - y
    w = np.ones_like(y)
    for d in (span, back):
        m = d < width
        w[m] *= 0.5 * (1 - np.cos(np.pi * d[m] / width))
    return w


def matching_profile(sheet, x_match_h, aspect_p, p, q, gamma, *, taper_h=4.0):
    """Cut the linear sheet at ``X = x_match_h h_p`` and express it in ``(eta, chi)``.

    Parameters
    ----------
    sheet : SheetSolution
        Linear solution (``kinkfit.wake.linear``).
    x_match_h : float
        Signed matching distance ``(r - r_p)/h_p``: ``> 0`` outer arm, ``< 0`` inner.
    aspect_p, p, q, gamma : float
        Disk parameters.
    taper_h : float
        Width (h_p) of the cosine taper that brings the cut to zero at the ends
        of the sheet window.

    Returns
    -------
    MatchProfile
    """
    from .linear import sheet_profile  # production path: the GR01 sheet

    xm = float(x_match_h)
    if xm == 0.0:
        raise PhysicsRangeError("matching distance must be non-zero", key="x_match_h", value=xm)
    y, sig, u, v = sheet_profile(sheet, xm)
    x = 1.0 + xm * aspect_p
    if not x > 0:
        raise PhysicsRangeError(f"matching distance {xm} h_p reaches r <= 0 for "
                                f"aspect_p={aspect_p}", key="x_match_h", value=xm)
    # origin on the local crest parabola y = -(3/4) X|X| of the sheet; the model
    # lays this origin onto the R02 crest phi_w(r) (global curvature)
    y_w = -0.75 * xm * abs(xm)
    eta = np.sign(xm) * (y - y_w)
    w = _taper(y, taper_h)
    order = np.argsort(eta)
    eta, sig, u, v, w = eta[order], sig[order], u[order], v[order], w[order]
    sig, u, v = sig * w, u * w, v * w
    chi = chi_from_sigma(sig, x, aspect_p, p, q, gamma)
    return MatchProfile(float(x), eta, chi, sig, u, v)


def profile_wavenumber_h(eta, sigma):
    """RMS cross-wake wavenumber ``k = sqrt(∫ sigma'^2 / ∫ sigma^2)``, 1/h_p."""
    d = np.gradient(sigma, eta)
    return float(np.sqrt(np.trapezoid(d * d, eta) / np.trapezoid(sigma * sigma, eta)))


def shock_distance_h(sheet, mass_ratio, *, aspect_p=0.05, p=1.0, q=0.25, gamma=1.4,
                     x_match_h=4.0, clock="planet"):
    """Radial distance ``|X_sh|/h_p`` at which the first shock forms (outer arm).

    ``t_sh = 1 / max(-d chi/d eta)`` of the matching profile (W74); the
    distance solves ``t(x_sh) = t_sh`` (``clock="planet"``, GR01) or
    ``t(x_sh) = t(x_match) + t_sh`` (``clock="matching"``).

    Parameters
    ----------
    sheet : SheetSolution
    mass_ratio : float
        ``Mp / M_th`` with ``M_th = (h_p/r_p)^3 M*``.
    aspect_p, p, q, gamma : float
        Disk parameters.
    x_match_h : float
        Matching distance, h_p.
    clock : {"planet", "matching"}
        Origin of the nonlinear clock.

    Returns
    -------
    float
        ``|X_sh| / h_p``.
    """
    prof = matching_profile(sheet, abs(x_match_h), aspect_p, p, q, gamma)
    t_sh = shock_formation_time(prof.eta, mass_ratio * prof.chi)
    xs = 1.0 + aspect_p * np.geomspace(1e-3, 0.9 / aspect_p, 4000)
    ts = nonlinear_time(xs, aspect_p, p, q)
    if clock == "matching":
        t_sh = t_sh + float(nonlinear_time(np.array([prof.x_match]), aspect_p, p, q)[0])
    elif clock != "planet":
        raise PhysicsRangeError(f"clock must be 'planet' or 'matching', not {clock!r}",
                                key="clock", value=clock)
    if t_sh > ts[-1]:
        return np.inf
    return float(np.interp(t_sh, ts, (xs - 1.0) / aspect_p))


def flux_from_chi(eta, chi, gamma):
    """WKB angular-momentum flux ``(2/3) (2/(gamma+1))^2 ∫ chi^2 d eta``.

    In units of ``(G Mp)^2 Sigma_p r_p Omega_p / c_p^3`` when ``chi`` is per
    unit ``Mp/M_th`` (divide by ``(Mp/M_th)^2`` otherwise); valid on both arms
    and at any radius (the ``r``, ``Sigma``, ``c`` and shear factors are in ``g``).
    """
    return (2.0 / 3.0) * (2.0 / (gamma + 1.0)) ** 2 * float(np.trapezoid(np.asarray(chi) ** 2, eta))
