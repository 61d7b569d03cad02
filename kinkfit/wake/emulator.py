"""Wake model callables for the likelihood.

:func:`make_fit_model` returns ``model(params, r_au, phi_rad) -> (dv_r,
dv_phi)`` with ``params`` a dict of arrays of shape ``(m,)`` (one entry per
walker, canonical units of :mod:`kinkfit.params`) and outputs of shape
``(m, npts)`` in km/s -- the interface of
:class:`kinkfit.likelihood.KinkLikelihood`.

``method="direct"`` evaluates the reference model
:func:`kinkfit.wake.model.wake_perturbations` walker by walker (slow; the
reference for accuracy tests and benchmarks).
"""

from __future__ import annotations

import math

import numpy as np

from .model import Damping, Planet, WakeDisk, wake_perturbations

__all__ = ["make_fit_model", "DirectModel"]


def _damping_for(kind: str, params: dict, i: int) -> Damping:
    if kind == "viscous":
        return Damping(kind="viscous", alpha=float(params["alpha"][i]))
    if kind == "efold":
        return Damping(kind="efold", efold_rp=float(params["efold"][i]))
    return Damping()


class DirectModel:
    """Reference model: one :func:`wake_perturbations` call per walker.

    Parameters
    ----------
    disk : WakeDisk
        Template disk; ``aspect_p`` is replaced by ``params["aspect_ratio"]``
        when that parameter is present.
    damping : str
        Damping assumption (``none``, ``viscous``, ``efold``).
    """

    def __init__(self, disk: WakeDisk, damping: str):
        self.disk = disk
        self.damping = damping

    def __call__(self, params: dict, r_au, phi_rad):
        m = len(params["mass"])
        r = np.asarray(r_au, dtype=float)
        phi = np.asarray(phi_rad, dtype=float)
        dv_r = np.zeros((m, r.size))
        dv_phi = np.zeros((m, r.size))
        for i in range(m):
            disk = self.disk
            if "aspect_ratio" in params:
                from dataclasses import replace
                disk = replace(disk, aspect_p=float(params["aspect_ratio"][i]))
            planet = Planet(mass_mjup=float(params["mass"][i]),
                            r_au=float(params["radius"][i]),
                            phi_rad=math.radians(float(params["azimuth"][i])))
            vr, vphi, _ = wake_perturbations(r, phi, planet, disk,
                                             _damping_for(self.damping,
                                                          params, i))
            dv_r[i], dv_phi[i] = vr, vphi
        return dv_r, dv_phi


def make_fit_model(disk: WakeDisk, damping: str, method: str = "direct"):
    """The wake model callable used by the likelihood.

    Parameters
    ----------
    disk : WakeDisk
    damping : str
    method : {"direct"}
    """
    if method == "direct":
        return DirectModel(disk, damping)
    raise ValueError(f"unknown wake-model method {method!r}")
