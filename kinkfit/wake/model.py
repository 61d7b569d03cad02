"""Direct reference model of a planet's wake over the whole disk.

``wake_perturbations(r_au, phi_rad, planet, disk, damping)`` returns the radial
and azimuthal velocity perturbations (km/s) and ``dSigma/Sigma`` of the wake:

* within ``|r - r_p| <= x_match_h h_p`` of the planet: the GR01 linear sheet
  (``kinkfit.wake.linear``) in the planet's frame (``X = (r - r_p)/h_p``),
  scaled by ``Mp/M_th``, taken to the global wave by per-column amplitude
  factors (R02 amplitude law over GR01's local one) and with its crest
  parabola laid onto the R02 locus;
* beyond it: the matching-distance profile evolved by inviscid Burgers in the
  coordinates of :mod:`kinkfit.wake.nonlinear` along the R02 locus, damped by
  the chosen :class:`~kinkfit.wake.damping.Damping`; velocities from the WKB
  relation ``u = c delta n`` plus the sheet's non-wave residual at the
  matching distance, tapered to zero by ``2 x_match_h``.

Nonlinear clock.  By default (``clock="planet"``) ``t`` counts from the planet
(GR01): the linear profile at the matching distance stands for the wave's
shape at launch, and it is evolved for the time ``t(r)`` accumulated since the
planet.  To keep the field continuous the sheet inside the matching distance
receives the same treatment, column by column (each sheet column at ``X`` is
steepened for ``t(X) ∝ |X|^(5/2)``, which vanishes at the planet).  Then
shock distances follow GR01's ``Mp^(-2/5)`` law and do not depend on the
matching distance; the far-field N-wave strength still does, by 25-45 % per
factor 2, because dispersion keeps reshaping the linear profile's lobes
(docs/physics/nonlinear.md §5: a model systematic, not a numerical error).  ``clock="matching"`` starts the clock at
the matching distance instead (plain linear sheet inside; shocks further out
and a flatter mass scaling).

Mass-independent pieces (locus, ``t``, ``eta``, ``g``, damping, velocity
directions, the matching profile) live in :class:`WakeSkeleton` (memoised for
the default sheet); the planet mass enters only through ``A = Mp/M_th`` as
``chi -> A chi`` (Burgers invariance ``chi -> A chi, t -> t/A``).
"""

from __future__ import annotations

import functools
import logging
import math
from dataclasses import dataclass

import numpy as np

from ..constants import MJUP_PER_MSUN, keplerian_speed_kms
from ..errors import PhysicsRangeError
from .burgers import burgers_at_times, burgers_solution
from .damping import Damping, DampingContext, damping_log_factor
from .locus import wake_azimuth, wrap_angle
from .nonlinear import (MatchProfile, amplitude_factor, chi_from_sigma, cross_coordinate,
                        front_normal, matching_profile, nonlinear_time,
                        profile_wavenumber_h)

__all__ = ["WakeDisk", "Planet", "Damping", "WakeSkeleton", "thermal_mass_msun",
           "mass_ratio", "wake_skeleton", "wake_perturbations",
           "wake_angular_momentum_flux", "DEFAULT_MATCH_H", "default_match_h"]

log = logging.getLogger(__name__)

#: default matching distance |r - r_p| / h_p between the sheet and Burgers.
#: The far-field N-wave strength does not converge with it (dispersion of the
#: linear profile's trough, docs/physics/nonlinear.md §5); 7 h_p keeps the local
#: sheet within 0.35 r_p for h/r >= 0.05 and launches modes down to k = 0.1/h_p.
DEFAULT_MATCH_H = 7.0
#: the local sheet is used at most this far from the planet, in r_p
MAX_MATCH_RP = 0.35


def default_match_h(aspect_p: float) -> float:
    """Default matching distance (h_p): ``min(7, 0.35 / aspect_p)``."""
    return min(DEFAULT_MATCH_H, round(MAX_MATCH_RP / aspect_p, 9))
_N_ARM = 3000       # points of the 1-D tables per arm
#: Burgers grid times per arm, or None (default): every point is evaluated
#: exactly (one entropy solution per distinct time) at its own time snapped to
#: a log-uniform grid of step ``_DLNT`` in ln t (0.1 %, i.e. 0.04 % in |X|
#: near the planet, where t ∝ |X|^(5/2)).  With an integer grid, points between
#: two grid times blend the two solutions linearly in t, which next to a
#: moving shock leaves a two-step staircase (local errors up to ~30 % of the
#: peak at 400 times; docs/physics/nonlinear.md §5).
_N_TIME = None
_DLNT = 1e-3


@dataclass(frozen=True)
class WakeDisk:
    """Background disk for the wake model.

    Attributes
    ----------
    mstar_msun : float
        Stellar mass, M_sun.
    aspect_p : float
        ``h_p / r_p`` at the planet, in (0, 0.5).
    q : float
        Sound speed ``c ∝ r^-q``.
    p : float
        Surface density ``Sigma ∝ r^-p``.
    gamma : float
        Adiabatic index (> 1) of the 2-D gas, ``P ∝ Sigma^gamma``.
    r_in_au, r_out_au : float
        Disk edges, au; the model is zero outside.
    """

    mstar_msun: float
    aspect_p: float
    q: float = 0.25
    p: float = 1.0
    gamma: float = 1.4
    r_in_au: float = 1.0
    r_out_au: float = 1000.0

    def __post_init__(self):
        if not (np.isfinite(self.mstar_msun) and self.mstar_msun > 0):
            raise PhysicsRangeError(f"stellar mass {self.mstar_msun!r} M_sun must be > 0",
                                    key="mstar_msun", value=self.mstar_msun)
        if not (0.0 < self.aspect_p < 0.5):
            raise PhysicsRangeError(f"aspect ratio h/r = {self.aspect_p!r} at the planet "
                                    "is outside (0, 0.5)", key="aspect_p", value=self.aspect_p)
        if not (np.isfinite(self.gamma) and self.gamma > 1.0):
            raise PhysicsRangeError(f"adiabatic index gamma = {self.gamma!r} must be > 1",
                                    key="gamma", value=self.gamma)
        for name in ("p", "q"):
            val = getattr(self, name)
            if not (np.isfinite(val) and -1.0 <= val <= 3.0):
                raise PhysicsRangeError(f"power-law index {name} = {val!r} outside [-1, 3]",
                                        key=name, value=val)
        if not (0.0 < self.r_in_au < self.r_out_au < np.inf):
            raise PhysicsRangeError(f"disk edges r_in={self.r_in_au!r} au, r_out="
                                    f"{self.r_out_au!r} au must satisfy 0 < r_in < r_out",
                                    key="r_in_au", value=self.r_in_au)


@dataclass(frozen=True)
class Planet:
    """The planet: mass (Jupiter masses), orbital radius (au), azimuth (rad, disk frame)."""

    mass_mjup: float
    r_au: float
    phi_rad: float = 0.0

    def __post_init__(self):
        if not (np.isfinite(self.mass_mjup) and self.mass_mjup >= 0):
            raise PhysicsRangeError(f"planet mass {self.mass_mjup!r} M_jup must be >= 0",
                                    key="mass_mjup", value=self.mass_mjup)
        if not (np.isfinite(self.r_au) and self.r_au > 0):
            raise PhysicsRangeError(f"planet radius {self.r_au!r} au must be > 0",
                                    key="r_au", value=self.r_au)
        if not np.isfinite(self.phi_rad):
            raise PhysicsRangeError(f"planet azimuth {self.phi_rad!r} must be finite",
                                    key="phi_rad", value=self.phi_rad)


def thermal_mass_msun(disk: WakeDisk) -> float:
    """``M_th = (h_p/r_p)^3 M*`` in M_sun (GR01's ``M1`` is 2/3 of this)."""
    return disk.aspect_p ** 3 * disk.mstar_msun


def mass_ratio(planet: Planet, disk: WakeDisk) -> float:
    """``Mp / M_th`` (dimensionless)."""
    return planet.mass_mjup * MJUP_PER_MSUN / thermal_mass_msun(disk)


# --------------------------------------------------------------------------
# mass-independent skeleton
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class _Arm:
    side: float                  # +1 outer, -1 inner
    x: np.ndarray                # r/r_p table from the matching radius outward
    t_clock: np.ndarray          # damped clock t'(x) from the planet
    g: np.ndarray                # amplitude factor g(x)
    log_d: np.ndarray            # ln D(x)
    wkb_r: np.ndarray            # c/c_p n_r and c/c_p n_phi: u = c delta n (WKB)
    wkb_phi: np.ndarray
    taper: np.ndarray            # weight of the non-wave residual (1 at matching)
    match: MatchProfile
    res_u: np.ndarray            # sheet minus WKB velocities at matching, on match.eta
    res_v: np.ndarray


@dataclass(frozen=True)
class WakeSkeleton:
    """Mass-independent ingredients of the wake (both arms, interior sheet).

    Attributes
    ----------
    disk : WakeDisk
    damping : Damping
    x_match_h : float
        Matching distance, h_p.
    outer, inner : _Arm or None
        1-D tables beyond the matching distance (``None`` if the disk does not
        extend there).
    sheet_x_h : ndarray (nxs,)
        Interior sheet columns used (``|x| <= x_match_h``).
    sheet_s_h : ndarray (ny,)
        Shear-aligned coordinate ``s = y + (3/4) x|x|`` of the interior tables.
    sheet_sigma, sheet_u, sheet_v : ndarray (nxs, ny)
        Linear sheet for ``Mp = M_th`` resampled on ``s``.
    sheet_t : ndarray (nxs,)
        Damped clock at the columns.
    sheet_log_d, sheet_g : ndarray (nxs,)
        ``ln D`` and ``g`` at the columns.
    sheet_wkb_r, sheet_wkb_phi : ndarray (nxs,)
        ``(c/c_p) n_r`` and ``(c/c_p) n_phi`` at the columns (WKB velocity of a
        density change).
    k_eta_h : float
        RMS cross-wake wavenumber used by the viscous law, 1/h_p.
    """

    disk: WakeDisk
    damping: Damping
    x_match_h: float
    outer: _Arm | None
    inner: _Arm | None
    sheet_x_h: np.ndarray
    sheet_s_h: np.ndarray
    sheet_sigma: np.ndarray
    sheet_u: np.ndarray
    sheet_v: np.ndarray
    sheet_t: np.ndarray
    sheet_log_d: np.ndarray
    sheet_g: np.ndarray
    sheet_wkb_r: np.ndarray
    sheet_wkb_phi: np.ndarray
    k_eta_h: float


def _y_ref(x_h):
    return -0.75 * x_h * np.abs(x_h)


def _global_factors(x, a, p, q):
    """Factors taking the local sheet to the global linear wave at ``x = r/r_p``.

    ``k_sigma = g(x) / |X/h_p|^(1/2)`` (R02 amplitude law over GR01's local
    one) and ``k_u = k_sigma (c/c_p) n_r / n_r,loc``,
    ``k_v = k_sigma (c/c_p) n_phi / n_phi,loc`` with the local normal built on
    the local shear Mach number ``(3/2)|X/h_p|``.  All tend to 1 at the planet;
    with them the angular-momentum flux of the rescaled sheet equals the
    sheet's own at every ``X``.
    """
    x = np.asarray(x, dtype=float)
    dist = np.abs(x - 1.0) / a
    with np.errstate(invalid="ignore", divide="ignore"):
        ks = np.where(dist > 1e-9, amplitude_factor(x, a, p, q) / np.sqrt(dist), 1.0)
        m_loc = 1.5 * dist
        n_r, n_phi = front_normal(x, a, q)
        norm = np.sqrt(1.0 + m_loc ** 2)
        ratio_r = np.where(dist > 1e-9, np.abs(n_r) * norm / np.maximum(m_loc, 1e-300),
                           1.0)
        ratio_phi = np.abs(n_phi) * norm
    xq = x ** -q
    return ks, ks * xq * ratio_r, ks * xq * ratio_phi


def _scaled_profile(prof, a, p, q, gamma):
    ks, ku, kv = _global_factors(prof.x_match, a, p, q)
    sig = prof.sigma * ks
    return MatchProfile(prof.x_match, prof.eta,
                        chi_from_sigma(sig, prof.x_match, a, p, q, gamma),
                        sig, prof.u * ku, prof.v * kv)


def windowed_profile(prof: MatchProfile, aspect_p: float) -> MatchProfile:
    """Window a matching profile to less than half a turn around the crest.

    ``|eta| <= min(0.9 pi / a, max|eta|)`` with a raised-cosine edge 4 h_p
    wide (``eta`` in h_p, ``a = h_p/r_p``), so the profile never overlaps its
    own next winding.  Shared by the direct model and the emulator.
    """
    half = min(0.9 * math.pi / aspect_p, np.max(np.abs(prof.eta)))
    keep = np.abs(prof.eta) <= half
    if np.all(keep):
        return prof
    w = np.clip((half - np.abs(prof.eta[keep])) / 4.0, 0.0, 1.0)
    w = 0.5 * (1 - np.cos(np.pi * w))
    return MatchProfile(prof.x_match, prof.eta[keep], prof.chi[keep] * w,
                        prof.sigma[keep] * w, prof.u[keep] * w, prof.v[keep] * w)


def wake_skeleton(disk: WakeDisk, damping: Damping = Damping(), *, x_lo: float, x_hi: float,
                  x_match_h: float | None = None, sheet=None) -> WakeSkeleton:
    """Build the mass-independent tables for ``x = r/r_p`` in ``[x_lo, x_hi]``.

    Parameters
    ----------
    disk : WakeDisk
    damping : Damping
    x_lo, x_hi : float
        Radial range (``r/r_p``) the tables must cover.
    x_match_h : float, optional
        Matching distance (h_p), inside the sheet window; default
        :func:`default_match_h`.
    sheet : SheetSolution, optional
        Linear solution; default ``kinkfit.wake.linear.get_sheet_solution()``.

    Returns
    -------
    WakeSkeleton
    """
    if sheet is None:
        from .linear import get_sheet_solution
        sheet = get_sheet_solution()
    a, p, q, gam = disk.aspect_p, disk.p, disk.q, disk.gamma
    xm = float(default_match_h(disk.aspect_p) if x_match_h is None else x_match_h)
    if xm < 2.0:
        log.warning("matching distance %.2f h_p is inside the wave-forming region of the "
                    "linear sheet (h/r = %.3g): the nonlinear far field is unreliable", xm, a)
    dx_sheet = sheet.x_h[1] - sheet.x_h[0]
    if not (0.5 <= xm <= sheet.x_h[-1] - dx_sheet):
        raise PhysicsRangeError(
            f"matching distance {xm!r} h_p outside [0.5, {sheet.x_h[-1] - dx_sheet:g}] "
            "(the linear sheet window)", key="x_match_h", value=xm)
    if 1.0 - xm * a <= 0.05:
        raise PhysicsRangeError(
            f"matching distance {xm} h_p with h/r = {a} reaches r <= 0.05 r_p",
            key="x_match_h", value=xm)
    # wavenumber of the wake profile (outer arm) for the viscous law
    prof_out = matching_profile(sheet, xm, a, p, q, gam)
    k_eta = profile_wavenumber_h(prof_out.eta, prof_out.sigma)
    ctx = DampingContext(a, p, q, k_eta)

    def log_d(x):
        return damping_log_factor(x, damping, ctx)

    def clock(x):
        if damping.kind == "none":
            return nonlinear_time(x, a, p, q)
        return nonlinear_time(x, a, p, q, weight=lambda s: np.exp(log_d(s)))

    arms = {}
    for side in (1.0, -1.0):
        x_m = 1.0 + side * xm * a
        x_end = x_hi if side > 0 else x_lo
        if (x_end - x_m) * side <= 0:
            arms[side] = None
            continue
        prof = prof_out if side > 0 else matching_profile(sheet, -xm, a, p, q, gam)
        prof = windowed_profile(_scaled_profile(prof, a, p, q, gam), a)
        xs = x_m + (x_end - x_m) * np.linspace(0.0, 1.0, _N_ARM) ** 1.5
        n_r, n_phi = front_normal(xs, a, q)
        xq = xs ** -q
        dist = np.abs(xs - 1.0) / a          # |X| / h_p
        w = np.clip((dist - xm) / xm, 0.0, 1.0)
        taper = 0.5 * (1.0 + np.cos(np.pi * w))
        res_u = prof.u - xq[0] * n_r[0] * prof.sigma
        res_v = prof.v - xq[0] * n_phi[0] * prof.sigma
        arms[side] = _Arm(side, xs, clock(xs), amplitude_factor(xs, a, p, q), log_d(xs),
                          xq * n_r, xq * n_phi, taper, prof, res_u, res_v)
    # interior sheet, shear-aligned
    cols = np.abs(sheet.x_h) <= xm + 1e-9
    xh = sheet.x_h[cols]
    y = sheet.y_h
    xcol = 1.0 + xh * a
    fields = []
    for f, fac in zip((sheet.sigma, sheet.u, sheet.v), _global_factors(xcol, a, p, q)):
        rows = f[cols]
        fields.append(np.stack([k * np.interp(y + _y_ref(xj), y, row, left=0.0, right=0.0)
                                for xj, row, k in zip(xh, rows, fac)]))
    n_r, n_phi = front_normal(xcol, a, q)
    return WakeSkeleton(disk, damping, xm, arms[1.0], arms[-1.0], xh, y.copy(), *fields,
                        clock(xcol), log_d(xcol), amplitude_factor(xcol, a, p, q),
                        xcol ** -q * n_r, xcol ** -q * n_phi, k_eta)


@functools.lru_cache(maxsize=16)
def _default_skeleton(disk, damping, x_lo, x_hi, x_match_h):
    return wake_skeleton(disk, damping, x_lo=x_lo, x_hi=x_hi, x_match_h=x_match_h)


# --------------------------------------------------------------------------
# evaluation
# --------------------------------------------------------------------------

def _interior(sk: WakeSkeleton, amp: float, clock: str, x_h, s_h):
    """Sheet fields (per unit c_p) at interior points, steepened for the planet clock.

    The density is steepened by Burgers column by column; the velocities are
    the sheet's plus the WKB velocity ``c n (delta_nl - delta_lin)`` of the
    nonlinear density change, so the linear limit is the sheet exactly.
    """
    sig, u, v = sk.sheet_sigma, sk.sheet_u, sk.sheet_v
    d = np.exp(sk.sheet_log_d)[:, None]
    if clock == "planet" and amp > 0:
        gam = sk.disk.gamma
        s = sk.sheet_s_h
        new = sig.copy()
        for j, xj in enumerate(sk.sheet_x_h):
            tj = sk.sheet_t[j]
            if tj <= 1e-12 or sk.sheet_g[j] <= 0:
                continue
            # eta = sgn(X) (y - y_w); s differs from y by a per-column constant
            order = slice(None) if xj > 0 else slice(None, None, -1)
            eta = s if xj > 0 else -s[::-1]
            chi0 = 0.5 * (gam + 1.0) * amp * sig[j][order] / sk.sheet_g[j]
            out = burgers_solution(eta, chi0, tj, eta)[0]
            new[j] = (2.0 * sk.sheet_g[j] / (gam + 1.0) * out / amp)[order]
        change = new - sig
        u = u + sk.sheet_wkb_r[:, None] * change
        v = v + sk.sheet_wkb_phi[:, None] * change
        sig = new
    from scipy.interpolate import RegularGridInterpolator
    # the sheet's crest parabola is laid onto the R02 locus (global curvature)
    pts = np.column_stack([x_h, s_h])
    res = []
    for f in (sig * d, u * d, v * d):
        itp = RegularGridInterpolator((sk.sheet_x_h, sk.sheet_s_h), f, bounds_error=False,
                                      fill_value=0.0)
        res.append(amp * itp(pts))
    return res


def _exterior(arm: _Arm, sk: WakeSkeleton, amp: float, clock: str, x, phi, phi_p):
    """Burgers-evolved wake beyond the matching distance (velocities / c_p)."""
    a, q, gam = sk.disk.aspect_p, sk.disk.q, sk.disk.gamma
    tab = arm.x if arm.side > 0 else arm.x[::-1]

    def on(f):
        return np.interp(x, tab, f if arm.side > 0 else f[::-1])

    t_pts = on(arm.t_clock)
    t0 = arm.t_clock[0]
    if clock == "matching":
        t_pts = t_pts - t0
    if _N_TIME is None:
        # exact at snapped times: one entropy solution per distinct snapped
        # time (burgers_at_times evaluates exactly when the grid is no shorter)
        pos = t_pts > 0
        t_pts = t_pts.copy()
        t_pts[pos] = np.exp(np.round(np.log(t_pts[pos]) / _DLNT) * _DLNT)
        grid = np.unique(t_pts) if t_pts.size else np.array([max(t0, 0.0)])
    elif clock == "matching":
        t_hi = max(float(t_pts.max(initial=0.0)), 1e-9)
        grid = np.concatenate([[0.0], np.geomspace(1e-5 * t_hi, t_hi, _N_TIME)])
    else:
        t_hi = max(float(t_pts.max(initial=t0)), t0 * (1 + 1e-9))
        grid = np.geomspace(t0, t_hi, _N_TIME)
    eta = cross_coordinate(x, phi, a, q, phi_p)
    m = arm.match
    psi = burgers_at_times(m.eta, amp * m.chi, t_pts, eta, grid)[0]
    sigma = 2.0 * on(arm.g) * np.exp(on(arm.log_d)) * psi / (gam + 1.0)
    # non-wave part of the sheet velocities, tapered off beyond the matching
    res_w = amp * np.exp(arm.log_d[0]) * on(arm.taper)
    u = on(arm.wkb_r) * sigma + res_w * np.interp(eta, m.eta, arm.res_u, left=0, right=0)
    v = on(arm.wkb_phi) * sigma + res_w * np.interp(eta, m.eta, arm.res_v, left=0, right=0)
    return sigma, u, v


def wake_perturbations(r_au, phi_rad, planet: Planet, disk: WakeDisk,
                       damping: Damping = Damping(), *, x_match_h: float | None = None,
                       clock: str = "planet", sheet=None):
    """Velocity and surface-density perturbations of the planet's wake.

    Parameters
    ----------
    r_au, phi_rad : ndarray (broadcastable)
        Cylindrical radius (au) and azimuth (rad) in the disk frame (gas and
        planet orbit in +phi).
    planet : Planet
    disk : WakeDisk
    damping : Damping
        Damping assumption (default none).
    x_match_h : float, optional
        Matching distance between the linear sheet and Burgers, h_p; default
        ``min(7, 0.35 r_p / h_p)`` (:func:`default_match_h`).
    clock : {"planet", "matching"}
        Origin of the nonlinear clock (see module docstring).
    sheet : SheetSolution, optional
        Linear solution to use instead of the cached default.

    Returns
    -------
    dv_r_kms, dv_phi_kms : ndarray
        Radial and azimuthal velocity perturbations, km/s (broadcast shape).
    dsigma : ndarray
        ``dSigma / Sigma``.

    Raises
    ------
    PhysicsRangeError
        Negative mass, h/r outside (0, 0.5), planet outside ``[r_in, r_out]``,
        matching distance outside the sheet, unknown clock.
    """
    if not isinstance(damping, Damping):
        raise PhysicsRangeError(f"damping must be a Damping, not {type(damping).__name__}",
                                key="damping", value=damping)
    if clock not in ("planet", "matching"):
        raise PhysicsRangeError(f"clock must be 'planet' or 'matching', not {clock!r}",
                                key="clock", value=clock)
    if not (disk.r_in_au <= planet.r_au <= disk.r_out_au):
        raise PhysicsRangeError(
            f"planet radius {planet.r_au} au outside the disk [{disk.r_in_au}, "
            f"{disk.r_out_au}] au", key="r_au", value=planet.r_au)
    r, phi = np.broadcast_arrays(np.asarray(r_au, dtype=float), np.asarray(phi_rad, dtype=float))
    shape = r.shape
    r, phi = r.ravel(), phi.ravel()
    amp = mass_ratio(planet, disk)
    if amp > 3.0:
        log.warning("Mp/M_th = %.3g: far outside the weakly nonlinear regime", amp)
    dvr = np.zeros(r.size)
    dvp = np.zeros(r.size)
    dsg = np.zeros(r.size)
    inside = np.isfinite(r) & np.isfinite(phi) & (r >= disk.r_in_au) & (r <= disk.r_out_au)
    if amp == 0.0 or not np.any(inside):
        return dvr.reshape(shape), dvp.reshape(shape), dsg.reshape(shape)
    a = disk.aspect_p
    rp = planet.r_au
    x_lo = disk.r_in_au / rp
    x_hi = disk.r_out_au / rp
    if sheet is None:
        xm = default_match_h(a) if x_match_h is None else float(x_match_h)
        sk = _default_skeleton(disk, damping, x_lo, x_hi, xm)
    else:
        sk = wake_skeleton(disk, damping, x_lo=x_lo, x_hi=x_hi, x_match_h=x_match_h,
                           sheet=sheet)
    c_p = a * float(keplerian_speed_kms(rp, disk.mstar_msun))
    x = r / rp
    x_h = (x - 1.0) / a
    near = inside & (np.abs(x_h) <= sk.x_match_h)
    if np.any(near):
        # s = y - y_crest, with the crest on the R02 locus phi_w(r)
        s_h = wrap_angle(phi[near] - wake_azimuth(x[near], a, disk.q, planet.phi_rad)) / a
        s_, u_, v_ = _interior(sk, amp, clock, x_h[near], s_h)
        dsg[near], dvr[near], dvp[near] = s_, u_ * c_p, v_ * c_p
    for arm, sel in ((sk.outer, inside & (x_h > sk.x_match_h)),
                     (sk.inner, inside & (x_h < -sk.x_match_h))):
        if arm is None or not np.any(sel):
            continue
        s_, u_, v_ = _exterior(arm, sk, amp, clock, x[sel], phi[sel], planet.phi_rad)
        dsg[sel], dvr[sel], dvp[sel] = s_, u_ * c_p, v_ * c_p
    return dvr.reshape(shape), dvp.reshape(shape), dsg.reshape(shape)


def wake_angular_momentum_flux(x, planet: Planet, disk: WakeDisk, damping: Damping = Damping(),
                               *, n_eta: int = 4001, half_width_h: float = 40.0, **kwargs):
    """One-sided angular-momentum flux of the model wake through circles ``r = x r_p``.

    ``F_J = r^2 Sigma ∮ dv_r dv_phi dphi`` (the same second-order expression as
    the linear sheet's ``Sigma r_p ∫ u v dy``), sampled on ``n_eta`` points
    within ``half_width_h`` h_p of the crest, in units of
    ``(G Mp)^2 Sigma_p r_p Omega_p / c_p^3``.

    Returns
    -------
    ndarray
        Same shape as ``x``.
    """
    x = np.atleast_1d(np.asarray(x, dtype=float))
    a = disk.aspect_p
    amp = mass_ratio(planet, disk)
    c_p = a * float(keplerian_speed_kms(planet.r_au, disk.mstar_msun))
    half = min(half_width_h, 0.999 * math.pi / a)
    eta = np.linspace(-half, half, n_eta)
    out = np.empty(x.size)
    for i, xi in enumerate(x):
        phi = wake_azimuth(xi, a, disk.q, planet.phi_rad) + eta * a
        ur, up, _ = wake_perturbations(np.full(eta.size, xi * planet.r_au), phi, planet, disk,
                                       damping, **kwargs)
        integral = np.trapezoid(ur * up, phi) / c_p ** 2
        # F/F0 = x^(2-p) ∮ u_r u_phi dphi / (A^2 a), velocities / c_p
        out[i] = xi ** (2.0 - disk.p) * integral / (amp ** 2 * a)
    return out.reshape(np.shape(x))
