"""Injection-recovery calibration: are the posteriors honest?

``kinkfit calibrate CONFIG`` draws planets from the config's prior (seeded
:func:`numpy.random.default_rng`), writes a synthetic cube for each with
:func:`kinkfit.scenario.synth_from_config` (the config's beam, channels and
SNR, its own noise seed), fits it with the real pipeline
(:func:`kinkfit.pipeline.run_fit`, one damping assumption, no baseline) and
compares the posterior with the injected truth.

Statistics (per parameter with an injected truth; the jitter nuisance has
none and is skipped):

* **quantile of the truth** ``u = P(theta < theta_true | data)`` (fraction of
  posterior samples below the truth).  For a calibrated posterior ``u`` is
  uniform on [0, 1] over injections drawn from the prior (the standard
  simulation-based-calibration argument).
* **coverage** of the central ``p`` interval: the truth is inside when
  ``|u - 1/2| < p / 2``; the fraction inside over ``n`` injections has the
  binomial standard error ``sqrt(p (1 - p) / n)`` under calibration.
* **rank** of the truth among ``L`` posterior draws (chosen with a seeded
  generator): uniform on ``{0, ..., L}`` under calibration; shown as a
  histogram.
* **bias** ``(median - truth) / width`` with ``width = (p84 - p16) / 2``;
  its mean over injections and the standard error of that mean.

The azimuth is treated as a plain interval parameter (no wrap-around): a
posterior straddling +-180 deg is rare for the priors used here but would
count as a miss.

Resumable: one JSON state file (written atomically: temporary file, fsync,
``os.replace``) holds a record per finished injection; a rerun with
``resume=True`` skips them, a campaign with a different config, seed or
damping refuses to resume.  Parallel: injections are independent and run in
a :class:`concurrent.futures.ProcessPoolExecutor` when ``workers > 1``.
Products: ``calibration.h5`` (HDF5), ``calibration_coverage.{ecsv,csv,md}``
and figures (rank histograms, coverage, bias).

Caution (PHYSICS.md section 8): a calibrated posterior is calibrated *for
the model it was fitted with*; injections here use the same wake model as
the fit, so model error (other kink sources, a wrong damping law) is not
tested.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import os
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from .atomic import write_json_atomic
from .errors import ConfigError, KinkfitError, ResultFileError

__all__ = ["Injection", "Posterior", "CalibrationRun", "draw_injections",
           "pipeline_posterior", "truth_statistics", "coverage", "rank_histogram",
           "bias_summary", "run_calibration", "read_calibration_state",
           "coverage_table", "write_calibration_products", "LEVELS",
           "STATE_FILE_NAME"]

log = logging.getLogger(__name__)

#: central credible-interval probabilities reported
LEVELS = (0.5, 0.68, 0.95)
STATE_FILE_NAME = "calibration_state.json"
_STATE_CONTENT = "kinkfit calibration state"
_STATE_VERSION = 1
#: posterior draws per injection for the rank statistic
N_RANK = 99


@dataclass(frozen=True)
class Injection:
    """One injected planet.

    Attributes
    ----------
    index : int
    values : dict of str -> float
        Drawn parameter values (canonical units, ``kinkfit.params``).
    truths : dict of str -> float
        The parameters compared with the posterior (``values`` minus the
        jitter nuisance).
    damping : str
    noise_seed, sampler_seed : int
    folder : str
        Where its cube and fit go.
    cfg_path : str or None
        Config file (reloaded in worker processes).
    cfg_text : str
        Config text (used when ``cfg_path`` is None).
    """

    index: int
    values: dict
    truths: dict
    damping: str
    noise_seed: int
    sampler_seed: int
    folder: str
    cfg_path: str | None = None
    cfg_text: str = ""


@dataclass
class Posterior:
    """What a fit function returns: flat samples of the free parameters."""

    names: tuple
    samples: np.ndarray           # (n, k)
    converged: bool = True
    result_path: str = ""


@dataclass
class CalibrationRun:
    """Outcome of :func:`run_calibration`."""

    folder: Path
    state_path: Path
    records: dict = field(default_factory=dict)
    ran: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    failed: list = field(default_factory=list)
    products: list = field(default_factory=list)
    names: tuple = ()
    seconds: float = 0.0


# ------------------------------------------------------------ injections ---
def draw_injections(cfg, n: int, *, seed: int = 0, damping: str | None = None,
                    folder=None) -> list[Injection]:
    """Draw ``n`` planets from the config's prior.

    Parameters
    ----------
    cfg : KinkfitConfig
    n : int
        Number of injections (>= 1).
    seed : int
        Seed of :func:`numpy.random.default_rng` for the draws; noise and
        sampler seeds of injection ``i`` are derived from it.
    damping : str, optional
        Assumption injected and fitted; default the first of ``wake.damping``.
    folder : path-like, optional
        Campaign folder; default ``<output.folder>/calibration``.

    Returns
    -------
    list of Injection
    """
    if isinstance(n, bool) or int(n) != n or n < 1:
        raise ConfigError(f"number of injections must be a positive integer, "
                          f"got {n!r}", key="injections", value=n)
    damping = cfg.wake.damping[0] if damping is None else damping
    pset = cfg.parameter_set(damping)
    rng = np.random.default_rng(seed)
    theta = pset.sample_prior(rng, int(n))
    vals = pset.unpack(theta)
    seeds = np.random.default_rng([seed, 1]).integers(0, 2 ** 31 - 1, size=(int(n), 2))
    folder = Path(folder) if folder is not None else Path(cfg.output.folder) / "calibration"
    out = []
    for i in range(int(n)):
        values = {k: float(v[i]) for k, v in vals.items()}
        truths = {k: values[k] for k in pset.free if k != "jitter"}
        out.append(Injection(i, values, truths, damping, int(seeds[i, 0]),
                             int(seeds[i, 1]), str(folder / f"inj_{i:04d}"),
                             None if cfg.path is None else str(cfg.path), cfg.text))
    return out


def _injection_config(cfg, inj: Injection):
    """The config of one injection: own cube, folder, seed, one assumption."""
    folder = Path(inj.folder)
    wake = dataclasses.replace(cfg.wake, damping=(inj.damping,), baseline=False,
                               aspect_ratio=inj.values.get("aspect_ratio",
                                                           cfg.wake.aspect_ratio))
    sampler = dataclasses.replace(cfg.sampler, seed=inj.sampler_seed, workers=1,
                                  progress=False)
    data = dataclasses.replace(cfg.data, cube=folder / "cube.fits")
    output = dataclasses.replace(cfg.output, folder=folder, overwrite=False)
    note = json.dumps({"injection": inj.index, "values": inj.values,
                       "noise_seed": inj.noise_seed}, sort_keys=True)
    text = cfg.text.rstrip("\n") + f"\n# kinkfit calibration injection: {note}\n"
    return dataclasses.replace(cfg, wake=wake, sampler=sampler, data=data,
                               output=output, text=text)


def _load(inj: Injection):
    from .config import load_config, parse_config
    if inj.cfg_path is not None:
        return load_config(inj.cfg_path)
    return parse_config(inj.cfg_text)


def pipeline_posterior(inj: Injection, *, fit_fn: Callable | None = None,
                       resume: bool = True) -> Posterior:
    """Synthesise the injection's cube and fit it with the real pipeline.

    Parameters
    ----------
    inj : Injection
    fit_fn : callable, optional
        ``fit_fn(cfg, *, force, resume, workers, progress) -> FitRun``;
        default :func:`kinkfit.pipeline.run_fit`.
    resume : bool
        Keep an existing cube and continue the fit's checkpoint.

    Returns
    -------
    Posterior
    """
    from .config import SynthTruth
    from .results import read_result
    from .scenario import synth_from_config
    if fit_fn is None:
        from .pipeline import run_fit as fit_fn
    cfg = _injection_config(_load(inj), inj)
    v = inj.values
    truth = SynthTruth(mass_mjup=v["mass"], radius_au=v["radius"],
                       azimuth_deg=v["azimuth"], damping=inj.damping,
                       alpha=v.get("alpha", 0.0), efold=v.get("efold", math.inf))
    Path(inj.folder).mkdir(parents=True, exist_ok=True)
    cube = Path(cfg.data.cube)
    if not (resume and cube.exists()):
        synth_from_config(cfg, output=cube, overwrite=True, truth=truth,
                          seed=inj.noise_seed)
    run = fit_fn(cfg, force=not resume, resume=resume, workers=1, progress=False)
    path = run.results[inj.damping]
    res = read_result(path)
    return Posterior(tuple(res.param_names), np.asarray(res.samples, float),
                     bool(res.converged), str(path))


# ------------------------------------------------------------- statistics ---
def truth_statistics(post: Posterior, truths: dict, *, seed: int = 0,
                     n_rank: int = N_RANK) -> dict:
    """Quantile, rank, median and width of each truth in one posterior.

    Returns
    -------
    dict
        ``{name: {"truth", "quantile", "rank", "n_rank", "median", "p16",
        "p84", "width", "bias"}}`` for every name in both ``truths`` and
        ``post.names``.
    """
    samples = np.asarray(post.samples, float)
    if samples.ndim != 2 or samples.shape[0] < 2:
        raise KinkfitError(f"posterior has {samples.shape} samples; need (n >= 2, k)")
    rng = np.random.default_rng(seed)
    L = int(min(n_rank, samples.shape[0]))
    pick = rng.choice(samples.shape[0], size=L, replace=False)
    out = {}
    for j, name in enumerate(post.names):
        if name not in truths:
            continue
        col = samples[:, j]
        t = float(truths[name])
        p16, med, p84 = np.percentile(col, [16, 50, 84])
        width = 0.5 * (p84 - p16)
        out[name] = {"truth": t, "quantile": float(np.mean(col < t)),
                     "rank": int(np.sum(col[pick] < t)), "n_rank": L,
                     "median": float(med), "p16": float(p16), "p84": float(p84),
                     "width": float(width),
                     "bias": float((med - t) / width) if width > 0 else float("nan")}
    return out


def coverage(quantiles, levels=LEVELS) -> dict:
    """Fraction of truths inside the central intervals.

    Parameters
    ----------
    quantiles : ndarray, shape (n,)
        Quantile of the truth in each posterior.
    levels : sequence of float

    Returns
    -------
    dict
        ``{level: (fraction, binomial_sigma, n_inside, n)}`` with
        ``binomial_sigma = sqrt(p (1 - p) / n)`` at the nominal ``p``.
    """
    u = np.asarray(quantiles, float)
    u = u[np.isfinite(u)]
    n = u.size
    out = {}
    for p in levels:
        inside = int(np.sum(np.abs(u - 0.5) < 0.5 * p))
        out[float(p)] = (inside / n if n else float("nan"),
                         math.sqrt(p * (1 - p) / n) if n else float("nan"), inside, n)
    return out


def rank_histogram(ranks, n_rank: int, nbins: int = 10):
    """Counts of ranks in ``nbins`` equal groups of ``{0..n_rank}``.

    ``n_rank + 1`` must be divisible by ``nbins`` for equal expected counts
    (100 ranks, 10 bins by default).

    Returns
    -------
    counts : ndarray, shape (nbins,)
    edges : ndarray, shape (nbins + 1,)
    """
    if (n_rank + 1) % nbins:
        raise ConfigError(f"{n_rank + 1} rank values do not split into {nbins} "
                          "equal bins", key="nbins", value=nbins)
    edges = np.linspace(-0.5, n_rank + 0.5, nbins + 1)
    counts, _ = np.histogram(np.asarray(ranks, float), bins=edges)
    return counts, edges


def bias_summary(bias) -> tuple[float, float, int]:
    """Mean of ``(median - truth) / width`` and its standard error."""
    b = np.asarray(bias, float)
    b = b[np.isfinite(b)]
    if b.size < 2:
        return (float(np.mean(b)) if b.size else float("nan"), float("nan"), b.size)
    return float(b.mean()), float(b.std(ddof=1) / math.sqrt(b.size)), int(b.size)


# ------------------------------------------------------------------ state ---
def read_calibration_state(path) -> dict:
    """Read a calibration state file (a fresh state if it does not exist)."""
    path = Path(path)
    if not path.exists():
        return {"content": _STATE_CONTENT, "version": _STATE_VERSION,
                "fingerprint": None, "injections": {}}
    try:
        state = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ResultFileError(f"unreadable calibration state: {exc}", file=path)
    if not isinstance(state, dict) or state.get("content") != _STATE_CONTENT:
        raise ResultFileError("not a kinkfit calibration state file", file=path)
    if int(state.get("version", 0)) > _STATE_VERSION:
        raise ResultFileError("calibration state is newer than this kinkfit", file=path)
    state.setdefault("injections", {})
    return state


def _fingerprint(cfg, seed, damping) -> str:
    h = hashlib.sha256()
    h.update(cfg.text.encode())
    h.update(f"|seed={seed}|damping={damping}".encode())
    return h.hexdigest()


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0] if text else ''}"


def _run_one(inj: Injection, posterior_fn, resume: bool) -> dict:
    """Run one injection; a JSON-able record.

    Status ``done``, ``failed`` (a :class:`KinkfitError`: bad draw, too few
    traced points...) or ``error`` (an unexpected exception, logged with its
    traceback); both of the latter are retried by a resumed campaign.
    """
    t0 = time.perf_counter()
    rec = {"index": inj.index, "values": inj.values, "truths": inj.truths,
           "noise_seed": inj.noise_seed, "status": "failed", "error": None,
           "pid": os.getpid()}
    try:
        if posterior_fn is None:
            post = pipeline_posterior(inj, resume=resume)
        else:
            post = posterior_fn(inj)
        rec["stats"] = truth_statistics(post, inj.truths, seed=inj.sampler_seed)
        rec["converged"] = bool(post.converged)
        rec["result_path"] = post.result_path
        rec["n_samples"] = int(np.asarray(post.samples).shape[0])
        rec["status"] = "done"
    except KinkfitError as exc:
        rec["error"] = _one_line(exc)
        log.warning("injection %d failed: %s", inj.index, rec["error"])
    except Exception as exc:  # noqa: BLE001 - one bad injection must not end a campaign
        rec["error"] = _one_line(exc)
        rec["status"] = "error"
        log.exception("injection %d raised an unexpected error", inj.index)
    rec["seconds"] = time.perf_counter() - t0
    return rec


def run_calibration(cfg, *, injections: int = 100, seed: int = 0,
                    damping: str | None = None, workers: int = 1,
                    resume: bool = False, folder=None,
                    posterior_fn: Callable | None = None, levels=LEVELS,
                    write_products: bool = True) -> CalibrationRun:
    """Run (or continue) an injection-recovery campaign.

    Parameters
    ----------
    cfg : KinkfitConfig
        Needs ``[synth]`` (the observing setup of the injections).
    injections : int
        Number of planets drawn from the prior.
    seed : int
        Campaign seed (draws, noise and sampler seeds).
    damping : str, optional
        Assumption injected and fitted (default the first of ``wake.damping``).
    workers : int
        Parallel injection processes (1: in this process).
    resume : bool
        Skip injections already recorded in the state file.  Without it an
        existing state file is an error (delete it or pass ``resume``).
    folder : path-like, optional
        Campaign folder (default ``<output.folder>/calibration``).
    posterior_fn : callable, optional
        ``posterior_fn(Injection) -> Posterior`` instead of synthesising a
        cube and running the pipeline (tests; must be picklable when
        ``workers > 1``).
    levels : sequence of float
        Central interval probabilities.
    write_products : bool
        Write HDF5, tables and figures at the end.

    Returns
    -------
    CalibrationRun
    """
    if cfg.synth is None and posterior_fn is None:
        raise ConfigError("calibrate needs a [synth] section (the observing setup "
                          "of the injections)", file=cfg.path, key="synth")
    if isinstance(workers, bool) or int(workers) < 1:
        raise ConfigError(f"workers must be >= 1, got {workers!r}", key="workers",
                          value=workers)
    t0 = time.perf_counter()
    damping = cfg.wake.damping[0] if damping is None else damping
    folder = Path(folder) if folder is not None else Path(cfg.output.folder) / "calibration"
    todo_all = draw_injections(cfg, injections, seed=seed, damping=damping,
                               folder=folder)
    state_path = folder / STATE_FILE_NAME
    state = read_calibration_state(state_path)
    fp = _fingerprint(cfg, seed, damping)
    if state_path.exists():
        if not resume:
            raise ResultFileError(f"{state_path} exists; pass --resume to continue "
                                  "it or delete it to start over", file=state_path)
        if state.get("fingerprint") != fp:
            raise ResultFileError("calibration state belongs to a different config, "
                                  "seed or damping; use another folder",
                                  file=state_path)
    state.update({"fingerprint": fp, "seed": int(seed), "damping": damping,
                  "config_path": None if cfg.path is None else str(cfg.path)})
    run = CalibrationRun(folder=folder, state_path=state_path)
    todo = []
    for inj in todo_all:
        rec = state["injections"].get(str(inj.index))
        if rec is not None and rec.get("status") == "done":
            run.skipped.append(inj.index)
        else:
            todo.append(inj)
    write_json_atomic(state_path, state)

    def record(rec):
        state["injections"][str(rec["index"])] = rec
        write_json_atomic(state_path, state)
        (run.ran if rec["status"] == "done" else run.failed).append(rec["index"])

    if workers == 1 or len(todo) <= 1:
        for inj in todo:
            record(_run_one(inj, posterior_fn, resume))
    else:
        with ProcessPoolExecutor(max_workers=int(workers)) as pool:
            futs = {pool.submit(_run_one, inj, posterior_fn, resume): inj for inj in todo}
            for fut in as_completed(futs):
                record(fut.result())
    run.records = {int(k): v for k, v in state["injections"].items()
                   if int(k) < int(injections)}
    done = [r for r in run.records.values() if r.get("status") == "done"]
    run.names = tuple(done[0]["stats"]) if done else ()
    if write_products and done:
        run.products = write_calibration_products(run, levels=levels,
                                                  title=cfg.title)
    run.seconds = time.perf_counter() - t0
    return run


# --------------------------------------------------------------- products ---
def _arrays(records: dict, names):
    done = sorted((k, r) for k, r in records.items() if r.get("status") == "done")
    keys = ("truth", "quantile", "rank", "median", "width", "bias")
    arr = {k: np.full((len(done), len(names)), np.nan) for k in keys}
    n_rank = np.zeros(len(done), dtype=int)
    for i, (_, r) in enumerate(done):
        for j, name in enumerate(names):
            s = r["stats"].get(name)
            if s is None:
                continue
            for k in keys:
                arr[k][i, j] = s[k]
            n_rank[i] = s["n_rank"]
    return [k for k, _ in done], arr, n_rank


def coverage_table(run: CalibrationRun, levels=LEVELS):
    """Coverage, bias and rank-uniformity per parameter (astropy Table)."""
    from astropy.table import Table
    from scipy import stats
    idx, arr, n_rank = _arrays(run.records, run.names)
    rows = []
    for j, name in enumerate(run.names):
        cov = coverage(arr["quantile"][:, j], levels)
        b, be, nb = bias_summary(arr["bias"][:, j])
        row = {"parameter": name, "n": cov[float(levels[0])][3]}
        for p in levels:
            f, s, _, _ = cov[float(p)]
            row[f"cov{int(round(100 * p))}"] = f
            row[f"cov{int(round(100 * p))}_err"] = s
        row["bias"] = b
        row["bias_err"] = be
        # uniformity of the quantiles (Kolmogorov-Smirnov against U(0, 1))
        u = arr["quantile"][:, j]
        u = u[np.isfinite(u)]
        row["ks_pvalue"] = float(stats.kstest(u, "uniform").pvalue) if u.size else np.nan
        rows.append(row)
    t = Table(rows=rows) if rows else Table()
    for c in t.colnames[2:]:
        t[c].format = ".3f"
    t.meta.update({"levels": [float(p) for p in levels],
                   "note": "coverage = fraction of truths inside the central "
                           "interval; *_err = binomial sigma at the nominal level; "
                           "bias = mean (median - truth) / ((p84 - p16) / 2)"})
    return t


def _markdown(t) -> str:
    lines = ["| " + " | ".join(t.colnames) + " |", "|" + "---|" * len(t.colnames)]
    for row in t:
        cells = []
        for c in t.colnames:
            v = row[c]
            cells.append(f"{v:.3f}" if isinstance(v, (float, np.floating)) else str(v))
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines) + "\n"


def write_calibration_products(run: CalibrationRun, *, levels=LEVELS,
                               title: str = "") -> list[Path]:
    """Write ``calibration.h5``, ``calibration_coverage.{ecsv,csv,md}`` and
    figures ``calibration_ranks.png``, ``calibration_coverage.png``.

    The HDF5 file is written to a temporary file and moved into place.
    """
    import h5py
    from .plots.calibration import coverage_figure, rank_figure
    folder = Path(run.folder)
    folder.mkdir(parents=True, exist_ok=True)
    idx, arr, n_rank = _arrays(run.records, run.names)
    out = []
    path = folder / "calibration.h5"
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".calib-", suffix=".h5")
    os.close(fd)
    try:
        with h5py.File(tmp, "w") as f:
            f.attrs["content"] = "kinkfit injection-recovery calibration"
            f.attrs["title"] = title
            f.attrs["param_names"] = list(run.names)
            f.attrs["levels"] = list(map(float, levels))
            f.create_dataset("index", data=np.asarray(idx, dtype=np.int64))
            f.create_dataset("n_rank", data=n_rank)
            for k, v in arr.items():
                f.create_dataset(k, data=v)
            conv = [bool(run.records[i].get("converged", False)) for i in idx]
            f.create_dataset("converged", data=np.asarray(conv, dtype=bool))
            g = f.create_group("coverage")
            for j, name in enumerate(run.names):
                cov = coverage(arr["quantile"][:, j], levels)
                g.create_dataset(name, data=np.array([[p, *cov[float(p)][:3]]
                                                      for p in levels]))
            g.attrs["columns"] = ["level", "fraction", "binomial_sigma", "n_inside"]
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    out.append(path)
    t = coverage_table(run, levels)
    for ext, fmt in (("ecsv", "ascii.ecsv"), ("csv", "ascii.csv")):
        p = folder / f"calibration_coverage.{ext}"
        t.write(p, format=fmt, overwrite=True)
        out.append(p)
    p = folder / "calibration_coverage.md"
    p.write_text(_markdown(t), encoding="utf-8")
    out.append(p)
    L = int(n_rank.max()) if n_rank.size else N_RANK
    for stem, fig in (("calibration_ranks", rank_figure(arr["rank"], L, run.names)),
                      ("calibration_coverage", coverage_figure(arr["quantile"],
                                                               run.names))):
        p = folder / f"{stem}.png"
        fig.savefig(p, dpi=110)
        out.append(p)
    return out
