"""Linear wake of a planet in the 2-D shearing sheet (Goodman & Rafikov 2001).

Units: ``c = Omega = 1`` at the planet, so lengths are in ``h_p`` and
velocities in ``c_p``; the planet's ``G Mp`` equals ``Mp / M_th`` with
``M_th = c^3 / (G Omega) = (h_p/r_p)^3 M*`` (GR01's ``M1 = (2/3) M_th``).
Every field is given for ``Mp = M_th``: the linear response scales with
``Mp / M_th``.

Geometry: ``x = r - r_p`` (radial), ``y = r_p (phi - phi_p)`` along the
orbital motion; background shear flow ``v_y = -(3/2) x``.  Perturbations are
steady in the planet frame and Fourier transformed in ``y`` as
``f(x, y) = int f_k(x) exp(i k y) dk / (2 pi)``.

Method (derivation in ``docs/physics/linear.md``): for each ``k > 0`` the
linearised equations reduce, with the vortensity constraint
``dv/dx - i k u = sigma / 2`` and the algebraic azimuthal-momentum equation
``u = -2 i k (s v + sigma + Phi)`` (``s = -3x/2``), to the *regular* first
order system for ``(sigma_k, v_k)``::

    sigma' = -2 k^2 s sigma + (2 - 2 k^2 s^2) v - Phi' - 2 k^2 s Phi
    v'     = (2 k^2 + 1/2) sigma + 2 k^2 s v + 2 k^2 Phi

with polynomial coefficients (no Lindblad or corotation singularity).  Two
homogeneous solutions, outgoing (WKB, group velocity away from the planet)
at ``-X_b`` and ``+X_b`` respectively, are integrated with RK4 towards the
other side and combined by variation of parameters; ``k = 0`` uses the
finite ``k -> 0`` limit (screened geostrophic response).  The real-space
fields follow from a real inverse FFT on a periodic box wider than the
returned window.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass

import numba
import numpy as np

from .. import cache
from ..errors import PhysicsRangeError

__all__ = [
    "SheetSolution",
    "solve_sheet",
    "get_sheet_solution",
    "angular_momentum_flux",
    "mach_line_y",
    "sheet_profile",
    "bessel_k0_k1",
    "SheetCuts",
    "solve_cuts",
]

log = logging.getLogger(__name__)

#: Bump when the numerics change: part of the cache key.
SOLVER_VERSION = "2"

_FIELDS = ("x_h", "y_h", "sigma", "u", "v")


# --------------------------------------------------------------------------
# Modified Bessel functions K0, K1 (Abramowitz & Stegun 1964, 9.8.1-9.8.8)
# --------------------------------------------------------------------------
@numba.njit(cache=True)
def _k0k1(z):
    """Return ``(K0(z), K1(z))`` for ``z > 0`` (A&S 9.8, |rel err| < 1e-6)."""
    if z <= 2.0:
        t = z / 3.75
        t2 = t * t
        i0 = 1.0 + t2 * (3.5156229 + t2 * (3.0899424 + t2 * (
            1.2067492 + t2 * (0.2659732 + t2 * (0.0360768 + t2 * 0.0045813)))))
        i1 = z * (0.5 + t2 * (0.87890594 + t2 * (0.51498869 + t2 * (
            0.15084934 + t2 * (0.02658733 + t2 * (0.00301532
                                                  + t2 * 0.00032411))))))
        y = z * z / 4.0
        lz = math.log(z / 2.0)
        k0 = -lz * i0 + (-0.57721566 + y * (0.42278420 + y * (
            0.23069756 + y * (0.03488590 + y * (0.00262698 + y * (
                0.00010750 + y * 0.00000740))))))
        k1 = (z * lz * i1 + 1.0 + y * (0.15443144 + y * (-0.67278579 + y * (
            -0.18156897 + y * (-0.01919402 + y * (-0.00110404 + y * (
                -0.00004686))))))) / z
        return k0, k1
    if z > 700.0:
        return 0.0, 0.0
    w = 2.0 / z
    pre = math.exp(-z) / math.sqrt(z)
    k0 = pre * (1.25331414 + w * (-0.07832358 + w * (0.02189568 + w * (
        -0.01062446 + w * (0.00587872 + w * (-0.00251540
                                              + w * 0.00053208))))))
    k1 = pre * (1.25331414 + w * (0.23498619 + w * (-0.03655620 + w * (
        0.01504268 + w * (-0.00780353 + w * (0.00325614
                                              + w * (-0.00068245)))))))
    return k0, k1


def bessel_k0_k1(z):
    """Vectorised :func:`_k0k1` (exposed for tests).

    Parameters
    ----------
    z : array_like, positive
    Returns
    -------
    k0, k1 : ndarray
    """
    z = np.atleast_1d(np.asarray(z, dtype=float))
    out0 = np.empty_like(z)
    out1 = np.empty_like(z)
    for i, zi in enumerate(z.ravel()):
        out0.flat[i], out1.flat[i] = _k0k1(float(zi))
    return out0, out1


# --------------------------------------------------------------------------
# Per-k boundary-value problem
# --------------------------------------------------------------------------
@numba.njit(cache=True)
def _forcing(x, k, eps):
    """Potential ``Phi_k`` and ``dPhi_k/dx`` for ``G Mp = 1`` (softened)."""
    r = math.sqrt(x * x + eps * eps)
    k0, k1 = _k0k1(k * r)
    phi = -2.0 * k0
    dphi = 2.0 * k * k1 * x / r
    return phi, dphi


@numba.njit(cache=True)
def _rhs(x, k, eps, sg, vv, sign, homog_only):
    """Derivatives of (sigma, v, I) for one homogeneous solution.

    ``I`` accumulates the variation-of-parameters integrand
    ``sign * det(Y, F)`` where ``F`` is the forcing vector.
    """
    s = -1.5 * x
    k2 = k * k
    dsg = -2.0 * k2 * s * sg + (2.0 - 2.0 * k2 * s * s) * vv
    dvv = (2.0 * k2 + 0.5) * sg + 2.0 * k2 * s * vv
    if homog_only:
        return dsg, dvv, 0.0j
    phi, dphi = _forcing(x, k, eps)
    f1 = -dphi - 2.0 * k2 * s * phi
    f2 = 2.0 * k2 * phi
    dI = sign * (sg * f2 - vv * f1)
    return dsg, dvv, dI


@numba.njit(cache=True)
def _rk4(x, h, k, eps, sg, vv, ii, sign):
    a1, b1, c1 = _rhs(x, k, eps, sg, vv, sign, False)
    a2, b2, c2 = _rhs(x + 0.5 * h, k, eps, sg + 0.5 * h * a1,
                      vv + 0.5 * h * b1, sign, False)
    a3, b3, c3 = _rhs(x + 0.5 * h, k, eps, sg + 0.5 * h * a2,
                      vv + 0.5 * h * b2, sign, False)
    a4, b4, c4 = _rhs(x + h, k, eps, sg + h * a3, vv + h * b3, sign, False)
    return (sg + h * (a1 + 2 * a2 + 2 * a3 + a4) / 6.0,
            vv + h * (b1 + 2 * b2 + 2 * b3 + b4) / 6.0,
            ii + h * (c1 + 2 * c2 + 2 * c3 + c4) / 6.0)


@numba.njit(cache=True)
def _wkb_q(x, k):
    """Squared local wavenumber ``q`` of the Liouville-normal form."""
    s = -1.5 * x
    k2 = k * k
    d = k2 * s * s - 1.0
    dp = 2.0 * k2 * s * (-1.5)
    return d - k2 + (6.0 * k2 + 2.25 * k2) / d - 0.75 * dp * dp / (d * d)


@numba.njit(cache=True)
def _outgoing_start(xb, k):
    """(sigma, v) of the outgoing homogeneous solution at ``x = xb``.

    Outgoing means ``exp(+i int sqrt(q) dx)`` on both sides for ``k > 0``
    (radial group velocity ``-k_x / (k s)`` points away from the planet).
    """
    s = -1.5 * xb
    k2 = k * k
    d = k2 * s * s - 1.0
    dp = 2.0 * k2 * s * (-1.5)
    q = _wkb_q(xb, k)
    dq = (_wkb_q(xb + 1e-5 * abs(xb), k)
          - _wkb_q(xb - 1e-5 * abs(xb), k)) / (2e-5 * abs(xb))
    dlogpsi = 0.5 * dp / d - 0.25 * dq / q + 1j * math.sqrt(q)
    psi = 1.0 + 0.0j
    dpsi = dlogpsi * psi
    vv = -(dpsi + 2.0 * k2 * s * psi) / (2.0 * d)
    return psi, vv


@numba.njit(cache=True)
def _kx_bound(x, k):
    return math.sqrt(2.25 * k * k * x * x + 1.0 + 4.0 * k * k)


@numba.njit(cache=True)
def _sweep(k, eps, xb, x_out, nx, m_inner, ppw, direction, out_s, out_v,
           out_i):
    """Integrate one outgoing homogeneous solution across the domain.

    ``direction = +1``: start at ``-xb`` (left-outgoing), march right to
    ``+x_out``; ``direction = -1``: start at ``+xb``, march left.  The
    output nodes ``linspace(-x_out, x_out, nx)`` receive (sigma, v, I).
    """
    # I' = det(Y, F) for both solutions: marching right from -xb it gives
    # I_L(x) = int_{-xb}^x det(Y_L, F); marching left from +xb it gives
    # int_{xb}^x det(Y_R, F) = int_x^{xb} det(F, Y_R) = I_R(x).
    sign = 1.0
    x = -xb if direction > 0 else xb
    sg, vv = _outgoing_start(x, k)
    ii = 0.0j
    x_edge = -x_out if direction > 0 else x_out
    # outer region: variable step, land exactly on the window edge
    while True:
        h = 2.0 * math.pi / (ppw * _kx_bound(x, k))
        rem = abs(x_edge - x)
        if rem <= 1e-12:
            break
        if h >= rem:
            h = rem
        step = h if direction > 0 else -h
        sg, vv, ii = _rk4(x, step, k, eps, sg, vv, ii, sign)
        x += step
    x = x_edge
    dxo = 2.0 * x_out / (nx - 1)
    h = dxo / m_inner
    j = 0 if direction > 0 else nx - 1
    out_s[j] = sg
    out_v[j] = vv
    out_i[j] = ii
    for n in range(1, nx):
        for _ in range(m_inner):
            step = h if direction > 0 else -h
            sg, vv, ii = _rk4(x, step, k, eps, sg, vv, ii, sign)
            x += step
        j = n if direction > 0 else nx - 1 - n
        x = -x_out + j * dxo
        out_s[j] = sg
        out_v[j] = vv
        out_i[j] = ii


@numba.njit(cache=True)
def _solve_modes(ks, eps, x_out, nx, ppw, c_wkb, core_steps):
    """Solve the forced radiation problem for every ``k > 0`` in ``ks``.

    Returns sigma_k, v_k, u_k of shape (nk, nx) and the relative spread of
    the Wronskian over the window (a diagnostic of integration accuracy).
    """
    nk = ks.shape[0]
    sig = np.zeros((nk, nx), dtype=np.complex128)
    vel = np.zeros((nk, nx), dtype=np.complex128)
    rad = np.zeros((nk, nx), dtype=np.complex128)
    wspread = np.zeros(nk)
    sl = np.empty(nx, dtype=np.complex128)
    vl = np.empty(nx, dtype=np.complex128)
    il = np.empty(nx, dtype=np.complex128)
    sr = np.empty(nx, dtype=np.complex128)
    vr = np.empty(nx, dtype=np.complex128)
    ir = np.empty(nx, dtype=np.complex128)
    dxo = 2.0 * x_out / (nx - 1)
    for n in range(nk):
        k = ks[n]
        x_turn = (2.0 / 3.0) * math.sqrt(1.0 + k * k) / k
        xb = max(math.sqrt(c_wkb / k), 1.5 * x_turn + 6.0, x_out + 6.0)
        h_need = min(2.0 * math.pi / (ppw * _kx_bound(x_out, k)),
                     eps / core_steps)
        m_inner = max(1, int(math.ceil(dxo / h_need)))
        _sweep(k, eps, xb, x_out, nx, m_inner, ppw, 1, sl, vl, il)
        _sweep(k, eps, xb, x_out, nx, m_inner, ppw, -1, sr, vr, ir)
        wmax = 0.0
        wmin = 1e300
        for j in range(nx):
            w = sl[j] * vr[j] - vl[j] * sr[j]
            aw = abs(w)
            wmax = max(wmax, aw)
            wmin = min(wmin, aw)
            # Y = (-Y_L I_R + Y_R I_L) / W
            sg = (-sl[j] * ir[j] + sr[j] * il[j]) / w
            vv = (-vl[j] * ir[j] + vr[j] * il[j]) / w
            x = -x_out + j * dxo
            phi, _ = _forcing(x, k, eps)
            sig[n, j] = sg
            vel[n, j] = vv
            rad[n, j] = -2.0j * k * (-1.5 * x * vv + sg + phi)
        wspread[n] = (wmax - wmin) / wmax
    return sig, vel, rad, wspread


@numba.njit(cache=True)
def _exp_convolutions(f, dx):
    """``a = int_{-inf}^x e^{-(x-x')} f``, ``b = int_x^inf e^{-(x'-x)} f``.

    Trapezoid rule in stable one-sided recurrences on a uniform grid.
    """
    n = f.shape[0]
    a = np.zeros(n)
    b = np.zeros(n)
    ed = math.exp(-dx)
    for i in range(1, n):
        a[i] = a[i - 1] * ed + 0.5 * dx * (f[i] + f[i - 1] * ed)
    for i in range(n - 2, -1, -1):
        b[i] = b[i + 1] * ed + 0.5 * dx * (f[i] + f[i + 1] * ed)
    return a, b


def _k_zero_mode(x, eps):
    """``k -> 0`` mode: ``sigma - sigma'' = Phi0''``, ``v = (sigma'+Phi0')/2``.

    ``Phi0`` is the x-dependent part of ``Phi_k`` as ``k -> 0``
    (``2 ln sqrt(x^2 + eps^2)``); the solution decaying on both sides is the
    Green's function convolution ``sigma = (1/2) int exp(-|x-x'|) Phi0'' dx'``.
    Returns (sigma_0, v_0, u_0) on the nodes ``x`` (uniform).
    """
    r2 = x * x + eps * eps
    phi0_p = 2.0 * x / r2
    # sigma'' - sigma = -Phi0''  ->  sigma = (1/2) int e^{-|x-x'|} Phi0'',
    # by quadrature on an auxiliary grid: |x'| <= 200 h (e^-200 negligible),
    # step <= eps/20
    dxf = min(1e-3, eps / 20.0)
    nf = 2 * int(math.ceil(200.0 / dxf)) + 1
    xf = np.linspace(-200.0, 200.0, nf)
    r2f = xf * xf + eps * eps
    fpp = 2.0 * (eps * eps - xf * xf) / (r2f * r2f)
    a, b = _exp_convolutions(fpp, xf[1] - xf[0])
    sig_f = 0.5 * (a + b)
    dsig_f = 0.5 * (-a + b)
    sig0 = np.interp(x, xf, sig_f)
    dsig0 = np.interp(x, xf, dsig_f)
    v0 = 0.5 * (dsig0 + phi0_p)
    return sig0, v0, np.zeros_like(x)


# --------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class SheetSolution:
    """Gridded linear wake for ``Mp = M_th`` (scale linearly by ``Mp/M_th``).

    Attributes
    ----------
    x_h : ndarray, shape (nx,)
        Radial offset from the planet / h_p, uniform, symmetric about 0.
    y_h : ndarray, shape (ny,)
        Azimuthal offset ``r_p (phi - phi_p)`` / h_p, uniform, symmetric.
    sigma : ndarray, shape (nx, ny)
        Relative surface-density perturbation dSigma/Sigma.
    u, v : ndarray, shape (nx, ny)
        Radial and azimuthal velocity perturbations / c_p.
    softening_h : float
        Plummer softening of the planet potential / h_p.
    y_period_h : float
        Period of the FFT box in y / h_p (>= the returned window).
    k_max_h : float
        Largest azimuthal wavenumber solved, 1/h_p.
    flux_k : ndarray, shape (nx,)
        One-sided angular-momentum flux from the Fourier modes (Parseval),
        units of (G Mp)^2 Sigma r_p Omega_p / c^3.
    wronskian_spread : float
        Largest relative variation of the Wronskian over the window (an
        integration-accuracy diagnostic; the exact value is constant).
    """

    x_h: np.ndarray
    y_h: np.ndarray
    sigma: np.ndarray
    u: np.ndarray
    v: np.ndarray
    softening_h: float
    y_period_h: float
    k_max_h: float
    flux_k: np.ndarray
    wronskian_spread: float


def _check_inputs(softening_h, x_max_h, y_max_h, nx, ny, y_pad, ppw):
    def bad(key, value, why):
        raise PhysicsRangeError(f"linear sheet: {key}={value!r} {why}",
                                key=key, value=value)
    if not (np.isfinite(softening_h) and 0.005 <= softening_h <= 2.0):
        bad("softening_h", softening_h, "must lie in [0.005, 2] h_p")
    if not (np.isfinite(x_max_h) and 1.0 <= x_max_h <= 30.0):
        bad("x_max_h", x_max_h, "must lie in [1, 30] h_p")
    if not (np.isfinite(y_max_h) and 4.0 <= y_max_h <= 2000.0):
        bad("y_max_h", y_max_h, "must lie in [4, 2000] h_p")
    if int(nx) != nx or nx < 11 or nx % 2 == 0:
        bad("nx", nx, "must be an odd integer >= 11 (grid symmetric about 0)")
    if int(ny) != ny or ny < 33 or ny % 2 == 0:
        bad("ny", ny, "must be an odd integer >= 33 (grid symmetric about 0)")
    if not (y_pad >= 1.0):
        bad("y_pad", y_pad, "must be >= 1")
    if not (ppw >= 8):
        bad("steps_per_wavelength", ppw, "must be >= 8")


def solve_sheet(*, softening_h: float = 0.1, x_max_h: float = 8.0,
                y_max_h: float = 80.0, nx: int = 321, ny: int = 1601,
                y_pad: float = 1.5, steps_per_wavelength: float = 40.0,
                wkb_start: float = 800.0) -> SheetSolution:
    """Solve the linear shearing-sheet wake of a planet of mass ``M_th``.

    Parameters
    ----------
    softening_h : float
        Plummer softening ``eps`` of the potential ``-G Mp/sqrt(r^2+eps^2)``,
        in h_p.
    x_max_h, y_max_h : float
        Half-widths of the returned window in x and y, h_p.
    nx, ny : int, odd
        Grid points in x and y (symmetric grids including 0).
    y_pad : float
        FFT period / window width (>= 1); padding keeps the periodic images
        of the wake outside the window.
    steps_per_wavelength : float
        RK4 steps per local radial wavelength.
    wkb_start : float
        The outgoing WKB start is placed at ``|x| = sqrt(wkb_start / k)``,
        where the WKB parameter ``1/(k_x x)`` is ``~ 1.3 / wkb_start``.

    Returns
    -------
    SheetSolution
    """
    _check_inputs(softening_h, x_max_h, y_max_h, nx, ny, y_pad,
                  steps_per_wavelength)
    t0 = time.perf_counter()
    nx = int(nx)
    ny = int(ny)
    x = np.linspace(-x_max_h, x_max_h, nx)
    dy = 2.0 * y_max_h / (ny - 1)
    # FFT box: odd number of points, symmetric about 0, period n_fft * dy
    half = int(math.ceil(0.5 * ny * y_pad))
    n_fft = 2 * half + 1
    period = n_fft * dy
    nk = n_fft // 2 + 1
    ks = 2.0 * np.pi * np.arange(nk) / period
    sig_k, vel_k, rad_k, wspread = _solve_modes(
        ks[1:], float(softening_h), float(x_max_h), nx,
        float(steps_per_wavelength), float(wkb_start), 6.0)
    s0, v0, u0 = _k_zero_mode(x, float(softening_h))
    sig_all = np.vstack([s0[None, :].astype(complex), sig_k])
    vel_all = np.vstack([v0[None, :].astype(complex), vel_k])
    rad_all = np.vstack([u0[None, :].astype(complex), rad_k])
    # inverse transform: f(y_n) = (1/period) sum_k f_k exp(i k y_n),
    # with y_n = -half*dy + n*dy; irfft handles the negative k by symmetry.
    y0 = -half * dy
    phase = np.exp(1j * ks * y0)[:, None]

    def to_real(fk):
        return np.fft.irfft((fk * phase).T, n=n_fft, axis=1) * (n_fft / period)

    i0 = half - (ny - 1) // 2
    crop = slice(i0, i0 + ny)
    sigma = to_real(sig_all)[:, crop]
    u = to_real(rad_all)[:, crop]
    v = to_real(vel_all)[:, crop]
    y = (np.arange(ny) - (ny - 1) // 2) * dy
    # Parseval: int u v dy = (1/period) sum_{all k} u_k conj(v_k)
    w = np.full(nk, 2.0)
    w[0] = 1.0
    flux_k = (w[:, None] * np.real(rad_all * np.conj(vel_all))).sum(0) / period
    log.info("linear sheet solved: eps=%.3g, %d modes, %d x %d grid in %.1f s",
             softening_h, nk, nx, ny, time.perf_counter() - t0)
    return SheetSolution(x_h=x, y_h=y, sigma=sigma, u=u, v=v,
                         softening_h=float(softening_h), y_period_h=period,
                         k_max_h=float(ks[-1]), flux_k=flux_k,
                         wronskian_spread=float(np.max(wspread)))


def get_sheet_solution(*, softening_h: float = 0.1, x_max_h: float = 8.0,
                       y_max_h: float = 80.0, nx: int = 321, ny: int = 1601,
                       y_pad: float = 1.5, steps_per_wavelength: float = 40.0,
                       wkb_start: float = 800.0) -> SheetSolution:
    """:func:`solve_sheet`, cached on disk through :mod:`kinkfit.cache`.

    The cache key holds every input and :data:`SOLVER_VERSION`; an entry
    that is unreadable, incomplete, non-finite or of the wrong shape is
    rebuilt.
    """
    inputs = dict(softening_h=float(softening_h), x_max_h=float(x_max_h),
                  y_max_h=float(y_max_h), nx=int(nx), ny=int(ny),
                  y_pad=float(y_pad),
                  steps_per_wavelength=float(steps_per_wavelength),
                  wkb_start=float(wkb_start), solver=SOLVER_VERSION)
    key = cache.cache_key("linear-sheet", inputs)
    required = _FIELDS + ("meta", "flux_k")
    got = cache.load_arrays(key, required)
    if got is not None:
        shapes_ok = (got["x_h"].shape == (int(nx),)
                     and got["y_h"].shape == (int(ny),)
                     and all(got[f].shape == (int(nx), int(ny))
                             for f in ("sigma", "u", "v"))
                     and got["meta"].shape == (4,)
                     and got["flux_k"].shape == (int(nx),))
        if shapes_ok:
            meta = got["meta"]
            return SheetSolution(x_h=got["x_h"], y_h=got["y_h"],
                                 sigma=got["sigma"], u=got["u"], v=got["v"],
                                 softening_h=float(meta[0]),
                                 y_period_h=float(meta[1]),
                                 k_max_h=float(meta[2]),
                                 flux_k=got["flux_k"],
                                 wronskian_spread=float(meta[3]))
        log.warning("cache entry %s has wrong shapes; rebuilding", key)
    sol = solve_sheet(**{k: v for k, v in inputs.items() if k != "solver"})
    meta = np.array([sol.softening_h, sol.y_period_h, sol.k_max_h,
                     sol.wronskian_spread])
    cache.save_arrays(key, dict(x_h=sol.x_h, y_h=sol.y_h, sigma=sol.sigma,
                                u=sol.u, v=sol.v, meta=meta,
                                flux_k=sol.flux_k))
    return sol


def mach_line_y(x_h) -> np.ndarray:
    """Phase-stationarity (Mach-line) curve of steady sheet waves, y/h vs x/h.

    For ``k -> inf`` the local dispersion relation of steady waves,
    ``(3 k x / 2)^2 = 1 + k^2 + k_x^2``, gives a phase ``k [y + int k_x/k dx]``
    linear in ``k``: all large-k waves are in phase on
    ``dy/dx = -sgn(x) sqrt(9 x^2/4 - 1)`` starting at the sonic point
    ``|x| = 2/3``::

        y = -sgn(x) [ |x|/2 sqrt(9x^2/4 - 1)
                      - (1/3) ln(3|x|/2 + sqrt(9x^2/4 - 1)) ]

    which tends to ``-(3/4) x|x| + sgn(x) [1/6 + (1/3) ln(3|x|)]``.  Inside
    the sonic points (``|x| < 2/3``) there is no wave and NaN is returned.

    Parameters
    ----------
    x_h : array_like
        Radial offsets / h_p.

    Returns
    -------
    ndarray
        Azimuthal offsets / h_p, same shape as ``x_h``.
    """
    x = np.asarray(x_h, dtype=float)
    ax = np.abs(x)
    with np.errstate(invalid="ignore", divide="ignore"):
        root = np.sqrt(2.25 * ax * ax - 1.0)
        val = 0.5 * ax * root - np.log(1.5 * ax + root) / 3.0
    out = np.where(ax >= 2.0 / 3.0, -np.sign(x) * val, np.nan)
    return out if out.ndim else float(out)


def _row_at(sol, field, x_h):
    """Field at ``x_h`` by interpolation along the Mach line.

    The two neighbouring x nodes are shifted in y so that their Mach-line
    points coincide with that of ``x_h`` (periodic linear interpolation in
    y), then weighted linearly in x.  This follows the tilted wake instead
    of smearing it between nodes.
    """
    x = sol.x_h
    if not (x[0] <= x_h <= x[-1]):
        raise PhysicsRangeError(
            f"linear sheet: x_h={x_h!r} outside the solved window "
            f"[{x[0]:g}, {x[-1]:g}]", key="x_h", value=x_h)
    dx = x[1] - x[0]
    i = int(min(max(np.floor((x_h - x[0]) / dx), 0), x.size - 2))
    t = (x_h - x[i]) / dx
    y = sol.y_h

    def ym(xx):
        val = mach_line_y(xx)
        return 0.0 if np.isnan(val) else val

    out = np.zeros_like(y)
    for j, wgt in ((i, 1.0 - t), (i + 1, t)):
        if wgt == 0.0:
            continue
        shift = ym(x_h) - ym(x[j])  # row j sampled at y - shift
        out += wgt * np.interp(y - shift, y, field[j], left=0.0, right=0.0)
    return out


def sheet_profile(sol: SheetSolution, x_h: float):
    """1-D cut of the linear wake at fixed radial offset, for matching.

    Parameters
    ----------
    sol : SheetSolution
    x_h : float
        Radial offset / h_p inside the solved window.

    Returns
    -------
    y_h : ndarray, shape (ny,)
    sigma_y, u_y, v_y : ndarray, shape (ny,)
        dSigma/Sigma and velocity perturbations / c_p for ``Mp = M_th``.
    """
    x_h = float(x_h)
    return (sol.y_h.copy(), _row_at(sol, sol.sigma, x_h),
            _row_at(sol, sol.u, x_h), _row_at(sol, sol.v, x_h))


def angular_momentum_flux(sol: SheetSolution, x_h):
    """One-sided angular-momentum flux of the wake through ``x = x_h``.

    ``F_J = Sigma r_p int u v dy`` (second order; the wave's own mass flux
    ``int sigma u dy`` is cancelled by the second-order mean radial flow in
    the steady state, see docs/physics/linear.md), returned in units of
    ``(G Mp)^2 Sigma r_p Omega_p / c^3``, computed from the real-space
    grid (trapezoid over the y window) and linearly interpolated in x.
    The flux is even in ``x``: positive on both sides.

    Parameters
    ----------
    sol : SheetSolution
    x_h : float or array_like
        Radial offset(s) / h_p inside the window.

    Returns
    -------
    float or ndarray
        Same shape as ``x_h``.
    """
    x = sol.x_h
    xq = np.asarray(x_h, dtype=float)
    if not np.all((x[0] <= xq) & (xq <= x[-1])):
        raise PhysicsRangeError(
            f"linear sheet: x_h={x_h!r} outside the solved window "
            f"[{x[0]:g}, {x[-1]:g}]", key="x_h", value=x_h)
    dy = sol.y_h[1] - sol.y_h[0]
    rows = np.trapezoid(sol.u * sol.v, dx=dy, axis=1)
    out = np.interp(xq, x, rows)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------
# 1-D cuts at arbitrary |x| (adaptive steps; no 2-D grid)
# --------------------------------------------------------------------------
@numba.njit(cache=True)
def _sweep_points(k, eps, xb, xo, ppw, core_steps, direction, out_s, out_v,
                  out_i):
    """Integrate one outgoing homogeneous solution through the nodes ``xo``.

    Like :func:`_sweep` but with a local step ``min(2 pi/(ppw k_x,bound(x)),
    sqrt(x^2+eps^2)/core_steps)`` everywhere, landing exactly on each node of
    the increasing array ``xo``; ``direction = +1`` starts at ``-xb``
    and visits ``xo`` in increasing order, ``-1`` starts at ``+xb``.
    """
    n = xo.shape[0]
    x = -xb if direction > 0 else xb
    sg, vv = _outgoing_start(x, k)
    ii = 0.0j
    for m in range(n):
        j = m if direction > 0 else n - 1 - m
        target = xo[j]
        while True:
            rem = abs(target - x)
            if rem <= 1e-13 * max(1.0, abs(target)):
                break
            h = min(2.0 * math.pi / (ppw * _kx_bound(x, k)),
                    math.sqrt(x * x + eps * eps) / core_steps)
            if h >= rem:
                h = rem
            step = h if direction > 0 else -h
            sg, vv, ii = _rk4(x, step, k, eps, sg, vv, ii, 1.0)
            x += step
        x = target
        out_s[j] = sg
        out_v[j] = vv
        out_i[j] = ii


@numba.njit(cache=True)
def _solve_points(ks, eps, xo, ppw, c_wkb, core_steps):
    """Forced outgoing solution of every mode ``k > 0`` at the nodes ``xo``.

    Same boundary-value problem as :func:`_solve_modes`; returns sigma_k,
    v_k, u_k of shape (nk, len(xo)) and the Wronskian spread.
    """
    nk = ks.shape[0]
    n = xo.shape[0]
    sig = np.zeros((nk, n), dtype=np.complex128)
    vel = np.zeros((nk, n), dtype=np.complex128)
    rad = np.zeros((nk, n), dtype=np.complex128)
    wspread = np.zeros(nk)
    sl = np.empty(n, dtype=np.complex128)
    vl = np.empty(n, dtype=np.complex128)
    il = np.empty(n, dtype=np.complex128)
    sr = np.empty(n, dtype=np.complex128)
    vr = np.empty(n, dtype=np.complex128)
    ir = np.empty(n, dtype=np.complex128)
    x_out = max(abs(xo[0]), abs(xo[n - 1]))
    for m in range(nk):
        k = ks[m]
        x_turn = (2.0 / 3.0) * math.sqrt(1.0 + k * k) / k
        xb = max(math.sqrt(c_wkb / k), 1.5 * x_turn + 6.0, x_out + 6.0)
        _sweep_points(k, eps, xb, xo, ppw, core_steps, 1, sl, vl, il)
        _sweep_points(k, eps, xb, xo, ppw, core_steps, -1, sr, vr, ir)
        wmax = 0.0
        wmin = 1e300
        for j in range(n):
            w = sl[j] * vr[j] - vl[j] * sr[j]
            aw = abs(w)
            wmax = max(wmax, aw)
            wmin = min(wmin, aw)
            sg = (-sl[j] * ir[j] + sr[j] * il[j]) / w
            vv = (-vl[j] * ir[j] + vr[j] * il[j]) / w
            phi, _ = _forcing(xo[j], k, eps)
            sig[m, j] = sg
            vel[m, j] = vv
            rad[m, j] = -2.0j * k * (-1.5 * xo[j] * vv + sg + phi)
        wspread[m] = (wmax - wmin) / wmax
    return sig, vel, rad, wspread


@dataclass(frozen=True)
class SheetCuts:
    """Linear wake on a few lines ``x = const``, crest-centred, for ``Mp = M_th``.

    Attributes
    ----------
    x_h : ndarray, shape (nc,)
        Radial offsets of the cuts / h_p.
    s_h : ndarray, shape (ns,)
        ``s = y + (3/4) x|x|`` / h_p (distance from the crest parabola along
        +y), uniform, symmetric, one full FFT period.
    sigma, u, v : ndarray, shape (nc, ns)
        dSigma/Sigma and velocities / c_p.
    k_h : ndarray, shape (nk,)
        Wavenumbers solved (1/h_p), ``k_h[0] = 0``.
    sigma_k : ndarray, shape (nc, nk), complex
        Fourier coefficients of sigma in ``s`` (``sigma(s) = (1/P) sum``
        over +-k of ``sigma_k e^{iks}``).
    flux : ndarray, shape (nc,)
        One-sided angular-momentum flux ``int u v dy`` (Parseval), units of
        ``(G Mp)^2 Sigma r_p Omega_p / c^3``.
    softening_h, period_h : float
    wronskian_spread : float
    """

    x_h: np.ndarray
    s_h: np.ndarray
    sigma: np.ndarray
    u: np.ndarray
    v: np.ndarray
    k_h: np.ndarray
    sigma_k: np.ndarray
    flux: np.ndarray
    softening_h: float
    period_h: float
    wronskian_spread: float


def solve_cuts(x_h, *, softening_h: float = 0.1, period_h: float = 240.0,
               k_max_h: float = 16.0, steps_per_wavelength: float = 40.0,
               wkb_start: float = 800.0, core_steps: float = 6.0) -> SheetCuts:
    """Linear sheet response on a few lines ``x = const`` (any ``|x| <= 60 h_p``).

    The same forced radiation problem as :func:`solve_sheet`, integrated
    with a local RK4 step (``steps_per_wavelength`` per local radial
    wavelength, ``core_steps`` per softened distance to the planet) and
    evaluated only at the requested ``x``; the output is centred on the
    crest parabola (``s = y + (3/4) x|x|``), so the FFT period only has to
    hold the profile's width, not its drift in ``y``.  Much cheaper than a
    2-D sheet for matching profiles far from the planet.

    Parameters
    ----------
    x_h : array_like, shape (nc,)
        Radial offsets / h_p, non-zero.
    softening_h : float
        Plummer softening / h_p.
    period_h : float
        FFT period in ``s`` (sets ``dk = 2 pi / period``), h_p.
    k_max_h : float
        Largest wavenumber, 1/h_p (sets the ``s`` resolution ``pi/k_max``).
    steps_per_wavelength, wkb_start, core_steps : float
        Integration controls (see :func:`solve_sheet`).

    Returns
    -------
    SheetCuts
    """
    xo = np.atleast_1d(np.asarray(x_h, dtype=float))
    if not (np.all(np.isfinite(xo)) and np.all(np.abs(xo) <= 60.0)
            and np.all(np.abs(xo) > 0)):
        raise PhysicsRangeError(f"linear cuts: x_h={x_h!r} must be non-zero, "
                                "|x| <= 60 h_p", key="x_h", value=x_h)
    _check_inputs(softening_h, 1.0, 4.0, 11, 33, 1.0, steps_per_wavelength)
    if not (np.isfinite(period_h) and 20.0 <= period_h <= 5000.0):
        raise PhysicsRangeError(f"linear cuts: period_h={period_h!r} outside "
                                "[20, 5000] h_p", key="period_h", value=period_h)
    if not (np.isfinite(k_max_h) and 1.0 <= k_max_h <= 64.0):
        raise PhysicsRangeError(f"linear cuts: k_max_h={k_max_h!r} outside "
                                "[1, 64] 1/h_p", key="k_max_h", value=k_max_h)
    t0 = time.perf_counter()
    order = np.argsort(xo)
    xs = xo[order]
    dk = 2.0 * np.pi / period_h
    nk = int(math.floor(k_max_h / dk)) + 1
    ks = dk * np.arange(nk)
    sig_k, vel_k, rad_k, wspread = _solve_points(
        ks[1:], float(softening_h), xs, float(steps_per_wavelength),
        float(wkb_start), float(core_steps))
    s0, v0, u0 = _k_zero_mode(xs, float(softening_h))
    inv = np.argsort(order)
    sig_all = np.vstack([s0[None, :].astype(complex), sig_k])[:, inv]
    vel_all = np.vstack([v0[None, :].astype(complex), vel_k])[:, inv]
    rad_all = np.vstack([u0[None, :].astype(complex), rad_k])[:, inv]
    # crest-centred: f(s) = f(y = s + y_ref), y_ref = -(3/4) x|x|
    yref = -0.75 * xo * np.abs(xo)
    shift = np.exp(1j * ks[:, None] * yref[None, :])
    n_s = 2 * nk - 1
    ds = period_h / n_s
    half = nk - 1
    s = (np.arange(n_s) - half) * ds
    phase = np.exp(1j * ks * s[0])[:, None]

    def to_real(fk):
        return np.fft.irfft((fk * shift * phase).T, n=n_s, axis=1) * (n_s / period_h)

    w = np.full(nk, 2.0)
    w[0] = 1.0
    flux = (w[:, None] * np.real(rad_all * np.conj(vel_all))).sum(0) / period_h
    log.info("linear cuts solved: %d cuts, %d modes in %.1f s", xo.size, nk,
             time.perf_counter() - t0)
    return SheetCuts(x_h=xo, s_h=s, sigma=to_real(sig_all), u=to_real(rad_all),
                     v=to_real(vel_all), k_h=ks, sigma_k=(sig_all * shift).T,
                     flux=flux, softening_h=float(softening_h),
                     period_h=float(period_h),
                     wronskian_spread=float(np.max(wspread)) if nk > 1 else 0.0)
