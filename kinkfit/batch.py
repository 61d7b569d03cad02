"""Surveys: many independent fits run as Dask tasks, resumable, summarised.

A *manifest* (TOML) lists fit configs; :func:`run_batch` runs one task per
entry on a Dask ``distributed`` cluster (a local one of ``workers``
single-threaded processes by default, or an existing scheduler given by its
address), records every task in a batch-state file, and writes the survey
products: one table across all fits (ECSV, CSV, LaTeX, Markdown) and a figure
of the planet masses with their 68 % intervals.

Dask is imported lazily, only here: the rest of kinkfit never needs it
(install the ``cluster`` extra to use this module).

Manifest
--------
::

    [survey]
    name = "fictional survey"          # free text, copied to the products
    folder = "survey_out"              # state file, products, one sub-folder
                                       # per entry (relative to the manifest)

    [common]                           # optional overrides for every entry
    max_steps = 2000

    [[fit]]
    name = "disk-a"                    # unique; letters, digits, - _ .
    config = "configs/disk_a.toml"     # relative to the manifest
    damping = ["none", "viscous"]      # optional per-entry overrides ...
    baseline = true
    walkers = 32
    max_steps = 3000
    seed = 7

Override keys (in ``[common]`` or ``[[fit]]``; an entry wins over
``[common]``): ``damping`` (list of assumptions), ``baseline`` (bool),
``walkers``, ``max_steps``, ``check_every``, ``seed`` (ints).  Every fit
writes into ``<folder>/<name>/`` unless the entry sets ``folder``.
Unknown keys are a :class:`~kinkfit.errors.ConfigError` naming the key.
Config files are read by the tasks: a missing or invalid config fails that
task only.

Tasks and state
---------------
Each task loads its config, applies the overrides, forces one process for
the likelihood (Dask workers are daemonic and cannot start a
``multiprocessing`` pool) and calls the fit function (default
:func:`kinkfit.pipeline.run_fit`, with ``resume=True`` so an interrupted fit
continues from its sampler checkpoint).  It returns a small summary (status,
one-line error, result paths, convergence flags and the posterior median and
16th/84th percentiles of mass, radius and azimuth per assumption) and writes
its own files.  User errors (:class:`~kinkfit.errors.KinkfitError`) become a
``failed`` summary at once; unexpected exceptions are retried once by Dask
and then recorded as ``failed``.  A task stopped by an interrupt is
``interrupted``.

The state file ``<folder>/batch_state.json`` is rewritten atomically (temp
file + ``os.replace``) after every finished task.  Re-running with
``resume=True`` skips the tasks recorded ``done`` whose config text and
overrides are unchanged (a fingerprint is stored) and whose result files
still exist; the others run again and resume from their checkpoints.

Caution (as in every kinkfit report): kinks also arise without planets
(instabilities, winds, warps, surface asymmetries); each mass in the survey
table is conditional on the wake model and assumption named in its row, and
must be read beside the planet-free baseline row of the same disk.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import logging
import math
import os
import re
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from .atomic import write_json_atomic
from .errors import ConfigError, InputFileError, KinkfitError, ResultFileError

__all__ = [
    "BatchEntry", "BatchManifest", "BatchRun", "load_manifest",
    "parse_manifest", "run_task", "run_batch", "read_state",
    "survey_table", "survey_markdown", "write_survey_tables",
    "survey_mass_figure", "apply_overrides",
    "STATE_NAME", "SURVEY_PARAMETERS",
]

log = logging.getLogger(__name__)

#: name of the batch-state file inside the survey folder
STATE_NAME = "batch_state.json"
_STATE_CONTENT = "kinkfit batch state"
_STATE_VERSION = 1

#: parameters summarised in the survey table, with their canonical units
SURVEY_PARAMETERS = {"mass": "jupiterMass", "radius": "au", "azimuth": "deg"}

_SURVEY_KEYS = {"name": "str", "folder": "str"}
_OVERRIDE_KEYS = {"damping": "list", "baseline": "bool", "walkers": "int",
                  "max_steps": "int", "check_every": "int", "seed": "int"}
_ENTRY_KEYS = {"name": "str", "config": "str", "folder": "str",
               **_OVERRIDE_KEYS}
_TOP_KEYS = ("survey", "common", "fit")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")


# ------------------------------------------------------------- manifest ---
@dataclass(frozen=True)
class BatchEntry:
    """One fit of the survey.

    Attributes
    ----------
    name : str
        Unique task name (also the default output sub-folder).
    config : Path
        Fit config (TOML), absolute.
    folder : Path
        Output folder of this fit, absolute.
    overrides : dict
        Validated override keys -> values (see the module docstring).
    """

    name: str
    config: Path
    folder: Path
    overrides: dict = field(default_factory=dict, hash=False)


@dataclass(frozen=True)
class BatchManifest:
    """A validated manifest: survey name, folder and entries."""

    path: Path | None
    name: str
    folder: Path
    entries: tuple[BatchEntry, ...]

    @property
    def state_path(self) -> Path:
        return self.folder / STATE_NAME


def _suggest(key, allowed) -> str:
    import difflib
    close = difflib.get_close_matches(str(key), list(allowed), n=1)
    return f" (did you mean '{close[0]}'?)" if close else ""


def _check_value(kind: str, value, key: str, file):
    ok = {"str": isinstance(value, str) and bool(value),
          "bool": isinstance(value, bool),
          "int": isinstance(value, int) and not isinstance(value, bool),
          "list": isinstance(value, list)}[kind]
    if not ok:
        want = {"str": "a non-empty string", "bool": "true or false",
                "int": "an integer", "list": "a list"}[kind]
        raise ConfigError(f"{key} = {value!r}: expected {want}", file=file,
                          key=key, value=value)
    return value


def _overrides(raw: dict, where: str, allowed: dict, file) -> dict:
    from .params import DAMPING_PARAMETER
    out = {}
    for key, value in raw.items():
        full = f"{where}.{key}"
        if key not in allowed:
            raise ConfigError(f"unknown key '{full}'" + _suggest(key, allowed),
                              file=file, key=full)
        _check_value(allowed[key], value, full, file)
        if key == "damping":
            if not value or len(set(value)) != len(value):
                raise ConfigError(f"{full} must list distinct damping "
                                  f"assumptions", file=file, key=full,
                                  value=value)
            for d in value:
                if d not in DAMPING_PARAMETER:
                    raise ConfigError(
                        f"{full}: unknown assumption {d!r} (expected one of "
                        f"{', '.join(DAMPING_PARAMETER)})"
                        + _suggest(d, DAMPING_PARAMETER), file=file, key=full,
                        value=d)
            value = tuple(str(d) for d in value)
        if key in ("walkers", "max_steps", "check_every") and value < (
                4 if key == "walkers" else 10):
            raise ConfigError(f"{full} = {value} is too small", file=file,
                              key=full, value=value)
        if key == "seed" and value < 0:
            raise ConfigError(f"{full} = {value} must be >= 0", file=file,
                              key=full, value=value)
        out[key] = value
    return out


def parse_manifest(text: str, path: str | Path | None = None) -> BatchManifest:
    """Validate manifest TOML text (paths relative to ``path``'s folder).

    Raises
    ------
    ConfigError
        Invalid TOML, unknown or missing keys, wrong types, duplicate names.
    """
    file = None if path is None else str(path)
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"manifest is not valid TOML: {exc}", file=file)
    for key in raw:
        if key not in _TOP_KEYS:
            raise ConfigError(f"unknown manifest section or key '{key}'"
                              + _suggest(key, _TOP_KEYS), file=file, key=key)
    base = Path(path).resolve().parent if path is not None else Path.cwd()
    survey = raw.get("survey", {})
    if not isinstance(survey, dict):
        raise ConfigError("[survey] must be a table", file=file, key="survey")
    for key, value in survey.items():
        if key not in _SURVEY_KEYS:
            raise ConfigError(f"unknown key 'survey.{key}'"
                              + _suggest(key, _SURVEY_KEYS), file=file,
                              key=f"survey.{key}")
        _check_value(_SURVEY_KEYS[key], value, f"survey.{key}", file)
    folder = base / survey.get("folder", "kinkfit_survey")
    common = raw.get("common", {})
    if not isinstance(common, dict):
        raise ConfigError("[common] must be a table", file=file, key="common")
    common = _overrides(common, "common", _OVERRIDE_KEYS, file)
    fits = raw.get("fit")
    if not isinstance(fits, list) or not fits or not all(
            isinstance(f, dict) for f in fits):
        raise ConfigError("the manifest needs at least one [[fit]] table",
                          file=file, key="fit")
    entries, seen = [], set()
    for i, spec in enumerate(fits):
        where = f"fit[{i}]"
        for req in ("name", "config"):
            if req not in spec:
                raise ConfigError(f"missing required key '{where}.{req}'",
                                  file=file, key=f"{where}.{req}")
        name = _check_value("str", spec["name"], f"{where}.name", file)
        if not _NAME_RE.match(name):
            raise ConfigError(f"{where}.name = {name!r}: use letters, digits, "
                              f"'-', '_' or '.'", file=file,
                              key=f"{where}.name", value=name)
        if name in seen:
            raise ConfigError(f"{where}.name = {name!r} is used twice",
                              file=file, key=f"{where}.name", value=name)
        seen.add(name)
        ov = dict(common)
        ov.update(_overrides({k: v for k, v in spec.items()
                              if k not in ("name", "config", "folder")},
                             where, _ENTRY_KEYS, file))
        cfg = base / _check_value("str", spec["config"], f"{where}.config",
                                  file)
        out = base / _check_value("str", spec["folder"], f"{where}.folder",
                                  file) if "folder" in spec else folder / name
        if out.resolve() in {e.folder.resolve() for e in entries}:
            raise ConfigError(f"{where}: output folder {out} is already used "
                              f"by another entry", file=file,
                              key=f"{where}.folder", value=str(out))
        entries.append(BatchEntry(name=name, config=cfg, folder=out,
                                  overrides=ov))
    title = survey.get("name", "")
    return BatchManifest(path=None if path is None else Path(path),
                         name=title, folder=folder, entries=tuple(entries))


def load_manifest(path: str | Path) -> BatchManifest:
    """Read and validate a manifest file (see the module docstring)."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputFileError("manifest file not found", file=path)
    except (OSError, UnicodeDecodeError) as exc:
        raise InputFileError(f"cannot read manifest: {exc}", file=path)
    return parse_manifest(text, path)


# ------------------------------------------------------------ the task ---
def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    if isinstance(exc, KinkfitError):
        return text or type(exc).__name__
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _fingerprint(entry: BatchEntry) -> str:
    """SHA-256 of the config text, the overrides, the output folder and the
    cube's size and modification time (config unreadable: of its path, so
    the task is simply run again)."""
    from .config import load_config
    h = hashlib.sha256()
    try:
        h.update(Path(entry.config).read_bytes())
    except OSError:
        h.update(str(entry.config).encode())
    try:
        st = Path(load_config(entry.config).data.cube).stat()
        h.update(f"cube {st.st_size} {st.st_mtime_ns}".encode())
    except (KinkfitError, OSError):
        h.update(b"no cube")
    h.update(json.dumps({k: list(v) if isinstance(v, tuple) else v
                         for k, v in sorted(entry.overrides.items())},
                        sort_keys=True).encode())
    h.update(str(entry.folder).encode())
    return h.hexdigest()


def apply_overrides(cfg, overrides: dict, folder: Path):
    """A copy of ``cfg`` with the manifest overrides, output ``folder`` and
    one likelihood process; the overrides are appended to ``cfg.text`` as a
    TOML comment so result files record them."""
    wake, sampler = cfg.wake, cfg.sampler
    if "damping" in overrides:
        wake = dataclasses.replace(wake, damping=tuple(overrides["damping"]))
    if "baseline" in overrides:
        wake = dataclasses.replace(wake, baseline=overrides["baseline"])
    sk = {k: overrides[k] for k in ("walkers", "max_steps", "check_every",
                                    "seed") if k in overrides}
    sampler = dataclasses.replace(sampler, workers=1, progress=False, **sk)
    output = dataclasses.replace(cfg.output, folder=Path(folder))
    note = json.dumps({k: list(v) if isinstance(v, tuple) else v
                       for k, v in sorted(overrides.items())}, sort_keys=True)
    text = cfg.text.rstrip("\n") + (f"\n# kinkfit batch overrides: {note}; "
                                    f"output folder: {folder}\n")
    new = dataclasses.replace(cfg, wake=wake, sampler=sampler, output=output,
                              text=text)
    for name in new.wake.damping:   # re-validate priors and walker count
        ndim = new.parameter_set(name).ndim
        if new.sampler.walkers < 2 * ndim:
            raise ConfigError(f"walkers = {new.sampler.walkers} must be at "
                              f"least twice the number of free parameters "
                              f"({ndim}) for damping '{name}'",
                              file=cfg.path, key="walkers",
                              value=new.sampler.walkers)
    return new


def _param_summary(path) -> dict:
    from .report import summary_table
    from .results import read_result
    res = read_result(path)
    t = summary_table(res)
    params = {}
    for row in t:
        if row["name"] in SURVEY_PARAMETERS:
            params[str(row["name"])] = {
                "median": float(row["median"]), "p16": float(row["p16"]),
                "p84": float(row["p84"]), "unit": str(row["unit"])}
    return {"is_baseline": bool(res.is_baseline), "params": params,
            "n_steps": int(res.n_steps), "converged": bool(res.converged),
            "_result": res}


def _fit_summaries(results: dict, converged: dict) -> dict:
    """Per-assumption summaries, with the baseline comparison (ΔBIC)."""
    from .report import baseline_comparison
    fits = {}
    for name, path in results.items():
        s = _param_summary(path)
        s["path"] = str(path)
        s["converged"] = bool(converged.get(name, s["converged"]))
        fits[name] = s
    base = next((s["_result"] for s in fits.values() if s["is_baseline"]),
                None)
    for s in fits.values():
        res = s.pop("_result")
        s["delta_bic"] = None
        if base is not None and not s["is_baseline"]:
            try:
                s["delta_bic"] = float(
                    baseline_comparison(res, base)["delta_bic"])
            except ValueError as exc:
                log.warning("%s: no baseline comparison (%s)", s["path"], exc)
    return fits


def run_task(entry: BatchEntry, *, resume: bool = True,
             fit_fn: Callable | None = None, run_tag: str | None = None
             ) -> dict:
    """Run one survey entry; the function each Dask task executes.

    Parameters
    ----------
    entry : BatchEntry
    resume : bool
        Passed to the fit function (continue from checkpoints); ``False``
        also passes ``force=True`` (replace earlier results).
    run_tag : str, optional
        Identifier of the batch submission.  With ``resume=False`` the task
        leaves a marker ``.batch-<run_tag>`` in its folder when it starts;
        if Dask re-executes the task (worker lost or retired, retry), the
        marker is found and the fit resumes instead of starting over again.
    fit_fn : callable, optional
        ``fit_fn(cfg, *, force, resume, workers, progress)`` returning an
        object with ``output_folder``, ``results`` (assumption -> HDF5
        path), ``converged`` (assumption -> bool) and ``seconds``; default
        :func:`kinkfit.pipeline.run_fit`.

    Returns
    -------
    dict
        ``name, status ("done" | "failed" | "interrupted"), error (one line
        or None), started_utc, finished_utc, seconds, pid, folder, fits``
        with ``fits`` mapping each assumption to ``path, converged,
        is_baseline, n_steps, delta_bic, params`` (``params``: mass, radius,
        azimuth -> median, p16, p84, unit).

    Raises
    ------
    Exception
        Unexpected (non-kinkfit) errors propagate, so that Dask retries.
    """
    from .config import load_config
    t0 = time.perf_counter()
    out = {"name": entry.name, "status": "failed", "error": None,
           "started_utc": _now(), "finished_utc": None, "seconds": 0.0,
           "pid": os.getpid(), "folder": str(entry.folder), "fits": {}}
    try:
        if fit_fn is None:
            from .pipeline import run_fit as fit_fn
        cfg = apply_overrides(load_config(entry.config), entry.overrides,
                              entry.folder)
        Path(entry.folder).mkdir(parents=True, exist_ok=True)
        if not resume and run_tag:
            marker = Path(entry.folder) / f".batch-{run_tag}"
            if marker.exists():
                log.info("task %s re-executed: resuming its checkpoints",
                         entry.name)
                resume = True
            else:
                marker.write_text(_now() + "\n", encoding="utf-8")
        run = fit_fn(cfg, force=not resume, resume=resume, workers=1,
                     progress=False)
        out["fits"] = _fit_summaries(dict(run.results), dict(run.converged))
        out["status"] = "done"
    except KinkfitError as exc:
        out["error"] = _one_line(exc)
        log.info("task %s failed: %s", entry.name, out["error"])
    except KeyboardInterrupt as exc:
        out["status"] = "interrupted"
        out["error"] = _one_line(exc) if str(exc) else "interrupted"
    out["finished_utc"] = _now()
    out["seconds"] = time.perf_counter() - t0
    return out


# ----------------------------------------------------------- the state ---
def read_state(path) -> dict:
    """Read a batch-state file; ``{}``-like fresh state if it does not exist.

    Raises
    ------
    ResultFileError
        The file exists but is not a kinkfit batch state.
    """
    path = Path(path)
    if not path.exists():
        return {"content": _STATE_CONTENT, "version": _STATE_VERSION,
                "tasks": {}}
    try:
        state = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ResultFileError(f"unreadable batch state: {exc}", file=path)
    if not isinstance(state, dict) or state.get("content") != _STATE_CONTENT:
        raise ResultFileError("not a kinkfit batch state file", file=path)
    if int(state.get("version", 0)) > _STATE_VERSION:
        raise ResultFileError(f"batch state version {state.get('version')} "
                              f"is newer than this kinkfit", file=path)
    state.setdefault("tasks", {})
    return state


def _is_complete(record: dict | None, fingerprint: str) -> bool:
    if not record or record.get("status") != "done":
        return False
    if record.get("fingerprint") != fingerprint:
        return False
    fits = (record.get("summary") or {}).get("fits", {})
    return bool(fits) and all(Path(f["path"]).exists() for f in fits.values())


# ------------------------------------------------------------ the batch ---
@dataclass
class BatchRun:
    """Outcome of :func:`run_batch`.

    Attributes
    ----------
    state_path : Path
    summaries : dict of str -> dict
        Task name -> the summary of :func:`run_task` (skipped tasks: the
        stored one).
    ran, skipped : list of str
        Tasks run in this call / skipped as already complete.
    products : list of Path
        Survey tables and figure.
    seconds : float
    """

    state_path: Path
    summaries: dict
    ran: list
    skipped: list
    products: list
    seconds: float

    @property
    def failed(self) -> list:
        """Tasks that did not finish (failed, interrupted, pending)."""
        return [n for n, s in self.summaries.items()
                if s.get("status") != "done"]

    @property
    def not_converged(self) -> list:
        """``"<task>/<assumption>"`` of finished fits that did not converge."""
        return [f"{n}/{a}" for n, s in self.summaries.items()
                if s.get("status") == "done"
                for a, f in (s.get("fits") or {}).items()
                if not f.get("converged")]


def _open_client(scheduler, workers):
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise KinkfitError("kinkfit batch needs dask.distributed: install "
                           "the 'cluster' extra (pip install "
                           "'kinkfit[cluster]')")
    if scheduler:
        try:
            if Path(scheduler).is_file():   # a scheduler file (JSON)
                return Client(scheduler_file=str(scheduler),
                              timeout="30s"), None
            return Client(scheduler, timeout="30s"), None
        except (OSError, TimeoutError, ValueError) as exc:
            raise KinkfitError(f"--scheduler {scheduler}: cannot connect "
                               f"({_one_line(exc)})", key="scheduler",
                               value=scheduler)
    n = int(workers or 1)
    if n < 1:
        raise KinkfitError(f"--workers {n} must be >= 1", key="workers",
                           value=n)
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=None)
    return Client(cluster), cluster


def run_batch(manifest, *, scheduler: str | None = None,
              workers: int | None = None, resume: bool = False,
              restart: bool = False, client=None,
              fit_fn: Callable | None = None) -> BatchRun:
    """Run a survey: one Dask task per manifest entry, then its products.

    Parameters
    ----------
    manifest : path-like or BatchManifest
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:8786``) or path
        of its scheduler file (``dask scheduler --scheduler-file``);
        default: a ``LocalCluster`` of ``workers`` processes, one thread
        each.
    workers : int, optional
        Local worker processes (default 1; ignored with ``scheduler``).
    resume : bool
        Continue an earlier batch: skip complete tasks, resume the others
        from their checkpoints.
    restart : bool
        Start over: rerun every task and replace its results.
    client : dask.distributed.Client, optional
        Use this client (``scheduler`` and ``workers`` are then ignored).
    fit_fn : callable, optional
        Fit function of :func:`run_task` (must be importable by the
        workers); default :func:`kinkfit.pipeline.run_fit`.

    Returns
    -------
    BatchRun

    Raises
    ------
    ResultFileError
        A batch state exists and neither ``resume`` nor ``restart`` is set.
    """
    t0 = time.perf_counter()
    if resume and restart:
        raise KinkfitError("--resume and --restart exclude each other",
                           key="restart")
    man = manifest if isinstance(manifest, BatchManifest) else \
        load_manifest(manifest)
    state_path = man.state_path
    state = read_state(state_path)
    if state_path.exists() and not (resume or restart):
        raise ResultFileError(
            "a batch state exists: rerun with --resume to continue it or "
            "--restart to start over", file=state_path)
    if restart:
        state["tasks"] = {}
    state.update({"manifest": str(man.path) if man.path else "",
                  "survey": man.name})
    tasks = state["tasks"]
    for name in list(tasks):
        if name not in {e.name for e in man.entries}:
            log.info("batch state: task %s is no longer in the manifest", name)
    todo, skipped = [], []
    for e in man.entries:
        fp = _fingerprint(e)
        rec = tasks.get(e.name)
        if resume and _is_complete(rec, fp):
            skipped.append(e.name)
            continue
        attempts = int(rec.get("attempts", 0)) if rec else 0
        tasks[e.name] = {"status": "pending", "fingerprint": fp,
                         "attempts": attempts,
                         "summary": rec.get("summary") if rec else None}
        todo.append(e)
    state["updated_utc"] = _now()
    write_json_atomic(state_path, state)
    log.info("batch: %d task(s) to run, %d already complete", len(todo),
             len(skipped))

    if todo:
        own = client is None
        cluster = None
        if own:
            client, cluster = _open_client(scheduler, workers)
        try:
            _run_tasks(client, todo, tasks, state, state_path,
                       resume=not restart, fit_fn=fit_fn)
        finally:
            if own:
                client.close()
                if cluster is not None:
                    cluster.close()

    summaries = {e.name: (tasks[e.name].get("summary") or {})
                 for e in man.entries}
    table = survey_table(summaries, title=man.name)
    products = write_survey_tables(table, man.folder)
    fig_path = man.folder / "survey_masses.png"
    survey_mass_figure(table).savefig(fig_path, dpi=120)
    products.append(fig_path)
    return BatchRun(state_path=state_path, summaries=summaries,
                    ran=[e.name for e in todo], skipped=skipped,
                    products=products, seconds=time.perf_counter() - t0)


def _run_tasks(client, todo, tasks, state, state_path, *, resume, fit_fn):
    import uuid

    from dask.distributed import as_completed
    tag = uuid.uuid4().hex[:8]
    keys = [f"kinkfit-{e.name}-{tag}" for e in todo]
    by_key = dict(zip(keys, todo))
    for e in todo:
        tasks[e.name]["status"] = "submitted"
        tasks[e.name]["attempts"] += 1
        tasks[e.name]["submitted_utc"] = _now()
    write_json_atomic(state_path, state)
    futures = client.map(run_task, todo, key=keys, pure=False, retries=1,
                         resume=resume, fit_fn=fit_fn, run_tag=tag)
    try:
        for fut in as_completed(futures):
            entry = by_key[fut.key]
            if fut.status == "error":
                exc = fut.exception()
                summary = {"name": entry.name, "status": "failed",
                           "error": _one_line(exc), "finished_utc": _now(),
                           "folder": str(entry.folder), "fits": {}}
            else:
                summary = fut.result()
            rec = tasks[entry.name]
            rec["status"] = summary["status"]
            rec["summary"] = summary
            state["updated_utc"] = _now()
            write_json_atomic(state_path, state)
            level = logging.INFO if summary["status"] == "done" else \
                logging.WARNING
            log.log(level, "task %s: %s%s", entry.name, summary["status"],
                    f" ({summary['error']})" if summary.get("error") else "")
    except KeyboardInterrupt:
        for e in todo:
            if tasks[e.name]["status"] == "submitted":
                tasks[e.name]["status"] = "interrupted"
        state["updated_utc"] = _now()
        write_json_atomic(state_path, state)
        client.cancel(futures)
        raise


# ------------------------------------------------------ survey products ---
def survey_table(summaries: dict, title: str = ""):
    """One row per (disk, assumption) across the survey.

    Parameters
    ----------
    summaries : dict of str -> dict
        Task name -> :func:`run_task` summary (a failed task gives one row
        with ``assumption = "-"``).

    Returns
    -------
    astropy.table.Table
        Columns ``disk``, ``assumption``, ``status``, ``converged``, for
        each of mass (``jupiterMass``), radius (``au``) and azimuth
        (``deg``): ``<p>_median``, ``<p>_p16``, ``<p>_p84`` as unit-carrying
        columns (NaN when not fitted), ``delta_bic`` (planet - baseline,
        NaN for the baseline or when none was fitted), ``n_steps``,
        ``error`` and ``result`` (HDF5 path).
    """
    from astropy import units as u
    from astropy.table import Table
    rows = []
    for disk, s in summaries.items():
        status = s.get("status", "pending") if s else "pending"
        fits = (s or {}).get("fits") or {}
        if not fits:
            rows.append((disk, "-", status, False, {}, math.nan, 0,
                         (s or {}).get("error") or "", ""))
            continue
        for name, f in fits.items():
            dbic = f.get("delta_bic")
            rows.append((disk, name, status, bool(f.get("converged")),
                         f.get("params", {}),
                         math.nan if dbic is None else float(dbic),
                         int(f.get("n_steps", 0)), s.get("error") or "",
                         str(f.get("path", ""))))
    t = Table()
    t["disk"] = [r[0] for r in rows] if rows else np.array([], dtype=str)
    t["assumption"] = [r[1] for r in rows] if rows else np.array([], str)
    t["status"] = [r[2] for r in rows] if rows else np.array([], str)
    t["converged"] = np.array([r[3] for r in rows], dtype=bool)
    for p, unit in SURVEY_PARAMETERS.items():
        for q in ("median", "p16", "p84"):
            vals = []
            for r in rows:
                d = r[4].get(p)
                if d is None:
                    vals.append(math.nan)
                else:
                    vals.append(u.Quantity(d[q], d["unit"] or "").to_value(
                        unit))
            t[f"{p}_{q}"] = np.array(vals, dtype=float) * u.Unit(unit)
            t[f"{p}_{q}"].format = ".4g"
            t[f"{p}_{q}"].description = (
                f"posterior {'median' if q == 'median' else q[1:] + 'th percentile'}"
                f" of the planet {p}")
    t["delta_bic"] = np.array([r[5] for r in rows], dtype=float)
    t["delta_bic"].format = ".1f"
    t["delta_bic"].description = ("BIC(planet) - BIC(planet-free baseline) "
                                  "of the same disk; negative favours the "
                                  "planet model (Schwarz 1978)")
    t["n_steps"] = np.array([r[6] for r in rows], dtype=int)
    t["error"] = [r[7] for r in rows] if rows else np.array([], str)
    t["result"] = [r[8] for r in rows] if rows else np.array([], str)
    t.meta.update({
        "title": title, "created_utc": _now(),
        "intervals": "median and 16th/84th percentiles of the posterior",
        "caution": "masses are conditional on the wake model and the damping "
                   "assumption of the row; kinks can have other causes; "
                   "compare with the planet-free baseline (delta_bic)",
        "thermal_mass_convention": "M_th = (h_p/r_p)^3 M_star"})
    return t


def _fmt(med, lo, hi) -> str:
    if not np.isfinite(med):
        return "—"
    em, ep = med - lo, hi - med
    err = min(em, ep)
    digits = 2 if not (np.isfinite(err) and err > 0) else max(
        0, 1 - int(math.floor(math.log10(err))))
    return f"{med:.{digits}f} (-{em:.{digits}f}/+{ep:.{digits}f})"


def survey_markdown(table) -> str:
    """Markdown version of :func:`survey_table` (intervals inline)."""
    head = ("| disk | assumption | status | converged | mass [M_Jup] | "
            "radius [au] | azimuth [deg] | ΔBIC vs baseline | error |")
    rows = [head, "|" + "---|" * 9]
    for r in table:
        cells = [r["disk"], r["assumption"], r["status"],
                 "yes" if r["converged"] else "no"]
        for p in SURVEY_PARAMETERS:
            cells.append(_fmt(float(r[f"{p}_median"]), float(r[f"{p}_p16"]),
                              float(r[f"{p}_p84"])))
        cells.append("—" if not np.isfinite(r["delta_bic"])
                     else f"{r['delta_bic']:.1f}")
        cells.append(str(r["error"]).replace("|", "/") or "")
        rows.append("| " + " | ".join(cells) + " |")
    note = ("\nMedians with 16th–84th percentile intervals. Each mass is "
            "conditional on the wake model and the damping assumption of its "
            "row; kinks can also come from other processes, so read every "
            "planet row beside the planet-free baseline (ΔBIC).\n")
    return "\n".join(rows) + "\n" + note


def _latex_escape(s: str) -> str:
    for a, b in (("\\", r"\textbackslash{}"), ("_", r"\_"), ("%", r"\%"),
                 ("&", r"\&"), ("#", r"\#"), ("$", r"\$")):
        s = s.replace(a, b)
    return s


def _latex(table):
    from astropy.table import Table
    out = Table()
    out["Disk"] = [_latex_escape(str(s)) for s in table["disk"]]
    out["Assumption"] = [_latex_escape(str(s)) for s in table["assumption"]]
    for p, head in (("mass", r"$M_p$ [$M_{\rm J}$]"), ("radius", r"$r_p$ [au]"),
                    ("azimuth", r"$\phi_p$ [deg]")):
        vals = []
        for r in table:
            med, lo, hi = (float(r[f"{p}_{q}"]) for q in ("median", "p16",
                                                          "p84"))
            if not np.isfinite(med):
                vals.append("--")
                continue
            s = _fmt(med, lo, hi)
            m, rest = s.split(" (")
            em, ep = rest.rstrip(")").split("/")
            vals.append(f"${m}^{{{ep}}}_{{{em}}}$")
        out[head] = vals
    out[r"$\Delta$BIC"] = ["--" if not np.isfinite(v) else f"{v:.1f}"
                           for v in table["delta_bic"]]
    out["Converged"] = ["yes" if c else "no" for c in table["converged"]]
    out["Status"] = list(table["status"])
    return out


def write_survey_tables(table, folder, stem: str = "survey") -> list[Path]:
    """Write the survey table as ECSV, CSV, LaTeX and Markdown.

    Returns
    -------
    list of Path: ``<stem>.ecsv``, ``.csv``, ``.tex``, ``.md`` in ``folder``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    paths = [folder / f"{stem}.{ext}" for ext in ("ecsv", "csv", "tex", "md")]
    table.write(paths[0], format="ascii.ecsv", overwrite=True)
    table.write(paths[1], format="ascii.csv", overwrite=True)
    caption = ("Planet parameters across the survey (posterior median and "
               "16th--84th percentiles). Each mass is conditional on the wake "
               "model and damping assumption of its row; compare with the "
               "planet-free baseline ($\\Delta$BIC).")
    _latex(table).write(paths[2], format="ascii.latex", overwrite=True,
                        latexdict={"caption": caption, "tabletype": "table"})
    paths[3].write_text(survey_markdown(table), encoding="utf-8")
    return paths


def survey_mass_figure(table, *, fig=None, ax=None):
    """Planet masses with 68 % intervals, one row per disk and assumption.

    Parameters
    ----------
    table : astropy.table.Table
        From :func:`survey_table`; rows without a mass (baselines, failed
        tasks) are listed as text, not plotted.
    fig, ax : matplotlib Figure / Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib
    if fig is None and ax is None:
        from matplotlib.figure import Figure
        fig = Figure(figsize=(7.2, 1.2 + 0.35 * max(len(table), 1)))
    if ax is None:
        ax = fig.add_subplot(1, 1, 1)
    fig = ax.figure
    med = np.asarray(table["mass_median"], dtype=float)
    lo = np.asarray(table["mass_p16"], dtype=float)
    hi = np.asarray(table["mass_p84"], dtype=float)
    ok = np.isfinite(med)
    assumptions = sorted({str(a) for a, k in zip(table["assumption"], ok) if k})
    colours = matplotlib.rcParams["axes.prop_cycle"].by_key().get(
        "color", ["k"])
    labels = [f"{d} · {a}" if a != "-" else str(d)
              for d, a in zip(table["disk"], table["assumption"])]
    y = np.arange(len(table))[::-1]
    for i, a in enumerate(assumptions):
        sel = ok & (np.asarray(table["assumption"]).astype(str) == a)
        if sel.any():
            ax.errorbar(med[sel], y[sel],
                        xerr=[med[sel] - lo[sel], hi[sel] - med[sel]],
                        fmt="o", capsize=3, color=colours[i % len(colours)],
                        label=f"damping: {a}")
    for k in np.flatnonzero(~ok):
        reason = ("planet-free baseline" if table["assumption"][k] == "baseline"
                  else str(table["status"][k]))
        ax.annotate(f"({reason})", (0.02, y[k]),
                    xycoords=("axes fraction", "data"), va="center",
                    fontsize=8, color="0.4")
    dbic = np.asarray(table["delta_bic"], dtype=float)
    for k in np.flatnonzero(ok & np.isfinite(dbic)):
        ax.annotate(f"ΔBIC {dbic[k]:+.1f}", (1.02, y[k]),
                    xycoords=("axes fraction", "data"), ha="left",
                    va="center", fontsize=8, color="0.3",
                    annotation_clip=False)
    ax.set_yticks(y)
    ax.set_yticklabels(labels)
    if ok.any() and np.all(lo[ok] > 0):
        from matplotlib.ticker import FuncFormatter
        ax.set_xscale("log")
        fmt = FuncFormatter(lambda v, _: f"{v:g}")
        ax.xaxis.set_major_formatter(fmt)
        def minor(v, _):
            mant = v / 10.0 ** math.floor(math.log10(v)) if v > 0 else 0.0
            return f"{v:g}" if round(mant) in (2, 5) else ""
        ax.xaxis.set_minor_formatter(FuncFormatter(minor))
    ax.set_xlabel(r"planet mass $M_p$ [$M_{\rm J}$] (median, 16th–84th "
                  r"percentiles)")
    ax.set_ylabel("disk · assumption")
    ax.set_ylim(-0.7, len(table) - 0.3)
    if assumptions:
        ax.legend(loc="best", fontsize=8)
    ax.set_title("Masses conditional on the wake model; compare each disk's "
                 "baseline", fontsize=9)
    fig.tight_layout()
    return fig
