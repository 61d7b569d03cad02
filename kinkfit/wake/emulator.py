"""Wake model callables for the likelihood: the direct reference and a fast emulator.

:func:`make_fit_model` returns ``model(params, r_au, phi_rad) -> (dv_r,
dv_phi)`` with ``params`` a dict of arrays of shape ``(m,)`` (one entry per
walker, canonical units of :mod:`kinkfit.params`) and outputs of shape
``(m, npts)`` in km/s -- the interface of
:class:`kinkfit.likelihood.KinkLikelihood`.

``method="direct"`` evaluates the reference model
:func:`kinkfit.wake.model.wake_perturbations` walker by walker (slow; the
reference for accuracy tests and benchmarks).

``method="emulator"`` (default) evaluates the same model from tables built
once, using the structure of the theory instead of a black-box fit
(derivation: ``docs/physics/emulator.md``):

* Mass.  Inviscid Burgers is invariant under ``chi -> A chi, t -> t/A``: the
  solution for ``A chi0`` at time ``t`` is ``A Chi(eta, A t)`` with ``Chi`` the
  solution for the unit profile ``chi0``.  One table of the unit solution per
  profile covers every mass through the scaled time ``tau = A t``.
* Exactness in ``tau``.  The entropy solution at any ``tau`` is the lower
  convex hull of ``Psi = tau U0(y) + y^2/2`` (Hopf-Lax; see
  :mod:`kinkfit.wake.burgers`).  ``Psi`` is affine in ``tau``, so a sample
  leaves the hull at one time and never returns: its *death time*.  The
  tables store the profile samples, their death times and the hull index
  lists at a few ``tau`` nodes; at run time the solution at the requested
  ``tau`` is rebuilt locally (characteristic positions ``y + chi0 tau`` of the
  surviving samples, equal-area shock positions between them), so shocks sit
  where the direct solver puts them for any ``tau`` -- no blending in time.
* Interior columns.  Each sheet column ``X`` steepened by the planet clock is
  ``g(X) F_X(s, tau_X)`` with ``F_X`` the Burgers solution of the universal
  profile ``S(X, s)/|X/h_p|^(1/2)`` (sheet density over GR01's local
  amplitude law) at ``tau_X = ((gamma+1)/2) A t'(X)``: one universal table for
  all disks and masses.
* Damping.  ``ln D`` is linear in ``alpha`` (viscous) or ``1/efold``; the damped
  clock ``t' = ∫ D dt`` is recomputed exactly for each walker as a cumulative
  sum on a fixed radial grid (a few thousand exponentials per walker).
* Radius and azimuth.  The tables are in ``x = r/r_p``; ``c_p ∝ r_p^(-1/2)``
  (Keplerian) scales the velocities and ``phi_p`` shifts the locus.

The point loop is compiled with numba (one core; layout and measured profile in
``docs/physics/emulator.md`` §5a): per-point powers of ``r`` cached while the
caller passes the same points, so the loop calls no transcendental function but
``sqrt`` (and ``exp`` for damped on-wake points); interior points in radius
order with a local search of the column's own samples; exterior points in
(radius bin, azimuth) order, galloping from the previous bracket; table
look-ups compiled without NRT (no reference counting per call).  The interior
points of a block are gathered first and their look-ups done in a loop of
their own (:func:`_interior_block`) through :func:`_local_fast` (the common
path of :func:`_eval_local` with the per-column scalars hoisted, inlined); the
general path stays in the kernel as the reference (``EmulatorModel._fast_interior
= False``; the tests compare the two).  The
reference in tests is the direct
model itself, evaluated exactly in time (``kinkfit.wake.model._N_TIME`` raised
above the number of points, so that :func:`~kinkfit.wake.burgers.burgers_at_times`
solves at each point's own time instead of blending between grid times).
"""

from __future__ import annotations

import hashlib
import logging
import math
from dataclasses import replace

import numpy as np

from .. import cache
from ..constants import MJUP_PER_MSUN, keplerian_speed_kms
from ..errors import KinkfitError, PhysicsRangeError
from .burgers import pad_profile
from .damping import Damping, DampingContext, damping_log_factor
from .model import (Planet, WakeDisk, _global_factors, _scaled_profile, _y_ref,
                    default_match_h, wake_perturbations, windowed_profile)
from .nonlinear import (_dt_dx, amplitude_factor, front_normal, matching_profile,
                        profile_wavenumber_h)

try:
    from numba import njit
except ImportError:  # pragma: no cover
    def njit(*args, **kwargs):
        def wrap(f):
            return f
        return wrap if not (args and callable(args[0])) else args[0]

__all__ = ["make_fit_model", "DirectModel", "EmulatorModel", "EmulatorTables",
           "build_tables", "ProfileTable", "build_profile_table", "profile_solution"]

log = logging.getLogger(__name__)

#: version of the table layout and algorithms (part of every cache key)
TABLE_VERSION = 3
_N_RADIAL = 4001     # radial grid per arm for the clocks and damping integrals
_N_NODES = 32        # tau nodes with stored hull lists per profile
_NEVER = 1e300       # death time of a sample that never leaves the hull (finite: cache check)


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
                disk = replace(disk, aspect_p=float(params["aspect_ratio"][i]))
            planet = Planet(mass_mjup=float(params["mass"][i]),
                            r_au=float(params["radius"][i]),
                            phi_rad=math.radians(float(params["azimuth"][i])))
            vr, vphi, _ = wake_perturbations(r, phi, planet, disk,
                                             _damping_for(self.damping,
                                                          params, i))
            dv_r[i], dv_phi[i] = vr, vphi
        return dv_r, dv_phi


# --------------------------------------------------------------------------
# Burgers profile tables (mass-independent, exact in tau)
# --------------------------------------------------------------------------

@njit(cache=True)
def _collapse_time(i, left, right, y, u0, now):  # pragma: no cover
    """Time at which sample ``i`` becomes collinear with ``left`` and ``right``.

    ``Psi = tau U0 + y^2/2``; the chord excess ``Psi_i - chord`` is
    ``tau (U0_i - U0_chord) - w (1 - w) (y_r - y_l)^2 / 2`` with
    ``w = (y_i - y_l)/(y_r - y_l)``, so the collapse is at
    ``w (1 - w) (y_r - y_l)^2 / (2 (U0_i - U0_chord))`` (never if the
    denominator is <= 0).  Times before ``now`` are moved to ``now``.
    """
    span = y[right] - y[left]
    w = (y[i] - y[left]) / span
    den = u0[i] - ((1.0 - w) * u0[left] + w * u0[right])
    if den <= 0.0:
        return _NEVER
    t = 0.5 * w * (1.0 - w) * span * span / den
    return t if t > now else now


@njit(cache=True)
def _heap_push(ht, hi, hv, size, t, i, v):  # pragma: no cover
    k = size
    ht[k] = t
    hi[k] = i
    hv[k] = v
    while k > 0:
        par = (k - 1) // 2
        if ht[par] <= ht[k]:
            break
        ht[par], ht[k] = ht[k], ht[par]
        hi[par], hi[k] = hi[k], hi[par]
        hv[par], hv[k] = hv[k], hv[par]
        k = par
    return size + 1


@njit(cache=True)
def _heap_pop(ht, hi, hv, size):  # pragma: no cover
    t, i, v = ht[0], hi[0], hv[0]
    size -= 1
    ht[0], hi[0], hv[0] = ht[size], hi[size], hv[size]
    k = 0
    while True:
        a = 2 * k + 1
        b = a + 1
        m = k
        if a < size and ht[a] < ht[m]:
            m = a
        if b < size and ht[b] < ht[m]:
            m = b
        if m == k:
            break
        ht[m], ht[k] = ht[k], ht[m]
        hi[m], hi[k] = hi[k], hi[m]
        hv[m], hv[k] = hv[k], hv[m]
        k = m
    return t, i, v, size


@njit(cache=True)
def _death_times(y, u0, t_max):  # pragma: no cover - compiled
    """Exact time at which each sample leaves the lower hull of ``tau U0 + y^2/2``.

    Kinetic hull: at ``tau = 0`` every sample is a vertex (``y^2/2`` is strictly
    convex); as ``tau`` grows the hull only loses vertices, each when it becomes
    collinear with its current neighbours.  Events are processed in time order
    (binary heap, lazy invalidation); after a deletion the two neighbours get
    new collapse times.  Samples alive at ``t_max`` get ``_NEVER``.
    """
    n = y.shape[0]
    death = np.full(n, _NEVER)
    left = np.arange(-1, n - 1)
    right = np.arange(1, n + 1)
    ver = np.zeros(n, dtype=np.int64)
    cap = 3 * n + 8     # n initial events + at most 2 per deletion
    ht = np.empty(cap)
    hi = np.empty(cap, dtype=np.int64)
    hv = np.empty(cap, dtype=np.int64)
    size = 0
    for i in range(1, n - 1):
        t = _collapse_time(i, i - 1, i + 1, y, u0, 0.0)
        if t < _NEVER:
            size = _heap_push(ht, hi, hv, size, t, i, 0)
    while size > 0:
        t, i, v, size = _heap_pop(ht, hi, hv, size)
        if t > t_max:
            break
        if v != ver[i] or death[i] < _NEVER:
            continue
        death[i] = t
        lft = left[i]
        rgt = right[i]
        right[lft] = rgt
        left[rgt] = lft
        for j in (lft, rgt):
            ver[j] += 1
            if 0 < j < n - 1 and death[j] == _NEVER:
                tj = _collapse_time(j, left[j], right[j], y, u0, t)
                if tj < _NEVER:
                    size = _heap_push(ht, hi, hv, size, tj, j, ver[j])
    return death


class ProfileTable:
    """Packed Burgers tables of one or more unit profiles (plain arrays).

    Attributes
    ----------
    y, chi0, u0, death : ndarray (ntot,)
        Padded samples of every profile, their initial ``chi``, its running
        integral ``U0`` and the death time of each sample (``inf`` = never).
    s_off : ndarray (nprof + 1,)
        Sample offsets of the profiles.
    tau_nodes : ndarray (nnode_tot,)
        Node times of every profile (first node 0), packed.
    t_off : ndarray (nprof + 1,)
        Node offsets of the profiles.
    h_idx : ndarray (nh,), int16 or int32
        Hull index lists (sample indices local to the profile) at every node, packed.
    support : ndarray (nprof, 4)
        ``y_L, y_R`` (the zero samples just outside the non-zero ones), ``-min U0`` and
        ``U0_end - min U0``: the solution vanishes outside
        ``[y_L - sqrt(2 tau (-min U0)), y_R + sqrt(2 tau (U0_end - min U0))]``
        (Hopf-Lax: the zero state is the minimiser there).
    h_off : ndarray (nnode_tot + 1,)
        Offsets of the hull lists.
    """

    fields = ("y", "chi0", "u0", "death", "s_off", "tau_nodes", "t_off", "h_idx", "h_off",
              "support")

    def __init__(self, **arrays):
        for k in self.fields:
            setattr(self, k, np.ascontiguousarray(arrays[k]))

    def __reduce__(self):
        return (_profile_table, (self.arrays(),))

    def arrays(self, prefix=""):
        return {prefix + k: getattr(self, k) for k in self.fields}

    @property
    def tau_max(self):
        """Largest tabulated time of each profile, ``(nprof,)``."""
        return self.tau_nodes[self.t_off[1:] - 1]


def _profile_table(arrays):
    return ProfileTable(**arrays)


def build_profile_table(profiles, tau_max, *, n_nodes=_N_NODES):
    """Tables for a list of unit profiles.

    Parameters
    ----------
    profiles : list of (eta0, chi0) pairs of ndarray
        Initial profiles (``eta0`` strictly increasing; vanishing at the ends).
    tau_max : sequence of float
        Largest time each profile will be asked for.

    Returns
    -------
    ProfileTable
    """
    from .burgers import shock_formation_time
    ys, cs, us, ds, nodes_all, hulls = [], [], [], [], [], []
    s_off, t_off, h_off = [0], [0], [0]
    support = []
    for (eta0, chi0), tmax in zip(profiles, tau_max):
        tmax = float(tmax)
        reach_t = tmax
        # the solution never leaves [eta0 - max|chi| t, eta0 + max|chi| t]; the N wave
        # grows only as sqrt(2 P t) (W74 §2.9), so pad to the smaller of the two reaches
        area = float(np.trapezoid(np.abs(chi0), eta0))
        cmax = float(np.max(np.abs(chi0)))
        if cmax > 0:
            reach = min(cmax * tmax, 2.0 * math.sqrt(2.0 * area * tmax) + 10.0)
            reach_t = reach / cmax
        y, c, _ = pad_profile(eta0, chi0, reach_t)
        u = np.concatenate([[0.0], np.cumsum(0.5 * (c[1:] + c[:-1]) * np.diff(y))])
        t_sh = shock_formation_time(y, c)
        if np.isfinite(t_sh) and t_sh < tmax:
            nodes = np.concatenate([[0.0], np.geomspace(0.999 * t_sh, tmax * 1.0001,
                                                        n_nodes - 1)])
            death = _death_times(y, u, float(nodes[-1]))
        else:
            nodes = np.array([0.0, max(tmax, 1e-300) * 1.0001])
            death = np.full(y.size, _NEVER)
        base = s_off[-1]
        nz = np.nonzero(c != 0.0)[0]
        if nz.size:
            # the piecewise-linear profile is non-zero strictly between the zero
            # samples next to the first and last non-zero ones
            i_l, i_r = max(nz[0] - 1, 0), min(nz[-1] + 1, y.size - 1)
            support.append([y[i_l], y[i_r], -min(u.min(), 0.0), u[-1] - min(u.min(), 0.0)])
        else:
            support.append([0.0, 0.0, 0.0, 0.0])
        for tk in nodes:
            live = np.nonzero(death > tk)[0]
            hulls.append(live.astype(np.int32))
            h_off.append(h_off[-1] + live.size)
        ys.append(y); cs.append(c); us.append(u); ds.append(death); nodes_all.append(nodes)
        s_off.append(base + y.size)
        t_off.append(t_off[-1] + nodes.size)
    return ProfileTable(y=np.concatenate(ys), chi0=np.concatenate(cs), u0=np.concatenate(us),
                        death=np.concatenate(ds), s_off=np.array(s_off, dtype=np.int64),
                        tau_nodes=np.concatenate(nodes_all),
                        t_off=np.array(t_off, dtype=np.int64),
                        h_idx=np.concatenate(hulls).astype(
                            np.int16 if max(np.diff(s_off)) < 32767 else np.int32),
                        h_off=np.array(h_off, dtype=np.int64),
                        support=np.array(support, dtype=float).reshape(-1, 4))


@njit(cache=True, _nrt=False)
def _node_of(p, tau, nodes, t_off):  # pragma: no cover
    """Index ``g`` of the node list live at ``tau`` (``nodes[g-1] <= tau < nodes[g]``), or -1."""
    n0 = t_off[p]
    n1 = t_off[p + 1]
    if tau > nodes[n1 - 1]:
        return -1
    lo = n0
    hi = n1 - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if nodes[mid] <= tau:
            lo = mid
        else:
            hi = mid
    return lo + 1


@njit(cache=True)
def _profile_eval(p, eta, tau, guess, y, c, u0, death, s_off, nodes, t_off, h_idx, h_off,
                  support):  # pragma: no cover
    """Entropy solution of profile ``p`` at ``(eta, tau)``; NaN beyond the tables.

    ``guess < 0``: bisection (:func:`_eval_at`); else the local search of
    :func:`_eval_local` from global sample index ``guess``.
    """
    if tau < 0.0:
        tau = 0.0
    g = _node_of(p, tau, nodes, t_off)
    if g < 0:
        return np.nan
    if guess >= 0:
        return _eval_local(p, eta, tau, g, guess, y, c, u0, death, s_off, nodes, h_idx, h_off,
                           support)[0]
    return _eval_at(p, eta, tau, g, -1, y, c, u0, death, s_off, h_idx, h_off, support)[0]


@njit(cache=True, _nrt=False)
def _eval_at(p, eta, tau, g, hint, y, c, u0, death, s_off, h_idx, h_off,
             support):  # pragma: no cover
    """Entropy solution of profile ``p`` at ``(eta, tau)`` (0 outside its support).

    Same node semantics as :func:`kinkfit.wake.burgers.burgers_nodes` (hull
    vertices at ``y + chi0 tau``, clipped at equal-area shocks, linear between).
    ``g`` is the node list live at ``tau`` (:func:`_node_of`); ``hint`` (or -1)
    a list position near the bracket (galloping from it, then bisection).
    Returns the value and the bracket's list position (-1 outside the support).
    """
    base = s_off[p]
    # outside the Hopf-Lax bound of the support the zero state wins
    if eta < support[p, 0] - math.sqrt(2.0 * tau * support[p, 2]) or \
            eta > support[p, 1] + math.sqrt(2.0 * tau * support[p, 3]):
        return 0.0, -1
    a0 = h_off[g]
    a1 = h_off[g + 1] - 1
    first = base + h_idx[a0]
    last = base + h_idx[a1]
    if eta < y[first] + c[first] * tau or eta > y[last] + c[last] * tau:
        return 0.0, -1
    lo = a0
    hi = a1
    if a0 <= hint < a1:
        jh = base + h_idx[hint]
        if y[jh] + c[jh] * tau <= eta:
            # gallop right from a position known to lie at or left of the bracket
            lo = hint
            step = 2
            while True:
                nx = lo + step
                if nx >= a1:
                    break
                jn = base + h_idx[nx]
                if y[jn] + c[jn] * tau <= eta:
                    lo = nx
                    step *= 2
                else:
                    hi = nx
                    break
        else:
            # gallop left until a characteristic at or left of eta
            hi = hint
            step = 2
            while True:
                nx = hi - step
                if nx <= a0:
                    break
                jn = base + h_idx[nx]
                if y[jn] + c[jn] * tau <= eta:
                    lo = nx
                    break
                hi = nx
                step *= 2
    # branch-free bisection for the last list position with y + chi0 tau <= eta
    span = hi - lo + 1
    while span > 1:
        half = span >> 1
        j = base + h_idx[lo + half]
        if y[j] + c[j] * tau <= eta:
            lo = lo + half
        span -= half
    if lo >= a1:
        lo = a1 - 1
    hi = lo + 1
    ia = h_idx[lo]
    # fast path: a run of four consecutive samples, all live: no shock nearby
    if lo - 1 >= a0 and lo + 2 <= a1 and h_idx[lo - 1] == ia - 1 and h_idx[lo + 1] == ia + 1 \
            and h_idx[lo + 2] == ia + 2:
        a = base + ia
        pl = y[a] + c[a] * tau
        pr = y[a + 1] + c[a + 1] * tau
        if pr <= pl:
            return c[a], lo
        w = (eta - pl) / (pr - pl)
        if w < 0.0:
            w = 0.0
        return c[a] + w * (c[a + 1] - c[a]), lo
    return _stream(p, eta, tau, g, h_idx[lo], y, c, u0, death, s_off, h_idx, h_off), lo


#: points per block of the kernel (all walkers on a block before the next)
_PT_BLOCK = 128
#: width in ln r of the radius bins of the exterior pass
_EXT_BIN = 0.02
#: members scanned by :func:`_eval_local` before it falls back to bisection
_SCAN_MAX = 24


@njit(cache=True, _nrt=False)
def _eval_local(p, eta, tau, g, j0, y, c, u0, death, s_off, nodes, h_idx, h_off,
                support):  # pragma: no cover
    """:func:`_eval_at` searching from a sample index ``j0`` near the answer.

    The bracket (last member of list ``g`` with ``y + chi0 tau <= eta``) is found
    by stepping over the members (``death > tau_nodes[g]``) from ``j0``: a few
    neighbouring samples, one or two cache lines, when ``eta`` is close to
    sample ``j0``'s characteristic (the interior columns, queried on their own
    sample grid); beyond ``_SCAN_MAX`` steps it falls back to bisection.  The
    result does not depend on ``j0``.  Returns the value and the bracket
    (global sample index, usable as the next ``j0``).
    """
    base = s_off[p]
    last = s_off[p + 1] - 1     # the end samples never leave the hull
    if eta < support[p, 0] - math.sqrt(2.0 * tau * support[p, 2]) or \
            eta > support[p, 1] + math.sqrt(2.0 * tau * support[p, 3]):
        return 0.0, j0
    if eta < y[base] + c[base] * tau or eta > y[last] + c[last] * tau:
        return 0.0, j0
    big = nodes[g]
    j = j0
    if j < base:
        j = base
    if j > last:
        j = last
    while death[j] <= big:
        j -= 1
    steps = 0
    if y[j] + c[j] * tau <= eta:
        while j < last:
            k = j + 1
            while death[k] <= big:
                k += 1
            if y[k] + c[k] * tau > eta:
                break
            j = k
            steps += 1
            if steps > _SCAN_MAX:
                v, lo = _eval_at(p, eta, tau, g, -1, y, c, u0, death, s_off, h_idx, h_off,
                                 support)
                return v, (base + h_idx[lo] if lo >= 0 else j0)
    else:
        while True:
            j -= 1
            while death[j] <= big:
                j -= 1
            steps += 1
            if y[j] + c[j] * tau <= eta:
                break
            if steps > _SCAN_MAX:
                v, lo = _eval_at(p, eta, tau, g, -1, y, c, u0, death, s_off, h_idx, h_off,
                                 support)
                return v, (base + h_idx[lo] if lo >= 0 else j0)
    if j >= last:
        j = last - 1
        while death[j] <= big:
            j -= 1
    # fast path: four consecutive members, no shock nearby
    if j - 1 >= base and j + 2 <= last and death[j - 1] > big and death[j + 1] > big \
            and death[j + 2] > big:
        pl = y[j] + c[j] * tau
        pr = y[j + 1] + c[j + 1] * tau
        if pr <= pl:
            return c[j], j
        w = (eta - pl) / (pr - pl)
        if w < 0.0:
            w = 0.0
        return c[j] + w * (c[j + 1] - c[j]), j
    return _stream(p, eta, tau, g, j - base, y, c, u0, death, s_off, h_idx, h_off), j


@njit(cache=True, _nrt=False, inline="always")
def _local_fast(eta, tau, big, lo_b, hi_b, j0, base, last, y, c, death):  # pragma: no cover
    """The common path of :func:`_eval_local`, with the per-(walker, column) scalars hoisted.

    ``lo_b, hi_b`` are the zero bounds of :func:`_eval_local` combined (the
    larger of the Hopf-Lax support bound and the first characteristic, the
    smaller of the two on the right), ``big = tau_nodes[g]``, ``base, last``
    the profile's first and last global sample.  Same walk and the same
    floating-point operations as :func:`_eval_local`; returns ``ok = False``
    (value unset) where that function would fall back to bisection or stream
    next to a shock -- the caller then calls :func:`_eval_local` from the same
    ``j0``, so the result is identical.  Three array arguments instead of ten:
    numba passes every array as its seven fields, and the argument traffic of
    the general function was a third of the interior time (measured, §5a).
    """
    if eta < lo_b or eta > hi_b:
        return 0.0, j0, True
    j = j0
    if j < base:
        j = base
    if j > last:
        j = last
    while death[j] <= big:
        j -= 1
    steps = 0
    if y[j] + c[j] * tau <= eta:
        while j < last:
            k = j + 1
            while death[k] <= big:
                k += 1
            if y[k] + c[k] * tau > eta:
                break
            j = k
            steps += 1
            if steps > _SCAN_MAX:
                return 0.0, j0, False
    else:
        while True:
            j -= 1
            while death[j] <= big:
                j -= 1
            steps += 1
            if y[j] + c[j] * tau <= eta:
                break
            if steps > _SCAN_MAX:
                return 0.0, j0, False
    if j >= last:
        j = last - 1
        while death[j] <= big:
            j -= 1
    if j - 1 >= base and j + 2 <= last and death[j - 1] > big and death[j + 1] > big \
            and death[j + 2] > big:
        pl = y[j] + c[j] * tau
        pr = y[j + 1] + c[j + 1] * tau
        if pr <= pl:
            return c[j], j, True
        w = (eta - pl) / (pr - pl)
        if w < 0.0:
            w = 0.0
        return c[j] + w * (c[j + 1] - c[j]), j, True
    return 0.0, j0, False


@njit(cache=True, _nrt=False)
def _stream(p, eta, tau, g, i_start, y, c, u0, death, s_off, h_idx, h_off):  # pragma: no cover
    """Value at ``eta`` streamed over the live samples from near local sample ``i_start``.

    The superset list (live at the node before ``tau``) is streamed from a safe
    start: live samples left of ``i_start`` with raw position <= eta (raw
    positions are not monotone next to shocks, where hull vertices are clipped).
    """
    base = s_off[p]
    b0 = h_off[g - 1]
    b1 = h_off[g] - 1
    lo2 = b0
    hi2 = b1
    while hi2 - lo2 > 1:
        mid = (lo2 + hi2) // 2
        if h_idx[mid] <= i_start:
            lo2 = mid
        else:
            hi2 = mid
    if h_idx[hi2] == i_start:
        lo2 = hi2
    # (the start must also have a live left neighbour: no shock clips it from the left)
    found = 0
    while lo2 > b0:
        j = base + h_idx[lo2]
        if death[j] > tau and y[j] + c[j] * tau <= eta:
            found += 1
            if found >= 3 and h_idx[lo2] > 0 and death[j - 1] > tau:
                break
        lo2 -= 1
    while lo2 < b1 and death[base + h_idx[lo2]] <= tau:
        lo2 += 1
    # nodes as in burgers.burgers_nodes: hull vertices at y + chi0 tau, clipped at the
    # equal-area shocks on either side (min with the shock on the right, then max
    # with the one on the left); a clipped vertex and both sides of a shock take
    # the fan value (eta - y_j)/tau of their vertex; positions accumulate (running max)
    left = base + h_idx[lo2]
    p_left = y[left] + c[left] * tau
    v_left = c[left]
    q = lo2 + 1
    right = -1
    while q <= b1:
        if death[base + h_idx[q]] > tau:
            right = base + h_idx[q]
            break
        q += 1
    if right < 0:
        return v_left
    first = True
    while True:
        nxt = -1
        q2 = q + 1
        while q2 <= b1:
            if death[base + h_idx[q2]] > tau:
                nxt = base + h_idx[q2]
                break
            q2 += 1
        raw_r = y[right] + c[right] * tau
        p_right = raw_r
        if nxt > right + 1:
            xs2 = (tau * (u0[nxt] - u0[right]) + 0.5 * (y[nxt] ** 2 - y[right] ** 2)) \
                / (y[nxt] - y[right])
            if xs2 < p_right:
                p_right = xs2
        gap = right > left + 1
        if gap:
            xs = (tau * (u0[right] - u0[left]) + 0.5 * (y[right] ** 2 - y[left] ** 2)) \
                / (y[right] - y[left])
            if first and xs < p_left:     # the start vertex: clipped on its right only
                v_left = (xs - y[left]) / tau
                p_left = xs
            if p_right < xs:
                p_right = xs
            v_right = c[right] if p_right == raw_r else (p_right - y[right]) / tau
            if first and eta < p_left:
                return v_left
            xa = xs if xs > p_left else p_left        # accumulated positions
            pa = p_right if p_right > xa else xa
            if eta < xa:
                vs = (xs - y[left]) / tau
                return v_left + (eta - p_left) * (vs - v_left) / (xa - p_left)
            if eta < pa or nxt < 0:
                vs = (xs - y[right]) / tau
                if eta >= pa:
                    return v_right
                return vs + (eta - xa) * (v_right - vs) / (pa - xa)
        else:
            v_right = c[right] if p_right == raw_r else (p_right - y[right]) / tau
            if first and eta < p_left:
                return v_left
            pa = p_right if p_right > p_left else p_left
            if eta < pa or nxt < 0:
                if eta >= pa:
                    return v_right
                return v_left + (eta - p_left) * (v_right - v_left) / (pa - p_left)
        first = False
        left = right
        p_left = pa
        v_left = v_right
        right = nxt
        q = q2


def profile_solution(table: ProfileTable, p: int, eta, tau, *, guess=None):
    """Burgers solution of profile ``p`` of ``table`` at points ``eta`` and one time ``tau``.

    Parameters
    ----------
    table : ProfileTable
    p : int
        Profile index.
    eta : ndarray
        Positions (any shape).
    tau : float
        Time (>= 0, within the tabulated range).
    guess : ndarray of int, optional
        Sample indices (local to the profile, same shape as ``eta``) from which
        the compiled local search starts (the path of the interior columns);
        the result does not depend on them.  Default: bisection.

    Returns
    -------
    ndarray
        ``chi`` at ``eta``, same shape.
    """
    eta = np.asarray(eta, dtype=float)
    out = np.empty(eta.size)
    t = table
    start = np.full(eta.size, -1, dtype=np.int64) if guess is None else \
        int(t.s_off[p]) + np.asarray(guess, dtype=np.int64).ravel()
    for k, e in enumerate(eta.ravel()):
        out[k] = _profile_eval(p, float(e), float(tau), int(start[k]), t.y, t.chi0, t.u0,
                               t.death, t.s_off, t.tau_nodes, t.t_off, t.h_idx, t.h_off,
                               t.support)
    if np.any(np.isnan(out)):
        raise PhysicsRangeError(f"time {tau!r} beyond the tabulated range of profile {p}",
                                key="tau", value=tau)
    return out.reshape(eta.shape)


# --------------------------------------------------------------------------
# tables of one disk
# --------------------------------------------------------------------------

#: largest Mp/M_th the tables cover
A_MAX = 10.0
#: default radial range (x = r/r_p) of the exterior tables; extended on demand
#: (rebuilt and cached) up to X_LIMITS when the traced points need it
X_RANGE = (0.08, 12.0)
X_LIMITS = (0.01, 60.0)
#: interior table: tau_max(X) = _TAU_INT * |X/h_p|^(5/2)
_TAU_INT = 15.0 * 0.6 * 1.4


def _sheet_digest(sheet) -> str:
    h = hashlib.sha256()
    for arr in (sheet.x_h, sheet.y_h, sheet.sigma, sheet.u, sheet.v):
        h.update(np.ascontiguousarray(arr, dtype=float).tobytes())
    return h.hexdigest()[:24]


def _table_from(arrays, prefix):
    return ProfileTable(**{k: arrays[prefix + k] for k in ProfileTable.fields})


def _interior_universal(sheet, digest, use_cache=True):
    """Universal interior tables: sheet columns |X| <= 7 h_p resampled on ``s``."""
    inputs = dict(sheet=digest, version=TABLE_VERSION, nodes=_N_NODES,
                  tau=_TAU_INT, x_max=7.0)
    key = cache.cache_key("wake-emulator-interior", inputs)
    req = ("xh", "S", "Su", "Sv") + tuple("i_" + k for k in ProfileTable.fields)
    got = cache.load_arrays(key, req) if use_cache else None
    if got is not None and got["S"].shape[1] == sheet.y_h.size:
        return got
    cols = np.abs(sheet.x_h) <= 7.0 + 1e-9
    xh = sheet.x_h[cols]
    y = sheet.y_h
    fields = []
    for f in (sheet.sigma, sheet.u, sheet.v):
        rows = f[cols]
        fields.append(np.stack([np.interp(y + _y_ref(xj), y, row, left=0.0, right=0.0)
                                for xj, row in zip(xh, rows)]))
    S = fields[0]
    profiles, tmax = [], []
    for xj, row in zip(xh, S):
        dist = abs(xj)
        if dist < 1e-9:
            profiles.append((y.copy(), np.zeros_like(y)))
            tmax.append(1e-6)
            continue
        f = row / math.sqrt(dist)
        if xj > 0:
            profiles.append((y.copy(), f.copy()))
        else:
            profiles.append((-y[::-1].copy(), f[::-1].copy()))
        tmax.append(_TAU_INT * dist ** 2.5)
    tab = build_profile_table(profiles, tmax)
    out = dict(xh=xh, S=S, Su=fields[1], Sv=fields[2], **tab.arrays("i_"))
    if use_cache:
        cache.save_arrays(key, out)
    return out


class EmulatorTables:
    """Every table the emulator needs for one disk and damping kind (plain arrays).

    Built by :func:`build_tables`; see the module docstring for the method.
    """

    def __init__(self, **arrays):
        self.__dict__.update(arrays)


def _radial_grid(side, u_max, n, a, p, q, kind, k_eta):
    u = u_max * np.linspace(0.0, 1.0, n) ** 2
    xs = 1.0 + side * u
    rate = _dt_dx(xs, a, p, q)
    rate[0] = 0.0
    ctx = DampingContext(a, p, q, k_eta)
    if kind == "viscous":
        ld = damping_log_factor(xs, Damping(kind="viscous", alpha=1.0), ctx)
    elif kind == "efold":
        ld = damping_log_factor(xs, Damping(kind="efold", efold_rp=1.0), ctx)
    else:
        ld = np.zeros_like(xs)
    ld[0] = 0.0
    return u, rate, ld


def build_tables(disk: WakeDisk, damping_kind: str, *, x_range=X_RANGE, sheet=None,
                 use_cache: bool = True) -> EmulatorTables:
    """Build (or load from the cache) the emulator tables of ``disk``.

    Parameters
    ----------
    disk : WakeDisk
        Disk; its edges in au are not used by the tables (only ``aspect_p``,
        ``p``, ``q``, ``gamma``).
    damping_kind : {"none", "viscous", "efold"}
    x_range : (float, float)
        Range of ``x = r/r_p`` the exterior tables cover.
    sheet : SheetSolution, optional
        Default ``kinkfit.wake.linear.get_sheet_solution()``.
    use_cache : bool
        Read and write the on-disk cache (``False``: build from scratch, e.g.
        to time a cold build).

    Returns
    -------
    EmulatorTables
    """
    from .damping import DAMPING_LAWS
    if damping_kind not in DAMPING_LAWS or damping_kind not in ("none", "viscous", "efold"):
        raise PhysicsRangeError(f"damping {damping_kind!r} has no emulator table "
                                "(expected none, viscous or efold)", key="damping",
                                value=damping_kind)
    if sheet is None:
        from .linear import get_sheet_solution
        sheet = get_sheet_solution()
    a, p, q, gam = disk.aspect_p, disk.p, disk.q, disk.gamma
    x_lo, x_hi = float(x_range[0]), float(x_range[1])
    xm = float(default_match_h(a))
    if not (0.0 < x_lo < 1.0 - xm * a and x_hi > 1.0 + xm * a):
        raise PhysicsRangeError(f"emulator radial range {x_range!r} (r/r_p) must contain "
                                "the matching radii", key="x_range", value=x_range)
    digest = _sheet_digest(sheet)
    uni = _interior_universal(sheet, digest, use_cache)
    inputs = dict(sheet=digest, version=TABLE_VERSION, a=a, p=p, q=q, gamma=gam, xm=xm,
                  x_lo=x_lo, x_hi=x_hi, a_max=A_MAX, n=_N_RADIAL, nodes=_N_NODES)
    key = cache.cache_key("wake-emulator-disk", inputs)
    req = ("u_out", "rate_out", "ld_out", "u_in", "rate_in", "ld_in", "res_eta", "res_u",
           "res_v", "res_off", "meta") + tuple("e_" + k for k in ProfileTable.fields)
    got = cache.load_arrays(key, req) if use_cache else None
    if got is None:
        prof_out = matching_profile(sheet, xm, a, p, q, gam)
        k_eta = profile_wavenumber_h(prof_out.eta, prof_out.sigma)
        got = {}
        profiles, tmax = [], []
        res_eta, res_u, res_v, res_off = [], [], [], [0]
        for side, name, x_end in ((1.0, "out", x_hi), (-1.0, "in", x_lo)):
            x_m = 1.0 + side * xm * a
            prof = prof_out if side > 0 else matching_profile(sheet, -xm, a, p, q, gam)
            # the same window as kinkfit.wake.model.wake_skeleton
            prof = windowed_profile(_scaled_profile(prof, a, p, q, gam), a)
            n_r, n_phi = front_normal(np.array([x_m]), a, q)
            xq = x_m ** -q
            step = np.diff(prof.eta)
            if np.ptp(step) > 1e-9 * step.mean():
                raise PhysicsRangeError("matching profile is not on a uniform eta grid",
                                        key="sheet", value=float(np.ptp(step)))
            res_eta.append(prof.eta)
            res_u.append(prof.u - xq * n_r[0] * prof.sigma)
            res_v.append(prof.v - xq * n_phi[0] * prof.sigma)
            res_off.append(res_off[-1] + prof.eta.size)
            u, rate, ld = _radial_grid(side, abs(x_end - 1.0), _N_RADIAL, a, p, q,
                                       "none", k_eta)
            t_und = np.concatenate([[0.0], np.cumsum(0.5 * (rate[1:] + rate[:-1])
                                                     * np.diff(u))])
            got["u_" + name], got["rate_" + name], got["ld_" + name] = u, rate, ld
            profiles.append((prof.eta, prof.chi))
            tmax.append(A_MAX * t_und[-1] * 1.001)
        tab = build_profile_table(profiles, tmax)
        got.update(tab.arrays("e_"))
        got.update(res_eta=np.concatenate(res_eta), res_u=np.concatenate(res_u),
                   res_v=np.concatenate(res_v), res_off=np.array(res_off, dtype=np.int64),
                   meta=np.array([a, p, q, gam, xm, k_eta, x_lo, x_hi]))
        if use_cache:
            cache.save_arrays(key, got)
    # damping: ln D per unit alpha or per unit 1/efold on the radial grids
    k_eta = float(got["meta"][5])
    for side, name in ((1.0, "out"), (-1.0, "in")):
        got["ld_" + name] = _radial_grid(side, float(got["u_" + name][-1]), _N_RADIAL, a, p, q,
                                         damping_kind, k_eta)[2]
    # interior columns of this disk and their mass-independent factors
    xh_all = uni["xh"]
    sel = np.nonzero(np.abs(xh_all) <= xm + 1e-9)[0]
    j0, j1 = int(sel[0]), int(sel[-1]) + 1
    xh = xh_all[j0:j1]
    xcol = 1.0 + xh * a
    _, ku, kv = _global_factors(xcol, a, p, q)
    g = amplitude_factor(xcol, a, p, q)
    n_r, n_phi = front_normal(xcol, a, q)
    S = uni["S"][j0:j1]
    dist = np.abs(xh)
    lin_f = np.where(dist[:, None] > 1e-9, S / np.sqrt(np.maximum(dist, 1e-300))[:, None], 0.0)
    burg = (dist > 1e-9) & (g > 0)
    itab = _table_from(uni, "i_")
    # derived (not cached): grid steps, undamped clocks, interleaved sheet columns
    derived = {}
    for name in ("out", "in"):
        u, rate = got["u_" + name], got["rate_" + name]
        du = np.diff(u)
        derived["du_" + name] = du
        derived["idu_" + name] = 1.0 / du
        derived["t0_" + name] = np.concatenate([[0.0], np.cumsum(0.5 * (rate[1:] + rate[:-1])
                                                                 * du)])
    # global sample index of the first s node of every column (x < 0: of -s_max,
    # the profile is reversed): the interior queries sit on the profile samples
    s_grid = np.ascontiguousarray(sheet.y_h, dtype=float)
    col_first = np.zeros(xh.size, dtype=np.int64)
    for jc, pc in enumerate(range(j0, j1)):
        ys = itab.y[itab.s_off[pc]:itab.s_off[pc + 1]]
        e0 = s_grid[0] if xh[jc] > 0 else -s_grid[-1]
        col_first[jc] = itab.s_off[pc] + min(int(np.searchsorted(ys, e0 - 1e-9)), ys.size - 1)
    lin = np.ascontiguousarray(np.stack([uni["Su"][j0:j1] * ku[:, None],
                                         uni["Sv"][j0:j1] * kv[:, None], lin_f], axis=-1))
    return EmulatorTables(
        lin=lin, **derived,
        a=a, p=p, q=q, gamma=gam, xm=xm, kind=damping_kind, x_lo=x_lo, x_hi=x_hi,
        u_out=got["u_out"], rate_out=got["rate_out"], ld_out=got["ld_out"],
        u_in=got["u_in"], rate_in=got["rate_in"], ld_in=got["ld_in"],
        res_eta=got["res_eta"], res_u=got["res_u"], res_v=got["res_v"],
        res_off=got["res_off"], ext=_table_from(got, "e_"),
        col_xh=np.ascontiguousarray(xh), col_prof=np.arange(j0, j1, dtype=np.int64),
        col_burg=burg, col_g=g, col_wr=xcol ** -q * n_r, col_wp=xcol ** -q * n_phi,
        s_grid=s_grid, col_first=col_first, inn=itab)


# --------------------------------------------------------------------------
# compiled evaluation
# --------------------------------------------------------------------------

@njit(cache=True, _nrt=False)
def _grid_cell(uu, inv_umax, n, u, inv_du):  # pragma: no cover
    """Cell ``i`` and weight ``w`` of ``uu`` on the grid ``u = u_max s^2`` (s uniform)."""
    i = int(math.sqrt(uu * inv_umax) * (n - 1))
    if i >= n - 1:
        return n - 2, 1.0
    return i, (uu - u[i]) * inv_du[i]


@njit(cache=True)
def _wrap(v):  # pragma: no cover
    two_pi = 2.0 * math.pi
    return (v + math.pi) - two_pi * math.floor((v + math.pi) / two_pi) - math.pi


@njit(cache=True)
def _clock(bet, kmax, rate, ld, du, t_buf, e_buf, t_und):  # pragma: no cover
    """Damped clock ``t' = ∫ D dt`` (cumulative trapezoid) on ``[0, kmax]`` of a radial grid.

    Returns the clock array (the undamped table itself when ``bet == 0``)."""
    if bet == 0.0:
        return t_und
    for k in range(kmax + 1):
        e_buf[k] = rate[k] * math.exp(bet * ld[k])
    t_buf[0] = 0.0
    for k in range(1, kmax + 1):
        t_buf[k] = t_buf[k - 1] + 0.5 * (e_buf[k] + e_buf[k - 1]) * du[k - 1]
    return t_buf


@njit(cache=True)
def _kernel(order, eperm, r, phi, inside, pw, r_lo, r_hi, amp, rp, phi_p, cp, beta, a, q, p, gam,
            xm, u_out, du_out, idu_out, rate_out, ld_out, t0_out,
            u_in, du_in, idu_in, rate_in, ld_in, t0_in,
            res_eta, res_u, res_v, res_off,
            ey, ec, eu, ed, es, en, et, eh, eho, esup,
            col_xh, col_prof, col_burg, col_g, col_wr, col_wp, lin, s_grid, col_first,
            iy, ic, iu, idd, iss, inn, it, ih, iho, isup,
            out_r, out_p, fast_int=True):  # pragma: no cover
    """Fill ``out_r, out_p`` (m, npts), km/s; returns an error code (0 = fine).

    Points arrive sorted by radius (``order`` maps them back to the caller's
    order) with the walker-independent powers of ``r`` precomputed in ``pw``:
    ``r^(1+q), r^(q-1/2)`` (``ln r`` when ``q = 1/2``), ``r^(-3/2), r^(p+3q-1),
    r^(-q)``.  Every power of ``x = r/r_p`` is then a product with a per-walker
    factor: the point loop calls no transcendental function except ``sqrt``
    (and ``exp`` for the damping of on-wake exterior points).
    """
    m = amp.shape[0]
    npts = r.shape[0]
    n = u_out.shape[0]
    umax_out = u_out[n - 1]
    umax_in = u_in[n - 1]
    iumax_out = 1.0 / umax_out
    iumax_in = 1.0 / umax_in
    nc = col_xh.shape[0]
    ns = s_grid.shape[0]
    s0 = s_grid[0]
    s_last = s_grid[ns - 1]
    ids = (ns - 1) / (s_grid[ns - 1] - s_grid[0])
    xh0 = col_xh[0]
    xh_last = col_xh[nc - 1]
    idxc = (nc - 1) / (col_xh[nc - 1] - col_xh[0])
    ia = 1.0 / a
    e_b = np.empty(n)
    t_b = np.empty(n)
    # per-walker state, computed first: scalars, clocks, interior columns, hints
    WS = np.zeros((m, 12))
    T_O = np.empty((m, n))
    T_I = np.empty((m, n))
    TAU = np.empty((m, nc))
    DC = np.empty((m, nc))
    GC = np.zeros((m, nc), dtype=np.int64)
    HG = np.full((m, 2), -1, dtype=np.int64)
    HP = np.full((m, 2), -1, dtype=np.int64)
    # per (walker, column): zero bounds and node time of the interior look-ups
    CLO = np.zeros((m, nc))
    CHI = np.zeros((m, nc))
    CBG = np.zeros((m, nc))
    NG = np.full((m, 2), -1, dtype=np.int64)
    # interior points of one (block, walker), gathered before their look-ups
    QO = np.empty(_PT_BLOCK, dtype=np.int64)
    QJ = np.empty(_PT_BLOCK, dtype=np.int64)
    QK = np.empty(_PT_BLOCK, dtype=np.int64)
    QWX = np.empty(_PT_BLOCK)
    QWS = np.empty(_PT_BLOCK)
    QV = np.zeros((_PT_BLOCK, 4))
    c2 = 0.5 * (gam + 1.0)
    b = q - 0.5
    log_b = abs(b) < 1e-12
    i1q = 1.0 / (1.0 + q)
    ib = 0.0 if log_b else 1.0 / b
    pg = p + 3.0 * q - 1.0
    umatch = xm * a
    ksig = 2.0 / (gam + 1.0)
    for w in range(m):
        A = amp[w]
        if A == 0.0:
            continue
        bet = beta[w]
        rpw = rp[w]
        irp = 1.0 / rpw
        f1 = rpw ** -(1.0 + q)
        f2 = math.log(rpw) if log_b else rpw ** -b
        f15 = rpw ** 1.5
        fg = rpw ** -pg
        fq = rpw ** q
        # damped clocks t' = ∫ D dt, only as far out as the points (and columns) need
        uo = max(r_hi * irp - 1.0, umatch)
        ui = max(1.0 - r_lo * irp, umatch)
        if uo > umax_out or ui > umax_in:
            return 2
        ko = min(n - 1, int(math.sqrt(uo * iumax_out) * (n - 1)) + 2)
        ki = min(n - 1, int(math.sqrt(ui * iumax_in) * (n - 1)) + 2)
        t_out = _clock(bet, ko, rate_out, ld_out, du_out, t_b, e_b, t0_out)
        for kk in range(ko + 1):
            T_O[w, kk] = t_out[kk]
        t_in = _clock(bet, ki, rate_in, ld_in, du_in, t_b, e_b, t0_in)
        for kk in range(ki + 1):
            T_I[w, kk] = t_in[kk]
        k, wk = _grid_cell(umatch, iumax_out, n, u_out, idu_out)
        dm_out = math.exp(bet * (ld_out[k] + wk * (ld_out[k + 1] - ld_out[k])))
        k, wk = _grid_cell(umatch, iumax_in, n, u_in, idu_in)
        dm_in = math.exp(bet * (ld_in[k] + wk * (ld_in[k + 1] - ld_in[k])))
        for j in range(nc):
            uj = abs(col_xh[j]) * a
            if col_xh[j] > 0:
                k, wk = _grid_cell(uj, iumax_out, n, u_out, idu_out)
                TAU[w, j] = c2 * A * (T_O[w, k] + wk * (T_O[w, k + 1] - T_O[w, k]))
                DC[w, j] = math.exp(bet * (ld_out[k] + wk * (ld_out[k + 1] - ld_out[k])))
            else:
                k, wk = _grid_cell(uj, iumax_in, n, u_in, idu_in)
                TAU[w, j] = c2 * A * (T_I[w, k] + wk * (T_I[w, k + 1] - T_I[w, k]))
                DC[w, j] = math.exp(bet * (ld_in[k] + wk * (ld_in[k + 1] - ld_in[k])))
            GC[w, j] = 0
            if col_burg[j] and TAU[w, j] > 1e-12:
                GC[w, j] = _node_of(col_prof[j], TAU[w, j], inn, it)
                if GC[w, j] < 0:
                    return 1
                # the same expressions as in _eval_local, evaluated once
                pj = col_prof[j]
                tj = TAU[w, j]
                bs = iss[pj]
                ls = iss[pj + 1] - 1
                lo_b = isup[pj, 0] - math.sqrt(2.0 * tj * isup[pj, 2])
                e0 = iy[bs] + ic[bs] * tj
                CLO[w, j] = lo_b if lo_b > e0 else e0
                hi_b = isup[pj, 1] + math.sqrt(2.0 * tj * isup[pj, 3])
                e1 = iy[ls] + ic[ls] * tj
                CHI[w, j] = hi_b if hi_b < e1 else e1
                CBG[w, j] = inn[GC[w, j]]
        WS[w, 0] = irp
        WS[w, 1] = f1
        WS[w, 2] = f2
        WS[w, 3] = f15
        WS[w, 4] = fg
        WS[w, 5] = fq
        WS[w, 6] = dm_out
        WS[w, 7] = dm_in
    # points in blocks, all walkers on a block before the next one: walkers close
    # in parameters (a converged cloud) then find the block's table lines cached.
    # Interior points in radius order (sheet columns in turn), exterior points in
    # (radius bin, azimuth) order: their eta then increases along a bin and each
    # Burgers bracket is galloped to from the walker's previous one
    for pas in range(2):
        for blk in range(0, npts, _PT_BLOCK):
            bend = min(blk + _PT_BLOCK, npts)
            for w in range(m):
                if pas == 0:
                    for ii in range(blk, bend):
                        out_r[w, order[ii]] = 0.0
                        out_p[w, order[ii]] = 0.0
                A = amp[w]
                if A == 0.0:
                    continue
                bet = beta[w]
                irp = WS[w, 0]
                f1 = WS[w, 1]
                f2 = WS[w, 2]
                f15 = WS[w, 3]
                fg = WS[w, 4]
                fq = WS[w, 5]
                dm_out = WS[w, 6]
                dm_in = WS[w, 7]
                ppw = phi_p[w]
                cpw = cp[w]
                amp_cp = A * cpw
                nq = 0
                for ii in range(blk, bend):
                    i = ii if pas == 0 else eperm[ii]
                    oi = order[i]
                    if not inside[i]:
                        continue
                    x = r[i] * irp
                    xh = (x - 1.0) * ia
                    if (abs(xh) <= xm) != (pas == 0):
                        continue
                    sg = 1.0 if x > 1.0 else (-1.0 if x < 1.0 else 0.0)
                    # R02 locus phase (closed form, powers of x as products)
                    if log_b:
                        ph = (pw[0, i] * f1 - 1.0) * i1q - (pw[1, i] - f2)
                    else:
                        ph = (pw[0, i] * f1 - 1.0) * i1q - (pw[1, i] * f2 - 1.0) * ib
                    dphi = _wrap(phi[i] - (ppw - sg * ph * ia))
                    if abs(xh) <= xm:
                        # interior: bilinear on (column, s) of the steepened sheet
                        if xh < xh0 or xh > xh_last:
                            continue
                        sh = dphi * ia
                        if sh < s0 or sh > s_last:
                            continue
                        j = int((xh - xh0) * idxc)
                        if j > nc - 2:
                            j = nc - 2
                        wx = (xh - col_xh[j]) / (col_xh[j + 1] - col_xh[j])
                        k = int((sh - s0) * ids)
                        if k > ns - 2:
                            k = ns - 2
                        ws = (sh - s_grid[k]) / (s_grid[k + 1] - s_grid[k])
                        if fast_int:
                            # look-ups and sums after the block's geometry (below)
                            QO[nq] = oi
                            QJ[nq] = j
                            QK[nq] = k
                            QWX[nq] = wx
                            QWS[nq] = ws
                            nq += 1
                            continue
                        # sheet values of the cell read first: their cache misses overlap
                        # with the Burgers look-ups below
                        a00 = lin[j, k, 0]
                        a01 = lin[j, k, 1]
                        a02 = lin[j, k, 2]
                        a10 = lin[j, k + 1, 0]
                        a11 = lin[j, k + 1, 1]
                        a12 = lin[j, k + 1, 2]
                        b00 = lin[j + 1, k, 0]
                        b01 = lin[j + 1, k, 1]
                        b02 = lin[j + 1, k, 2]
                        b10 = lin[j + 1, k + 1, 0]
                        b11 = lin[j + 1, k + 1, 1]
                        b12 = lin[j + 1, k + 1, 2]
                        ur = 0.0
                        up = 0.0
                        for dj in range(2):
                            jj = j + dj
                            wj = wx if dj == 1 else 1.0 - wx
                            if wj == 0.0:
                                continue
                            if dj == 0:
                                sf0, su0, sv0, sf1, su1, sv1 = a02, a00, a01, a12, a10, a11
                            else:
                                sf0, su0, sv0, sf1, su1, sv1 = b02, b00, b01, b12, b10, b11
                            # the two s nodes, in increasing eta (eta = -s on the inner side)
                            ch0 = 0.0
                            ch1 = 0.0
                            if GC[w, jj] > 0:
                                pj = col_prof[jj]
                                # s node k is profile sample col_first + k (reversed for x < 0)
                                if col_xh[jj] > 0:
                                    v0, jb = _eval_local(pj, s_grid[k], TAU[w, jj], GC[w, jj],
                                                         col_first[jj] + k, iy, ic, iu, idd, iss,
                                                         inn, ih, iho, isup)
                                    v1, jb = _eval_local(pj, s_grid[k + 1], TAU[w, jj], GC[w, jj],
                                                         jb + 1,
                                                         iy, ic, iu, idd, iss, inn, ih, iho, isup)
                                else:
                                    v1, jb = _eval_local(pj, -s_grid[k + 1], TAU[w, jj], GC[w, jj],
                                                         col_first[jj] + ns - 2 - k, iy, ic, iu,
                                                         idd,
                                                         iss, inn, ih, iho, isup)
                                    v0, jb = _eval_local(pj, -s_grid[k], TAU[w, jj], GC[w, jj],
                                                         jb + 1,
                                                         iy, ic, iu, idd, iss, inn, ih, iho, isup)
                                ch0 = col_g[jj] * (v0 - sf0)
                                ch1 = col_g[jj] * (v1 - sf1)
                            w0 = wj * (1.0 - ws) * DC[w, jj]
                            w1 = wj * ws * DC[w, jj]
                            ur += w0 * (su0 + col_wr[jj] * ch0) + w1 * (su1 + col_wr[jj] * ch1)
                            up += w0 * (sv0 + col_wp[jj] * ch0) + w1 * (sv1 + col_wp[jj] * ch1)
                        out_r[w, oi] = amp_cp * ur
                        out_p[w, oi] = amp_cp * up
                        continue
                    uu = abs(x - 1.0)
                    if xh > 0:
                        k, wk = _grid_cell(uu, iumax_out, n, u_out, idu_out)
                        tt = T_O[w, k] + wk * (T_O[w, k + 1] - T_O[w, k])
                        prof = 0
                        dmatch = dm_out
                    else:
                        k, wk = _grid_cell(uu, iumax_in, n, u_in, idu_in)
                        tt = T_I[w, k] + wk * (T_I[w, k + 1] - T_I[w, k])
                        prof = 1
                        dmatch = dm_in
                    eta = sg * dphi * ia
                    chi = 0.0
                    if tt > 0.0:
                        tau_e = A * tt
                        ge = NG[w, prof]
                        # the node list of the previous exterior point of this walker
                        # and side still brackets tau_e (the unique g with
                        # en[g-1] <= tau_e < en[g] that _node_of bisects for)
                        if not (fast_int and ge > et[prof] and en[ge - 1] <= tau_e < en[ge]):
                            ge = _node_of(prof, tau_e, en, et)
                            if ge < 0:
                                return 1
                            NG[w, prof] = ge
                        hint = -1
                        if prof == 0 and ge == HG[w, 0]:
                            hint = HP[w, 0]
                        elif prof == 1 and ge == HG[w, 1]:
                            hint = HP[w, 1]
                        chi, lo = _eval_at(prof, eta, A * tt, ge, hint, ey, ec, eu, ed, es, eh,
                                           eho,
                                           esup)
                        if lo >= 0:
                            if prof == 0:
                                HG[w, 0] = ge
                                HP[w, 0] = lo
                            else:
                                HG[w, 1] = ge
                                HP[w, 1] = lo
                    # non-wave residual of the sheet, tapered off by 2 x_match
                    wt = (uu * ia - xm) / xm
                    if wt < 0.0:
                        wt = 0.0
                    res_w = 0.0
                    i0 = res_off[prof]
                    i1 = res_off[prof + 1]
                    if wt < 1.0 and res_eta[i0] <= eta <= res_eta[i1 - 1]:
                        res_w = A * dmatch * 0.5 * (1.0 + math.cos(math.pi * wt))
                    if chi == 0.0 and res_w == 0.0:
                        continue
                    rr = 0.0
                    rv = 0.0
                    if res_w != 0.0:
                        # uniform eta grid of the matching profile (checked at build)
                        fk = (eta - res_eta[i0]) / (res_eta[i0 + 1] - res_eta[i0])
                        kk = i0 + int(fk)
                        if kk > i1 - 2:
                            kk = i1 - 2
                        wr = (eta - res_eta[kk]) / (res_eta[kk + 1] - res_eta[kk])
                        rr = res_u[kk] + wr * (res_u[kk + 1] - res_u[kk])
                        rv = res_v[kk] + wr * (res_v[kk + 1] - res_v[kk])
                    dd = 1.0
                    if bet != 0.0:
                        if prof == 0:
                            dd = math.exp(bet * (ld_out[k] + wk * (ld_out[k + 1] - ld_out[k])))
                        else:
                            dd = math.exp(bet * (ld_in[k] + wk * (ld_in[k + 1] - ld_in[k])))
                    shear = abs(pw[2, i] * f15 - 1.0)
                    g = math.sqrt((2.0 / 3.0) * shear * pw[3, i] * fg * ia)
                    sigma = ksig * g * dd * A * chi
                    xq = pw[4, i] * fq
                    mach = x * shear / (xq * a)
                    norm = math.sqrt(1.0 + mach * mach)
                    out_r[w, oi] = cpw * (xq * sg * mach / norm * sigma + res_w * rr)
                    out_p[w, oi] = cpw * (xq * sg / norm * sigma + res_w * rv)
                if nq > 0:
                    _interior_block(w, nq, QO, QJ, QK, QWX, QWS, QV, amp_cp, GC, TAU, DC, CLO,
                                    CHI, CBG, col_xh, col_prof, col_g, col_wr, col_wp, col_first,
                                    lin, s_grid, iy, ic, iu, idd, iss, inn, ih, iho, isup,
                                    out_r, out_p)
    return 0


@njit(cache=True, _nrt=False)
def _interior_block(w, nq, QO, QJ, QK, QWX, QWS, QV, amp_cp, GC, TAU, DC, CLO, CHI, CBG, col_xh,
                    col_prof, col_g, col_wr, col_wp, col_first, lin, s_grid, iy, ic, iu, idd,
                    iss, inn, ih, iho, isup, out_r, out_p):  # pragma: no cover
    """Interior points of one block for walker ``w``, gathered by the kernel.

    First every Burgers look-up of the block in a loop that holds little else
    (the column pair and its two ``s`` nodes per point), then the bilinear sums
    with the sheet cells: the same operations in the same order as the
    kernel's general interior path, so the values are identical.
    """
    ns = s_grid.shape[0]
    for q in range(nq):
        j = QJ[q]
        k = QK[q]
        wx = QWX[q]
        for dj in range(2):
            jj = j + dj
            wj = wx if dj == 1 else 1.0 - wx
            if wj == 0.0 or GC[w, jj] <= 0:
                continue
            pj = col_prof[jj]
            tj = TAU[w, jj]
            bs = iss[pj]
            ls = iss[pj + 1] - 1
            if col_xh[jj] > 0:
                e0 = s_grid[k]
                e1 = s_grid[k + 1]
                st = col_first[jj] + k
            else:
                e0 = -s_grid[k + 1]
                e1 = -s_grid[k]
                st = col_first[jj] + ns - 2 - k
            va, jb, ok = _local_fast(e0, tj, CBG[w, jj], CLO[w, jj], CHI[w, jj], st, bs, ls,
                                     iy, ic, idd)
            if not ok:
                va, jb = _eval_local(pj, e0, tj, GC[w, jj], st, iy, ic, iu, idd, iss, inn, ih,
                                     iho, isup)
            vb, jb, ok = _local_fast(e1, tj, CBG[w, jj], CLO[w, jj], CHI[w, jj], jb + 1, bs,
                                     ls, iy, ic, idd)
            if not ok:
                vb, jb = _eval_local(pj, e1, tj, GC[w, jj], jb + 1, iy, ic, iu, idd, iss, inn,
                                     ih, iho, isup)
            if col_xh[jj] > 0:
                QV[q, 2 * dj] = va
                QV[q, 2 * dj + 1] = vb
            else:
                QV[q, 2 * dj] = vb
                QV[q, 2 * dj + 1] = va
    for q in range(nq):
        j = QJ[q]
        k = QK[q]
        wx = QWX[q]
        ws = QWS[q]
        ur = 0.0
        up = 0.0
        for dj in range(2):
            jj = j + dj
            wj = wx if dj == 1 else 1.0 - wx
            if wj == 0.0:
                continue
            su0 = lin[jj, k, 0]
            sv0 = lin[jj, k, 1]
            sf0 = lin[jj, k, 2]
            su1 = lin[jj, k + 1, 0]
            sv1 = lin[jj, k + 1, 1]
            sf1 = lin[jj, k + 1, 2]
            ch0 = 0.0
            ch1 = 0.0
            if GC[w, jj] > 0:
                ch0 = col_g[jj] * (QV[q, 2 * dj] - sf0)
                ch1 = col_g[jj] * (QV[q, 2 * dj + 1] - sf1)
            w0 = wj * (1.0 - ws) * DC[w, jj]
            w1 = wj * ws * DC[w, jj]
            ur += w0 * (su0 + col_wr[jj] * ch0) + w1 * (su1 + col_wr[jj] * ch1)
            up += w0 * (sv0 + col_wp[jj] * ch0) + w1 * (sv1 + col_wp[jj] * ch1)
        out_r[w, QO[q]] = amp_cp * ur
        out_p[w, QO[q]] = amp_cp * up


class EmulatorModel:
    """Fast wake model with the :class:`DirectModel` interface (picklable, plain arrays).

    Parameters
    ----------
    disk : WakeDisk
        Disk (``aspect_p`` must equal every ``params["aspect_ratio"]``).
    damping : {"none", "viscous", "efold"}
    x_range : (float, float)
        ``r/r_p`` range of the tables.
    """

    def __init__(self, disk: WakeDisk, damping: str, *, x_range=X_RANGE, tables=None):
        self.disk = disk
        self.damping = damping
        self.tables = tables if tables is not None else build_tables(disk, damping,
                                                                      x_range=x_range)
        self._pts = None
        #: interior look-ups through :func:`_local_fast` (``False``: the general
        #: :func:`_eval_local` for every look-up, the reference path of the tests)
        self._fast_interior = True

    def _cover(self, r_lo, r_hi, rp):
        """Extend the radial tables (rebuild, cached) if points in ``[r_lo, r_hi]`` au need it."""
        t = self.tables
        x_min = r_lo / float(np.max(rp))
        x_max = r_hi / float(np.min(rp))
        if x_min >= t.x_lo and x_max <= t.x_hi:
            return
        if x_min < X_LIMITS[0] or x_max > X_LIMITS[1]:
            raise PhysicsRangeError(
                f"traced points at r/r_p in [{x_min:.3g}, {x_max:.3g}] beyond the emulator "
                f"limits {X_LIMITS} (planet radius {np.min(rp):.4g}-{np.max(rp):.4g} au)",
                key="radius", value=float(np.min(rp)))
        lo = min(t.x_lo, max(x_min / 1.5, X_LIMITS[0]))
        hi = max(t.x_hi, min(x_max * 1.5, X_LIMITS[1]))
        if (lo, hi) != (t.x_lo, t.x_hi):
            log.info("wake emulator: radial tables extended to r/r_p in [%.3g, %.3g]", lo, hi)
            self.tables = build_tables(self.disk, self.damping, x_range=(lo, hi))

    def _walker_arrays(self, params, m):
        disk = self.disk
        mass = np.asarray(params["mass"], dtype=float).reshape(m)
        rp = np.asarray(params["radius"], dtype=float).reshape(m)
        az = np.radians(np.asarray(params["azimuth"], dtype=float).reshape(m))
        if "aspect_ratio" in params:
            asp = np.asarray(params["aspect_ratio"], dtype=float).reshape(m)
            if np.any(np.abs(asp - disk.aspect_p) > 1e-12 * disk.aspect_p):
                raise KinkfitError(
                    f"the wake emulator is tabulated for aspect_ratio = {disk.aspect_p:g}; "
                    "fix aspect_ratio or use the direct model", key="aspect_ratio",
                    value=float(asp[np.argmax(np.abs(asp - disk.aspect_p))]))
        bad = ~(np.isfinite(mass) & (mass >= 0))
        if np.any(bad):
            raise PhysicsRangeError(f"planet mass {mass[bad][0]!r} M_jup must be >= 0",
                                    key="mass", value=float(mass[bad][0]))
        bad = ~((rp >= disk.r_in_au) & (rp <= disk.r_out_au))
        if np.any(bad):
            raise PhysicsRangeError(f"planet radius {rp[bad][0]!r} au outside the disk "
                                    f"[{disk.r_in_au}, {disk.r_out_au}] au", key="radius",
                                    value=float(rp[bad][0]))
        if not np.all(np.isfinite(az)):
            raise PhysicsRangeError("planet azimuth must be finite", key="azimuth",
                                    value=float(az[~np.isfinite(az)][0]))
        amp = mass * MJUP_PER_MSUN / (disk.aspect_p ** 3 * disk.mstar_msun)
        if np.any(amp > A_MAX):
            raise PhysicsRangeError(f"Mp/M_th = {amp.max():.3g} above the emulator tables "
                                    f"({A_MAX:g})", key="mass", value=float(mass.max()))
        if self.damping == "viscous":
            beta = np.asarray(params["alpha"], dtype=float).reshape(m)
            if not np.all(np.isfinite(beta) & (beta >= 0)):
                raise PhysicsRangeError("damping alpha must be finite and >= 0", key="alpha",
                                        value=float(beta[~(beta >= 0)][0]) if np.any(
                                            ~(beta >= 0)) else float("nan"))
        elif self.damping == "efold":
            ef = np.asarray(params["efold"], dtype=float).reshape(m)
            if not np.all(ef > 0):
                raise PhysicsRangeError("damping efold must be > 0", key="efold",
                                        value=float(ef[~(ef > 0)][0]))
            beta = 1.0 / ef
        else:
            beta = np.zeros(m)
        cp = disk.aspect_p * np.asarray(keplerian_speed_kms(rp, disk.mstar_msun), dtype=float)
        return (np.ascontiguousarray(amp), np.ascontiguousarray(rp), np.ascontiguousarray(az),
                np.ascontiguousarray(cp), np.ascontiguousarray(beta, dtype=float))

    def _points(self, r_au, phi_rad):
        """Walker-independent per-point arrays, kept while the caller passes the same points.

        A fit evaluates the model on the same traced points thousands of times:
        the radius order, the disk mask and the powers of ``r`` are computed once.
        """
        r = np.asarray(r_au, dtype=float).ravel()
        phi = np.asarray(phi_rad, dtype=float).ravel()
        if r.shape != phi.shape:
            raise KinkfitError(f"r_au ({r.size} points) and phi_rad ({phi.size} points) "
                               "differ in length", key="phi_rad", value=phi.size)
        c = self._pts
        if c is not None and c["r"].shape == r.shape and \
                np.array_equal(c["r"], r, equal_nan=True) and \
                np.array_equal(c["phi"], phi, equal_nan=True):
            return c
        d = self.disk
        # points in order of radius: successive points then use the same table
        # columns and node lists (cache locality; several times faster)
        order = np.argsort(r, kind="stable")
        rs, ps = r[order], phi[order]
        inside = np.isfinite(rs) & np.isfinite(ps) & (rs >= d.r_in_au) & (rs <= d.r_out_au)
        rr = np.where(inside, rs, 1.0)
        q, pp = d.q, d.p
        second = np.log(rr) if abs(q - 0.5) < 1e-12 else rr ** (q - 0.5)
        pw = np.ascontiguousarray(np.stack([rr ** (1.0 + q), second, rr ** -1.5,
                                            rr ** (pp + 3.0 * q - 1.0), rr ** -q]))
        # exterior pass order: bins of 2 % in radius, azimuth within a bin
        rbin = np.floor(np.log(rr) / _EXT_BIN)
        eperm = np.lexsort((np.where(inside, ps, 0.0), rbin)).astype(np.int64)
        c = dict(r=r.copy(), phi=phi.copy(), order=order.astype(np.int64), eperm=eperm,
                 rs=np.ascontiguousarray(rr), ps=np.ascontiguousarray(np.where(inside, ps, 0.0)),
                 inside=inside, pw=pw, any=bool(inside.any()),
                 r_lo=float(rr[inside].min()) if inside.any() else 1.0,
                 r_hi=float(rr[inside].max()) if inside.any() else 1.0)
        self._pts = c
        return c

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_pts"] = None          # per-point cache: rebuilt on first use
        return state

    def __call__(self, params: dict, r_au, phi_rad):
        m = len(params["mass"])
        amp, rp, az, cp, beta = self._walker_arrays(params, m)
        c = self._points(r_au, phi_rad)
        npts = c["r"].size
        out_r = np.empty((m, npts))
        out_p = np.empty((m, npts))
        if not c["any"]:
            out_r[:] = 0.0
            out_p[:] = 0.0
            return out_r, out_p
        self._cover(c["r_lo"], c["r_hi"], rp)
        t = self.tables
        e, ii = t.ext, t.inn
        code = _kernel(c["order"], c["eperm"], c["rs"], c["ps"], c["inside"], c["pw"], c["r_lo"],
                       c["r_hi"], amp, rp, az, cp, beta, t.a, t.q, t.p, t.gamma, t.xm,
                       t.u_out, t.du_out, t.idu_out, t.rate_out, t.ld_out, t.t0_out,
                       t.u_in, t.du_in, t.idu_in, t.rate_in, t.ld_in, t.t0_in,
                       t.res_eta, t.res_u, t.res_v, t.res_off,
                       e.y, e.chi0, e.u0, e.death, e.s_off, e.tau_nodes, e.t_off, e.h_idx,
                       e.h_off, e.support, t.col_xh, t.col_prof, t.col_burg, t.col_g, t.col_wr,
                       t.col_wp, t.lin, t.s_grid, t.col_first,
                       ii.y, ii.chi0, ii.u0, ii.death, ii.s_off, ii.tau_nodes, ii.t_off,
                       ii.h_idx, ii.h_off, ii.support, out_r, out_p,
                       getattr(self, "_fast_interior", True))
        if code == 1:
            raise PhysicsRangeError("scaled Burgers time beyond the emulator tables "
                                    f"(Mp/M_th up to {amp.max():.3g})", key="mass",
                                    value=float(np.max(params["mass"])))
        if code == 2:
            raise PhysicsRangeError(
                f"traced points beyond r/r_p in [{t.x_lo:g}, {t.x_hi:g}] of the emulator "
                f"tables (planet radius {rp.min():.4g}-{rp.max():.4g} au)", key="radius",
                value=float(rp.min()))
        return out_r, out_p


def make_fit_model(disk: WakeDisk, damping: str, method: str = "emulator", **kwargs):
    """The wake model callable used by the likelihood.

    Parameters
    ----------
    disk : WakeDisk
    damping : {"none", "viscous", "efold"}
    method : {"emulator", "direct"}
        ``emulator`` (default): tabulated, exact-in-time Burgers (fast);
        ``direct``: :func:`kinkfit.wake.model.wake_perturbations` per walker.
    **kwargs
        ``x_range`` for the emulator.
    """
    if method == "direct":
        return DirectModel(disk, damping)
    if method == "emulator":
        return EmulatorModel(disk, damping, **kwargs)
    raise PhysicsRangeError(f"unknown wake-model method {method!r} (expected emulator or "
                            "direct)", key="method", value=method)
