"""Background (planet-free) disk fitted to traced ridge points.

Each traced point ``i`` (position ``x_i``, channel velocity ``v_i``, error
``sigma_i`` along the cut, surface ``s_i``) should lie on the background
iso-velocity curve ``V_bg(x; theta) = v_i``.  Its first-order signed distance
from that curve is ``(V_bg(x_i) - v_i) / |grad V_bg|``, so the normalised
residual minimised here is::

    e_i(theta) = [(V_bg(x_i; theta) - v_i) / g_i - b_i] / sigma_i

with ``g_i = |grad V_bg|`` evaluated at the reference geometry of the round
(updated between rounds, so the costly gradient is not recomputed at every
function call) and ``b_i`` an optional beam-smearing bias (arcsec, along the
gradient; see :mod:`kinkfit.deviations`).  A robust loss
(``scipy.optimize.least_squares(loss='cauchy')``, scale ``f_scale = 2``
residual units) keeps a planet's kink from dragging the background.

Uncertainties: ``cov = (J^T J)^-1 s^2`` with ``J`` the loss-weighted Jacobian
returned by ``least_squares`` and ``s = 1.4826 * median|e_i|`` the robust
scatter of the residuals (the normal-equation covariance of a least-squares
fit, rescaled by the measured residual scale).  Points are not fully
independent (noise correlation ~0.25 at one beam along a ridge, line
profiles spanning adjacent channels, shared errors of the smearing-bias
model), so the covariance is multiplied by ``max(1, median_k C_kk / V_kk)``
where ``C`` is the cluster-robust ("sandwich") covariance
``A^-1 (sum_g s_g s_g^T) A^-1 G/(G-1)`` over cells ``g`` of the disk
(radius x azimuth, ``cluster_cells``; ``A = J^T J``, ``s_g = J_g^T e_g``),
and ``V`` the plain one (``meta['covariance_inflation']``).  Disk cells
capture the slowly varying errors of the smearing-bias model, which are
shared by neighbouring points of many channels.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy.optimize import least_squares

from .errors import ConfigError, ConvergenceError

__all__ = ["BackgroundFit", "fit_background", "trace_and_fit", "PARAMETERS",
           "DEFAULT_FREE"]

log = logging.getLogger(__name__)

#: name -> (unit, typical step used to scale the problem, lower, upper)
PARAMETERS = {
    "mstar_msun": ("solMass", 0.01, 1e-3, 100.0),
    "inclination_deg": ("deg", 0.3, 0.01, 89.9),
    "position_angle_deg": ("deg", 0.3, -720.0, 720.0),
    "x0_arcsec": ("arcsec", 0.005, -100.0, 100.0),
    "y0_arcsec": ("arcsec", 0.005, -100.0, 100.0),
    "vsys_kms": ("km/s", 0.005, -1e4, 1e4),
    "aspect": ("", 0.01, 0.0, 1.0),
    "flaring": ("", 0.05, 0.0, 3.0),
}

#: parameters fitted by default
DEFAULT_FREE = ("mstar_msun", "inclination_deg", "position_angle_deg",
                "x0_arcsec", "y0_arcsec", "vsys_kms", "aspect", "flaring")

#: residual (sigma units) given to a point that falls off the layer for a
#: trial geometry: treated as an outlier by the robust loss
OFF_LAYER_RESIDUAL = 30.0

_SURF = {0: "front", 1: "back"}


def _get(geom, name):
    if name in ("aspect", "flaring"):
        return float(getattr(geom.front, name))
    return float(getattr(geom, name))


def _set(geom, values: dict):
    """Copy of ``geom`` with parameters replaced (front surface for shape)."""
    front = geom.front
    surf = {k: values[k] for k in ("aspect", "flaring") if k in values}
    if surf:
        front = replace(front, **surf)
    top = {k: v for k, v in values.items() if k not in ("aspect", "flaring")}
    if "rotation" not in top:
        top["rotation"] = geom.rotation
    return replace(geom, front=front, **top)


@dataclass(frozen=True)
class BackgroundFit:
    """Result of :func:`fit_background`.

    Attributes
    ----------
    geometry : kinkfit.geometry.DiskGeometry
        Best-fit geometry (fixed parameters as given).
    names : tuple of str
        Free parameter names (see :data:`PARAMETERS` for units).
    values, errors : ndarray, shape (nfree,)
        Best fit and 1-sigma uncertainties.
    covariance : ndarray, shape (nfree, nfree)
    start : ndarray, shape (nfree,)
        Start values.
    residuals : ndarray, shape (npoints,)
        Normalised residuals ``e_i`` at the best fit.
    scatter : float
        Robust residual scale ``1.4826 median|e|`` used to scale ``covariance``.
    inlier : ndarray of bool, shape (npoints,)
        ``|e_i| < 3 max(scatter, 1)``.
    success : bool
    message : str
    nfev : int
    loss : str
    f_scale : float
    rounds : int
        Trace/fit rounds (1 for a plain fit).
    """

    geometry: object
    names: tuple
    values: np.ndarray
    errors: np.ndarray
    covariance: np.ndarray
    start: np.ndarray
    residuals: np.ndarray
    scatter: float
    inlier: np.ndarray
    success: bool
    message: str
    nfev: int
    loss: str
    f_scale: float
    rounds: int = 1
    meta: dict = field(default_factory=dict, compare=False)

    def value(self, name: str) -> float:
        """Best-fit value of a parameter (free or fixed)."""
        return _get(self.geometry, name)

    def error(self, name: str) -> float:
        """1-sigma error of a free parameter (NaN if fixed)."""
        return float(self.errors[self.names.index(name)]) if name in self.names else math.nan

    def table(self):
        """:class:`astropy.table.Table` of all parameters (free and fixed)."""
        from astropy.table import Table
        rows = []
        for name, (unit, *_rest) in PARAMETERS.items():
            free = name in self.names
            rows.append((name, self.value(name), self.error(name) if free else np.nan,
                         unit, free))
        t = Table(rows=rows, names=("parameter", "value", "error", "unit", "free"))
        t["value"].format = ".6g"
        t["error"].format = ".3g"
        t.meta.update({"rotation": int(self.geometry.rotation),
                       "distance_pc": float(self.geometry.distance_pc),
                       "loss": self.loss, "f_scale": float(self.f_scale),
                       "scatter": float(self.scatter),
                       "n_points": int(self.residuals.size),
                       "n_inliers": int(np.sum(self.inlier)),
                       "success": bool(self.success), "rounds": int(self.rounds)})
        return t

    def summary(self) -> str:
        """Human-readable lines: parameter = value +- error unit."""
        lines = []
        for name, (unit, *_rest) in PARAMETERS.items():
            if name in self.names:
                lines.append(f"{name:20s} = {self.value(name):12.6g} +- "
                             f"{self.error(name):.3g} {unit}")
            else:
                lines.append(f"{name:20s} = {self.value(name):12.6g} (fixed) {unit}")
        lines.append(f"{len(self.residuals)} points, {int(np.sum(self.inlier))} "
                     f"inliers, robust residual scale {self.scatter:.3f}, "
                     f"loss {self.loss} (f_scale {self.f_scale:g}), "
                     f"{self.rounds} round(s)")
        return "\n".join(lines)


def _residual_parts(ridges):
    return (np.asarray(ridges.x_arcsec), np.asarray(ridges.y_arcsec),
            np.asarray(ridges.velocity_kms), np.asarray(ridges.sigma_arcsec),
            np.asarray(ridges.surface))


def _velocity(geom, x, y, surf):
    from .geometry import background_velocity
    out = np.full(x.shape, np.nan)
    for code, name in _SURF.items():
        m = surf == code
        if np.any(m):
            out[m] = background_velocity(geom, x[m], y[m], name)
    return out


def _gradient(geom, x, y, surf):
    from .geometry import velocity_gradient
    out = np.full(x.shape, np.nan)
    for code, name in _SURF.items():
        m = surf == code
        if np.any(m):
            gx, gy = velocity_gradient(geom, x[m], y[m], name)
            out[m] = np.hypot(gx, gy)
    return out


def _disk_cells(geom, x, y, surf, cells):
    """Cluster label of each point: equal-count radius bins x azimuth sectors."""
    from .geometry import sky_to_disk
    nr, nphi = int(cells[0]), int(cells[1])
    r = np.full(x.shape, np.nan)
    phi = np.full(x.shape, np.nan)
    for code, name in _SURF.items():
        m = surf == code
        if np.any(m):
            r[m], phi[m], _ = sky_to_disk(geom, x[m], y[m], name)
    r = np.where(np.isfinite(r), r, np.nanmedian(r) if np.any(np.isfinite(r)) else 0.0)
    phi = np.where(np.isfinite(phi), phi, 0.0)
    edges = np.quantile(r, np.linspace(0, 1, nr + 1)[1:-1]) if nr > 1 else []
    rb = np.searchsorted(edges, r)
    pb = np.floor((phi + np.pi) / (2 * np.pi) * nphi).astype(int) % nphi
    return rb * nphi + pb


def fit_background(ridges, geom0, free=DEFAULT_FREE, *, bias=None,
                   loss: str = "cauchy", f_scale: float = 2.0,
                   inner_rounds: int = 2, max_nfev: int = 200,
                   cluster_cells=(4, 8)) -> BackgroundFit:
    """Fit the background disk to traced ridge points.

    Parameters
    ----------
    ridges : kinkfit.trace.Ridges
        Traced points (at least ``len(free) + 1``).
    geom0 : kinkfit.geometry.DiskGeometry
        Start geometry; parameters not in ``free`` stay as given (rotation
        sense, distance, radial extent and a separately given back surface
        are always fixed).
    free : sequence of str
        Names from :data:`PARAMETERS`.
    bias : ndarray, shape (npoints,), optional
        Beam-smearing bias of each point along the gradient, arcsec,
        subtracted from the measured offsets.
    loss : {'cauchy', 'soft_l1', 'huber', 'arctan', 'linear'}
        Robust loss of ``scipy.optimize.least_squares``; Cauchy (default)
        down-weights a planet's kink more firmly than soft-l1, which let
        the kink pull the PA by ~3 sigma in our synthetic tests.
    f_scale : float
        Residual scale (sigma units) where the loss turns robust.
    inner_rounds : int
        Re-evaluations of the gradient normalisation ``g_i`` at the updated
        geometry.
    max_nfev : int
        Function evaluations per round.
    cluster_cells : (int, int) or None
        Radial (equal-count) and azimuthal cells of the disk that define the
        clusters of the cluster-robust covariance used to inflate the errors
        for spatially correlated residuals; None disables.

    Returns
    -------
    BackgroundFit

    Raises
    ------
    ConfigError
        Unknown parameter name or too few points.
    ConvergenceError
        The optimiser failed.
    """
    free = tuple(free)
    for name in free:
        if name not in PARAMETERS:
            raise ConfigError(f"unknown background parameter {name!r} "
                              f"(known: {', '.join(PARAMETERS)})", key="free",
                              value=name)
    x, y, v, sig, surf = _residual_parts(ridges)
    n = x.size
    if n < len(free) + 1:
        raise ConfigError(f"background fit needs more than {len(free)} traced "
                          f"points, got {n}", key="ridges", value=n)
    b = np.zeros(n) if bias is None else np.nan_to_num(np.asarray(bias, float))
    start = np.array([_get(geom0, k) for k in free])
    scale = np.array([PARAMETERS[k][1] for k in free])
    lo = np.array([PARAMETERS[k][2] for k in free])
    hi = np.array([PARAMETERS[k][3] for k in free])
    lo_p = (lo - start) / scale
    hi_p = (hi - start) / scale
    p = np.zeros(len(free))
    p = np.clip(p, lo_p + 1e-9, hi_p - 1e-9)

    def geom_of(pvec):
        return _set(geom0, dict(zip(free, start + scale * pvec)))

    nfev = 0
    res = None
    g_ref = _gradient(geom0, x, y, surf)
    for _ in range(max(1, int(inner_rounds))):
        g = np.where(np.isfinite(g_ref) & (g_ref > 0), g_ref, np.nan)

        def fun(pvec):
            try:
                gm = geom_of(pvec)
            except Exception:          # out-of-range trial geometry
                return np.full(n, OFF_LAYER_RESIDUAL)
            e = ((_velocity(gm, x, y, surf) - v) / g - b) / sig
            return np.where(np.isfinite(e), e, OFF_LAYER_RESIDUAL)

        res = least_squares(fun, p, jac="2-point", bounds=(lo_p, hi_p),
                            loss=loss, f_scale=f_scale, x_scale=1.0,
                            diff_step=1e-3, max_nfev=max_nfev, method="trf")
        nfev += int(res.nfev)
        p = res.x
        g_ref = _gradient(geom_of(p), x, y, surf)
    if res is None or res.status < 0:
        raise ConvergenceError(f"background fit failed: "
                               f"{getattr(res, 'message', 'no result')}")
    e = res.fun
    scat = float(1.4826 * np.median(np.abs(e)))
    J = res.jac
    try:
        cov_p = np.linalg.inv(J.T @ J) * scat ** 2
    except np.linalg.LinAlgError:
        cov_p = np.full((len(free), len(free)), np.nan)
    # correlated points (neighbours along a ridge, overlapping line
    # profiles in adjacent channels, shared smearing-bias errors): inflate
    # by the cluster-robust (sandwich) covariance over blocks of channels
    inflation, nclus = 1.0, 0
    if cluster_cells and np.all(np.isfinite(cov_p)):
        z = (e / f_scale) ** 2
        w = {"soft_l1": 1.0 / np.sqrt(1.0 + z), "cauchy": 1.0 / (1.0 + z),
             "huber": np.where(z <= 1, 1.0, 1.0 / np.sqrt(np.maximum(z, 1e-300))),
             "arctan": 1.0 / (1.0 + z ** 2)}.get(loss, np.ones_like(z))
        rt = e * np.sqrt(w)
        block = _disk_cells(geom_of(p), x, y, surf, cluster_cells)
        groups = np.unique(block)
        nclus = groups.size
        if nclus > 2 * len(free):
            Ainv = np.linalg.inv(J.T @ J)
            S = np.array([J[block == gk].T @ rt[block == gk] for gk in groups])
            cov_cl = Ainv @ (S.T @ S) @ Ainv * nclus / (nclus - 1)
            ratio = np.diag(cov_cl) / np.diag(cov_p)
            inflation = float(max(1.0, np.median(ratio)))
            cov_p = cov_p * inflation
    cov = cov_p * np.outer(scale, scale)
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    values = start + scale * p
    fit = BackgroundFit(
        geometry=geom_of(p), names=free, values=values, errors=err,
        covariance=cov, start=start, residuals=e, scatter=scat,
        inlier=np.abs(e) < 3.0 * max(scat, 1.0), success=bool(res.success),
        message=str(res.message), nfev=nfev, loss=loss, f_scale=float(f_scale))
    log.info("background fit: %s", fit.summary().replace("\n", "; "))
    return fit


def trace_and_fit(cube, geom0, settings, free=DEFAULT_FREE, *, rounds: int = 3,
                  tol_sigma: float = 0.3, bias=None, **trace_kw):
    """Alternate tracing and background fitting until the geometry settles.

    Tracing follows the model's iso-velocity curves, so a poor start
    geometry traces slightly off-centre cuts; re-tracing with the fitted
    geometry removes that dependence.  Stops when every free parameter
    moved by less than ``tol_sigma`` of its uncertainty, or after
    ``rounds`` rounds.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    geom0 : kinkfit.geometry.DiskGeometry
    settings : kinkfit.config.TraceSettings
    free : sequence of str
    rounds : int
    tol_sigma : float
    bias : callable, optional
        ``bias(ridges, geom) -> ndarray`` per-point bias used in the fit.
    **trace_kw
        Passed to :func:`kinkfit.trace.trace_ridges`.

    Returns
    -------
    ridges : kinkfit.trace.Ridges
        Traced with the last geometry used for tracing.
    fit : BackgroundFit
    """
    from .trace import trace_ridges
    geom = geom0
    fit = None
    ridges = None
    for k in range(1, max(1, int(rounds)) + 1):
        ridges = trace_ridges(cube, geom, settings, **trace_kw)
        b = None if bias is None else bias(ridges, geom)
        new = fit_background(ridges, geom, free, bias=b)
        moved = np.abs(new.values - np.array([_get(geom, nm) for nm in new.names]))
        fit = replace(new, rounds=k)
        geom = new.geometry
        if np.all(moved < tol_sigma * np.maximum(new.errors, 1e-12)):
            break
    return ridges, fit


def offset_jacobian(fit, ridges, rel_step: float = 0.1):
    """Derivatives of the points' first-order offsets w.r.t. the background.

    ``J[i, j] = d offset_i / d g_j`` for the free background parameters
    ``fit.names`` at ``fit.values``, by central differences of
    :func:`kinkfit.deviations.signed_offsets` with steps ``rel_step`` times
    each parameter's fitted error (arcsec per unit of each parameter, see
    :data:`PARAMETERS`).  Used to marginalise the planet fit over the
    background disk (:class:`kinkfit.likelihood.KinkLikelihood`,
    ``nuisance``): a small change ``dg`` of the background moves every
    offset by ``J dg``.

    Returns
    -------
    ndarray, shape (n, k)
    """
    from .deviations import signed_offsets
    x, y = ridges.x_arcsec, ridges.y_arcsec
    v, surf = ridges.velocity_kms, ridges.surface
    base = dict(zip(fit.names, (float(a) for a in fit.values)))
    cols = []
    for name, err in zip(fit.names, fit.errors):
        h = rel_step * float(err) if np.isfinite(err) and err > 0 else 1e-4
        up = _set(fit.geometry, {**base, name: base[name] + h})
        dn = _set(fit.geometry, {**base, name: base[name] - h})
        o_up, _ = signed_offsets(up, x, y, v, surf)
        o_dn, _ = signed_offsets(dn, x, y, v, surf)
        cols.append((o_up - o_dn) / (2.0 * h))
    J = np.column_stack(cols)
    return np.where(np.isfinite(J), J, 0.0)
