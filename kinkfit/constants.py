"""Physical constants as plain SI floats, taken once from astropy.

Use these inside hot loops; use ``astropy.units`` at the boundaries.
Values follow the CODATA/IAU set of the installed astropy
(``astropy.__version__`` is recorded in every result file).
"""

from __future__ import annotations

import numpy as np
from astropy import constants as _c
from astropy import units as _u

__all__ = [
    "G", "GM_SUN", "M_SUN", "M_JUP", "MJUP_PER_MSUN", "AU", "PC", "KM",
    "C_LIGHT", "K_B", "M_H", "ARCSEC", "AU_PER_ARCSEC_PER_PC",
    "keplerian_speed_kms",
]

G = float(_c.G.si.value)                     #: m^3 kg^-1 s^-2
GM_SUN = float(_c.GM_sun.si.value)           #: m^3 s^-2
M_SUN = float(_c.M_sun.si.value)             #: kg
M_JUP = float(_c.M_jup.si.value)             #: kg
MJUP_PER_MSUN = float((_c.M_jup / _c.M_sun).decompose().value)  #: ~9.546e-4
AU = float(_c.au.si.value)                   #: m
PC = float(_c.pc.si.value)                   #: m
KM = 1.0e3                                   #: m
C_LIGHT = float(_c.c.si.value)               #: m s^-1
K_B = float(_c.k_B.si.value)                 #: J K^-1
M_H = float(_c.m_p.si.value + _c.m_e.si.value)  #: kg, hydrogen atom
ARCSEC = float((1 * _u.arcsec).to_value(_u.rad))  #: rad
#: 1 arcsec at 1 pc is 1 au (definition of the parsec)
AU_PER_ARCSEC_PER_PC = 1.0


def keplerian_speed_kms(r_au, mstar_msun):
    """Midplane Keplerian speed.

    Parameters
    ----------
    r_au : float or ndarray
        Cylindrical radius, au.
    mstar_msun : float
        Stellar mass, solar masses.

    Returns
    -------
    float or ndarray
        ``sqrt(G M / r)`` in km/s.

    Examples
    --------
    >>> round(float(keplerian_speed_kms(1.0, 1.0)), 2)
    29.78
    """
    return np.sqrt(GM_SUN * mstar_msun / (np.asarray(r_au) * AU)) / KM
