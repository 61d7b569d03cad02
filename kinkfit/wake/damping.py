"""Damping assumptions for the wake amplitude (PHYSICS.md §6).

A damping law gives ``D(x)``, the factor by which dissipation other than the
Burgers shocks has reduced the wave amplitude between the planet and
``x = r/r_p`` (``D(1) = 1``).  It enters the Burgers problem as a linear,
amplitude-independent loss ``chi_t + chi chi_eta = -lambda(t) chi``; with
``chi = D psi`` and the damped clock ``dt' = D dt`` this becomes the undamped
``psi_t' + psi psi_eta = 0`` exactly, so the universal Burgers solution is
reused and damping also slows the steepening (see ``docs/physics/nonlinear.md``).

Laws
----
``"none"``
    ``D = 1``.
``"viscous"`` (parameter ``alpha``)
    Sound waves in a fluid of kinematic viscosity ``nu = alpha c h`` lose
    amplitude at ``Gamma = nu_L k^2 / 2`` with the longitudinal viscosity
    ``nu_L = (4/3) nu`` (shear viscosity with the ``-2/3`` trace term, no bulk
    viscosity; Landau & Lifshitz, Fluid Mechanics §79).  A wake of
    cross-wake wavenumber ``k_eta`` (1/h_p, the rms wavenumber of the linear
    profile at the matching distance) has radial wavenumber
    ``k_r = k_eta |Omega - Omega_p| / (a c)``; travelling radially at ``c`` it
    decays per unit ``x`` at ::

        -dlnD/d|x| = (2/3) alpha k_eta^2 x^(3/2+q) (x^-3/2 - 1)^2 / a^3

    (``≈ (3/2) alpha k_eta^2 |X/h_p|^2 / h_p`` near the planet, so
    ``ln D ≈ -(1/2) alpha k_eta^2 |X/h_p|^3``).  The width is held at its
    value at the matching distance (the N wave's broadening is ignored).
``"efold"`` (parameter ``efold_rp``)
    ``D = exp(-l / efold_rp)`` with ``l`` the arc length along the wake crest
    from the planet in units of ``r_p`` (same unit as the fit parameter
    ``efold``).

Adding a law: write ``f(x, damping, ctx) -> ln D`` and decorate it with
``@register_damping("name")``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..errors import PhysicsRangeError
from .locus import wake_arc_length_rp
from .nonlinear import arm_integral

__all__ = ["Damping", "DampingContext", "DAMPING_LAWS", "register_damping",
           "damping_log_factor", "damping_factor"]


@dataclass(frozen=True)
class DampingContext:
    """Mass-independent facts a damping law may use.

    Attributes
    ----------
    aspect_p : float
        ``h_p / r_p``.
    p, q : float
        Surface-density and sound-speed power-law indices.
    k_eta_h : float
        RMS cross-wake wavenumber of the wake profile, 1/h_p.
    """

    aspect_p: float
    p: float
    q: float
    k_eta_h: float = 1.0


#: name -> function(x, damping, ctx) -> ln D(x)
DAMPING_LAWS: dict[str, Callable] = {}


def register_damping(name: str):
    """Decorator registering a damping law under ``name``."""
    def deco(func):
        DAMPING_LAWS[name] = func
        return func
    return deco


@dataclass(frozen=True)
class Damping:
    """Chosen damping assumption.

    Attributes
    ----------
    kind : str
        Key of :data:`DAMPING_LAWS` (``"none"``, ``"viscous"``, ``"efold"``).
    alpha : float
        Shakura-Sunyaev ``alpha`` (``"viscous"``), >= 0.
    efold_rp : float
        E-folding length along the wake, units of ``r_p`` (``"efold"``), > 0.
    """

    kind: str = "none"
    alpha: float = 0.0
    efold_rp: float = math.inf

    def __post_init__(self):
        if self.kind not in DAMPING_LAWS:
            raise PhysicsRangeError(
                f"damping kind {self.kind!r} unknown (expected one of "
                f"{', '.join(sorted(DAMPING_LAWS))})", key="damping", value=self.kind)
        if not (np.isfinite(self.alpha) and self.alpha >= 0.0):
            raise PhysicsRangeError(f"damping alpha = {self.alpha!r} must be finite and >= 0",
                                    key="alpha", value=self.alpha)
        if not (self.efold_rp > 0.0):  # inf allowed, NaN rejected
            raise PhysicsRangeError(f"damping efold_rp = {self.efold_rp!r} must be > 0",
                                    key="efold_rp", value=self.efold_rp)

    def describe(self) -> str:
        """One line for reports."""
        if self.kind == "viscous":
            return f"viscous damping, alpha = {self.alpha:g}"
        if self.kind == "efold":
            return f"e-folding along the wake, length = {self.efold_rp:g} r_p"
        return f"{self.kind} damping"


@register_damping("none")
def _none(x, damping, ctx):
    return np.zeros_like(np.asarray(x, dtype=float))


@register_damping("viscous")
def _viscous(x, damping, ctx):
    x = np.asarray(x, dtype=float)
    if damping.alpha == 0.0:
        return np.zeros_like(x)
    a, q, k = ctx.aspect_p, ctx.q, ctx.k_eta_h
    coef = (2.0 / 3.0) * damping.alpha * k * k / a ** 3

    def rate(s):
        return coef * s ** (1.5 + q) * (s ** -1.5 - 1.0) ** 2
    return -arm_integral(x, rate)


@register_damping("efold")
def _efold(x, damping, ctx):
    x = np.asarray(x, dtype=float)
    if not np.isfinite(damping.efold_rp):
        return np.zeros_like(x)
    return -wake_arc_length_rp(x, ctx.aspect_p, ctx.q) / damping.efold_rp


def damping_log_factor(x, damping: Damping, ctx: DampingContext):
    """``ln D(x)`` for the chosen law (<= 0, zero at the planet)."""
    return DAMPING_LAWS[damping.kind](np.asarray(x, dtype=float), damping, ctx)


def damping_factor(x, damping: Damping, ctx: DampingContext):
    """Amplitude factor ``D(x)`` in (0, 1], same shape as ``x``."""
    return np.exp(damping_log_factor(x, damping, ctx))
