"""Posterior sampling with emcee, checkpointed and resumable.

emcee is used only in this module.  :func:`run_sampler` owns an
``emcee.EnsembleSampler`` with ``vectorize=True`` (the log-probability gets
an ``(m, ndim)`` batch), differential-evolution moves (``DEMove`` weight
0.8, ``DESnookerMove`` 0.2) and an ``emcee.backends.HDFBackend`` checkpoint.

Checkpoint and resume
---------------------
The checkpoint is an HDF5 file with one group (:data:`CHECKPOINT_GROUP`)
in emcee's ``HDFBackend`` layout: chain, log-probability, acceptance counts
and the legacy ``RandomState`` of the sampler (attrs ``random_state_0..4``,
saved with the step it follows).  Steps are written in blocks
(``checkpoint_every`` steps or ``checkpoint_seconds``, see
:func:`run_sampler`), each block with the random state of its last step.  kinkfit adds the
attrs ``kinkfit_param_names`` and ``kinkfit_seed``.  On resume a new sampler
is built on the same backend, which restores the random state, and the run
continues from the last stored step, so no step is lost or repeated and
the chain is identical to an uninterrupted run with the same seed.  A first
SIGINT (Ctrl-C) is deferred to the end of the current step (the checkpoint is
never interrupted mid-write); a second one interrupts at once.

Convergence
-----------
Every ``check_every`` steps (counted from the start of the chain, so a
resumed run checks at the same iterations) the integrated autocorrelation
time ``tau`` of each parameter is estimated (``emcee.autocorr`` with
``tol=0``).  The run stops when ``iteration > autocorr_multiple * max(tau)``
and every ``tau`` changed by less than ``tau_tolerance`` (relative) since the
previous check; otherwise it stops at ``max_steps`` with
``converged=False``.  Burn-in ``≈ 3 max(tau)``, thinning ``≈ min(tau)/2``.

Parallelism
-----------
``settings.workers > 1`` splits each vectorised batch over a
``multiprocessing.Pool``; the log-probability is sent once to every worker
by the pool initializer (it must be picklable, e.g. a
:class:`kinkfit.likelihood.KinkLikelihood` with a top-level model function).
Use ``OMP_NUM_THREADS=1`` with it.  See ``bench/bench_likelihood.py``.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from .errors import ConfigError, KinkfitError, ResultFileError
from .params import ParameterSet

__all__ = ["SamplerOutcome", "run_sampler", "find_start", "find_modes",
           "initial_ball",
           "read_checkpoint", "CHECKPOINT_GROUP"]

log = logging.getLogger(__name__)

#: group of the emcee backend inside the checkpoint file
CHECKPOINT_GROUP = "walk"


@dataclass
class SamplerOutcome:
    """What a sampler run produced.

    Attributes
    ----------
    param_names : tuple of str
        Free parameters, in the column order of ``chain``.
    chain : ndarray, shape (n_steps, nwalkers, ndim)
    log_prob : ndarray, shape (n_steps, nwalkers)
    acceptance : ndarray, shape (nwalkers,)
        Acceptance fraction of each walker over the whole chain.
    tau : ndarray, shape (ndim,), steps
        Integrated autocorrelation time at the end (``tol=0`` estimate).
    converged : bool
    n_steps : int
    burn, thin : int
        Suggested burn-in and thinning (steps).
    timings : dict of str -> float
        ``wall_s`` (this call), ``log_prob_s`` (time inside the
        log-probability), ``n_evaluations`` (samples evaluated this call),
        ``ms_per_evaluation``, ``steps_this_run``, ``workers``.
    seed : int
    resumed_from : int
        Iterations already in the checkpoint when this call started.
    tau_history : ndarray, shape (k, 1 + ndim)
        Iteration and tau at every convergence check since the start of the
        chain (checks before a resume are recomputed from the stored chain).
    settings : dict
        The convergence settings used.
    """

    param_names: tuple[str, ...]
    chain: np.ndarray
    log_prob: np.ndarray
    acceptance: np.ndarray
    tau: np.ndarray
    converged: bool
    n_steps: int
    burn: int
    thin: int
    timings: dict = field(default_factory=dict)
    seed: int = 0
    resumed_from: int = 0
    tau_history: np.ndarray = field(default_factory=lambda: np.zeros((0, 1)))
    settings: dict = field(default_factory=dict)
    checkpoint_path: str = ""

    def flat_samples(self, burn: int | None = None,
                     thin: int | None = None) -> np.ndarray:
        """Posterior samples after burn-in and thinning, (n, ndim)."""
        b = self.burn if burn is None else burn
        t = self.thin if thin is None else thin
        return self.chain[b::t].reshape(-1, self.chain.shape[-1])

    def flat_log_prob(self, burn: int | None = None,
                      thin: int | None = None) -> np.ndarray:
        b = self.burn if burn is None else burn
        t = self.thin if thin is None else thin
        return self.log_prob[b::t].reshape(-1)


# ------------------------------------------------------------ helpers ---
def _support(param_set: ParameterSet):
    lo = np.array([param_set.prior(n).support[0] for n in param_set.free])
    hi = np.array([param_set.prior(n).support[1] for n in param_set.free])
    return lo, hi


def initial_ball(center, param_set: ParameterSet, nwalkers: int,
                 rng: np.random.Generator, log_prob: Callable | None = None,
                 scale: float = 1e-3) -> np.ndarray:
    """Walkers in a small Gaussian ball around ``center``, inside the prior.

    Parameters
    ----------
    center : ndarray, shape (ndim,)
    scale : float
        Ball radius as a fraction of the prior width (of ``max(|c|, 1)``
        for unbounded priors).
    log_prob : callable, optional
        If given, walkers with ``-inf`` are redrawn (up to 200 times).

    Returns
    -------
    ndarray, shape (nwalkers, ndim)
    """
    center = np.asarray(center, dtype=float).ravel()
    lo, hi = _support(param_set)
    width = np.where(np.isfinite(hi - lo), hi - lo,
                     np.maximum(np.abs(center), 1.0))
    sd = scale * width
    eps = 1e-9 * width
    inner_lo = np.where(np.isfinite(lo), lo + eps, -np.inf)
    inner_hi = np.where(np.isfinite(hi), hi - eps, np.inf)
    if np.any(center < lo) or np.any(center > hi):
        raise KinkfitError("start point lies outside the prior: "
                           + ", ".join(f"{n}={c:g}" for n, c, a, b in
                                       zip(param_set.free, center, lo, hi)
                                       if not a <= c <= b),
                           key="initial", value=center.tolist())
    def draw(k):
        # reflected at the prior's edges, not clipped: a start on an edge
        # (a jitter polished to its lower bound) would otherwise put half
        # the walkers on one point, and the differential-evolution moves
        # divide by the distance between two walkers (NaN proposals)
        q = center + sd * rng.normal(size=(k, center.size))
        q = np.where(q < inner_lo, 2.0 * inner_lo - q, q)
        q = np.where(q > inner_hi, 2.0 * inner_hi - q, q)
        return np.clip(q, inner_lo, inner_hi)

    p = draw(nwalkers)
    if log_prob is not None:
        for _ in range(200):
            bad = ~np.isfinite(log_prob(p))
            if not bad.any():
                break
            p[bad] = draw(int(bad.sum()))
        else:
            raise KinkfitError("could not place the walkers where the "
                               "log-probability is finite around the start "
                               "point", key="initial", value=center.tolist())
    return p


#: rows per call of the log-probability when :func:`find_modes` evaluates
#: its prior draws
_PRIOR_BLOCK = 32


def find_modes(log_prob: Callable, param_set: ParameterSet,
               rng: np.random.Generator, n_tries: int = 256,
               n_polish: int = 3, maxiter: int = 2000,
               max_drop: float = 10.0) -> np.ndarray:
    """Distinct polished optima, best first (see :func:`find_start`).

    The ``n_polish`` best prior draws are polished; optima that differ by
    more than 1% of the prior width in some parameter and whose
    log-probability is within ``max_drop`` of the best are all returned, so
    that the walkers can start in every competitive mode (a wake posterior
    can have several: mass and radius trade against each other).

    Returns
    -------
    ndarray, shape (k, ndim), k >= 1
    """
    from scipy.optimize import minimize

    draws = param_set.sample_prior(rng, n_tries)
    # in blocks: the forward model's temporaries grow with the batch (wake
    # at every node for every row) and fall out of the CPU caches; on the
    # demo 4096 rows in one call cost 3.6 ms per row, in blocks of
    # _PRIOR_BLOCK rows 2.4 ms (bench/profile_demo.py).  The values agree
    # with one call to round-off (the rows are independent)
    lp = np.concatenate([
        np.asarray(log_prob(draws[i:i + _PRIOR_BLOCK]), dtype=float).ravel()
        for i in range(0, len(draws), _PRIOR_BLOCK)])
    lp = np.where(np.isnan(lp), -np.inf, lp)
    if not np.any(np.isfinite(lp)):
        raise KinkfitError(f"none of {n_tries} prior draws has a finite "
                           f"log-probability; check the priors and the data",
                           key="planet")
    order = np.argsort(-lp)[:n_polish]
    lo, hi = _support(param_set)
    # polish in units of the prior width: the simplex starts 2% of the
    # width wide in every parameter (scipy's default, 5% of each value, is
    # degenerate for an azimuth near 0 and huge for a radius), and stops at
    # 1e-4 of the width and 1e-3 in log-probability -- far finer than the
    # walker ball placed around the result, and ~3x fewer evaluations than
    # polishing to round-off
    span = np.where(np.isfinite(hi - lo), hi - lo, np.nan)

    def neg(y, s):
        v = float(np.asarray(log_prob((np.asarray(y) * s)[None]))[0])
        return 1e300 if not np.isfinite(v) else -v

    found = []
    for k in order:
        if not np.isfinite(lp[k]):
            continue
        s = np.where(np.isfinite(span), span,
                     np.maximum(np.abs(draws[k]), 1.0))
        y0 = draws[k] / s
        simplex = np.vstack([y0, y0 + 0.02 * np.eye(y0.size)])
        res = minimize(neg, y0, args=(s,), method="Nelder-Mead",
                       options={"maxiter": maxiter, "xatol": 1e-4,
                                "fatol": 1e-3, "initial_simplex": simplex})
        x, v = np.asarray(res.x, dtype=float) * s, float(res.fun)
        if v > -lp[k]:              # polishing never makes a start worse
            x, v = draws[k], -lp[k]
        found.append((v, x))
    found.sort(key=lambda t: t[0])
    width = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    modes = []
    for v, x in found:
        if v > found[0][0] + max_drop:
            break
        if all(np.any(np.abs(x - m) > 0.01 * width) for _, m in modes):
            modes.append((v, x))
    for v, x in modes:
        log.info("start mode: log_prob = %.6g at %s", -v,
                 dict(zip(param_set.free, np.round(x, 6))))
    return np.array([x for _, x in modes])


def find_start(log_prob: Callable, param_set: ParameterSet,
               rng: np.random.Generator, n_tries: int = 256,
               n_polish: int = 3, maxiter: int = 2000) -> np.ndarray:
    """A high-posterior start point: best prior draws, polished.

    Draws ``n_tries`` vectors from the prior, evaluates them in one
    vectorised call, and polishes the best ``n_polish`` with
    ``scipy.optimize.minimize(method="Nelder-Mead")`` on ``-log_prob``
    (the best of :func:`find_modes`).

    Returns
    -------
    ndarray, shape (ndim,): the best point found (inside the prior).
    """
    return find_modes(log_prob, param_set, rng, n_tries=n_tries,
                      n_polish=n_polish, maxiter=maxiter)[0]


# ---------------------------------------------------- pool machinery ---
_WORKER_FN = None


def _pool_init(fn):
    global _WORKER_FN
    _WORKER_FN = fn
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles it
    os.environ.setdefault("OMP_NUM_THREADS", "1")


def _pool_eval(chunk):
    fn = _WORKER_FN
    coded = getattr(fn, "log_prob_coded", None)
    if coded is None and hasattr(fn, "__self__"):
        coded = getattr(fn.__self__, "log_prob_coded", None)
    if coded is not None:
        lp, codes = coded(chunk)
        return np.asarray(lp, dtype=float), np.asarray(codes)
    return np.asarray(fn(chunk), dtype=float), None


def _counter_holder(fn):
    if hasattr(fn, "record"):
        return fn
    owner = getattr(fn, "__self__", None)
    return owner if hasattr(owner, "record") else None


class _Evaluator:
    """Vectorised log-probability wrapper: timing, NaN guard, pool split."""

    def __init__(self, fn, pool=None, workers=1):
        self.fn, self.pool, self.workers = fn, pool, workers
        self.holder = _counter_holder(fn)
        self.seconds = 0.0
        self.rows = 0
        self.nan = 0

    def __call__(self, theta):
        t0 = time.perf_counter()
        theta = np.asarray(theta, dtype=float)
        if self.pool is None:
            lp = np.asarray(self.fn(theta), dtype=float)
        else:
            chunks = [c for c in np.array_split(theta, self.workers) if len(c)]
            parts = self.pool.map(_pool_eval, chunks)
            lp = np.concatenate([p[0] for p in parts])
            if self.holder is not None and parts[0][1] is not None:
                self.holder.record(np.concatenate([p[1] for p in parts]))
        lp = lp.reshape(theta.shape[0])
        nan = np.isnan(lp)
        if nan.any():
            self.nan += int(nan.sum())
            lp = np.where(nan, -np.inf, lp)
        self.seconds += time.perf_counter() - t0
        self.rows += theta.shape[0]
        return lp


def _tau(chain: np.ndarray) -> np.ndarray:
    import emcee
    with np.errstate(invalid="ignore", divide="ignore"):  # stuck walkers
        return emcee.autocorr.integrated_time(chain, tol=0)


def _burn_thin(tau, n_steps):
    if np.all(np.isfinite(tau)) and n_steps > 0:
        # at least the third that the convergence test discarded
        burn = max(n_steps // 3, int(np.ceil(3 * np.max(tau))))
        thin = max(1, int(np.min(tau) / 2))
    else:
        burn, thin = n_steps // 2, 1
    if burn >= n_steps:
        burn = n_steps // 2
    return burn, thin


def _buffered_backend(path: Path, every: int, seconds: float):
    """An ``emcee.backends.HDFBackend`` that writes steps in blocks.

    emcee's backend opens the file several times per step (shape, blob and
    iteration checks, then the write), about 10 ms per step on a loaded
    machine (``bench/bench_likelihood.py``).  This subclass keeps complete
    steps in memory and writes them, with the random state of the last one,
    in one file opening every ``every`` steps or ``seconds`` seconds, before
    any read, and when the run ends or fails.  A killed process loses at
    most that block; the resumed run recomputes it identically.
    """
    import emcee

    class BufferedHDFBackend(emcee.backends.HDFBackend):
        def __init__(self, filename, name):
            super().__init__(filename, name=name)
            self.every, self.seconds = max(1, int(every)), float(seconds)
            self._rows = []
            self._meta = None
            self._t_flush = time.monotonic()

        def _cached(self):
            if self._meta is None:
                with self.open() as f:
                    g = f[self.name]
                    self._meta = (int(g.attrs["nwalkers"]),
                                  int(g.attrs["ndim"]),
                                  bool(g.attrs["has_blobs"]))
            return self._meta

        def reset(self, nwalkers, ndim):
            self._rows, self._meta = [], None
            super().reset(nwalkers, ndim)

        @property
        def shape(self):
            return self._cached()[:2]

        def has_blobs(self):
            return self._cached()[2]

        @property
        def iteration(self):
            return super().iteration + len(self._rows)

        @property
        def accepted(self):
            self.flush()
            return super().accepted

        @property
        def random_state(self):
            self.flush()
            return super().random_state

        def get_value(self, name, flat=False, thin=1, discard=0):
            self.flush()
            return super().get_value(name, flat=flat, thin=thin,
                                     discard=discard)

        def _check_blobs(self, blobs):
            if blobs is not None:
                super()._check_blobs(blobs)

        def save_step(self, state, accepted):
            if state.blobs is not None:  # not buffered: plain emcee path
                self.flush()
                super().save_step(state, accepted)
                self._meta = None
                return
            nw, nd = self.shape
            coords = np.array(state.coords, dtype=float)
            if coords.shape != (nw, nd):
                raise ValueError(f"state shape {coords.shape} differs from "
                                 f"the backend's {(nw, nd)}")
            self._rows.append((coords, np.array(state.log_prob, dtype=float),
                               np.array(accepted, dtype=float),
                               state.random_state))
            if (len(self._rows) >= self.every
                    or time.monotonic() - self._t_flush >= self.seconds):
                self.flush()

        def flush(self):
            self._t_flush = time.monotonic()
            if not self._rows:
                return
            rows, self._rows = self._rows, []
            n = len(rows)
            with self.open("a") as f:
                g = f[self.name]
                it = int(g.attrs["iteration"])
                if g["chain"].shape[0] < it + n:
                    g["chain"].resize(it + n, axis=0)
                    g["log_prob"].resize(it + n, axis=0)
                g["chain"][it:it + n] = np.stack([r[0] for r in rows])
                g["log_prob"][it:it + n] = np.stack([r[1] for r in rows])
                g["accepted"][:] = (g["accepted"][:]
                                    + np.sum([r[2] for r in rows], axis=0))
                for i, v in enumerate(rows[-1][3]):
                    g.attrs[f"random_state_{i}"] = v
                g.attrs["iteration"] = it + n

    return BufferedHDFBackend(str(path), CHECKPOINT_GROUP)


def _open_backend(path: Path, param_set, nwalkers, resume: bool,
                  every: int = 1, seconds: float = 0.0):
    """Checkpoint backend on ``path``; returns (backend, iteration, seed)."""
    import h5py

    ndim = param_set.ndim
    if path.exists() and resume:
        try:
            with h5py.File(path, "r") as f:
                g = f.get(CHECKPOINT_GROUP)
                if g is None:
                    raise ResultFileError(
                        f"not a kinkfit checkpoint (no '{CHECKPOINT_GROUP}' "
                        f"group); remove it or run without resume",
                        file=path)
                attrs = dict(g.attrs)
        except OSError as exc:
            raise ResultFileError(f"checkpoint is unreadable ({exc}); remove "
                                  f"it or run without resume", file=path)
        shape = (int(attrs.get("nwalkers", -1)), int(attrs.get("ndim", -1)))
        if shape != (nwalkers, ndim):
            raise ResultFileError(
                f"checkpoint has (walkers, parameters) = {shape}, this run "
                f"needs {(nwalkers, ndim)}; remove it or run without resume",
                file=path, value=shape)
        names = tuple(str(s) for s in attrs.get("kinkfit_param_names", ()))
        if names and names != tuple(param_set.free):
            raise ResultFileError(
                f"checkpoint parameters {list(names)} differ from this "
                f"run's {list(param_set.free)}", file=path, value=names)
        backend = _buffered_backend(path, every, seconds)
        it = int(attrs.get("iteration", 0))
        if it > 0:
            return backend, it, attrs.get("kinkfit_seed")
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.exists():
        path.unlink()
    # uncompressed: gzip chunks made the file larger and the steps slower
    backend = _buffered_backend(path, every, seconds)
    backend.reset(nwalkers, ndim)
    return backend, 0, None


class _DeferredInterrupt:
    """Delay the first SIGINT to the end of a sampler step."""

    def __init__(self):
        self.hit = False
        self._old = None

    def __enter__(self):
        if threading.current_thread() is threading.main_thread():
            self._old = signal.signal(signal.SIGINT, self._handler)
        return self

    def _handler(self, signum, frame):
        if self.hit:
            raise KeyboardInterrupt
        self.hit = True
        log.warning("interrupt received: stopping after this step "
                    "(press again to stop at once)")

    def __exit__(self, *exc):
        if self._old is not None:
            signal.signal(signal.SIGINT, self._old)
        return False


# ------------------------------------------------------------- runner ---
def run_sampler(log_prob: Callable, param_set: ParameterSet, settings,
                checkpoint_path, *, initial=None, rng_seed: int | None = None,
                resume: bool = True, ball_scale: float = 1e-3,
                checkpoint_every: int = 10, checkpoint_seconds: float = 30.0
                ) -> SamplerOutcome:
    """Run (or resume) the ensemble sampler until converged or max_steps.

    Parameters
    ----------
    log_prob : callable
        Vectorised: ``(m, ndim) -> (m,)``; ``-inf`` outside the prior.
    param_set : ParameterSet
    settings : kinkfit.config.SamplerSettings
        ``walkers, max_steps, check_every, autocorr_multiple,
        tau_tolerance, seed, workers, progress``.
    checkpoint_path : path-like
        HDF5 checkpoint (created, or continued when ``resume``).
    initial : ndarray, shape (ndim,) or (k, ndim), optional
        Centre(s) of the initial walker ball(s) (e.g. :func:`find_start`,
        :func:`find_modes`; walkers are shared round-robin between several
        centres); default: walkers drawn from the prior.
    rng_seed : int, optional
        Seed of the walker ball and of emcee's ``RandomState``; default
        ``settings.seed``.  Ignored on resume (the stored state is used).
    resume : bool
        Continue a matching checkpoint; ``False`` starts afresh (the old
        checkpoint is replaced).
    ball_scale : float
        Radius of the initial ball as a fraction of each prior's width.
    checkpoint_every, checkpoint_seconds : int, float
        Steps are written to the checkpoint in blocks of this many steps or
        after this many seconds, whichever comes first (and at every
        convergence check, at the end, on errors and on SIGINT).  A SIGKILL
        loses at most one block, recomputed identically on resume.

    Returns
    -------
    SamplerOutcome

    Raises
    ------
    ResultFileError
        Unreadable or mismatched checkpoint.
    KeyboardInterrupt
        After a SIGINT, once the checkpoint holds the last complete step.
    """
    import emcee

    t_start = time.perf_counter()
    path = Path(checkpoint_path)
    seed = int(settings.seed if rng_seed is None else rng_seed)
    nwalkers, ndim = int(settings.walkers), param_set.ndim
    if ndim < 1:
        raise ConfigError("no free parameters to sample", key="planet")
    if nwalkers < 2 * ndim:
        raise ConfigError(f"sampler.walkers = {nwalkers} must be at least "
                          f"twice the number of free parameters ({ndim})",
                          key="sampler.walkers", value=nwalkers)
    ce = int(settings.check_every)
    backend, it0, stored_seed = _open_backend(
        path, param_set, nwalkers, resume, checkpoint_every,
        checkpoint_seconds)
    if it0 == 0:
        import h5py
        with h5py.File(path, "a") as f:
            f[CHECKPOINT_GROUP].attrs["kinkfit_param_names"] = list(
                param_set.free)
            f[CHECKPOINT_GROUP].attrs["kinkfit_seed"] = seed
    else:
        if stored_seed is not None and int(stored_seed) != seed:
            log.warning("resuming a chain started with seed %s (requested "
                        "%s): the stored random state is used",
                        stored_seed, seed)
        seed = int(stored_seed) if stored_seed is not None else seed
        log.info("resuming %s at iteration %d", path, it0)

    pool = None
    workers = int(getattr(settings, "workers", 1))
    if workers > 1:
        pool = multiprocessing.get_context().Pool(
            workers, initializer=_pool_init, initargs=(log_prob,))
    evaluator = _Evaluator(log_prob, pool, workers)
    try:
        sampler = emcee.EnsembleSampler(
            nwalkers, ndim, evaluator, vectorize=True, backend=backend,
            moves=[(emcee.moves.DEMove(), 0.8),
                   (emcee.moves.DESnookerMove(), 0.2)])
        if it0 == 0:
            sampler.random_state = np.random.RandomState(seed).get_state()
            rng = np.random.default_rng(seed)
            if initial is None:
                p0 = param_set.sample_prior(rng, nwalkers)
                bad = ~np.isfinite(evaluator(p0))
                tries = 0
                while bad.any():
                    tries += 1
                    if tries > 100:
                        raise KinkfitError("prior draws give no finite "
                                           "log-probability", key="planet")
                    p0[bad] = param_set.sample_prior(rng, int(bad.sum()))
                    bad = ~np.isfinite(evaluator(p0))
            else:
                # one small ball per start mode, walkers shared round-robin
                centres = np.atleast_2d(np.asarray(initial, dtype=float))
                share = np.bincount(np.arange(nwalkers) % len(centres),
                                    minlength=len(centres))
                p0 = np.concatenate([
                    initial_ball(c, param_set, int(k), rng, evaluator,
                                 scale=ball_scale)
                    for c, k in zip(centres, share) if k > 0])
            state = p0
        else:
            # emcee's backend stores the RandomState after every step; make
            # the restore explicit (emcee's setter ignores failures silently)
            stored = backend.random_state
            if stored is None:
                log.warning("checkpoint %s has no random state: the resumed "
                            "chain is valid but not identical to an "
                            "uninterrupted run", path)
            else:
                sampler.random_state = tuple(stored)
                if not np.array_equal(sampler.random_state[1], stored[1]):
                    log.warning("could not restore the random state of %s; "
                                "the resumed chain will differ from an "
                                "uninterrupted run", path)
            state = sampler.get_last_sample()

        taus: dict[int, np.ndarray] = {}

        def tau_at(k):
            # tau of the last two thirds of the first k steps: the first
            # third is discarded as burn-in, so walkers still travelling
            # from the start ball do not inflate tau for ever
            if k not in taus:
                taus[k] = _tau(backend.get_chain()[k // 3:k])
            return taus[k]

        history = []

        def check(k):
            tau = tau_at(k)
            history.append(np.concatenate([[k], tau]))
            if k - ce < ce or not np.all(np.isfinite(tau)):
                return False
            prev = tau_at(k - ce)
            change = np.max(np.abs(tau - prev) / tau)
            kept = k - k // 3
            ok = (kept > settings.autocorr_multiple * np.max(tau)
                  and change < settings.tau_tolerance)
            log.info("iteration %d: tau = %s, N/tau = %.1f, change %.3g%s",
                     k, np.round(tau, 1), kept / np.max(tau), change,
                     " (converged)" if ok else "")
            return bool(ok)

        converged = False
        it = it0
        for k in range(ce, it0 + 1, ce):  # the checks an uninterrupted run
            converged = check(k)          # made (its last one may be missing)
            if converged:
                break
        remaining = int(settings.max_steps) - it0
        if not converged and remaining > 0:
            from tqdm.auto import tqdm
            show = bool(settings.progress) and sys.stderr.isatty()
            with _DeferredInterrupt() as intr, tqdm(
                    total=int(settings.max_steps), initial=it0,
                    disable=not show, desc="sampling", unit="step") as bar:
                for _ in sampler.sample(state, iterations=remaining,
                                        progress=False, store=True):
                    it += 1
                    bar.update(1)
                    if intr.hit:
                        log.warning("stopped at iteration %d; checkpoint %s "
                                    "is complete, run again to resume",
                                    it, path)
                        raise KeyboardInterrupt
                    if it % ce == 0 and check(it):
                        converged = True
                        break
    finally:
        backend.flush()  # buffered complete steps, also after errors
        if pool is not None:
            pool.close()
            pool.join()

    chain = backend.get_chain()
    lp = backend.get_log_prob()
    n_steps = chain.shape[0]
    acceptance = backend.accepted / max(n_steps, 1)
    tau = tau_at(n_steps) if n_steps > 1 else np.full(ndim, np.nan)
    burn, thin = _burn_thin(tau, n_steps)
    if not converged:
        log.warning("sampler stopped at %d steps without meeting the "
                    "convergence criterion (N/tau_max = %.1f, needed %.1f)",
                    n_steps, (n_steps - n_steps // 3) / np.nanmax(tau) if np.any(
                        np.isfinite(tau)) else np.nan,
                    settings.autocorr_multiple)
    wall = time.perf_counter() - t_start
    timings = {"wall_s": wall, "log_prob_s": evaluator.seconds,
               "n_evaluations": float(evaluator.rows),
               "ms_per_evaluation": (1e3 * evaluator.seconds / evaluator.rows
                                     if evaluator.rows else float("nan")),
               "steps_this_run": float(n_steps - it0),
               "workers": float(workers), "nan_replaced": float(evaluator.nan)}
    hist = (np.array(history) if history
            else np.zeros((0, 1 + ndim)))
    return SamplerOutcome(
        param_names=tuple(param_set.free), chain=chain, log_prob=lp,
        acceptance=acceptance, tau=tau, converged=converged, n_steps=n_steps,
        burn=burn, thin=thin, timings=timings, seed=seed, resumed_from=it0,
        tau_history=hist, checkpoint_path=str(path),
        settings={"walkers": nwalkers, "max_steps": int(settings.max_steps),
                  "check_every": ce,
                  "autocorr_multiple": float(settings.autocorr_multiple),
                  "tau_tolerance": float(settings.tau_tolerance)})


def read_checkpoint(path) -> tuple[np.ndarray, np.ndarray, int]:
    """Chain ``(it, walkers, ndim)``, log-prob and iteration of a checkpoint.

    Raises :class:`ResultFileError` when the file is missing or unreadable.
    """
    import emcee
    import h5py
    path = Path(path)
    try:
        with h5py.File(path, "r") as f:
            if CHECKPOINT_GROUP not in f:
                raise ResultFileError("not a kinkfit checkpoint", file=path)
    except OSError as exc:
        raise ResultFileError(f"checkpoint is unreadable ({exc})", file=path)
    be = emcee.backends.HDFBackend(str(path), name=CHECKPOINT_GROUP,
                                   read_only=True)
    it = be.iteration
    if it == 0:
        return (np.zeros((0,) + be.shape), np.zeros((0, be.shape[0])), 0)
    return be.get_chain(), be.get_log_prob(), it
