"""Likelihood of traced kink displacements given a wake model.

The data seen by the fit are, per traced ridge point ``i`` (see
``DEVELOPERS.md``, "Data objects"): its disk-plane position ``r_au[i]``,
``phi_rad[i]`` (from the fixed background disk), the projection
coefficients ``a_r[i]``, ``a_phi[i]`` (``dv_los = a_r dv_r + a_phi dv_phi``),
the background velocity gradient ``grad_kms_per_arcsec[i]`` (``|grad V_bg|``
on the sky), the measured signed displacement ``offset_arcsec[i]`` from the
background iso-velocity curve (positive along ``grad V_bg``) and its
uncertainty ``sigma_arcsec[i]``.  The model displacement is the first-order
shift of the iso-velocity curve (PHYSICS.md §7)::

    offset_model[i] = -(a_r[i] dv_r[i] + a_phi[i] dv_phi[i]) / grad[i]

Residual distribution
---------------------
``kind="gaussian"``: independent normal residuals with variance
``sigma_i^2 + s^2``, ``s`` = the ``jitter`` parameter (arcsec; 0 when the
parameter set has none)::

    ln L_i = -0.5 r_i^2 / v_i - 0.5 ln(2 pi v_i),   v_i = sigma_i^2 + s^2

``kind="student-t"``: Student's t with fixed ``dof`` = nu and *scale*
``sqrt(v_i)`` (the same density as ``scipy.stats.t(nu, scale=sqrt(v_i))``;
note its variance is ``v_i nu / (nu - 2)``, not ``v_i``).  It down-weights
outliers such as mis-traced ridge points.

Beam correlation
----------------
Ridge points closer than a beam are correlated.  The tracer decimates the
ridges to about one point per beam FWHM along each ridge
(``trace.points_per_beam``), and this likelihood *assumes the remaining
points are independent*.  If points are kept more densely than one per beam
the posterior is too narrow by roughly ``sqrt(points per beam)``; the jitter
term does not fix that.  Points of different channels at the same sky
position are treated as independent too (channel noise is independent, but
beam smearing of one wake can couple neighbouring channels).

Failure handling
----------------
Nothing here returns NaN.  A sample outside the prior, a model that raises
:class:`~kinkfit.errors.PhysicsRangeError` for it, or a model / likelihood
value that is not finite gives ``-inf``; each case is counted in
:attr:`KinkLikelihood.counters` (keys ``"evaluated"``, ``"out_of_prior"``,
``"model_range"``, ``"non_finite_model"``, ``"non_finite_likelihood"``).
"""

from __future__ import annotations

import logging
from typing import Callable

import numpy as np
from scipy.special import gammaln

from .errors import KinkfitError, PhysicsRangeError
from .params import ParameterSet

__all__ = ["KinkLikelihood", "null_model", "REASONS", "LIKELIHOOD_KINDS"]

log = logging.getLogger(__name__)

#: reason codes per evaluated sample (0 = finite value)
REASONS = {0: "ok", 1: "out_of_prior", 2: "model_range",
           3: "non_finite_model", 4: "non_finite_likelihood"}
LIKELIHOOD_KINDS = ("gaussian", "student-t")

ModelFn = Callable[[dict, np.ndarray, np.ndarray],
                   tuple[np.ndarray, np.ndarray]]


def null_model(params: dict, r_au: np.ndarray, phi_rad: np.ndarray):
    """Planet-free model: zero velocity perturbation everywhere.

    Parameters
    ----------
    params : dict of str -> ndarray, shape (m,)
    r_au, phi_rad : ndarray, shape (npts,)

    Returns
    -------
    dv_r, dv_phi : ndarray, shape (m, npts), km/s (zeros)
    """
    m = len(next(iter(params.values()))) if params else 1
    z = np.zeros((m, np.size(r_au)))
    return z, z.copy()


class KinkLikelihood:
    """Log-likelihood of traced displacements, built once, evaluated often.

    Parameters
    ----------
    r_au, phi_rad : ndarray, shape (npts,)
        Disk-plane radius (au) and azimuth (rad) of each traced point.
    a_r, a_phi : ndarray, shape (npts,)
        Projection coefficients, ``dv_los = a_r dv_r + a_phi dv_phi``.
    grad_kms_per_arcsec : ndarray, shape (npts,), km/s/arcsec
        ``|grad V_bg|`` of the background disk on the sky; must be > 0.
    offset_arcsec : ndarray, shape (npts,), arcsec
        Measured signed displacement (positive along ``grad V_bg``).
    sigma_arcsec : ndarray, shape (npts,), arcsec
        1-sigma uncertainty of each displacement; must be > 0.
    model : callable or None
        ``model(params, r_au, phi_rad) -> (dv_r, dv_phi)`` with ``params`` a
        dict of every parameter of ``param_set`` (fixed included) mapping to
        arrays of shape (m,); returns two arrays of shape (m, npts) in km/s.
        ``None`` means :func:`null_model` (planet-free baseline).
    param_set : ParameterSet
        Parameters and priors; for the baseline, a set with only ``jitter``.
    kind : {"gaussian", "student-t"}
    dof : float
        Degrees of freedom of the student-t option (> 0).
    channel : ndarray of int, shape (npts,), optional
        Channel index of each point (kept for bookkeeping only).

    Notes
    -----
    See the module docstring for the formulas, the independence assumption
    (one point per beam) and the failure counters.  Inputs are copied; the
    caller's arrays are never modified.
    """

    def __init__(self, r_au, phi_rad, a_r, a_phi, grad_kms_per_arcsec,
                 offset_arcsec, sigma_arcsec, model: ModelFn | None,
                 param_set: ParameterSet, *, kind: str = "gaussian",
                 dof: float = 4.0, channel=None, response=None,
                 nuisance=None):
        if response is not None:
            # the forward-modelled tracer (kinkfit.response): the data are
            # the kinks relative to the background model's own smeared ridge
            if response.n_points != np.size(r_au):
                raise KinkfitError(f"ridge response has {response.n_points} "
                                   f"points, the data {np.size(r_au)}",
                                   key="response")
            offset_arcsec = response.observed
        arrays = {"r_au": r_au, "phi_rad": phi_rad, "a_r": a_r,
                  "a_phi": a_phi, "grad_kms_per_arcsec": grad_kms_per_arcsec,
                  "offset_arcsec": offset_arcsec,
                  "sigma_arcsec": sigma_arcsec}
        data = {k: np.array(v, dtype=float).ravel() for k, v in arrays.items()}
        npts = data["r_au"].size
        for k, v in data.items():
            if v.size != npts:
                raise KinkfitError(f"likelihood data '{k}' has {v.size} "
                                   f"points, expected {npts}", key=k,
                                   value=v.size)
            if not np.all(np.isfinite(v)):
                raise KinkfitError(f"likelihood data '{k}' has non-finite "
                                   f"values", key=k)
        if npts == 0:
            raise KinkfitError("no traced points to fit", key="offset_arcsec",
                               value=0)
        if np.any(data["sigma_arcsec"] <= 0):
            raise KinkfitError("likelihood data 'sigma_arcsec' must be > 0",
                               key="sigma_arcsec",
                               value=float(data["sigma_arcsec"].min()))
        if np.any(data["grad_kms_per_arcsec"] <= 0):
            raise KinkfitError("likelihood data 'grad_kms_per_arcsec' must be "
                               "> 0", key="grad_kms_per_arcsec",
                               value=float(data["grad_kms_per_arcsec"].min()))
        if kind not in LIKELIHOOD_KINDS:
            raise KinkfitError(f"likelihood.kind = '{kind}': expected one of "
                               f"{', '.join(LIKELIHOOD_KINDS)}",
                               key="likelihood.kind", value=kind)
        if not (np.isfinite(dof) and dof > 0):
            raise KinkfitError(f"likelihood.dof = {dof} must be > 0",
                               key="likelihood.dof", value=dof)
        for v in data.values():
            v.setflags(write=False)
        self.data = data
        self.npts = npts
        self.channel = (None if channel is None
                        else np.array(channel, dtype=int).ravel())
        self.model = null_model if model is None else model
        self.is_baseline = model is None
        self.response = response
        # linear nuisance offsets J dg (background disk), marginalised
        # analytically per sample: (J (npts, k), prior precision (k, k))
        self.nuisance = None
        if nuisance is not None:
            J, prec = nuisance
            J = np.array(J, dtype=float).reshape(npts, -1)
            prec = np.array(prec, dtype=float).reshape(J.shape[1], J.shape[1])
            if not (np.all(np.isfinite(J)) and np.all(np.isfinite(prec))):
                raise KinkfitError("nuisance design has non-finite values",
                                   key="nuisance")
            self.nuisance = (J, prec)
            # outer products J_n J_n^T, row n flattened (n, k*k)
            self._jj = np.ascontiguousarray(
                (J[:, :, None] * J[:, None, :]).reshape(npts, -1))
        self.param_set = param_set
        self.kind = kind
        self.dof = float(dof)
        self._has_jitter = "jitter" in param_set.names
        # projection to offsets: offset = -(a_r dv_r + a_phi dv_phi) / grad
        self._c_r = -data["a_r"] / data["grad_kms_per_arcsec"]
        self._c_phi = -data["a_phi"] / data["grad_kms_per_arcsec"]
        self._sig2 = data["sigma_arcsec"] ** 2
        if kind == "student-t":
            nu = self.dof
            self._t_const = (gammaln(0.5 * (nu + 1)) - gammaln(0.5 * nu)
                             - 0.5 * np.log(nu * np.pi))
        self.counters = {k: 0 for k in ("evaluated", *list(REASONS.values())[1:])}

    @classmethod
    def from_deviations(cls, dev, model: ModelFn | None,
                        param_set: ParameterSet, **kwargs) -> "KinkLikelihood":
        """Build from a :class:`kinkfit.deviations.Deviations`-like object.

        Uses its attributes ``r_au, phi_rad, a_r, a_phi,
        grad_v_kms_per_arcsec, offset_arcsec, sigma_arcsec`` and, when
        present, ``channel``.
        """
        return cls(dev.r_au, dev.phi_rad, dev.a_r, dev.a_phi,
                   dev.grad_v_kms_per_arcsec, dev.offset_arcsec,
                   dev.sigma_arcsec, model, param_set,
                   channel=getattr(dev, "channel", None), **kwargs)

    # ----------------------------------------------------------- model ---
    def _model_offsets(self, params: dict) -> np.ndarray:
        m = len(next(iter(params.values())))
        if self.response is not None:
            if self.is_baseline:
                return np.zeros((m, self.npts))
            resp = self.response
            dv_r, dv_phi = self.model(params, resp.node_r_au,
                                      resp.node_phi_rad)
            # dv_los = a_r dv_r + a_phi dv_phi, projected inside the kernel
            return resp.offsets_from_wake(dv_r, dv_phi)
        dv_r, dv_phi = self.model(params, self.data["r_au"],
                                  self.data["phi_rad"])
        dv_r = np.asarray(dv_r, dtype=float)
        dv_phi = np.asarray(dv_phi, dtype=float)
        if dv_r.shape != (m, self.npts) or dv_phi.shape != (m, self.npts):
            raise ValueError(f"model returned shapes {dv_r.shape}, "
                             f"{dv_phi.shape}; expected {(m, self.npts)}")
        return dv_r * self._c_r + dv_phi * self._c_phi

    def _offsets_guarded(self, params: dict, m: int):
        """Model offsets (m, npts) and a per-row code (0 ok, 2 model range)."""
        codes = np.zeros(m, dtype=np.int8)
        try:
            return self._model_offsets(params), codes
        except PhysicsRangeError:
            if m == 1:
                codes[:] = 2
                return np.full((1, self.npts), np.nan), codes
        out = np.full((m, self.npts), np.nan)
        for k in range(m):  # isolate the offending rows
            one = {n: v[k:k + 1] for n, v in params.items()}
            try:
                out[k] = self._model_offsets(one)[0]
            except PhysicsRangeError as exc:
                codes[k] = 2
                log.debug("model range error at %s: %s",
                          {n: float(v[0]) for n, v in one.items()}, exc)
        return out, codes

    def predict_offset(self, theta) -> np.ndarray:
        """Model displacement of every point, arcsec.

        Parameters
        ----------
        theta : ndarray, shape (m, ndim) or (ndim,)

        Returns
        -------
        ndarray, shape (m, npts), arcsec (NaN rows where the model fails)
        """
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        out, _ = self._offsets_guarded(self.param_set.unpack(theta),
                                       theta.shape[0])
        return out

    # ------------------------------------------------------ likelihood ---
    def _pointwise_coded(self, theta):
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        if theta.shape[1] != self.param_set.ndim:
            raise ValueError(f"theta has {theta.shape[1]} columns, expected "
                             f"{self.param_set.ndim}")
        m = theta.shape[0]
        lp = self.param_set.log_prior(theta)
        codes = np.where(np.isfinite(lp), 0, 1).astype(np.int8)
        ll = np.full((m, self.npts), -np.inf)
        ok = codes == 0
        if np.any(ok):
            params = self.param_set.unpack(theta[ok])
            pred, mcodes = self._offsets_guarded(params, int(ok.sum()))
            bad_model = ~np.all(np.isfinite(pred), axis=1) & (mcodes == 0)
            mcodes[bad_model] = 3
            good = mcodes == 0
            jit = params["jitter"] if self._has_jitter else np.zeros(len(pred))
            var = self._sig2[None, :] + (jit ** 2)[:, None]
            with np.errstate(all="ignore"):
                resid = self.data["offset_arcsec"][None, :] - pred
                logdet = 0.0
                if self.nuisance is not None:
                    resid, logdet = self._marginalise(resid, var)
                r2 = resid ** 2 / var
                if self.kind == "gaussian":
                    pw = (-0.5 * r2 - 0.5 * np.log(2 * np.pi * var)
                          - 0.5 * np.asarray(logdet)[..., None] / self.npts)
                else:
                    nu = self.dof
                    pw = (self._t_const - 0.5 * np.log(var)
                          - 0.5 * (nu + 1) * np.log1p(r2 / nu))
            bad_ll = good & ~np.all(np.isfinite(pw), axis=1)
            mcodes[bad_ll] = 4
            pw[mcodes != 0] = -np.inf
            ll[ok] = pw
            codes[ok] = mcodes
        return ll, lp, codes

    def _marginalise(self, resid, var):
        """Residuals with the best nuisance offsets removed, and the
        log-determinant term of the Gaussian marginal likelihood.

        With offsets ``J dg`` and a Gaussian prior of precision ``P`` on
        ``dg``, integrating ``dg`` out of a Gaussian likelihood leaves the
        residual ``r' = r - J dg``, ``dg = A^-1 J^T W r`` (``W = 1/var``,
        ``A = J^T W J + P``), the prior term ``exp(-dg^T P dg / 2)`` and a
        factor ``det(A)^(-1/2) det(P)^(1/2)``: exactly the Gaussian
        ``N(r; 0, C + J P^-1 J^T)``; the constant ``det(P)`` is dropped.
        The returned second value is ``ln det A + dg^T P dg``.  For the Student-t option the same profile
        shift is applied (an approximation).
        """
        J, prec = self.nuisance
        k = J.shape[1]
        w = 1.0 / var                                      # (m, n)
        # A = J^T W J + P for every sample at once: one matrix product with
        # the outer products J_n J_n^T (n, k*k), precomputed
        A = (w @ self._jj).reshape(-1, k, k) + prec[None]
        b = (w * resid) @ J
        dg = np.linalg.solve(A, b[..., None])[..., 0]      # (m, k)
        sign, logdet = np.linalg.slogdet(A)
        logdet = np.where(sign > 0, logdet, np.inf)
        # the prior's own term dg^T P dg completes the square exactly
        penalty = np.sum((dg @ prec) * dg, axis=1)
        return resid - dg @ J.T, logdet + penalty

    def _marginalise_reference(self, resid, var):
        """:meth:`_marginalise` with the einsum forms of its docstring
        (the reference of tests and bench/bench_forward.py)."""
        J, prec = self.nuisance
        w = 1.0 / var
        A = np.einsum("nk,mn,nl->mkl", J, w, J) + prec[None]
        b = np.einsum("nk,mn->mk", J, w * resid)
        dg = np.linalg.solve(A, b[..., None])[..., 0]
        sign, logdet = np.linalg.slogdet(A)
        logdet = np.where(sign > 0, logdet, np.inf)
        penalty = np.einsum("mk,kl,ml->m", dg, prec, dg)
        return resid - dg @ J.T, logdet + penalty

    def _count(self, codes):
        self.counters["evaluated"] += int(codes.size)
        for c in np.unique(codes):
            if c:
                self.counters[REASONS[int(c)]] += int(np.sum(codes == c))

    def pointwise(self, theta) -> np.ndarray:
        """Per-point log-likelihood (for model comparison).

        Parameters
        ----------
        theta : ndarray, shape (m, ndim) or (ndim,)

        Returns
        -------
        ndarray, shape (m, npts); rows of ``-inf`` where the sample fails
        (outside the prior, model failure).  Not counted in ``counters``.
        """
        return self._pointwise_coded(theta)[0]

    def log_likelihood(self, theta) -> np.ndarray:
        """Total log-likelihood, shape (m,) (``-inf`` where it fails)."""
        return self._pointwise_coded(theta)[0].sum(axis=1)

    def log_prob_coded(self, theta):
        """Log-posterior and reason codes (see :data:`REASONS`), uncounted.

        Returns
        -------
        lp : ndarray, shape (m,)
        codes : ndarray of int8, shape (m,)
        """
        ll, lp, codes = self._pointwise_coded(theta)
        out = np.where(codes == 0, lp + ll.sum(axis=1), -np.inf)
        return out, codes

    def log_prob(self, theta) -> np.ndarray:
        """Log prior + log likelihood, vectorised for emcee.

        Parameters
        ----------
        theta : ndarray, shape (m, ndim)

        Returns
        -------
        ndarray, shape (m,); finite or ``-inf``, never NaN.  Failures are
        counted in :attr:`counters`.
        """
        out, codes = self.log_prob_coded(theta)
        self._count(codes)
        return out

    __call__ = log_prob

    def record(self, codes) -> None:
        """Add reason codes computed elsewhere (e.g. in worker processes)."""
        self._count(np.asarray(codes))

    def reset_counters(self) -> None:
        for k in self.counters:
            self.counters[k] = 0
