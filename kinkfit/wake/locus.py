"""Shape of the planet wake in the disk plane (R02, OL02).

In the planet's frame a wave packet launched near the planet travels radially at
the local sound speed ``c(r)`` while the flow carries it in azimuth at
``Omega(r) - Omega_p``.  For a planet orbiting in the +phi sense the wake
satisfies ``dphi/dr = -|Omega - Omega_p| / c``; with ``x = r / r_p``,
``c = c_p x^-q`` and ``Omega = Omega_p x^-3/2``::

    dphi/dx = -sgn(x - 1) (r_p/h_p) (x^q - x^(q - 3/2))

whose integral from the planet is the closed form coded in
:func:`wake_azimuth` (R02 eq. for the wake shape; OL02).  Both arms trail:
``dphi/dr < 0`` on each.  The observer's rotation sense is handled by the
geometry module, never here.
"""

from __future__ import annotations

import numpy as np

from ..errors import PhysicsRangeError

__all__ = ["wake_azimuth", "wake_azimuth_slope", "wrap_angle",
           "wake_arc_length_rp", "shear_mach_number"]


def wrap_angle(angle_rad):
    """Wrap angles to ``[-pi, pi)``.

    Parameters
    ----------
    angle_rad : float or ndarray
        Angle(s), radians.

    Returns
    -------
    ndarray
        Same shape, radians in ``[-pi, pi)``.
    """
    return np.mod(np.asarray(angle_rad, dtype=float) + np.pi, 2.0 * np.pi) - np.pi


def _check(r_over_rp, aspect_p):
    x = np.asarray(r_over_rp, dtype=float)
    if not (0.0 < aspect_p < 0.5):
        raise PhysicsRangeError(
            f"aspect_p = h_p/r_p = {aspect_p!r} is outside (0, 0.5)",
            key="aspect_p", value=aspect_p)
    if np.any(~(x > 0.0)):
        raise PhysicsRangeError("r_over_rp must be positive and finite",
                                key="r_over_rp", value=float(np.nanmin(x)))
    return x


def _phase_integral(x, q):
    """``(x^(1+q) - 1)/(1+q) - (x^(q-1/2) - 1)/(q-1/2)``, ln x at q = 1/2."""
    first = np.expm1((1.0 + q) * np.log(x)) / (1.0 + q)
    a = q - 0.5
    lx = np.log(x)
    if abs(a) < 1e-12:
        second = lx
    else:
        # expm1 keeps precision near x = 1 and near q = 1/2
        second = np.expm1(a * lx) / a
    return first - second


def wake_azimuth(r_over_rp, aspect_p, q, phi_p=0.0, *, wrapped=False):
    """Azimuth of the wake crest (both arms) at radius ``r``.

    Parameters
    ----------
    r_over_rp : float or ndarray
        ``x = r / r_p`` (> 0).  ``x > 1`` gives the outer arm, ``x < 1`` the
        inner arm, ``x = 1`` the planet.
    aspect_p : float
        ``h_p / r_p`` at the planet, in (0, 0.5).
    q : float
        Sound-speed power law index, ``c ∝ r^-q``.
    phi_p : float
        Planet azimuth, radians (disk frame, orbit in +phi).
    wrapped : bool
        If ``False`` (default) return the unwrapped phase, which keeps
        decreasing with ``r`` through any number of windings; if ``True``
        return it wrapped to ``[-pi, pi)``.

    Returns
    -------
    ndarray
        Wake azimuth ``phi_w``, radians, same shape as ``r_over_rp``.

    Notes
    -----
    ``phi_w = phi_p - sgn(x-1) (r_p/h_p) [(x^(1+q)-1)/(1+q) - (x^(q-1/2)-1)/(q-1/2)]``
    (R02, OL02); the second term is ``ln x`` at ``q = 1/2``.  Near the planet
    it reduces to ``y = -(3/4) X|X|/h_p`` with ``X = r - r_p``,
    ``y = r_p (phi - phi_p)``.
    """
    x = _check(r_over_rp, aspect_p)
    phase = phi_p - np.sign(x - 1.0) * _phase_integral(x, q) / aspect_p
    return wrap_angle(phase) if wrapped else phase


def wake_azimuth_slope(r_over_rp, aspect_p, q):
    """``dphi_w/dx`` of the wake (radians per unit ``r/r_p``), negative on both arms."""
    x = _check(r_over_rp, aspect_p)
    return -np.abs(x ** q - x ** (q - 1.5)) / aspect_p


def shear_mach_number(r_over_rp, aspect_p, q):
    """``M = r |Omega - Omega_p| / c``, the pitch cotangent of the wake.

    ``M = x^(1+q) |x^-3/2 - 1| / aspect_p`` (dimensionless); the wake-front
    normal makes an angle ``arctan(1/M)`` with the radial direction.
    """
    x = _check(r_over_rp, aspect_p)
    return x ** (1.0 + q) * np.abs(x ** -1.5 - 1.0) / aspect_p


def wake_arc_length_rp(r_over_rp, aspect_p, q, *, n_grid=4001):
    """Arc length along the wake crest from the planet, in units of ``r_p``.

    ``dl = sqrt(dx^2 + x^2 dphi_w^2)``; integrated numerically (trapezoid on a
    grid refined towards the planet) and interpolated.

    Parameters
    ----------
    r_over_rp : float or ndarray
        ``x = r / r_p``.
    aspect_p, q : float
        As in :func:`wake_azimuth`.
    n_grid : int
        Points of the integration grid per arm.

    Returns
    -------
    ndarray
        Arc length / r_p, same shape, zero at the planet.
    """
    x = _check(r_over_rp, aspect_p)
    out = np.zeros_like(x)
    for side in (1.0, -1.0):
        sel = (x - 1.0) * side > 0
        if not np.any(sel):
            continue
        far = np.max(np.abs(x[sel] - 1.0))
        u = far * np.linspace(0.0, 1.0, n_grid) ** 2
        xs = 1.0 + side * u
        dl_dx = np.sqrt(1.0 + (xs * wake_azimuth_slope(xs, aspect_p, q)) ** 2)
        ell = np.concatenate([[0.0], np.cumsum(0.5 * (dl_dx[1:] + dl_dx[:-1])
                                               * np.diff(u))])
        out[sel] = np.interp(np.abs(x[sel] - 1.0), u, ell)
    return out
