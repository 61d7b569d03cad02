"""Planet-wake physics: locus (R02/OL02), linear sheet (GR01), Burgers
steepening (W74), damping and the whole-disk reference model.

The public entry point is :func:`wake_perturbations`; the submodules hold the
mass-independent pieces (``locus``, ``nonlinear``, ``damping``, ``burgers``)
that a faster emulator can tabulate.  ``kinkfit.wake.linear`` is imported
lazily (it solves and caches the sheet on first use).
"""

from .damping import DAMPING_LAWS, Damping, register_damping
from .locus import wake_azimuth, wrap_angle
from .model import (DEFAULT_MATCH_H, Planet, WakeDisk, mass_ratio,
                    thermal_mass_msun, wake_angular_momentum_flux,
                    wake_perturbations, wake_skeleton)

__all__ = ["Damping", "DAMPING_LAWS", "register_damping", "wake_azimuth",
           "wrap_angle", "Planet", "WakeDisk", "mass_ratio", "thermal_mass_msun",
           "wake_perturbations", "wake_angular_momentum_flux", "wake_skeleton",
           "DEFAULT_MATCH_H"]
