"""One HDF5 result file per fit: layout, writer, reader.

:class:`FitResult` is the in-memory result; :func:`write_result` stores it
atomically and :func:`read_result` reads it back exactly (every array
bit-for-bit, every scalar and string equal).  Everything the report and the
figures need is in the file, so they can be regenerated from it alone.
The sampler's working checkpoint (:mod:`kinkfit.sampling`) is a separate
file; this one is the product.

File layout (``schema_version`` = :data:`SCHEMA_VERSION`)
-------------------------------------------------------------

=================================  =========================================
path                               content
=================================  =========================================
``/`` attrs                        ``schema_version`` (int), ``content`` =
                                   ``"kinkfit fit result"``,
                                   ``package_version``, ``created_utc``
                                   (ISO 8601), ``title``, ``damping``,
                                   ``likelihood_kind``, ``likelihood_dof``,
                                   ``seed``, ``is_baseline``
``/provenance`` attrs              ``cube_path``, ``cube_sha256``,
                                   ``version_<lib>`` for python, numpy,
                                   scipy, astropy, emcee, h5py, kinkfit
``/provenance/config_text``        the TOML config as read (string dataset)
``/parameters`` attrs              ``names``, ``units`` (astropy strings),
                                   ``labels`` (LaTeX), ``priors`` (one-line
                                   descriptions), ``prior_specs`` (JSON), all
                                   per free parameter in sampler order
``/parameters/fixed`` attrs        fixed parameter -> value (canonical unit)
``/parameters/truths`` attrs       injected values when known (synthetic)
``/posterior/samples``             (n, ndim) flat samples after burn/thin
``/posterior/log_prob``            (n,) their log-posterior
``/posterior/map_theta``           (ndim,) highest-posterior chain sample
``/posterior`` attrs               ``map_loglike``: its log-likelihood
``/walkers/chain``                 (n_steps, nwalkers, ndim) full chain
``/walkers/log_prob``              (n_steps, nwalkers)
``/walkers/acceptance``            (nwalkers,) acceptance fractions
``/walkers/tau``                   (ndim,) autocorrelation time, steps
``/walkers/tau_history``           (k, 1 + ndim) iteration, tau per check
``/walkers`` attrs                 ``converged``, ``n_steps``, ``burn``,
                                   ``thin``
``/pointwise/loglike``             (k, npts) per-point log-likelihood of a
                                   thinned subset of the samples
``/pointwise/sample_index``        (k,) rows of ``/posterior/samples`` used
``/traced/<name>``                 (npts,) traced-data arrays (``r_au``,
                                   ``phi_rad``, ``a_r``, ``a_phi``,
                                   ``grad_kms_per_arcsec``,
                                   ``offset_arcsec``, ``sigma_arcsec``,
                                   ``channel`` and any extra, e.g.
                                   ``x_arcsec``)
``/model/map_offset_arcsec``       (npts,) displacement of the MAP model
``/model/median_offset_arcsec``    (npts,) pointwise posterior median of the
                                   model displacement (over the subset)
``/model`` attrs                   forward kink model actually used, str ->
                                   float: ``node_subpixels``,
                                   ``back_node_stride``, ``nodes``, the node
                                   check (configured ``node_check_
                                   subpixels`` against ``node_check_
                                   reference_subpixels``: ``node_check_
                                   median_delta_chi2``, ``..._max_delta_
                                   chi2``, test mass ``node_check_mass_
                                   mjup``, 1 if at the refit's best planet
                                   ``node_check_at_best_planet``) and
                                   ``background_refit_rounds``
``/disk/values`` attrs             background-disk parameters -> float
                                   (after the refit with the planet when
                                   ``disk.refit_with_planet`` > 0; the trace
                                   stage's fit is in ``trace.h5``)
``/disk/sigma`` attrs              their 1-sigma uncertainties
``/diagnostics/convergence`` attrs sampler settings (walkers, max_steps,
                                   check_every, autocorr_multiple,
                                   tau_tolerance)
``/diagnostics/timings`` attrs     seconds and counts (see SamplerOutcome)
``/diagnostics/counters`` attrs    likelihood ``-inf`` reasons and counts
``/comparison`` attrs              numbers about other fits of the same data
                                   (e.g. the planet-free baseline), str ->
                                   float
=================================  =========================================

Datasets are gzip-compressed (level 4, shuffle).  Strings are UTF-8.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import logging
import os
import platform
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import ResultFileError

__all__ = ["SCHEMA_VERSION", "FitResult", "write_result", "read_result", "open_hdf5",
           "assemble_result", "file_sha256", "library_versions",
           "prior_spec_json", "result_parameter_set", "likelihood_from_result"]

log = logging.getLogger(__name__)

#: version of the layout above; readers refuse newer files
SCHEMA_VERSION = 1
CONTENT = "kinkfit fit result"

_TRACED_CORE = ("r_au", "phi_rad", "a_r", "a_phi", "grad_kms_per_arcsec",
                "offset_arcsec", "sigma_arcsec")


@dataclass
class FitResult:
    """Everything one fit produced (see the module docstring for units).

    Arrays: ``samples (n, ndim)``, ``sample_log_prob (n,)``,
    ``chain (n_steps, nwalkers, ndim)``, ``log_prob (n_steps, nwalkers)``,
    ``acceptance (nwalkers,)``, ``tau (ndim,)``, ``tau_history (k, 1+ndim)``,
    ``pointwise_loglike (k, npts)``, ``pointwise_index (k,)``,
    ``map_theta (ndim,)``, ``map_offset_arcsec (npts,)``,
    ``median_offset_arcsec (npts,)``; ``data`` maps names to ``(npts,)``.
    """

    param_names: tuple[str, ...]
    param_units: tuple[str, ...]
    param_labels: tuple[str, ...]
    param_priors: tuple[str, ...]
    prior_specs: tuple[str, ...]
    samples: np.ndarray
    sample_log_prob: np.ndarray
    chain: np.ndarray
    log_prob: np.ndarray
    acceptance: np.ndarray
    tau: np.ndarray
    converged: bool
    n_steps: int
    burn: int
    thin: int
    map_theta: np.ndarray
    data: dict = field(default_factory=dict)
    map_loglike: float = float("nan")
    pointwise_loglike: np.ndarray = field(
        default_factory=lambda: np.zeros((0, 0)))
    pointwise_index: np.ndarray = field(
        default_factory=lambda: np.zeros(0, dtype=np.int64))
    map_offset_arcsec: np.ndarray = field(default_factory=lambda: np.zeros(0))
    median_offset_arcsec: np.ndarray = field(
        default_factory=lambda: np.zeros(0))
    tau_history: np.ndarray = field(default_factory=lambda: np.zeros((0, 1)))
    fixed: dict = field(default_factory=dict)
    truths: dict = field(default_factory=dict)
    background: dict = field(default_factory=dict)
    background_sigma: dict = field(default_factory=dict)
    damping: str = "none"
    likelihood_kind: str = "gaussian"
    likelihood_dof: float = 4.0
    is_baseline: bool = False
    seed: int = 0
    title: str = ""
    config_text: str = ""
    cube_path: str = ""
    cube_sha256: str = ""
    convergence: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    counters: dict = field(default_factory=dict)
    comparison: dict = field(default_factory=dict)
    forward_model: dict = field(default_factory=dict)
    created_utc: str = ""
    package_version: str = ""
    versions: dict = field(default_factory=dict)

    @property
    def ndim(self) -> int:
        return len(self.param_names)

    @property
    def npts(self) -> int:
        return int(np.size(self.data.get("offset_arcsec", [])))


# ------------------------------------------------------------ helpers ---
def file_sha256(path, chunk: int = 1 << 20) -> str:
    """Hex SHA-256 of a file (read in 1 MiB chunks)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(chunk), b""):
            h.update(block)
    return h.hexdigest()


def library_versions() -> dict[str, str]:
    """Versions of the libraries a result depends on."""
    import astropy
    import emcee
    import h5py
    import scipy

    from . import __version__
    return {"python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "astropy": astropy.__version__,
            "emcee": emcee.__version__, "h5py": h5py.__version__,
            "kinkfit": __version__}


def prior_spec_json(prior) -> str:
    """JSON of a prior: ``{"kind": ..., <its fields>}`` (inf as string)."""
    d = {"kind": prior.kind}
    for f in dataclasses.fields(prior):
        v = float(getattr(prior, f.name))
        d[f.name] = v if np.isfinite(v) else str(v)
    return json.dumps(d, sort_keys=True)


def _prior_from_json(text: str):
    from .priors import make_prior
    d = json.loads(text)
    kind = d.pop("kind")
    return make_prior(kind, **{k: float(v) for k, v in d.items()},
                      key="prior_specs")


def result_parameter_set(result: "FitResult"):
    """The :class:`~kinkfit.params.ParameterSet` a result was sampled with.

    Free parameters keep their sampler order (and stored priors); fixed ones
    follow them.
    """
    from .params import ParameterSet
    from .priors import Fixed
    names = list(result.param_names) + list(result.fixed)
    priors = [_prior_from_json(t) for t in result.prior_specs]
    priors += [Fixed(float(v)) for v in result.fixed.values()]
    return ParameterSet(tuple(names), tuple(priors))


def likelihood_from_result(result: "FitResult", model=None):
    """Rebuild the likelihood of a result from its stored traced data.

    Parameters
    ----------
    model : callable or None
        The model the fit used (``None`` for the planet-free baseline).
        It is not stored in the file; pass the same one.
    """
    from .likelihood import KinkLikelihood
    d = result.data
    return KinkLikelihood(
        *(d[n] for n in _TRACED_CORE), model, result_parameter_set(result),
        kind=result.likelihood_kind, dof=result.likelihood_dof,
        channel=d.get("channel"))


def _now_utc() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def assemble_result(outcome, likelihood, *, damping: str,
                    config_text: str = "", cube_path: str = "",
                    cube_sha256: str | None = None, title: str = "",
                    background: dict | None = None,
                    background_sigma: dict | None = None,
                    truths: dict | None = None,
                    comparison: dict | None = None,
                    extra_data: dict | None = None,
                    forward_model: dict | None = None,
                    max_pointwise: int = 400) -> FitResult:
    """Build a :class:`FitResult` from a sampler outcome and its likelihood.

    Parameters
    ----------
    outcome : kinkfit.sampling.SamplerOutcome
    likelihood : kinkfit.likelihood.KinkLikelihood
        The likelihood that was sampled (its data, model and counters).
    damping : str
        Damping assumption of the model.
    cube_path, cube_sha256 : str
        Input provenance; the checksum is computed when omitted and the
        file exists.
    background, background_sigma : dict of str -> float, optional
        Background-disk parameters and 1-sigma uncertainties.
    truths : dict, optional
        Injected values (synthetic data), canonical units.
    extra_data : dict of str -> ndarray (npts,), optional
        More traced arrays to store (e.g. ``x_arcsec``, ``y_arcsec``).
    forward_model : dict of str -> float, optional
        Settings and checks of the forward kink model (nodes actually used,
        node check, background refit rounds).
    max_pointwise : int
        Number of posterior samples (evenly spaced) whose per-point
        log-likelihood is stored.
    """
    ps = likelihood.param_set
    samples = np.ascontiguousarray(outcome.flat_samples(), dtype=float)
    slp = np.ascontiguousarray(outcome.flat_log_prob(), dtype=float)
    if samples.shape[0] == 0:
        raise ResultFileError("the sampler produced no posterior samples",
                              key="sampler.max_steps")
    flat_chain = outcome.chain.reshape(-1, outcome.chain.shape[-1])
    imap = int(np.argmax(outcome.log_prob.reshape(-1)))
    map_theta = np.array(flat_chain[imap], dtype=float)
    k = min(int(max_pointwise), samples.shape[0])
    idx = np.unique(np.linspace(0, samples.shape[0] - 1, k).astype(np.int64))
    pw = likelihood.pointwise(samples[idx])
    pred = likelihood.predict_offset(samples[idx])
    median_off = np.nanmedian(pred, axis=0) if pred.size else pred
    map_off = likelihood.predict_offset(map_theta)[0]
    map_ll = float(likelihood.log_likelihood(map_theta)[0])
    data = {name: np.array(likelihood.data[name]) for name in _TRACED_CORE}
    if likelihood.channel is not None:
        data["channel"] = np.array(likelihood.channel, dtype=np.int64)
    for name, arr in (extra_data or {}).items():
        arr = np.asarray(arr)
        if arr.shape != (likelihood.npts,):
            raise ResultFileError(f"extra traced array '{name}' has shape "
                                  f"{arr.shape}, expected "
                                  f"({likelihood.npts},)", key=name)
        data[name] = arr.copy()
    if cube_sha256 is None:
        cube_sha256 = (file_sha256(cube_path) if cube_path
                       and Path(cube_path).is_file() else "")
    specs = [ps.spec(n) for n in ps.free]
    fixed = {n: float(ps.prior(n).value) for n in ps.names
             if not ps.prior(n).free}
    versions = library_versions()
    return FitResult(
        param_names=tuple(ps.free), param_units=tuple(s.unit for s in specs),
        param_labels=tuple(s.label for s in specs),
        param_priors=tuple(ps.prior(n).describe(ps.spec(n).unit)
                           for n in ps.free),
        prior_specs=tuple(prior_spec_json(ps.prior(n)) for n in ps.free),
        samples=samples, sample_log_prob=slp,
        chain=np.array(outcome.chain, dtype=float),
        log_prob=np.array(outcome.log_prob, dtype=float),
        acceptance=np.array(outcome.acceptance, dtype=float),
        tau=np.array(outcome.tau, dtype=float),
        tau_history=np.array(outcome.tau_history, dtype=float),
        converged=bool(outcome.converged), n_steps=int(outcome.n_steps),
        burn=int(outcome.burn), thin=int(outcome.thin), map_theta=map_theta,
        map_loglike=map_ll, data=data, pointwise_loglike=pw, pointwise_index=idx,
        map_offset_arcsec=map_off, median_offset_arcsec=median_off,
        fixed=fixed, truths={k: float(v) for k, v in (truths or {}).items()},
        background={k: float(v) for k, v in (background or {}).items()},
        background_sigma={k: float(v)
                          for k, v in (background_sigma or {}).items()},
        damping=str(damping), likelihood_kind=likelihood.kind,
        likelihood_dof=float(likelihood.dof),
        is_baseline=bool(likelihood.is_baseline), seed=int(outcome.seed),
        title=str(title), config_text=str(config_text),
        cube_path=str(cube_path), cube_sha256=str(cube_sha256),
        convergence={k: float(v) for k, v in outcome.settings.items()},
        timings={k: float(v) for k, v in outcome.timings.items()},
        counters={k: int(v) for k, v in likelihood.counters.items()},
        comparison={k: float(v) for k, v in (comparison or {}).items()},
        forward_model={k: float(v) for k, v in (forward_model or {}).items()},
        created_utc=_now_utc(), package_version=versions["kinkfit"],
        versions=versions)


# ------------------------------------------------------------- writer ---
_DS = dict(compression="gzip", compression_opts=4, shuffle=True)


def _put(g, name, arr):
    arr = np.asarray(arr)
    if arr.dtype == object:
        raise ResultFileError(f"cannot store '{name}': not a numeric array",
                              key=name)
    if arr.size == 0 or arr.ndim == 0:
        g.create_dataset(name, data=arr)
    else:
        g.create_dataset(name, data=arr, chunks=True, **_DS)


def _attrs(g, mapping: dict, kind):
    for k, v in mapping.items():
        g.attrs[str(k)] = kind(v)


def _write(f, r: FitResult):
    import h5py
    f.attrs["schema_version"] = SCHEMA_VERSION
    f.attrs["content"] = CONTENT
    f.attrs["package_version"] = r.package_version
    f.attrs["created_utc"] = r.created_utc
    f.attrs["title"] = r.title
    f.attrs["damping"] = r.damping
    f.attrs["likelihood_kind"] = r.likelihood_kind
    f.attrs["likelihood_dof"] = float(r.likelihood_dof)
    f.attrs["seed"] = int(r.seed)
    f.attrs["is_baseline"] = bool(r.is_baseline)

    prov = f.create_group("provenance", track_order=True)
    prov.attrs["cube_path"] = r.cube_path
    prov.attrs["cube_sha256"] = r.cube_sha256
    for lib, ver in r.versions.items():
        prov.attrs[f"version_{lib}"] = str(ver)
    prov.create_dataset("config_text", data=r.config_text,
                        dtype=h5py.string_dtype("utf-8"))

    par = f.create_group("parameters", track_order=True)
    for key in ("names", "units", "labels", "priors", "prior_specs"):
        values = list(getattr(r, "param_" + key if key != "prior_specs"
                              else key))
        par.attrs[key] = np.array(values, dtype=h5py.string_dtype("utf-8"))
    _attrs(par.create_group("fixed", track_order=True), r.fixed, float)
    _attrs(par.create_group("truths", track_order=True), r.truths, float)

    post = f.create_group("posterior", track_order=True)
    _put(post, "samples", r.samples)
    _put(post, "log_prob", r.sample_log_prob)
    _put(post, "map_theta", r.map_theta)
    post.attrs["map_loglike"] = float(r.map_loglike)

    w = f.create_group("walkers", track_order=True)
    _put(w, "chain", r.chain)
    _put(w, "log_prob", r.log_prob)
    _put(w, "acceptance", r.acceptance)
    _put(w, "tau", r.tau)
    _put(w, "tau_history", r.tau_history)
    w.attrs["converged"] = bool(r.converged)
    w.attrs["n_steps"] = int(r.n_steps)
    w.attrs["burn"] = int(r.burn)
    w.attrs["thin"] = int(r.thin)

    pw = f.create_group("pointwise", track_order=True)
    _put(pw, "loglike", r.pointwise_loglike)
    _put(pw, "sample_index", np.asarray(r.pointwise_index, dtype=np.int64))

    tr = f.create_group("traced", track_order=True)
    for name, arr in r.data.items():
        _put(tr, name, arr)

    mod = f.create_group("model", track_order=True)
    _put(mod, "map_offset_arcsec", r.map_offset_arcsec)
    _put(mod, "median_offset_arcsec", r.median_offset_arcsec)
    _attrs(mod, r.forward_model, float)

    disk = f.create_group("disk", track_order=True)
    _attrs(disk.create_group("values", track_order=True), r.background, float)
    _attrs(disk.create_group("sigma", track_order=True), r.background_sigma,
           float)

    diag = f.create_group("diagnostics", track_order=True)
    _attrs(diag.create_group("convergence", track_order=True), r.convergence,
           float)
    _attrs(diag.create_group("timings", track_order=True), r.timings, float)
    _attrs(diag.create_group("counters", track_order=True), r.counters, int)
    _attrs(f.create_group("comparison", track_order=True), r.comparison,
           float)


def write_result(path, result: FitResult, overwrite: bool = False) -> Path:
    """Write ``result`` to ``path`` atomically.

    The file is written to a temporary file in the same folder and moved
    into place with :func:`os.replace`; on any error the temporary file is
    removed and an existing file at ``path`` is left untouched.

    Raises
    ------
    ResultFileError
        ``path`` exists and ``overwrite`` is false, or the folder cannot be
        written.
    """
    import h5py
    path = Path(path)
    if path.exists() and not overwrite:
        raise ResultFileError("result file exists; pass overwrite=True (or "
                              "set output.overwrite = true) to replace it",
                              file=path, key="output.overwrite")
    folder = path.parent if str(path.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=folder, prefix="." + path.name + ".",
                                   suffix=".tmp")
        os.close(fd)
    except OSError as exc:
        raise ResultFileError(f"cannot write in the folder ({exc})",
                              file=path)
    try:
        with h5py.File(tmp, "w", track_order=True) as f:
            _write(f, result)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    log.info("wrote %s", path)
    return path


# ------------------------------------------------------------- reader ---
def _a(g, mapping_kind):
    return {k: mapping_kind(v) for k, v in g.attrs.items()}


def _to_bool(v):
    return bool(v)


def _read(f, path) -> FitResult:
    par = f["parameters"]
    names = tuple(str(s) for s in par.attrs["names"])

    def strs(key):
        return tuple(str(s) for s in par.attrs[key])

    def arr(p):
        return f[p][()]

    prov = f["provenance"]
    versions = {k[len("version_"):]: str(v) for k, v in prov.attrs.items()
                if k.startswith("version_")}
    w = f["walkers"]
    return FitResult(
        param_names=names, param_units=strs("units"),
        param_labels=strs("labels"), param_priors=strs("priors"),
        prior_specs=strs("prior_specs"),
        samples=arr("posterior/samples"),
        sample_log_prob=arr("posterior/log_prob"),
        chain=arr("walkers/chain"), log_prob=arr("walkers/log_prob"),
        acceptance=arr("walkers/acceptance"), tau=arr("walkers/tau"),
        tau_history=arr("walkers/tau_history"),
        converged=bool(w.attrs["converged"]), n_steps=int(w.attrs["n_steps"]),
        burn=int(w.attrs["burn"]), thin=int(w.attrs["thin"]),
        map_theta=arr("posterior/map_theta"),
        map_loglike=float(f["posterior"].attrs["map_loglike"]),
        data={k: v[()] for k, v in f["traced"].items()},
        pointwise_loglike=arr("pointwise/loglike"),
        pointwise_index=arr("pointwise/sample_index"),
        map_offset_arcsec=arr("model/map_offset_arcsec"),
        median_offset_arcsec=arr("model/median_offset_arcsec"),
        fixed=_a(par["fixed"], float), truths=_a(par["truths"], float),
        background=_a(f["disk/values"], float),
        background_sigma=_a(f["disk/sigma"], float),
        damping=str(f.attrs["damping"]),
        likelihood_kind=str(f.attrs["likelihood_kind"]),
        likelihood_dof=float(f.attrs["likelihood_dof"]),
        is_baseline=bool(f.attrs["is_baseline"]), seed=int(f.attrs["seed"]),
        title=str(f.attrs["title"]),
        config_text=prov["config_text"].asstr()[()],
        cube_path=str(prov.attrs["cube_path"]),
        cube_sha256=str(prov.attrs["cube_sha256"]),
        convergence=_a(f["diagnostics/convergence"], float),
        timings=_a(f["diagnostics/timings"], float),
        counters=_a(f["diagnostics/counters"], int),
        comparison=_a(f["comparison"], float),
        forward_model=_a(f["model"], float),
        created_utc=str(f.attrs["created_utc"]),
        package_version=str(f.attrs["package_version"]), versions=versions)


def open_hdf5(path, what: str = "file"):
    """Open an HDF5 product for reading, or raise a one-line ResultFileError.

    Parameters
    ----------
    path : path-like
    what : str
        Name used in the message ("result file", "comparison file", ...).

    Returns
    -------
    h5py.File, open read-only (use it as a context manager).
    """
    import h5py
    path = Path(path)
    if not path.is_file():
        raise ResultFileError(f"{what} not found", file=path)
    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise ResultFileError(f"not a readable HDF5 file ({exc})", file=path)


def read_result(path) -> FitResult:
    """Read a result file written by :func:`write_result`.

    Raises
    ------
    ResultFileError
        Missing file, not HDF5, not a kinkfit result, a newer schema, or a
        missing / damaged item (named in the message).
    """
    path = Path(path)
    with open_hdf5(path, "result file") as f:
        if f.attrs.get("content") != CONTENT or "schema_version" not in f.attrs:
            raise ResultFileError("not a kinkfit result file (no "
                                  "schema_version / content attributes)",
                                  file=path)
        version = int(f.attrs["schema_version"])
        if version > SCHEMA_VERSION or version < 1:
            raise ResultFileError(f"result schema_version {version} is not "
                                  f"supported (this kinkfit reads 1 to "
                                  f"{SCHEMA_VERSION}); upgrade kinkfit",
                                  file=path, key="schema_version",
                                  value=version)
        try:
            return _read(f, path)
        except KeyError as exc:
            raise ResultFileError(f"damaged result file: missing {exc}",
                                  file=path)
        except OSError as exc:
            raise ResultFileError(f"damaged result file ({exc})", file=path)
