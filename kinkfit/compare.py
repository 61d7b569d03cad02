"""Compare fits of the same traced data: damping assumptions and no planet.

:func:`compare_results` reads several result files (:mod:`kinkfit.results`)
fitted to the same traced points -- one per damping assumption plus,
usually, the planet-free baseline -- checks that they really are fits of the
same data with the same priors, and writes, in one folder,

* ``comparison.h5``: the numbers (layout below, written atomically);
* ``comparison.{ecsv,csv,tex,md}``: one row per assumption with the
  posterior summaries of the shared planet parameters, their shift
  relative to the reference fit and the model-comparison columns;
* ``comparison_corner.png``: overlaid corner plot of mass, radius and
  azimuth, one colour per planet assumption;
* ``comparison_elpd.png``: elpd differences and Pareto-k diagnostics.

Model comparison: PSIS-LOO (Vehtari, Gelman & Gabry 2017, "VGG17")
computed from the per-point log-likelihood each result stores for a thinned
subset of its posterior samples, with the generalized-Pareto tail fit of
Zhang & Stephens (2009, "ZS09"), plus WAIC (Watanabe 2010) beside it.  The
method and its limits are described in ``docs/model_comparison.md``.

Definitions used in the tables
------------------------------
* posterior width of a parameter ``sd = (p84 - p16) / 2`` (half the
  central 68 % interval, robust to tails);
* shift relative to the reference ``(median - median_ref) /
  sqrt(sd**2 + sd_ref**2)``; azimuth differences are wrapped to
  (-180, 180] deg;
* ``elpd_diff = elpd_loo - elpd_loo(best)`` (<= 0) and ``se_diff`` =
  ``sqrt(n var_i(elpd_i - elpd_i(best)))`` (VGG17 eq. 24).

Comparison file layout (``schema_version`` = :data:`COMPARISON_SCHEMA`)
---------------------------------------------------------------------------

=================================  =========================================
path                               content
=================================  =========================================
``/`` attrs                        ``schema_version``, ``content`` =
                                   ``"kinkfit comparison"``,
                                   ``package_version``, ``created_utc``,
                                   ``reference`` (assumption name),
                                   ``best`` (highest elpd_loo), ``method``,
                                   ``n_points``, ``allow_mismatch``,
                                   ``mismatches`` (list of one-line texts,
                                   empty when all checks passed),
                                   ``cube_sha256``, ``traced_sha256`` (of
                                   the first file), ``caution``;
                                   ``planet_vs_baseline_planet``,
                                   ``_baseline``, ``_delta_elpd``, ``_se``
                                   (best planet fit minus the baseline,
                                   paired; absent without a baseline)
``/assumptions`` attrs             per assumption (file order): ``names``,
                                   ``files``, ``file_sha256``, ``damping``,
                                   ``is_baseline`` (int 0/1),
                                   ``converged`` (int 0/1), ``n_free``,
                                   ``n_loglike_samples``, ``r_eff`` (used
                                   by PSIS)
``/posterior`` attrs               ``parameters`` (shared names), ``units``
``/posterior/<stat>``              (n_assumptions, n_shared) for ``median``,
                                   ``p16``, ``p84``, ``sd``, ``shift``; NaN
                                   where an assumption lacks the parameter
``/loo/<scalar>``                  (n_assumptions,) ``elpd_loo``,
                                   ``se_elpd_loo``, ``p_loo``, ``elpd_diff``,
                                   ``se_diff``, ``rank`` (1 = best),
                                   ``pareto_k_max``, ``n_k_over_0p7``,
                                   ``elpd_waic``, ``se_elpd_waic``,
                                   ``p_waic``
``/loo/pointwise_elpd``            (n_assumptions, n_points) elpd_loo,i
``/loo/pareto_k``                  (n_assumptions, n_points) k-hat_i
                                   (both NaN-padded when ``allow_mismatch``
                                   let different point counts through)
=================================  =========================================
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import logging
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
from scipy.special import logsumexp

from .errors import ConfigError, ResultFileError

__all__ = ["COMPARISON_SCHEMA", "SHARED_PARAMETERS", "LooResult",
           "WaicResult", "fit_generalized_pareto", "psis_log_weights",
           "psis_loo", "relative_efficiency", "waic", "elpd_differences",
           "traced_sha256",
           "check_compatible", "posterior_shifts", "comparison_table",
           "compare_results", "read_comparison", "CAUTION_TEXT"]

log = logging.getLogger(__name__)

#: version of the comparison-file layout above
COMPARISON_SCHEMA = 1
CONTENT = "kinkfit comparison"
#: planet parameters every planet assumption shares
SHARED_PARAMETERS = ("mass", "radius", "azimuth")
#: VGG17 sec. 3.1: above 0.7 the PSIS estimate is unreliable
K_BAD = 0.7
#: |elpd difference| below which the normal approximation of its
#: uncertainty is poor and models are read as tied (Sivula, Magnusson,
#: Matamoros & Vehtari 2022, from memory)
SMALL_ELPD = 4.0
#: PHYSICS.md sec. 8
CAUTION_TEXT = (
    "A higher elpd for a planet model is not a detection by itself: kinks "
    "can also come from vertical shear instability, winds, gravitational "
    "instability, warps or disk-surface asymmetries, none of which is among "
    "the models compared here. The planet parameters are conditional on the "
    "wake model and on the damping assumption; the elpd compares only the "
    "models listed, on these traced points, and treats the points as "
    "independent (neighbouring points within a beam are not).")

_TRACED_CORE = ("r_au", "phi_rad", "a_r", "a_phi", "grad_kms_per_arcsec",
                "offset_arcsec", "sigma_arcsec")


# =========================================================== statistics ===
def fit_generalized_pareto(x, *, weak_prior: bool = True):
    """Fit a generalized Pareto distribution with location 0 (ZS09).

    Empirical-Bayes estimate of Zhang & Stephens (2009): the profile
    likelihood of ``theta = -k / sigma`` is evaluated on ``m = 20 +
    floor(sqrt(n))`` grid points built from the sample quantiles, and
    ``theta`` is its likelihood-weighted mean.  Parametrisation of
    :func:`scipy.stats.genpareto`: shape ``k`` (``c`` in scipy; > 0 for a
    heavy tail) and scale ``sigma``.

    Parameters
    ----------
    x : array_like, shape (n,)
        Non-negative exceedances over the threshold.
    weak_prior : bool
        Shrink ``k`` towards 0.5 as ``(n k + 10 * 0.5) / (n + 10)``
        (VGG17 sec. 3, used for PSIS; switch off to estimate a shape).

    Returns
    -------
    k, sigma : float (``0, 0`` when every exceedance is 0)
    """
    x = np.sort(np.asarray(x, dtype=float).ravel())
    if x.size < 5 or not np.all(np.isfinite(x)) or x[0] < 0:
        raise ValueError("need at least 5 finite non-negative exceedances")
    k, sigma = _gpd_fit_columns(x[:, None], weak_prior=weak_prior)
    return float(k[0]), float(sigma[0])


def _gpd_fit_columns(x, *, weak_prior: bool = True, block: int = 256):
    """ZS09 fit of every column of ``x (n, ncol)``, sorted ascending, >= 0.

    Returns ``k, sigma`` of shape ``(ncol,)``; columns whose exceedances
    are all 0 get ``k = sigma = 0``.
    """
    n, ncol = x.shape
    m = 20 + int(math.floor(math.sqrt(n)))
    j = np.arange(1, m + 1, dtype=float)
    grid = (1.0 - np.sqrt(m / (j - 0.5)))[:, None]          # (m, 1)
    k_out = np.zeros(ncol)
    s_out = np.zeros(ncol)
    live = np.flatnonzero(x[-1] > 0)
    for start in range(0, live.size, block):
        cols = live[start:start + block]
        xc = x[:, cols]                                      # (n, c)
        x_q = xc[max(int(math.floor(n / 4.0 + 0.5)) - 1, 0)]  # 1st quartile
        if np.any(x_q <= 0):  # many exact zeros: smallest positive value
            x_q = np.where(x_q > 0, x_q,
                           np.min(np.where(xc > 0, xc, np.inf), axis=0))
        theta = 1.0 / xc[-1] + grid / (3.0 * x_q)            # (m, c)
        # ZS09 eq. (3): k(theta) = -mean log(1 - theta x) (their sign);
        # profile log-likelihood l(theta) = n (log(theta / k) + k - 1)
        k_zs = -np.mean(np.log1p(-theta[:, None, :] * xc[None, :, :]),
                        axis=1)                              # (m, c)
        with np.errstate(divide="ignore", invalid="ignore"):
            prof = n * (np.log(theta / k_zs) + k_zs - 1.0)
        prof = np.where(np.isfinite(prof), prof, -np.inf)
        w = np.exp(prof - logsumexp(prof, axis=0))
        theta_hat = np.sum(theta * w, axis=0)                # (c,)
        k = np.mean(np.log1p(-theta_hat[None, :] * xc), axis=0)  # scipy sign
        with np.errstate(divide="ignore", invalid="ignore"):
            sigma = np.where(theta_hat != 0, -k / theta_hat,
                             np.mean(xc, axis=0))
        k_out[cols] = k
        s_out[cols] = sigma
    if weak_prior:
        k_out[live] = (n * k_out[live] + 10 * 0.5) / (n + 10)
    return k_out, s_out


def _gpd_quantile(p, k, sigma):
    """Inverse CDF of the generalized Pareto (location 0, scipy sign).

    ``p (M, 1)`` or ``(M,)``; ``k, sigma`` scalars or ``(ncol,)``.
    """
    p = np.asarray(p, dtype=float)
    k = np.asarray(k, dtype=float)
    small = np.abs(k) < 1e-12
    ksafe = np.where(small, 1.0, k)
    lp = np.log1p(-p)
    return np.where(small, -sigma * lp, sigma * np.expm1(-ksafe * lp) / ksafe)


def _psis_columns(log_ratios, r_eff: float = 1.0):
    """PSIS of every column of ``log_ratios (S, n)``: (log weights, k)."""
    lr = np.array(log_ratios, dtype=float)
    s, n = lr.shape
    lr -= np.max(lr, axis=0)
    m = int(min(math.floor(0.2 * s), math.ceil(3.0 * math.sqrt(s / r_eff))))
    k = np.full(n, np.inf)
    if m >= 5:
        order = np.argsort(lr, axis=0, kind="stable")
        srt = np.take_along_axis(lr, order, axis=0)
        cutoff = srt[s - m - 1]                              # (n,)
        # same exp for both terms, clipped: tied draws (rejected emcee
        # moves repeat a sample) must give exceedances of exactly 0
        exceed = np.maximum(np.exp(srt[s - m:]) - np.exp(cutoff), 0.0)
        k, sigma = _gpd_fit_columns(exceed)
        smooth_cols = exceed[-1] > 0       # flat tails: nothing to smooth
        k[~smooth_cols] = 0.0
        if np.any(smooth_cols):
            p = ((np.arange(1, m + 1) - 0.5) / m)[:, None]
            q = _gpd_quantile(p, k[smooth_cols], sigma[smooth_cols])
            smooth = np.log(np.exp(cutoff[smooth_cols]) + q)
            srt[s - m:, smooth_cols] = np.minimum(smooth, 0.0)  # truncate
        np.put_along_axis(lr, order, srt, axis=0)
    return lr - logsumexp(lr, axis=0), k


def psis_log_weights(log_ratios, *, r_eff: float = 1.0):
    """Pareto-smoothed importance weights of one set of draws (VGG17).

    The largest ``M = min(S / 5, 3 sqrt(S / r_eff))`` raw ratios are
    replaced by the expected order statistics of the generalized Pareto
    fitted to them (VGG17 sec. 3), truncated at the largest raw ratio.

    Parameters
    ----------
    log_ratios : array_like, shape (S,)
        Log importance ratios (for LOO: ``-log p(y_i | theta_s)``).
    r_eff : float
        Relative efficiency of the draws (1 for independent draws).

    Returns
    -------
    log_weights : ndarray, shape (S,)
        Normalised (``logsumexp = 0``) smoothed log weights.
    k : float
        Pareto shape estimate (``inf`` when the tail is too short to fit,
        0 when the tail is flat).
    """
    lr = np.asarray(log_ratios, dtype=float).ravel()
    lw, k = _psis_columns(lr[:, None], r_eff=r_eff)
    return lw[:, 0], float(k[0])


@dataclass(frozen=True)
class LooResult:
    """PSIS-LOO estimate (VGG17).

    Attributes
    ----------
    elpd_loo, se_elpd_loo, p_loo : float
        Expected log pointwise predictive density, its standard error
        ``sqrt(n var_i elpd_i)`` and the effective number of parameters
        ``lppd - elpd_loo``.
    pointwise_elpd, pareto_k, lppd : ndarray, shape (n,)
    n_samples : int
    """

    elpd_loo: float
    se_elpd_loo: float
    p_loo: float
    pointwise_elpd: np.ndarray
    pareto_k: np.ndarray
    lppd: np.ndarray
    n_samples: int

    @property
    def n_points(self) -> int:
        return int(self.pointwise_elpd.size)

    @property
    def k_counts(self) -> dict[str, int]:
        """Points per Pareto-k class of VGG17 (good / ok / bad / very bad)."""
        k = self.pareto_k
        return {"k<=0.5": int(np.sum(k <= 0.5)),
                "0.5<k<=0.7": int(np.sum((k > 0.5) & (k <= 0.7))),
                "0.7<k<=1": int(np.sum((k > 0.7) & (k <= 1))),
                "k>1": int(np.sum(k > 1))}


@dataclass(frozen=True)
class WaicResult:
    """WAIC (Watanabe 2010) in the elpd scale of VGG17 eqs. (11)-(12)."""

    elpd_waic: float
    se_elpd_waic: float
    p_waic: float
    pointwise_elpd: np.ndarray


def _check_loglike(loglike, where="loglike"):
    ll = np.asarray(loglike, dtype=float)
    if ll.ndim != 2 or ll.shape[0] < 10 or ll.shape[1] < 1:
        raise ValueError(f"{where}: need a (samples >= 10, points >= 1) "
                         f"array, got shape {ll.shape}")
    bad = ~np.all(np.isfinite(ll), axis=1)
    if np.any(bad):
        log.warning("%s: dropping %d of %d samples with a non-finite "
                    "log-likelihood", where, int(bad.sum()), ll.shape[0])
        ll = ll[~bad]
        if ll.shape[0] < 10:
            raise ValueError(f"{where}: fewer than 10 samples with a finite "
                             f"log-likelihood")
    return ll


def _se(values):
    n = values.size
    return float(math.sqrt(n * np.var(values, ddof=1))) if n > 1 else 0.0


def relative_efficiency(result) -> float:
    """Relative efficiency of a result's stored log-likelihood draws.

    ``min(1, ESS / k)`` with ``ESS = nwalkers (n_steps - burn) / max(tau)``
    (emcee's effective sample size of the kept chain) and ``k`` the number
    of rows of ``pointwise_loglike``: 1 when the evenly spaced subset is
    sparser than the independent draws the chain holds.  Falls back to 1
    when tau or the chain shape is not known.
    """
    k = int(np.shape(result.pointwise_loglike)[0])
    tau = np.asarray(result.tau, dtype=float)
    chain = np.shape(result.chain)
    if k == 0 or tau.size == 0 or not np.all(np.isfinite(tau)) or \
            len(chain) != 3 or np.max(tau) <= 0:
        return 1.0
    kept = max(int(result.n_steps) - int(result.burn), 0)
    ess = chain[1] * kept / float(np.max(tau))
    return float(min(1.0, max(ess / k, 1.0 / k)))


def psis_loo(loglike, *, r_eff: float = 1.0) -> LooResult:
    """PSIS leave-one-out cross-validation (VGG17 eqs. 7-10, 22-23).

    Parameters
    ----------
    loglike : array_like, shape (S, n)
        ``log p(y_i | theta_s)`` for ``S`` posterior draws and ``n`` points
        (nats).  Rows with a non-finite value are dropped (logged).
    r_eff : float
        Relative efficiency of the draws (1: independent).

    Returns
    -------
    LooResult
    """
    ll = _check_loglike(loglike)
    s, n = ll.shape
    elpd = np.empty(n)
    kk = np.empty(n)
    for start in range(0, n, 1024):  # bounded memory for many points
        cols = slice(start, start + 1024)
        lw, kk[cols] = _psis_columns(-ll[:, cols], r_eff=r_eff)
        elpd[cols] = logsumexp(lw + ll[:, cols], axis=0)
    lppd = logsumexp(ll, axis=0) - math.log(s)
    return LooResult(elpd_loo=float(elpd.sum()), se_elpd_loo=_se(elpd),
                     p_loo=float(np.sum(lppd - elpd)), pointwise_elpd=elpd,
                     pareto_k=kk, lppd=lppd, n_samples=s)


def waic(loglike) -> WaicResult:
    """Widely applicable information criterion, elpd scale (VGG17 eq. 11-12).

    ``p_waic = sum_i var_s log p(y_i | theta_s)``,
    ``elpd_waic = lppd - p_waic``.
    """
    ll = _check_loglike(loglike)
    s = ll.shape[0]
    lppd = logsumexp(ll, axis=0) - math.log(s)
    p = np.var(ll, axis=0, ddof=1)
    pw = lppd - p
    return WaicResult(elpd_waic=float(pw.sum()), se_elpd_waic=_se(pw),
                      p_waic=float(p.sum()), pointwise_elpd=pw)


def elpd_differences(loos: dict[str, LooResult]) -> dict[str, dict]:
    """Rank models by elpd_loo; differences to the best with their SE.

    Returns
    -------
    dict name -> {"elpd_diff", "se_diff", "rank"}: ``elpd_diff`` =
    elpd(name) - elpd(best) (0 for the best), ``se_diff`` =
    ``sqrt(n var_i(d_i))`` of the pointwise differences (VGG17 eq. 24).
    All models must share the same points.
    """
    names = list(loos)
    n = {loos[k].n_points for k in names}
    if len(n) != 1:
        raise ValueError("elpd differences need the same points in every "
                         "model")
    best = max(names, key=lambda k: loos[k].elpd_loo)
    order = sorted(names, key=lambda k: -loos[k].elpd_loo)
    out = {}
    for name in names:
        d = loos[name].pointwise_elpd - loos[best].pointwise_elpd
        out[name] = {"elpd_diff": float(d.sum()), "se_diff": _se(d),
                     "rank": order.index(name) + 1}
    return out


# ========================================================== consistency ===
def traced_sha256(result) -> str:
    """SHA-256 of a result's traced arrays (core names, plus ``channel``).

    Arrays are hashed as little-endian float64 (int64 for ``channel``) in a
    fixed order, so equal data give equal hashes across files.
    """
    h = hashlib.sha256()
    for name in _TRACED_CORE + ("channel",):
        if name not in result.data:
            continue
        dt = "<i8" if name == "channel" else "<f8"
        arr = np.ascontiguousarray(np.asarray(result.data[name]), dtype=dt)
        h.update(name.encode())
        h.update(str(arr.shape).encode())
        h.update(arr.tobytes())
    return h.hexdigest()


def _shared_prior(result, name):
    if name in result.param_names:
        spec = json.loads(result.prior_specs[result.param_names.index(name)])
        return json.dumps(spec, sort_keys=True)
    if name in result.fixed:
        return json.dumps({"kind": "fixed",
                           "value": float(result.fixed[name])})
    return None


def _fmt_files(groups: dict) -> str:
    parts = []
    for value, files in groups.items():
        parts.append(f"{', '.join(files)} [{value}]")
    return " vs ".join(parts)


def check_compatible(results: Sequence, files: Sequence[str]) -> list[str]:
    """One-line descriptions of the ways the results are not comparable.

    Checks the cube checksum (results without one are skipped, with a
    warning), the traced data (:func:`traced_sha256`) and the priors of
    the shared planet parameters among the planet fits.  Empty list: all
    comparable.
    """
    problems = []
    cubes: dict[str, list[str]] = {}
    for r, f in zip(results, files):
        if r.cube_sha256:
            cubes.setdefault(r.cube_sha256[:12], []).append(f)
        else:
            log.warning("%s records no cube checksum; cannot check that it "
                        "fits the same cube", f)
    if len(cubes) > 1:
        problems.append("results come from different cubes (SHA-256): "
                        + _fmt_files(cubes))
    traced: dict[str, list[str]] = {}
    for r, f in zip(results, files):
        traced.setdefault(traced_sha256(r)[:12], []).append(f)
    if len(traced) > 1:
        problems.append("results were fitted to different traced data "
                        "(hash of /traced): " + _fmt_files(traced))
    planets = [(r, f) for r, f in zip(results, files) if not r.is_baseline]
    for name in SHARED_PARAMETERS:
        priors: dict[str, list[str]] = {}
        for r, f in planets:
            priors.setdefault(str(_shared_prior(r, name)), []).append(f)
        if len(priors) > 1:
            problems.append(f"results have different priors on '{name}': "
                            + _fmt_files(priors))
    return problems


# ============================================================ summaries ===
def _names(results, files) -> list[str]:
    base = ["baseline" if r.is_baseline else str(r.damping) for r in results]
    out = []
    for b, f in zip(base, files):
        name = b if base.count(b) == 1 else f"{b}:{Path(f).stem}"
        while name in out:
            name += "'"
        out.append(name)
    return out


def _wrap_deg(d):
    return (np.asarray(d, dtype=float) + 180.0) % 360.0 - 180.0


def posterior_shifts(results: Sequence, reference: int,
                     params: Sequence[str] = SHARED_PARAMETERS) -> dict:
    """Posterior summaries of ``params`` and shifts relative to a reference.

    Parameters
    ----------
    results : sequence of FitResult
    reference : int
        Index of the reference result (must have every parameter).

    Returns
    -------
    dict of ndarrays, shape (n_results, n_params): ``median``, ``p16``,
    ``p84``, ``sd`` = (p84 - p16) / 2, ``shift`` = (median - median_ref) /
    sqrt(sd**2 + sd_ref**2) (azimuth difference wrapped to (-180, 180]);
    NaN where a result lacks the parameter.
    """
    na, npar = len(results), len(params)
    stats = {k: np.full((na, npar), np.nan) for k in
             ("median", "p16", "p84", "sd", "shift")}
    for a, r in enumerate(results):
        for j, name in enumerate(params):
            if name not in r.param_names:
                continue
            col = np.asarray(r.samples)[:, r.param_names.index(name)]
            p16, p50, p84 = np.percentile(col, [16.0, 50.0, 84.0])
            stats["median"][a, j] = p50
            stats["p16"][a, j] = p16
            stats["p84"][a, j] = p84
            stats["sd"][a, j] = 0.5 * (p84 - p16)
    for j, name in enumerate(params):
        diff = stats["median"][:, j] - stats["median"][reference, j]
        if name == "azimuth":
            diff = _wrap_deg(diff)
        width = np.hypot(stats["sd"][:, j], stats["sd"][reference, j])
        with np.errstate(divide="ignore", invalid="ignore"):
            shift = np.where(width > 0, diff / width,
                             np.where(diff == 0, 0.0, np.inf))
        stats["shift"][:, j] = np.where(np.isnan(diff) | np.isnan(width),
                                        np.nan, shift)
    return stats


def comparison_table(names, results, stats, loos, waics, diffs,
                     params=SHARED_PARAMETERS, reference: str = ""):
    """Astropy table, one row per assumption (columns: module docstring)."""
    from astropy import units as u
    from astropy.table import Table

    t = Table()
    t["assumption"] = list(names)
    t["kind"] = ["baseline" if r.is_baseline else "planet" for r in results]
    t["damping"] = [str(r.damping) for r in results]
    t["likelihood"] = [str(r.likelihood_kind) for r in results]
    t["n_free"] = [int(r.ndim) for r in results]
    t["converged"] = [bool(r.converged) for r in results]
    units = _units(results, params)
    for j, p in enumerate(params):
        unit = u.Unit(units[j]) if units[j] else None
        med = stats["median"][:, j]
        scale = unit if unit is not None else 1.0
        t[f"{p}_median"] = med * scale
        t[f"{p}_err_minus"] = (med - stats["p16"][:, j]) * scale
        t[f"{p}_err_plus"] = (stats["p84"][:, j] - med) * scale
        t[f"{p}_shift"] = stats["shift"][:, j]
        t[f"{p}_shift"].description = (
            f"(median - median_ref) / sqrt(sd^2 + sd_ref^2), sd = (p84 - "
            f"p16)/2, reference '{reference}'")
    t["elpd_loo"] = [loos[n].elpd_loo for n in names]
    t["se_elpd_loo"] = [loos[n].se_elpd_loo for n in names]
    t["p_loo"] = [loos[n].p_loo for n in names]
    t["elpd_diff"] = [diffs[n]["elpd_diff"] for n in names]
    t["se_diff"] = [diffs[n]["se_diff"] for n in names]
    t["rank"] = [diffs[n]["rank"] for n in names]
    t["pareto_k_max"] = [float(np.max(loos[n].pareto_k)) for n in names]
    t["n_k_over_0p7"] = [int(np.sum(loos[n].pareto_k > K_BAD)) for n in names]
    t["elpd_waic"] = [waics[n].elpd_waic for n in names]
    t["se_elpd_waic"] = [waics[n].se_elpd_waic for n in names]
    t["p_waic"] = [waics[n].p_waic for n in names]
    for col in t.colnames:
        if t[col].dtype.kind == "f":
            t[col].format = ".5g"
    t["elpd_loo"].description = "PSIS-LOO expected log pointwise predictive " \
                                "density, nats (Vehtari et al. 2017)"
    t["elpd_diff"].description = "elpd_loo - elpd_loo(best), nats"
    t["se_diff"].description = "standard error of elpd_diff (paired over " \
                               "points)"
    t.meta["reference"] = reference
    t.meta["n_points"] = int(next(iter(loos.values())).n_points)
    t.meta["parameters"] = list(params)
    t.meta["caution"] = CAUTION_TEXT
    return t


def _planet_vs_baseline(names, results, loos, same_points) -> dict:
    """Best planet fit minus the baseline: paired elpd difference and SE."""
    planets = [n for n, r in zip(names, results) if not r.is_baseline]
    bases = [n for n, r in zip(names, results) if r.is_baseline]
    if not (planets and bases and same_points):
        return {}
    best = max(planets, key=lambda n: loos[n].elpd_loo)
    d = loos[best].pointwise_elpd - loos[bases[0]].pointwise_elpd
    return {"planet": best, "baseline": bases[0],
            "delta_elpd": float(d.sum()), "se": _se(d)}


def _units(results, params):
    units = []
    for p in params:
        unit = ""
        for r in results:
            if p in r.param_names:
                unit = r.param_units[r.param_names.index(p)]
                break
        units.append(unit)
    return units


def _labels(results, params):
    out = []
    for p in params:
        lab = p
        for r in results:
            if p in r.param_names:
                lab = r.param_labels[r.param_names.index(p)]
                break
        out.append(lab)
    return out


# --------------------------------------------------------- text tables ---
def _sig(x, err):
    if not np.isfinite(x):
        return "—"
    if not (np.isfinite(err) and err > 0):
        return f"{x:.4g}"
    digits = max(0, 1 - int(math.floor(math.log10(err))))
    return f"{x:.{digits}f}"


def _markdown(t, params, mismatches) -> str:
    lines = [f"# Comparison of fits (reference: `{t.meta['reference']}`)", "",
             "## Posterior of the shared planet parameters", "",
             "| assumption | converged | "
             + " | ".join(f"`{p}` median (-1σ/+1σ) | `{p}` shift"
                          for p in params) + " |",
             "|---|---|" + "---|---|" * len(params)]
    for r in t:
        cells = [f"`{r['assumption']}`", "yes" if r["converged"] else "**no**"]
        for p in params:
            med = float(r[f"{p}_median"])
            em, ep = float(r[f"{p}_err_minus"]), float(r[f"{p}_err_plus"])
            err = min(em, ep)
            if np.isfinite(med):
                cells.append(f"{_sig(med, err)} (-{_sig(em, err)}/"
                             f"+{_sig(ep, err)})")
                cells.append(f"{float(r[f'{p}_shift']):+.2f}")
            else:
                cells += ["—", "—"]
        lines.append("| " + " | ".join(cells) + " |")
    lines += ["", "Shift = (median − median_ref) / √(sd² + sd_ref²), "
              "sd = (p84 − p16)/2; azimuth differences wrapped to ±180°.",
              "", "## Model comparison (PSIS-LOO)", "",
              "| rank | assumption | elpd_loo ± SE | p_loo | Δelpd ± SE "
              "(to best) | max Pareto k | points k > 0.7 | elpd_waic |",
              "|---|---|---|---|---|---|---|---|"]
    for r in sorted(t, key=lambda row: row["rank"]):
        lines.append(
            f"| {r['rank']} | `{r['assumption']}` | {r['elpd_loo']:.1f} ± "
            f"{r['se_elpd_loo']:.1f} | {r['p_loo']:.1f} | "
            f"{r['elpd_diff']:.1f} ± {r['se_diff']:.1f} | "
            f"{r['pareto_k_max']:.2f} | {r['n_k_over_0p7']} | "
            f"{r['elpd_waic']:.1f} |")
    lines += ["", "Δelpd within about 2 SE of zero, or smaller than 4 nats, "
              "is a tie (Vehtari et al. 2017; Sivula et al. 2022). Points "
              "with Pareto k > 0.7 make the PSIS-LOO value of "
              "that model unreliable; refit without them or treat the "
              "ranking as indicative.", ""]
    vs = t.meta.get("planet_vs_baseline") or {}
    if vs:
        d, se = vs["delta_elpd"], vs["se"]
        if abs(d) <= 2 * se or abs(d) < SMALL_ELPD:
            verdict = ("within 2 SE of zero or below 4 nats: these traced "
                       "points do not distinguish the planet model from no "
                       "planet")
        elif d > 0:
            verdict = (f"the planet model predicts the traced points better "
                       f"by {d / se:.1f} SE (not a detection by itself, "
                       f"see the caution below)")
        else:
            verdict = (f"the planet-free baseline predicts the traced points "
                       f"better by {-d / se:.1f} SE")
        kbad = {r["assumption"]: int(r["n_k_over_0p7"]) for r in t
                if r["assumption"] in (vs["planet"], vs["baseline"])}
        if any(kbad.values()):
            verdict += ("; unreliable: Pareto k > 0.7 at "
                        + ", ".join(f"{n} point(s) of `{a}`"
                                    for a, n in kbad.items() if n))
        lines += [f"Best planet fit `{vs['planet']}` against the planet-free "
                  f"`{vs['baseline']}`: Δelpd = {d:.1f} ± {se:.1f} nats "
                  f"(paired over the {t.meta.get('n_points', '')} traced "
                  f"points): {verdict}.", ""]
    else:
        lines += ["**No planet-free baseline among the compared fits**: "
                  "fit one (`wake.baseline = true`) before reading anything "
                  "into the planet parameters.", ""]
    unconverged = [r["assumption"] for r in t if not r["converged"]]
    if unconverged:
        lines += ["**Not converged:** " + ", ".join(f"`{n}`"
                                                  for n in unconverged)
                  + " (chains stopped before the autocorrelation criterion; "
                  "their posteriors and elpd values are provisional).", ""]
    if mismatches:
        lines += ["**Compared despite mismatches (allow_mismatch):**", ""]
        lines += [f"- {m}" for m in mismatches] + [""]
    lines += ["> **Caution.** " + CAUTION_TEXT, ""]
    return "\n".join(lines)


def _latex(t, params, labels):
    from astropy.table import Table
    out = Table()
    out["Assumption"] = [s.replace("_", r"\_") for s in t["assumption"]]
    for p, lab in zip(params, labels):
        vals = []
        for r in t:
            med = float(r[f"{p}_median"])
            em, ep = float(r[f"{p}_err_minus"]), float(r[f"{p}_err_plus"])
            err = min(em, ep)
            vals.append(f"${_sig(med, err)}^{{+{_sig(ep, err)}}}"
                        f"_{{-{_sig(em, err)}}}$" if np.isfinite(med)
                        else "--")
        out[lab] = vals
    out[r"$\Delta\mathrm{elpd}_{\rm LOO}$"] = [
        f"${r['elpd_diff']:.1f} \\pm {r['se_diff']:.1f}$" for r in t]
    out[r"$\hat k_{\max}$"] = [f"{r['pareto_k_max']:.2f}" for r in t]
    return out


# ============================================================ top level ===
def _now_utc() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _write_h5(path, *, names, files, results, stats, loos, waics, diffs,
              params, units, reference, mismatches, allow_mismatch,
              versus=None, reffs=None):
    import h5py

    from . import __version__
    from .results import file_sha256
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix="." + path.name + ".",
                               suffix=".tmp")
    os.close(fd)
    sdt = h5py.string_dtype("utf-8")
    best = min(names, key=lambda n: diffs[n]["rank"])
    try:
        with h5py.File(tmp, "w", track_order=True) as f:
            f.attrs["schema_version"] = COMPARISON_SCHEMA
            f.attrs["content"] = CONTENT
            f.attrs["package_version"] = __version__
            f.attrs["created_utc"] = _now_utc()
            f.attrs["reference"] = reference
            f.attrs["best"] = best
            f.attrs["method"] = ("PSIS-LOO (Vehtari, Gelman & Gabry 2017; "
                                 "GPD fit of Zhang & Stephens 2009); WAIC")
            f.attrs["n_points"] = int(loos[names[0]].n_points)
            f.attrs["allow_mismatch"] = bool(allow_mismatch)
            f.attrs["mismatches"] = np.array(list(mismatches), dtype=sdt)
            f.attrs["cube_sha256"] = results[0].cube_sha256
            f.attrs["traced_sha256"] = traced_sha256(results[0])
            f.attrs["caution"] = CAUTION_TEXT
            for key, val in (versus or {}).items():
                f.attrs[f"planet_vs_baseline_{key}"] = val
            g = f.create_group("assumptions", track_order=True)
            g.attrs["names"] = np.array(names, dtype=sdt)
            g.attrs["files"] = np.array([str(x) for x in files], dtype=sdt)
            g.attrs["file_sha256"] = np.array(
                [file_sha256(x) for x in files], dtype=sdt)
            g.attrs["damping"] = np.array([str(r.damping) for r in results],
                                          dtype=sdt)
            g.attrs["is_baseline"] = np.array(
                [int(r.is_baseline) for r in results], dtype=np.int64)
            g.attrs["converged"] = np.array(
                [int(r.converged) for r in results], dtype=np.int64)
            g.attrs["n_free"] = np.array([r.ndim for r in results],
                                         dtype=np.int64)
            g.attrs["n_loglike_samples"] = np.array(
                [loos[n].n_samples for n in names], dtype=np.int64)
            g.attrs["r_eff"] = np.array(
                [(reffs or {}).get(n, np.nan) for n in names], dtype=float)
            p = f.create_group("posterior", track_order=True)
            p.attrs["parameters"] = np.array(list(params), dtype=sdt)
            p.attrs["units"] = np.array(list(units), dtype=sdt)
            for key in ("median", "p16", "p84", "sd", "shift"):
                p.create_dataset(key, data=stats[key])
            lo = f.create_group("loo", track_order=True)
            scal = {
                "elpd_loo": [loos[n].elpd_loo for n in names],
                "se_elpd_loo": [loos[n].se_elpd_loo for n in names],
                "p_loo": [loos[n].p_loo for n in names],
                "elpd_diff": [diffs[n]["elpd_diff"] for n in names],
                "se_diff": [diffs[n]["se_diff"] for n in names],
                "rank": [diffs[n]["rank"] for n in names],
                "pareto_k_max": [float(np.max(loos[n].pareto_k))
                                 for n in names],
                "n_k_over_0p7": [int(np.sum(loos[n].pareto_k > K_BAD))
                                 for n in names],
                "elpd_waic": [waics[n].elpd_waic for n in names],
                "se_elpd_waic": [waics[n].se_elpd_waic for n in names],
                "p_waic": [waics[n].p_waic for n in names]}
            for key, vals in scal.items():
                lo.create_dataset(key, data=np.asarray(vals))
            width = max(loos[n].n_points for n in names)
            for key in ("pointwise_elpd", "pareto_k"):
                arr = np.full((len(names), width), np.nan)
                for a, n in enumerate(names):  # NaN-padded if npts differ
                    v = getattr(loos[n], key)
                    arr[a, :v.size] = v
                lo.create_dataset(key, data=arr, compression="gzip",
                                  compression_opts=4)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    return path


def read_comparison(path) -> dict:
    """Read a comparison file into a plain dict (keys as in the layout).

    Raises
    ------
    ResultFileError
        Missing, not a comparison file, or a newer schema.
    """
    from .results import open_hdf5
    path = Path(path)
    with open_hdf5(path, "comparison file") as f:
        if f.attrs.get("content") != CONTENT:
            raise ResultFileError("not a kinkfit comparison file", file=path)
        if int(f.attrs["schema_version"]) > COMPARISON_SCHEMA:
            raise ResultFileError(
                f"comparison schema_version {int(f.attrs['schema_version'])}"
                f" is newer than this kinkfit reads ({COMPARISON_SCHEMA})",
                file=path, key="schema_version")
        out = {k: (v.tolist() if isinstance(v, np.ndarray) else v)
               for k, v in f.attrs.items()}
        for grp in ("assumptions", "posterior"):
            out[grp] = {k: (v.tolist() if isinstance(v, np.ndarray) else v)
                        for k, v in f[grp].attrs.items()}
        for grp in ("posterior", "loo"):
            out.setdefault(grp, {})
            for k, ds in f[grp].items():
                out[grp][k] = ds[()]
    return out


def compare_results(paths: Sequence, folder, *, reference: str | None = None,
                    overwrite: bool = False, allow_mismatch: bool = False,
                    r_eff: float | None = None,
                    figures: bool = True) -> Path:
    """Compare fits of the same traced data and write the products.

    Parameters
    ----------
    paths : sequence of path-like
        Result files (:func:`kinkfit.results.write_result`), at least two;
        typically one per damping assumption plus the baseline.
    folder : path-like
        Output folder (created).
    reference : str, optional
        Assumption name (damping name, ``"baseline"``; ``damping:stem``
        when a damping appears twice) the shifts are measured from; default
        the first planet fit.
    overwrite : bool
        Replace an existing ``comparison.h5`` and its tables/figures.
    allow_mismatch : bool
        Compare even if cubes, traced data or shared priors differ (the
        mismatches are recorded; with different traced data the elpd
        differences are set to NaN, they would be meaningless).
    r_eff : float, optional
        Relative efficiency of the stored log-likelihood draws for PSIS;
        default per result from :func:`relative_efficiency`.
    figures : bool
        Also draw the PNG figures.

    Returns
    -------
    Path of ``comparison.h5``.

    Raises
    ------
    ResultFileError
        Unreadable result, mismatched inputs (one line naming the files), no
        stored pointwise log-likelihood, existing output without
        ``overwrite``.
    ConfigError
        Unknown or planet-free ``reference``, fewer than two results.
    """
    from .results import read_result
    files = [str(p) for p in paths]
    if len(files) < 2:
        raise ConfigError(f"compare needs at least two result files, got "
                          f"{len(files)}: {', '.join(files) or 'none'}")
    folder = Path(folder)
    out = folder / "comparison.h5"
    if out.exists() and not overwrite:
        raise ResultFileError("comparison file exists; pass overwrite=True "
                              "(--force) to replace it", file=out)
    results = [read_result(p) for p in files]
    for r, f in zip(results, files):
        pw = np.asarray(r.pointwise_loglike)
        if pw.ndim != 2 or pw.shape[0] < 10 or pw.shape[1] != r.npts:
            raise ResultFileError(
                f"no usable per-point log-likelihood (/pointwise/loglike has "
                f"shape {pw.shape}, need (>=10, {r.npts})); refit to store "
                f"it", file=f, key="pointwise/loglike")
    mismatches = check_compatible(results, files)
    if mismatches and not allow_mismatch:
        raise ResultFileError(
            mismatches[0] + "; pass --allow-mismatch (allow_mismatch=True) "
            "to compare anyway", key="allow_mismatch")
    for m in mismatches:
        log.warning("comparing despite mismatch: %s", m)
    names = _names(results, files)
    planet_idx = [i for i, r in enumerate(results) if not r.is_baseline]
    if reference is None:
        if not planet_idx:
            raise ConfigError("compare: no planet fit among "
                              + ", ".join(files), key="reference")
        ref_i = planet_idx[0]
    else:
        if reference not in names:
            raise ConfigError(f"--reference '{reference}' is not one of the "
                              f"assumptions {', '.join(names)}",
                              key="reference", value=reference)
        ref_i = names.index(reference)
        if results[ref_i].is_baseline:
            raise ConfigError(f"--reference '{reference}' is the planet-free "
                              f"baseline, which has no planet parameters",
                              key="reference", value=reference)
    params = tuple(p for p in SHARED_PARAMETERS
                   if p in results[ref_i].param_names)
    stats = posterior_shifts(results, ref_i, params)
    reffs = {n: (float(r_eff) if r_eff is not None
                 else relative_efficiency(r)) for n, r in zip(names, results)}
    loos = {n: psis_loo(r.pointwise_loglike, r_eff=reffs[n])
            for n, r in zip(names, results)}
    waics = {n: waic(r.pointwise_loglike) for n, r in zip(names, results)}
    same_points = len({traced_sha256(r) for r in results}) == 1
    if same_points:
        diffs = elpd_differences(loos)
    else:
        order = sorted(names, key=lambda n: -loos[n].elpd_loo)
        diffs = {n: {"elpd_diff": float("nan"), "se_diff": float("nan"),
                     "rank": order.index(n) + 1} for n in names}
    for n in names:
        nbad = int(np.sum(loos[n].pareto_k > K_BAD))
        if nbad:
            log.warning("%s: %d point(s) with Pareto k > %.1f; its PSIS-LOO "
                        "estimate is unreliable", n, nbad, K_BAD)
    folder.mkdir(parents=True, exist_ok=True)
    reference_name = names[ref_i]
    table = comparison_table(names, results, stats, loos, waics, diffs,
                             params, reference=reference_name)
    table.meta["mismatches"] = list(mismatches)
    table.meta["planet_vs_baseline"] = _planet_vs_baseline(
        names, results, loos, same_points)
    units = _units(results, params)
    _write_h5(out, names=names, files=files, results=results, stats=stats,
              loos=loos, waics=waics, diffs=diffs, params=params,
              units=units, reference=reference_name, mismatches=mismatches,
              allow_mismatch=allow_mismatch,
              versus=table.meta["planet_vs_baseline"], reffs=reffs)
    table.write(folder / "comparison.ecsv", format="ascii.ecsv",
                overwrite=True)
    plain = table.copy()  # CSV: full precision (no display formats)
    for col in plain.itercols():
        col.format = None
    plain.write(folder / "comparison.csv", format="ascii.csv", overwrite=True)
    labels = _labels(results, params)
    caption = ("Planet parameters (median and 16th--84th percentiles) under "
               "each damping assumption and PSIS-LOO elpd difference to the "
               "best model (nats, with its standard error). Masses are "
               "conditional on the wake model; a better elpd is not a "
               "detection by itself.")
    _latex(table, params, labels).write(
        folder / "comparison.tex", format="ascii.latex", overwrite=True,
        latexdict={"caption": caption, "tabletype": "table"})
    (folder / "comparison.md").write_text(
        _markdown(table, params, mismatches), encoding="utf-8")
    if figures:
        from .plots.compare import elpd_figure, overlay_corner_figure
        planets = [(n, r) for n, r in zip(names, results)
                   if not r.is_baseline
                   and all(q in r.param_names for q in params)]
        if planets and params:
            fig = overlay_corner_figure([r for _, r in planets],
                                        [n for n, _ in planets], params=params)
            fig.savefig(folder / "comparison_corner.png", dpi=110)
        fig = elpd_figure(table, {n: loos[n].pareto_k for n in names})
        fig.savefig(folder / "comparison_elpd.png", dpi=110)
    log.info("wrote %s", out)
    return out
