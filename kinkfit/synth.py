"""Synthetic line cubes of a (possibly perturbed) Keplerian disk.

The forward model, in the order it is applied:

1. Sky grid.  Pixel ``(j, i)`` of an ``npix x npix`` image is at
   ``x = -(i - npix // 2) * pixel``, ``y = (j - npix // 2) * pixel`` arcsec
   (east, north; ``CDELT1 < 0``, reference pixel ``npix // 2``), exactly the
   grid :func:`kinkfit.cube.write_cube` writes and
   :func:`kinkfit.cube.read_cube` returns.  Each pixel is split into
   ``oversample**2`` sub-pixels; the model is evaluated at their centres and
   block-averaged.
2. Emitting layers.  Each sub-pixel is deprojected onto the front and back
   surface (:func:`kinkfit.geometry.sky_to_disk`); the gas there has the
   elevated Keplerian speed plus the optional ``perturbation(r, phi, z) ->
   (dv_r, dv_phi, dv_z)`` (km/s; ``dv_z`` along disk ``+Z``), projected with
   :func:`kinkfit.geometry.los_velocity`.
3. Line profile.  A Gaussian of peak 1 and dispersion
   ``sigma_v = sqrt(k T(r) / m + v_turb^2)`` averaged exactly over each
   channel (difference of error functions):
   ``phi_k = sqrt(pi/2) sigma / dv * [erf((v_k + dv/2 - v0) / (sqrt2 sigma))
   - erf((v_k - dv/2 - v0) / (sqrt2 sigma))]``, so ``0 <= phi_k <= 1``.
4. Optically thick combination.  ``I = I_f phi_f + I_b phi_b (1 - phi_f)``:
   where the front layer emits at its line centre it is opaque and hides the
   back layer; away from its line centre it is transparent.
5. Units and beam.  Model brightness is in **Jy/beam** of the observing beam
   (surface brightness times the beam solid angle
   ``Omega_b = pi bmaj bmin / (4 ln 2)``); the beam kernel on the pixel
   grid is normalised to **unit sum**, so convolution conserves
   ``flux [Jy] = sum(S) * Omega_pix / Omega_b`` and a point source of flux F
   peaks at ``~F`` Jy/beam.
6. Noise.  White Gaussian noise convolved with the same kernel (on a grid
   padded by the kernel half-width, so there is no edge roll-off) and scaled
   by ``1 / sqrt(sum K^2)``: the per-pixel rms is exactly
   ``peak_jy_beam / peak_snr``.  **Peak SNR** is thus defined on the model's
   unconvolved line-peak brightness ``LineEmission.peak_jy_beam`` (the
   brightness of the front layer at the disk centre), independent of the
   perturbation and of the beam dilution; the measured maximum of the
   noiseless cube is recorded in the FITS header (``SYNPEAK``).
"""

from __future__ import annotations

import logging
import math
from collections import OrderedDict
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from astropy import constants as _c
from scipy.signal import fftconvolve
from scipy.special import erf

from .constants import K_B
from .errors import ConfigError, PhysicsRangeError
from .geometry import DiskGeometry, los_velocity, rotation_speed_kms, sky_to_disk

__all__ = [
    "ObservingSetup",
    "LineEmission",
    "sky_grid",
    "channel_velocities",
    "beam_kernel",
    "channel_profile",
    "make_cube",
    "beam_noise",
    "write_synthetic_cube",
    "truth_cards",
    "geometry_from_header",
    "REST_FREQUENCY_12CO_21_HZ",
]

log = logging.getLogger(__name__)

#: 12CO J=2-1 rest frequency, Hz (CDMS catalogue, from memory)
REST_FREQUENCY_12CO_21_HZ = 230.538e9
_AMU_KG = float(_c.u.si.value)
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


def _positive(obj, name, integer=False, allow_zero=False):
    value = getattr(obj, name)
    try:
        v = int(value) if integer else float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{name} must be a number, got {value!r}",
                          key=name, value=value) from None
    if integer and (isinstance(value, bool) or v != value):
        raise ConfigError(f"{name} must be an integer, got {value!r}",
                          key=name, value=value)
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise ConfigError(f"{name} must be {'>= 0' if allow_zero else '> 0'}, "
                          f"got {value!r}", key=name, value=value)
    object.__setattr__(obj, name, v)
    return v


@dataclass(frozen=True)
class ObservingSetup:
    """Image grid, spectral axis, beam and noise of a synthetic observation.

    Parameters
    ----------
    npix : int
        Pixels per side (square image).
    pixel_arcsec : float
        Pixel size, arcsec.
    nchan : int
        Number of channels.
    channel_width_kms : float
        Channel spacing = width (no spectral response overlap), km/s.
    velocity_centre_kms : float or None
        Velocity of the band centre, km/s; None means the disk's ``vsys``.
    beam_major_arcsec, beam_minor_arcsec : float
        Beam FWHM, arcsec (``minor <= major``).
    beam_pa_deg : float
        Beam major-axis position angle, deg east of north.
    peak_snr : float
        ``LineEmission.peak_jy_beam`` / per-pixel noise rms.
    rest_frequency_hz : float
        Line rest frequency, Hz (default 12CO J=2-1).
    ra_deg, dec_deg : float
        Sky position of the image centre (fictional), deg.
    frequency_ascending : bool
        True (ALMA-like): frequency increases with channel index, so the
        radio velocity *decreases* with channel index.
    oversample : int
        Sub-pixels per pixel side for the model evaluation.
    """

    npix: int = 128
    pixel_arcsec: float = 0.05
    nchan: int = 40
    channel_width_kms: float = 0.2
    velocity_centre_kms: float | None = None
    beam_major_arcsec: float = 0.12
    beam_minor_arcsec: float = 0.10
    beam_pa_deg: float = 0.0
    peak_snr: float = 20.0
    rest_frequency_hz: float = REST_FREQUENCY_12CO_21_HZ
    ra_deg: float = 165.0
    dec_deg: float = -34.0
    frequency_ascending: bool = True
    oversample: int = 3

    def __post_init__(self):
        _positive(self, "npix", integer=True)
        _positive(self, "nchan", integer=True)
        _positive(self, "oversample", integer=True)
        for name in ("pixel_arcsec", "channel_width_kms", "beam_major_arcsec",
                     "beam_minor_arcsec", "peak_snr", "rest_frequency_hz"):
            _positive(self, name)
        if self.beam_minor_arcsec > self.beam_major_arcsec:
            raise ConfigError(
                f"beam_minor_arcsec ({self.beam_minor_arcsec}) exceeds "
                f"beam_major_arcsec ({self.beam_major_arcsec})",
                key="beam_minor_arcsec", value=self.beam_minor_arcsec)
        for name in ("beam_pa_deg", "ra_deg", "dec_deg"):
            v = float(getattr(self, name))
            if not math.isfinite(v):
                raise ConfigError(f"{name} must be finite", key=name, value=v)
            object.__setattr__(self, name, v)
        if not -90.0 <= self.dec_deg <= 90.0:
            raise ConfigError(f"dec_deg must be in [-90, 90], got {self.dec_deg}",
                              key="dec_deg", value=self.dec_deg)
        if self.velocity_centre_kms is not None:
            v = float(self.velocity_centre_kms)
            if not math.isfinite(v):
                raise ConfigError("velocity_centre_kms must be finite",
                                  key="velocity_centre_kms", value=v)
            object.__setattr__(self, "velocity_centre_kms", v)
        object.__setattr__(self, "frequency_ascending", bool(self.frequency_ascending))

    @property
    def beam(self) -> tuple[float, float, float]:
        """``(bmaj_arcsec, bmin_arcsec, bpa_deg)``."""
        return (self.beam_major_arcsec, self.beam_minor_arcsec, self.beam_pa_deg)

    @property
    def beam_area_arcsec2(self) -> float:
        """Beam solid angle ``pi bmaj bmin / (4 ln 2)``, arcsec^2."""
        return math.pi * self.beam_major_arcsec * self.beam_minor_arcsec / (
            4.0 * math.log(2.0))


@dataclass(frozen=True)
class LineEmission:
    """Brightness and line width of the emitting layers.

    Front-layer line-peak brightness (Jy/beam, before beam convolution)::

        I(r) = peak_jy_beam * min(1, (r / r_core)^-gamma) * exp(-(r / r_char)^2)

    zero beyond ``r_out_au``; the back layer has ``back_ratio * I(r)``.
    Line dispersion ``sigma_v = sqrt(k T / m + v_turb^2)`` with
    ``T(r) = t_ref_k (r / r_t_ref_au)^-temperature_index`` (an index of 2q
    for a sound speed ``c ∝ r^-q``), held constant inside ``r_core_au``.

    Parameters
    ----------
    peak_jy_beam : float
        Line-peak brightness of the front layer inside ``r_core_au``, Jy/beam.
    r_char_au : float
        Radius of the exponential (Gaussian) taper, au.
    gamma : float
        Power-law index of the brightness outside ``r_core_au``.
    r_core_au : float
        Radius inside which the brightness is flat, au.
    r_out_au : float
        Hard outer edge of the emission, au (inf for none).
    back_ratio : float
        Back / front layer brightness, in [0, 1].
    t_ref_k : float
        Gas temperature at ``r_t_ref_au``, K.
    r_t_ref_au : float
        Reference radius of the temperature law, au.
    temperature_index : float
        ``T ∝ r^-temperature_index``.
    molecule_amu : float
        Molecular mass, atomic mass units (CO: 28).
    v_turb_kms : float
        Turbulent velocity dispersion (1 sigma), km/s.
    """

    peak_jy_beam: float = 0.05
    r_char_au: float = 150.0
    gamma: float = 0.3
    r_core_au: float = 10.0
    r_out_au: float = math.inf
    back_ratio: float = 0.5
    t_ref_k: float = 40.0
    r_t_ref_au: float = 100.0
    temperature_index: float = 0.5
    molecule_amu: float = 28.0
    v_turb_kms: float = 0.05

    def __post_init__(self):
        for name in ("peak_jy_beam", "r_char_au", "r_core_au", "r_out_au",
                     "t_ref_k", "r_t_ref_au", "molecule_amu"):
            if name == "r_out_au":
                v = float(self.r_out_au)
                if not v > 0:
                    raise PhysicsRangeError(f"r_out_au must be > 0, got {v}",
                                            key=name, value=v)
                object.__setattr__(self, name, v)
                continue
            _positive_phys(self, name)
        _positive_phys(self, "v_turb_kms", allow_zero=True)
        for name in ("gamma", "temperature_index"):
            v = float(getattr(self, name))
            if not math.isfinite(v):
                raise PhysicsRangeError(f"{name} must be finite", key=name, value=v)
            object.__setattr__(self, name, v)
        b = float(self.back_ratio)
        if not 0.0 <= b <= 1.0:
            raise PhysicsRangeError(f"back_ratio must be in [0, 1], got {b}",
                                    key="back_ratio", value=b)
        object.__setattr__(self, "back_ratio", b)

    def brightness_jy_beam(self, r_au, surface: str = "front"):
        """Line-peak brightness of a layer at radius ``r_au`` (Jy/beam)."""
        r = np.asarray(r_au, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            core = np.minimum(1.0, (r / self.r_core_au) ** (-self.gamma))
        core = np.where(r <= self.r_core_au, 1.0, core)
        out = self.peak_jy_beam * core * np.exp(-(r / self.r_char_au) ** 2)
        out = np.where(r <= self.r_out_au, out, 0.0)
        if surface == "back":
            out = out * self.back_ratio
        return out

    def temperature_k(self, r_au):
        """Gas temperature ``T(r)``, K (held at ``T(r_core_au)`` inside it)."""
        r = np.maximum(np.asarray(r_au, dtype=float), self.r_core_au)
        return self.t_ref_k * (r / self.r_t_ref_au) ** (-self.temperature_index)

    def line_sigma_kms(self, r_au):
        """Line dispersion ``sqrt(k T / m + v_turb^2)``, km/s."""
        thermal = K_B * self.temperature_k(r_au) / (self.molecule_amu * _AMU_KG)
        return np.sqrt(thermal / 1.0e6 + self.v_turb_kms ** 2)


def _positive_phys(obj, name, allow_zero=False):
    v = float(getattr(obj, name))
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        raise PhysicsRangeError(
            f"{name} must be {'>= 0' if allow_zero else '> 0'} and finite, got {v}",
            key=name, value=v)
    object.__setattr__(obj, name, v)


# ------------------------------------------------------------------ grids ---
def sky_grid(setup: ObservingSetup, oversample: int = 1):
    """Sky offsets of the pixel (or sub-pixel) centres.

    Parameters
    ----------
    setup : ObservingSetup
    oversample : int
        Sub-pixels per pixel side (1: the pixel centres).

    Returns
    -------
    x_arcsec : ndarray, shape (npix * oversample,)
        East offsets of the columns, arcsec (decreasing with index).
    y_arcsec : ndarray, shape (npix * oversample,)
        North offsets of the rows, arcsec (increasing with index).
    """
    n, os_ = setup.npix, int(oversample)
    centre = np.arange(n) - n // 2
    sub = (np.arange(os_) + 0.5) / os_ - 0.5
    pos = (centre[:, None] + sub[None, :]).ravel() * setup.pixel_arcsec
    return -pos, pos.copy()


def channel_velocities(setup: ObservingSetup, geom: DiskGeometry) -> np.ndarray:
    """Channel-centre radio velocities, km/s, in channel order.

    Evenly spaced by ``channel_width_kms`` about ``velocity_centre_kms``
    (or ``geom.vsys_kms``); descending when ``frequency_ascending``.
    """
    vc = geom.vsys_kms if setup.velocity_centre_kms is None else setup.velocity_centre_kms
    k = np.arange(setup.nchan) - (setup.nchan - 1) / 2.0
    v = vc + k * setup.channel_width_kms
    return v[::-1].copy() if setup.frequency_ascending else v


def beam_kernel(setup: ObservingSetup, nsigma: float = 5.0) -> np.ndarray:
    """Elliptical Gaussian beam sampled on the pixel grid, unit sum.

    Array axes are (row = north, column = west): the major axis at
    ``beam_pa_deg`` east of north points along ``(drow, dcol) =
    (cos PA, -sin PA)``.

    Returns
    -------
    ndarray, shape (2 m + 1, 2 m + 1)
        Kernel with ``m = ceil(nsigma * sigma_major / pixel)``; sums to 1.
    """
    pix = setup.pixel_arcsec
    smaj = setup.beam_major_arcsec / _FWHM_PER_SIGMA
    smin = setup.beam_minor_arcsec / _FWHM_PER_SIGMA
    m = max(1, int(math.ceil(nsigma * smaj / pix)))
    d = np.arange(-m, m + 1) * pix
    north = d[:, None]
    east = -d[None, :]
    pa = math.radians(setup.beam_pa_deg)
    a = east * math.sin(pa) + north * math.cos(pa)
    b = east * math.cos(pa) - north * math.sin(pa)
    k = np.exp(-0.5 * ((a / smaj) ** 2 + (b / smin) ** 2))
    return k / k.sum()


def channel_profile(v0_kms, sigma_kms, v_lo_kms, v_hi_kms):
    """Peak-1 Gaussian line averaged over a channel ``[v_lo, v_hi]``.

    ``sqrt(pi/2) sigma / (v_hi - v_lo) * [erf((v_hi - v0)/(sqrt2 sigma))
    - erf((v_lo - v0)/(sqrt2 sigma))]``; in [0, 1].
    """
    s2 = math.sqrt(2.0) * np.asarray(sigma_kms, dtype=float)
    width = v_hi_kms - v_lo_kms
    return (math.sqrt(math.pi) / 2.0 * s2 / width
            * (erf((v_hi_kms - v0_kms) / s2) - erf((v_lo_kms - v0_kms) / s2)))


# ------------------------------------------------------------------ model ---
# The deprojection of a sub-pixel grid depends on the geometry alone; a fit of
# the emission profile (kinkfit.deviations.fit_emission) makes ~100 model
# cubes at one geometry, and the iterative height solve was half of each.
_LAYER_MEMO: "OrderedDict[tuple, tuple]" = OrderedDict()
_LAYER_MEMO_SIZE = 4


def _layer_positions(geom, xs, ys, surface):
    """Disk coordinates and Keplerian speed of the grid's points on one layer.

    Returns ``(idx, r_au, phi_rad, z_au, v_phi_kms)`` for the points with a
    finite deprojection (flat indices into the grid), memoised on the
    geometry, the layer and the grid (its shape and corner values: the grids
    of :func:`sky_grid` are regular).  The arrays are read-only.
    """
    key = (geom, surface, xs.shape, float(xs.flat[0]), float(xs.flat[-1]),
           float(ys.flat[0]), float(ys.flat[-1]))
    hit = _LAYER_MEMO.get(key)
    if hit is not None:
        _LAYER_MEMO.move_to_end(key)
        return hit
    r, phi, z = sky_to_disk(geom, xs, ys, surface)
    idx = np.flatnonzero(np.isfinite(r).ravel())
    rr, pp, zz = r.ravel()[idx], phi.ravel()[idx], z.ravel()[idx]
    out = (idx, rr, pp, zz, rotation_speed_kms(geom, rr, zz))
    for a in out:
        a.setflags(write=False)
    _LAYER_MEMO[key] = out
    while len(_LAYER_MEMO) > _LAYER_MEMO_SIZE:
        _LAYER_MEMO.popitem(last=False)
    return out


def _layer(geom, emission, xs, ys, surface, perturbation):
    """Velocity, brightness and width of one layer on the sub-pixel grid."""
    idx, rr, pp, zz, v_phi = _layer_positions(geom, xs, ys, surface)
    keep = rr <= emission.r_out_au
    if not np.all(keep):
        idx, rr, pp, zz, v_phi = idx[keep], rr[keep], pp[keep], zz[keep], v_phi[keep]
    dv = (0.0, 0.0, 0.0)
    if perturbation is not None and idx.size:
        out = perturbation(rr, pp, zz)
        try:
            dv = tuple(np.broadcast_to(np.asarray(c, dtype=float), rr.shape)
                       for c in out)
        except (TypeError, ValueError):
            raise PhysicsRangeError(
                "perturbation must return (dv_r, dv_phi, dv_z) arrays "
                "broadcastable to its inputs", key="perturbation") from None
        if len(dv) != 3 or not all(np.all(np.isfinite(c)) for c in dv):
            raise PhysicsRangeError(
                "perturbation must return three finite arrays (dv_r, dv_phi, dv_z)",
                key="perturbation")
    vlos = los_velocity(geom, rr, pp, zz, v_r=dv[0], v_phi=v_phi + dv[1], v_z=dv[2])
    return (idx, vlos, emission.brightness_jy_beam(rr, surface),
            emission.line_sigma_kms(rr))


# erf(x) rounds to exactly +-1 in float64 for |x| >= 5.95; beyond this many
# sqrt(2) sigma from a channel's edges a point's channel_profile is exactly 0
_ERF_SATURATED = 6.5


def _velocity_windows(layer, velocity_kms, width_kms):
    """Points of a layer whose line reaches each channel.

    A point with ``|v - v_k| > width/2 + 6.5 sqrt(2) sigma_max`` has both
    erf arguments of :func:`channel_profile` beyond 6.5 with the same sign,
    so its profile is exactly zero in float64 and can be skipped without
    changing a bit of the cube.

    Returns
    -------
    list of ndarray
        Per channel, indices into the layer's point arrays.
    """
    _, v, _, sigma = layer
    sigma = np.broadcast_to(np.asarray(sigma, float), np.shape(v))
    order = np.argsort(v, kind="stable")
    v_sorted = v[order]
    reach = width_kms / 2.0 + _ERF_SATURATED * math.sqrt(2.0) * (
        float(np.max(sigma)) if sigma.size else 0.0)
    lo = np.searchsorted(v_sorted, np.asarray(velocity_kms) - reach, side="left")
    hi = np.searchsorted(v_sorted, np.asarray(velocity_kms) + reach, side="right")
    return [order[a:b] for a, b in zip(lo, hi)]


# The channel profiles of a grid depend on the geometry, the channels and
# the line width alone, not on the brightness: a fit of the emission profile
# (kinkfit.deviations.fit_emission) changes one parameter per finite-
# difference column, four of its six columns only the brightness.
_PROFILE_MEMO: "OrderedDict[tuple, list]" = OrderedDict()
_PROFILE_MEMO_SIZE = 2


def _channel_profiles(geom, emission, xs, ys, front, back, velocity, dv,
                      memo):
    """Per channel, the points each layer's line reaches and their profiles.

    Returns a list over channels of ``(sel_f, phi_f, sel_b, phi_b,
    phi_f_at_b)``: indices into the front layer's point arrays and the
    front profile there (:func:`channel_profile`), the same for the back
    layer (None without one) and the front profile at the back layer's
    points (0 where the front layer has none).  ``memo``: keep the result
    for a later call with the same geometry, grid, channels and line-width
    parameters (unperturbed layers only); the cube is then the same to the
    last bit.
    """
    key = None
    if memo:
        key = (geom, xs.shape, float(xs.flat[0]), float(xs.flat[-1]),
               float(ys.flat[0]), float(ys.flat[-1]), float(dv),
               np.asarray(velocity, float).tobytes(), back is not None,
               emission.r_out_au, emission.r_core_au, emission.t_ref_k,
               emission.r_t_ref_au, emission.temperature_index,
               emission.molecule_amu, emission.v_turb_kms)
        hit = _PROFILE_MEMO.get(key)
        if hit is not None:
            _PROFILE_MEMO.move_to_end(key)
            return hit
    nsub = xs.size
    front_w = _velocity_windows(front, velocity, dv)
    back_w = _velocity_windows(back, velocity, dv) if back is not None else None
    idx_f, v_f, _, s_f = front
    phi_f = np.zeros(nsub)
    out = []
    for k, vk in enumerate(velocity):
        lo, hi = vk - dv / 2.0, vk + dv / 2.0
        sel = front_w[k]
        pf = channel_profile(v_f[sel], s_f[sel], lo, hi)
        entry = [sel, pf, None, None, None]
        if back is not None:
            idx_b, v_b, _, s_b = back
            sel_b = back_w[k]
            phi_f[idx_f[sel]] = pf
            entry[2] = sel_b
            entry[3] = channel_profile(v_b[sel_b], s_b[sel_b], lo, hi)
            entry[4] = phi_f[idx_b[sel_b]]
            phi_f[idx_f[sel]] = 0.0
        for a in entry:
            if a is not None:
                a.setflags(write=False)
        out.append(tuple(entry))
    if key is not None:
        _PROFILE_MEMO[key] = out
        while len(_PROFILE_MEMO) > _PROFILE_MEMO_SIZE:
            _PROFILE_MEMO.popitem(last=False)
    return out


def make_cube(geom: DiskGeometry, setup: ObservingSetup, emission: LineEmission, *,
              perturbation=None, rng=None, noise: bool = True,
              convolve: bool = True):
    """Synthetic line cube of a disk.

    Parameters
    ----------
    geom : DiskGeometry
    setup : ObservingSetup
    emission : LineEmission
    perturbation : callable, optional
        ``f(r_au, phi_rad, z_au) -> (dv_r, dv_phi, dv_z)`` in km/s, called on
        1-D arrays of the sub-pixel disk positions of each layer (``dv_z``
        along disk ``+Z``); added to the Keplerian field.
    rng : numpy.random.Generator, optional
        Noise generator; None means ``numpy.random.default_rng(0)``.
    noise : bool
        Add beam-correlated noise of rms ``peak_jy_beam / peak_snr``.
    convolve : bool
        Convolve with the beam (False for diagnostics; then no noise).

    Returns
    -------
    data : ndarray, shape (nchan, npix, npix), float64
        Brightness, Jy/beam, rows north, columns west (see :func:`sky_grid`).
    velocity_kms : ndarray, shape (nchan,)
        Channel-centre radio velocities, km/s.
    """
    n, os_ = setup.npix, setup.oversample
    x1, y1 = sky_grid(setup, os_)
    xs, ys = np.meshgrid(x1, y1)
    velocity = channel_velocities(setup, geom)
    dv = setup.channel_width_kms
    front = _layer(geom, emission, xs, ys, "front", perturbation)
    back = (_layer(geom, emission, xs, ys, "back", perturbation)
            if emission.back_ratio > 0 else None)
    nsub = xs.size
    cube = np.zeros((setup.nchan, n, n))
    profiles = _channel_profiles(geom, emission, xs, ys, front, back,
                                 velocity, dv, perturbation is None)
    img = np.zeros(nsub)
    for k in range(len(velocity)):
        sel_f, pf, sel_b, pb, pf_at_b = profiles[k]
        img[:] = 0.0
        img[front[0][sel_f]] = front[2][sel_f] * pf
        if back is not None:
            img[back[0][sel_b]] += back[2][sel_b] * pb * (1.0 - pf_at_b)
        cube[k] = img.reshape(n, os_, n, os_).mean(axis=(1, 3))
    if not convolve:
        return cube, velocity
    cube = fftconvolve(cube, beam_kernel(setup)[None], mode="same", axes=(1, 2))
    if noise:
        if rng is None:
            rng = np.random.default_rng(0)
        cube += beam_noise(setup, emission.peak_jy_beam / setup.peak_snr, rng)
    return cube, velocity


def beam_noise(setup: ObservingSetup, rms_jy_beam: float, rng) -> np.ndarray:
    """Gaussian noise correlated by the beam, per-pixel rms ``rms_jy_beam``.

    White unit-variance noise on a grid padded by the kernel half-width is
    convolved with :func:`beam_kernel` (``mode='valid'``, so every output
    pixel sees the full kernel) and divided by ``sqrt(sum K^2)``, the rms of
    the convolved white noise.

    Returns
    -------
    ndarray, shape (nchan, npix, npix)
    """
    kern = beam_kernel(setup)
    m = kern.shape[0] // 2
    n = setup.npix
    white = rng.standard_normal((setup.nchan, n + 2 * m, n + 2 * m))
    corr = fftconvolve(white, kern[None], mode="valid", axes=(1, 2))
    return corr * (float(rms_jy_beam) / math.sqrt(float(np.sum(kern ** 2))))


# ------------------------------------------------------------------ files ---
def truth_cards(geom: DiskGeometry, setup: ObservingSetup, emission: LineEmission,
                *, seed=None, noise_rms=None, peak_model=None) -> list:
    """FITS cards recording the truth of a synthetic cube.

    Keywords ``SYN*`` (numbers) plus ``HISTORY`` lines with the full
    dataclass contents; ``SYNTRUTH = T`` marks a synthetic cube.
    """
    f, b = geom.front, geom.surface("back")
    cards = [
        ("SYNTRUTH", True, "synthetic cube: SYN* cards = truth"),
        ("SYNMSTAR", geom.mstar_msun, "stellar mass, Msun"),
        ("SYNDIST", geom.distance_pc, "distance, pc"),
        ("SYNINC", geom.inclination_deg, "inclination, deg"),
        ("SYNPA", geom.position_angle_deg, "PA of red major axis, deg E of N"),
        ("SYNROT", geom.rotation, "+1 counter-clockwise on sky, -1 clockwise"),
        ("SYNVSYS", geom.vsys_kms, "systemic velocity, km/s"),
        ("SYNX0", geom.x0_arcsec, "disk centre east offset, arcsec"),
        ("SYNY0", geom.y0_arcsec, "disk centre north offset, arcsec"),
        ("SYNRMIN", geom.r_min_au, "inner radius of the layers, au"),
        ("SYNRMAX", geom.r_max_au if math.isfinite(geom.r_max_au) else -1.0,
         "outer radius of the layers, au (-1: none)"),
        ("SYNFASP", f.aspect, "front layer z/r at r_ref"),
        ("SYNFFLR", f.flaring, "front layer flaring index"),
        ("SYNFREF", f.r_ref_au, "front layer reference radius, au"),
        ("SYNFTAP", -1.0 if f.taper_au is None else f.taper_au,
         "front layer taper radius, au (-1: none)"),
        ("SYNBASP", b.aspect, "back layer z/r at r_ref"),
        ("SYNBFLR", b.flaring, "back layer flaring index"),
        ("SYNBREF", b.r_ref_au, "back layer reference radius, au"),
        ("SYNBTAP", -1.0 if b.taper_au is None else b.taper_au,
         "back layer taper radius, au (-1: none)"),
        ("SYNPKBR", emission.peak_jy_beam, "model line-peak brightness, Jy/beam"),
        ("SYNSNR", setup.peak_snr, "SYNPKBR / noise rms"),
    ]
    if noise_rms is not None:
        cards.append(("SYNNOISE", float(noise_rms), "per-pixel noise rms, Jy/beam"))
    if peak_model is not None:
        # 9 significant digits (the float32 data's precision): the float64
        # maximum of an FFT-convolved cube differs in its last bits between
        # FFT library versions, and the demo cube must be rebuilt bit for bit
        cards.append(("SYNPEAK", float(f"{float(peak_model):.9g}"),
                      "max of the noiseless cube, Jy/beam"))
    if seed is not None:
        cards.append(("SYNSEED", int(seed), "noise seed"))
    for name, obj in (("setup", setup), ("emission", emission)):
        for key, value in asdict(obj).items():
            cards.append(("HISTORY", f"synth {name}.{key} = {value!r}"))
    return cards


def geometry_from_header(header) -> DiskGeometry:
    """The true :class:`DiskGeometry` recorded by :func:`truth_cards`.

    Parameters
    ----------
    header : mapping
        FITS header (or dict) with the ``SYN*`` cards.

    Raises
    ------
    InputFileError
        If the header is not that of a synthetic cube.
    """
    from .errors import InputFileError
    from .geometry import EmittingSurface

    if not header.get("SYNTRUTH", False):
        raise InputFileError("header has no SYNTRUTH card: not a kinkfit synthetic cube",
                             key="SYNTRUTH")

    def layer(prefix):
        taper = float(header[f"SYN{prefix}TAP"])
        return EmittingSurface(float(header[f"SYN{prefix}ASP"]),
                               float(header[f"SYN{prefix}FLR"]),
                               float(header[f"SYN{prefix}REF"]),
                               None if taper < 0 else taper)

    try:
        front, back = layer("F"), layer("B")
        rmax = float(header["SYNRMAX"])
        return DiskGeometry(
            mstar_msun=float(header["SYNMSTAR"]), distance_pc=float(header["SYNDIST"]),
            inclination_deg=float(header["SYNINC"]),
            position_angle_deg=float(header["SYNPA"]), rotation=int(header["SYNROT"]),
            x0_arcsec=float(header["SYNX0"]), y0_arcsec=float(header["SYNY0"]),
            vsys_kms=float(header["SYNVSYS"]), front=front,
            back=None if back == front else back,
            r_max_au=math.inf if rmax < 0 else rmax, r_min_au=float(header["SYNRMIN"]))
    except KeyError as err:
        raise InputFileError(f"synthetic-cube header lacks card {err.args[0]}",
                             key=str(err.args[0])) from None


def write_synthetic_cube(path, geom: DiskGeometry, setup: ObservingSetup,
                         emission: LineEmission, *, perturbation=None, seed: int = 0,
                         overwrite: bool = False, extra_truth=None,
                         noise: bool = True) -> Path:
    """Make a synthetic cube and write it as an ALMA-like FITS file.

    Parameters
    ----------
    path : str or os.PathLike
        Output FITS file.
    geom, setup, emission
        The model (see :func:`make_cube`).
    perturbation : callable, optional
        Velocity perturbation, see :func:`make_cube`.
    seed : int
        Noise seed (``numpy.random.default_rng(seed)``).
    overwrite : bool
        Replace an existing file.
    extra_truth : sequence of (key, value[, comment]), optional
        More truth cards (e.g. the injected planet), written as given.
    noise : bool
        Add noise.

    Returns
    -------
    pathlib.Path
    """
    from .cube import write_cube

    data, velocity = make_cube(geom, setup, emission, perturbation=perturbation,
                               noise=False)
    peak = float(np.max(data))
    rms = emission.peak_jy_beam / setup.peak_snr
    if noise:     # same draws as make_cube(..., rng=default_rng(seed))
        data = data + beam_noise(setup, rms, np.random.default_rng(seed))
    cards = truth_cards(geom, setup, emission, seed=seed,
                        noise_rms=rms if noise else 0.0, peak_model=peak)
    cards.append(("SYNPERT", perturbation is not None, "velocity perturbation added"))
    if extra_truth:
        cards.extend(extra_truth.items() if isinstance(extra_truth, dict)
                     else extra_truth)
    return write_cube(path, data.astype(np.float32), velocity_kms=velocity,
                      pixel_arcsec=setup.pixel_arcsec,
                      rest_frequency_hz=setup.rest_frequency_hz, beam=setup.beam,
                      ra_deg=setup.ra_deg, dec_deg=setup.dec_deg, bunit="Jy/beam",
                      overwrite=overwrite, extra_cards=cards)
