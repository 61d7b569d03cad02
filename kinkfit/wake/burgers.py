"""Inviscid Burgers equation ``chi_t + chi chi_eta = 0`` (W74 ch. 2-4).

Method
------
The entropy (weak) solution is obtained from the Hopf / Lax-Oleinik variational
formula (W74 §2.8 via the equivalent equal-area rule; Lax 1957).  With
``U0(eta) = int chi0 d eta`` the solution at ``(eta, t)`` is
``chi = (eta - y*)/t`` where ``y*`` minimises ``U0(y) + (eta - y)^2 / (2 t)``.
Equivalently ``y*`` is a vertex of the lower convex hull of
``Psi(y) = t U0(y) + y^2/2`` touched by a line of slope ``eta``:

* before any shock ``Psi'' = 1 + t chi0' > 0`` for every ``y``, every sample is on
  the hull and the solution is the characteristic map
  ``eta = y + chi0(y) t`` (exact for piecewise-linear ``chi0``);
* a hull edge that skips samples is a shock: the skipped characteristics have
  been swallowed, the shock sits at ``eta_s = (Psi_k - Psi_j)/(y_k - y_j)`` and
  joins the states ``chi0(y_j)`` and ``chi0(y_k)``.  This is the equal-area cut
  of the multivalued characteristic profile, and the shock speed is the mean of
  the two states (Rankine-Hugoniot).

The initial profile is sampled on a fine grid and treated as piecewise linear;
``U0`` is integrated exactly (trapezoid) for such a profile.  Cost per time is
one O(N) hull (numba) plus a vectorised interpolation, so a history of a few
hundred times of a 4000-sample profile takes well under a second (see
``bench/bench_wake_burgers.py``).  Before the first shock the result is exact to
round-off for the piecewise-linear data; after it the shock feet are located to
within one sample spacing.

Scaling: if ``chi(eta, t)`` solves the problem for ``chi0`` then
``A chi(eta, A t)`` solves it for ``A chi0``; the wake model uses this to share
one universal history among all planet masses.
"""

from __future__ import annotations

import numpy as np

try:  # numba is a declared dependency; keep a pure-Python fallback for safety
    from numba import njit
except ImportError:  # pragma: no cover
    def njit(*args, **kwargs):
        def wrap(f):
            return f
        return wrap if not (args and callable(args[0])) else args[0]

__all__ = ["lower_hull", "pad_profile", "burgers_nodes", "burgers_solution", "burgers_history",
           "burgers_at_times", "shock_formation_time", "shock_positions"]


@njit(cache=True)
def lower_hull(x, y):  # pragma: no cover - compiled
    """Indices of the lower convex hull of points with increasing ``x``.

    Andrew's monotone chain; collinear points are dropped.

    Parameters
    ----------
    x, y : ndarray, shape (n,)
        Abscissae (strictly increasing) and ordinates.

    Returns
    -------
    ndarray of int64
        Hull vertex indices, increasing, first and last point included.
    """
    n = x.shape[0]
    hull = np.empty(n, dtype=np.int64)
    m = 0
    for i in range(n):
        while m >= 2:
            a = hull[m - 2]
            b = hull[m - 1]
            cross = (x[b] - x[a]) * (y[i] - y[a]) - (y[b] - y[a]) * (x[i] - x[a])
            if cross <= 0.0:
                m -= 1
            else:
                break
        hull[m] = i
        m += 1
    return hull[:m].copy()


def _prepare(eta0, chi0):
    eta0 = np.ascontiguousarray(eta0, dtype=float)
    chi0 = np.ascontiguousarray(chi0, dtype=float)
    if eta0.ndim != 1 or eta0.shape != chi0.shape or eta0.size < 3:
        raise ValueError("eta0 and chi0 must be 1-D arrays of equal length >= 3")
    if np.any(np.diff(eta0) <= 0):
        raise ValueError("eta0 must be strictly increasing")
    u0 = np.concatenate([[0.0], np.cumsum(0.5 * (chi0[1:] + chi0[:-1]) * np.diff(eta0))])
    return eta0, chi0, u0


def pad_profile(eta0, chi0, t_max, passive=(), *, coarsen=4.0):
    """Extend a profile with zero states so that no shock leaves the domain.

    Nothing moves faster than ``max|chi0|``, so the solution up to ``t_max``
    lives in ``[eta0[0] - max|chi0| t_max, eta0[-1] + max|chi0| t_max]``.  The
    added samples (zero in ``chi`` and in every passive quantity) are uniform
    with ``coarsen`` times the end spacing.  The profile should vanish at its
    ends; otherwise the padding introduces a jump there.

    Returns
    -------
    eta, chi : ndarray
        Padded grid and profile.
    passive : tuple of ndarray
        Padded passive quantities.
    """
    eta0 = np.asarray(eta0, dtype=float)
    chi0 = np.asarray(chi0, dtype=float)
    reach = float(np.max(np.abs(chi0))) * float(t_max)
    left = right = np.zeros(0)
    if reach > 0:
        dl = coarsen * (eta0[1] - eta0[0])
        dr = coarsen * (eta0[-1] - eta0[-2])
        nl = int(np.ceil(reach / dl)) + 1
        nr = int(np.ceil(reach / dr)) + 1
        left = eta0[0] - dl * np.arange(nl, 0, -1)
        right = eta0[-1] + dr * np.arange(1, nr + 1)
    eta = np.concatenate([left, eta0, right])
    zl, zr = np.zeros(left.size), np.zeros(right.size)
    chi = np.concatenate([zl, chi0, zr])
    pas = tuple(np.concatenate([zl, np.asarray(p, dtype=float), zr]) for p in passive)
    return eta, chi, pas


def burgers_nodes(eta0, chi0, t, passive=(), *, _u0=None):
    """Piecewise-linear representation of the entropy solution at time ``t``.

    Parameters
    ----------
    eta0, chi0 : ndarray, shape (n,)
        Initial profile samples (``eta0`` strictly increasing), treated as
        piecewise linear.
    t : float
        Time (>= 0), in the units in which ``chi0`` is a speed.
    passive : sequence of ndarray, shape (n,)
        Quantities carried unchanged along the characteristics of ``chi``
        (the same branch selection at shocks).

    Returns
    -------
    pos : ndarray, shape (m,)
        Node positions (non-decreasing; a shock is a repeated position).
    vals : ndarray, shape (1 + len(passive), m)
        ``chi`` then each passive quantity at the nodes.
    shocks : ndarray, shape (k, 3)
        ``(eta_s, chi_left, chi_right)`` of each shock.
    """
    if _u0 is None:
        eta0, chi0, u0 = _prepare(eta0, chi0)
    else:
        u0 = _u0
    fields = np.vstack([chi0] + [np.asarray(p, dtype=float) for p in passive])
    if t <= 0.0:
        return eta0.copy(), fields.copy(), np.zeros((0, 3))
    psi = t * u0 + 0.5 * eta0 ** 2
    hull = lower_hull(eta0, psi)
    pos = eta0[hull] + chi0[hull] * t
    vals = fields[:, hull]
    k = np.nonzero(np.diff(hull) > 1)[0]
    if k.size == 0:
        return pos, vals, np.zeros((0, 3))
    j0, j1 = hull[k], hull[k + 1]
    xs = (psi[j1] - psi[j0]) / (eta0[j1] - eta0[j0])
    raw = pos.copy()
    pos[k] = np.minimum(pos[k], xs)
    pos[k + 1] = np.maximum(pos[k + 1], xs)
    # Next to a shock the vertex y_j is the minimiser for every eta between
    # its node and the shock, where the Hopf-Lax solution is the fan
    # chi = (eta - y_j)/t (slope 1/t), not the constant chi0(y_j).  The
    # difference matters late, when an N-wave lobe is fed by less than one
    # sample interval around the minimum of U0 (amplitude sqrt(2L/t) below
    # |chi0'| d eta).  A node clipped onto a shock takes the fan value too.
    clipped = pos != raw
    if np.any(clipped):
        vals[0, clipped] = (pos[clipped] - eta0[hull][clipped]) / t
    where = np.repeat(k + 1, 2)
    pos = np.insert(pos, where, np.repeat(xs, 2))
    pairs = np.stack([vals[:, k], vals[:, k + 1]], axis=-1).reshape(vals.shape[0], -1)
    pairs[0, 0::2] = (xs - eta0[j0]) / t
    pairs[0, 1::2] = (xs - eta0[j1]) / t
    vals = np.insert(vals, where, pairs, axis=1)
    pos = np.maximum.accumulate(pos)
    shocks = np.column_stack([xs, pairs[0, 0::2], pairs[0, 1::2]])
    return pos, vals, shocks


def _interp_nodes(pos, vals, eta):
    return np.stack([np.interp(eta, pos, v, left=0.0, right=0.0) for v in vals])


def burgers_solution(eta0, chi0, t, eta_out, passive=()):
    """Entropy solution of inviscid Burgers at one time, sampled at ``eta_out``.

    Parameters
    ----------
    eta0, chi0 : ndarray, shape (n,)
        Initial profile (piecewise linear; zero outside ``eta0``'s range).
    t : float
        Time >= 0.
    eta_out : ndarray
        Where to sample the solution (any shape).
    passive : sequence of ndarray, shape (n,)
        Quantities carried along the characteristics.

    Returns
    -------
    ndarray, shape (1 + len(passive),) + eta_out.shape
        ``chi`` and the passive quantities at ``eta_out``; zero outside the
        evolved support.
    """
    eta_out = np.asarray(eta_out, dtype=float)
    eta0, chi0, passive = pad_profile(eta0, chi0, t, passive)
    pos, vals, _ = burgers_nodes(eta0, chi0, float(t), passive)
    return _interp_nodes(pos, vals, eta_out.ravel()).reshape((vals.shape[0],) + eta_out.shape)


def burgers_history(eta0, chi0, times, eta_out, passive=()):
    """Solution on a grid of times: shape ``(1 + len(passive), nt, len(eta_out))``.

    The profile is padded with zero states (:func:`pad_profile`) to the reach
    of the largest time.
    """
    times = np.asarray(times, dtype=float).ravel()
    eta0, chi0, passive = pad_profile(eta0, chi0, times.max(initial=0.0), passive)
    eta0, chi0, u0 = _prepare(eta0, chi0)
    eta_out = np.asarray(eta_out, dtype=float).ravel()
    out = np.empty((1 + len(passive), times.size, eta_out.size))
    for i, t in enumerate(times):
        pos, vals, _ = burgers_nodes(eta0, chi0, t, passive, _u0=u0)
        out[:, i, :] = _interp_nodes(pos, vals, eta_out)
    return out


def burgers_at_times(eta0, chi0, t_points, eta_points, t_grid, passive=()):
    """Solution at scattered ``(t, eta)`` points, linear in ``t`` between grid times.

    Each point is evaluated exactly in ``eta`` at the two bracketing times of
    ``t_grid`` and blended linearly in ``t``; points outside the grid use the
    nearest end.  Cost: one hull per grid time.  If the points have no more
    distinct times than the grid has, they are evaluated exactly at their own
    times instead (no blending).

    Parameters
    ----------
    eta0, chi0 : ndarray, shape (n,)
        Initial profile.
    t_points, eta_points : ndarray, same shape
        Evaluation times and positions.
    t_grid : ndarray, shape (nt,)
        Increasing grid of times (>= 0).
    passive : sequence of ndarray, shape (n,)
        Quantities carried along the characteristics.

    Returns
    -------
    ndarray, shape (1 + len(passive),) + t_points.shape
    """
    tg = np.asarray(t_grid, dtype=float).ravel()
    eta0, chi0, passive = pad_profile(eta0, chi0, tg.max(), passive)
    eta0, chi0, u0 = _prepare(eta0, chi0)
    t_points = np.asarray(t_points, dtype=float)
    shape = t_points.shape
    tp = t_points.ravel()
    ep = np.broadcast_to(np.asarray(eta_points, dtype=float), shape).ravel()
    nf = 1 + len(passive)
    out = np.zeros((nf, tp.size))
    if tp.size == 0:
        return out.reshape((nf,) + shape)
    uniq, inv = np.unique(tp, return_inverse=True)
    if uniq.size <= tg.size:
        # few distinct times (e.g. points on a few circles): evaluate exactly
        for i, t in enumerate(uniq):
            sel = inv == i
            pos, vals, _ = burgers_nodes(eta0, chi0, max(t, 0.0), passive, _u0=u0)
            out[:, sel] = _interp_nodes(pos, vals, ep[sel])
        return out.reshape((nf,) + shape)
    tc = np.clip(tp, tg[0], tg[-1])
    idx = np.clip(np.searchsorted(tg, tc, side="right") - 1, 0, tg.size - 2) \
        if tg.size > 1 else np.zeros(tp.size, dtype=int)
    if tg.size == 1:
        pos, vals, _ = burgers_nodes(eta0, chi0, tg[0], passive, _u0=u0)
        return _interp_nodes(pos, vals, ep).reshape((nf,) + shape)
    w = (tc - tg[idx]) / (tg[idx + 1] - tg[idx])
    for i in np.unique(np.concatenate([idx, idx + 1])):
        lo = idx == i
        hi = idx + 1 == i
        sel = lo | hi
        pos, vals, _ = burgers_nodes(eta0, chi0, tg[i], passive, _u0=u0)
        f = _interp_nodes(pos, vals, ep[sel])
        weight = np.where(lo[sel], 1.0 - w[sel], w[sel])
        out[:, sel] += f * weight
    return out.reshape((nf,) + shape)


def shock_formation_time(eta0, chi0):
    """``t* = 1 / max(-dchi0/deta)`` (W74 §2.2); ``inf`` if nowhere decreasing.

    Exact for the piecewise-linear profile defined by the samples.
    """
    eta0, chi0, _ = _prepare(eta0, chi0)
    steep = np.max(-np.diff(chi0) / np.diff(eta0))
    return np.inf if steep <= 0 else 1.0 / steep


def shock_positions(eta0, chi0, t):
    """Shocks at time ``t``: array ``(k, 3)`` of ``(eta_s, chi_left, chi_right)``."""
    eta0, chi0, _ = pad_profile(eta0, chi0, t)
    return burgers_nodes(eta0, chi0, float(t))[2]
