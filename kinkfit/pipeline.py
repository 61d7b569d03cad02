"""The main job, end to end: ``kinkfit fit CONFIG``.

:func:`run_fit` reads the cube, fits the background disk, traces the ridges
and measures the deviations (once, shared by every assumption), then for each
damping assumption of ``wake.damping`` -- and the planet-free baseline when
``wake.baseline`` -- builds the likelihood on the fast wake model, finds a
start, samples with emcee (checkpointed, resumable), writes one HDF5 result
and its report, and finally the comparison across assumptions.

Output folder layout (``output.folder``)::

    trace.h5                      traced ridges, background fit, deviations
    fit_<assumption>.h5           one result per assumption (kinkfit.results)
    fit_<assumption>.chain.h5     the sampler's working checkpoint
    <assumption>/                 report.md, summary.{ecsv,csv,tex,md}, figures
    gallery.png, deviations.png   channel gallery with model contours; map
    comparison/                   products of kinkfit.compare (several fits)

Re-running the same config resumes: a finished result whose recorded config
text and cube checksum match is kept (its report is regenerated), an
unfinished one continues from its checkpoint.  A result that does not match
is never overwritten unless ``--force`` / ``output.overwrite``.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .config import KinkfitConfig
from .errors import ResultFileError

__all__ = ["FitRun", "run_fit", "fit_assumption", "truths_from_header",
           "BASELINE"]

log = logging.getLogger(__name__)

#: name of the planet-free baseline in file names and tables
BASELINE = "baseline"


@dataclass
class FitRun:
    """What :func:`run_fit` produced.

    Attributes
    ----------
    output_folder : Path
    results : dict of str -> Path
        Assumption (damping name or ``"baseline"``) -> result HDF5.
    converged : dict of str -> bool
    seconds : float
        Wall time of this call.
    reports : dict of str -> Path
        Assumption -> ``report.md``.
    status : dict of str -> str
        Assumption -> what happened (new fit, resumed, kept).
    trace_file : Path
    """

    output_folder: Path
    results: dict = field(default_factory=dict)
    converged: dict = field(default_factory=dict)
    seconds: float = 0.0
    reports: dict = field(default_factory=dict)
    trace_file: Path | None = None
    comparison: Path | None = None
    status: dict = field(default_factory=dict)


def truths_from_header(cube) -> dict:
    """Injected planet recorded by :mod:`kinkfit.scenario` (empty if none).

    Returns
    -------
    dict : canonical-unit values keyed by fit-parameter name, plus
    ``"damping"`` (str).
    """
    cards = getattr(cube, "provenance", {}) or {}
    hdr = cards.get("truth_cards") or cards.get("header") or {}
    if not hdr:
        try:
            from astropy.io import fits
            hdr = fits.getheader(cube.provenance["path"])
        except Exception:  # noqa: BLE001 - provenance without a readable file
            return {}
    if not hdr.get("KFPLANET", False):
        return {}
    out = {"mass": float(hdr["KFMASS"]), "radius": float(hdr["KFRADIUS"]),
           "azimuth": float(hdr["KFAZIM"]),
           "aspect_ratio": float(hdr["KFASPECT"]),
           "damping": str(hdr["KFDAMP"])}
    if out["damping"] == "viscous":
        out["alpha"] = float(hdr["KFALPHA"])
    elif out["damping"] == "efold" and float(hdr["KFEFOLD"]) > 0:
        out["efold"] = float(hdr["KFEFOLD"])
    return out


def _background_dicts(fit):
    if fit is None:
        return {}, {}
    values = {n: float(v) for n, v in zip(fit.names, fit.values)}
    sigma = {n: float(e) for n, e in zip(fit.names, fit.errors)}
    return values, sigma


def _matches(path: Path, cfg: KinkfitConfig, cube_sha: str, name: str):
    """Is the finished result at ``path`` from this config and cube?"""
    from .results import read_result
    res = read_result(path)
    same = (res.config_text == cfg.text and res.cube_sha256 == cube_sha)
    if not same:
        raise ResultFileError(
            f"{path.name} exists from a different config or cube; use "
            f"--force to replace it (assumption '{name}')", file=path)
    return res


def fit_assumption(cfg: KinkfitConfig, deviations, geometry, name: str, *,
                   folder: Path, cube_path: str, cube_sha: str,
                   background=None, truths=None, force=False, resume=True,
                   workers=None, progress=None, response=None):
    """Sample the posterior of one assumption and write its result.

    Parameters
    ----------
    cfg : KinkfitConfig
    deviations : kinkfit.deviations.Deviations
        The traced data (shared by all assumptions).
    geometry : kinkfit.geometry.DiskGeometry
        Fitted background disk (its stellar mass scales the wake).
    name : str
        A damping assumption or :data:`BASELINE`.

    Returns
    -------
    (Path, FitResult, str)
        The result file, the result, and what happened: ``"new fit"``,
        ``"resumed from checkpoint at step N"`` or ``"finished result kept"``.
    """
    from dataclasses import replace

    from .likelihood import KinkLikelihood
    from .results import assemble_result, write_result
    from .sampling import find_modes, find_start, run_sampler
    from .scenario import wake_disk

    path = folder / f"fit_{name}.h5"
    checkpoint = folder / f"fit_{name}.chain.h5"
    overwrite = force or cfg.output.overwrite
    if path.exists() and not overwrite:
        res = _matches(path, cfg, cube_sha, name)
        log.info("%s: finished result found, kept", path.name)
        return path, res, "finished result kept"

    with_planet = name != BASELINE
    damping = name if with_planet else cfg.wake.damping[0]
    pset = cfg.parameter_set(damping, with_planet=with_planet)
    if with_planet:
        from .wake.emulator import make_fit_model
        model = make_fit_model(wake_disk(cfg, mstar_msun=geometry.mstar_msun),
                               damping)
    else:
        model = None
    like = KinkLikelihood.from_deviations(
        deviations, model, pset, kind=cfg.likelihood.kind,
        dof=cfg.likelihood.dof, response=response,
        nuisance=background_nuisance(cfg, background, deviations)
        if response is not None else None)
    settings = cfg.sampler
    if workers is not None or progress is not None:
        settings = replace(settings,
                           workers=settings.workers if workers is None
                           else int(workers),
                           progress=settings.progress if progress is None
                           else bool(progress))
    t0 = time.perf_counter()
    rng = np.random.default_rng(settings.seed)
    start = None
    status = "new fit"
    done = 0
    if resume and checkpoint.exists() and not force:
        from .sampling import read_checkpoint
        done = read_checkpoint(checkpoint)[2]  # ResultFileError if corrupt
    if done > 0:
        status = f"resumed from checkpoint at step {done}"
    else:
        # no checkpoint, or one killed before its first block of steps was
        # written (iteration 0): start exactly as an uninterrupted run does
        # many cheap prior draws (one vectorised call of the emulator), the
        # best few polished: the wake posterior is multimodal in azimuth
        if response is not None:
            # the forward model's posterior can have competing modes (mass
            # trades against radius and azimuth): start in each of them
            start = find_modes(like.log_prob, pset, rng, n_tries=4096,
                               n_polish=6)
        else:
            start = find_start(like.log_prob, pset, rng, n_tries=4096,
                               n_polish=6)
    outcome = run_sampler(like.log_prob, pset, settings, checkpoint,
                          initial=start, rng_seed=settings.seed,
                          resume=resume and not force)
    bg, bg_sigma = _background_dicts(background)
    extra = {k: np.asarray(getattr(deviations, k))
             for k in ("x_arcsec", "y_arcsec", "velocity_kms", "surface")
             if hasattr(deviations, k)}
    result = assemble_result(
        outcome, like, damping=name, config_text=cfg.text,
        cube_path=cube_path, cube_sha256=cube_sha, title=cfg.title,
        background=bg, background_sigma=bg_sigma,
        truths={k: v for k, v in (truths or {}).items()
                if k in pset.names} or None,
        extra_data=extra, forward_model=_forward_model_record(
            cfg, response, deviations))
    write_result(path, result, overwrite=True)
    log.info("%s: %d steps in %.1f s, converged=%s", path.name,
             outcome.n_steps, time.perf_counter() - t0, outcome.converged)
    return path, result, status


def _forward_model_record(cfg, response, deviations) -> dict:
    """Numbers of the forward kink model for the result file (``/model``
    attrs): the nodes used, the node check of those nodes, refit rounds."""
    if response is None:
        return {}
    out = {"node_subpixels": cfg.likelihood.node_subpixels,
           "back_node_stride": cfg.likelihood.back_node_stride,
           "nodes": response.n_nodes,
           "background_refit_rounds": len(deviations.meta.get(
               "planet_refit") or [])}
    check = deviations.meta.get("node_check")
    if check:
        out.update(node_check_at_best_planet=float(
                       check["test_planets"] == "best planet"),
                   node_check_subpixels=check["node_subpixels"],
                   node_check_reference_subpixels=check["reference_subpixels"],
                   node_check_median_delta_chi2=check["median_delta_chi2"],
                   node_check_max_delta_chi2=check["max_delta_chi2"],
                   node_check_mass_mjup=check["test_mass_mjup"])
    return out


def background_nuisance(cfg, background, deviations):
    """Linear background-disk nuisance of the planet fit, or None.

    ``J = d offset / d g`` at the traced points for the fitted background
    parameters (:func:`kinkfit.diskfit.offset_jacobian`) and a Gaussian
    prior on ``dg`` of ``likelihood.background_prior`` times each fitted
    error (the background fit is made before, and without, the planet
    model, and its errors ignore the remaining model error: widening them
    is common practice, no source).  None when the background was not
    fitted or the prior width is 0.
    """
    width = float(getattr(cfg.likelihood, "background_prior", 0.0))
    if background is None or width <= 0 or not hasattr(background, "errors"):
        return None
    from .diskfit import offset_jacobian
    errors = np.asarray(background.errors, dtype=float)
    if not np.all(np.isfinite(errors) & (errors > 0)):
        return None
    J = offset_jacobian(background, deviations.ridges)
    return J, np.diag(1.0 / (width * errors) ** 2)


def refit_background_with_planet(cfg: KinkfitConfig, cube, ridges, background,
                                 traced_deviations, response, deviations, *,
                                 rounds: int = 1):
    """Refit the background disk with the planet's kinks taken out.

    The background fit of the trace stage sees the planet's kinks as
    residuals.  An inviscid or weakly damped wake kinks ridges across the
    whole disk, and those moderate residuals, spread over many points, pull
    the fit (on the CI-sized near-side case: stellar mass -4%, layer height
    -15 to -30%, the planet mass -14%; docs/physics/response.md).  Each round
    here fits the planet to the current background (the forward model's
    best optimum from :func:`kinkfit.sampling.find_modes`, first damping
    assumption, background marginalised as in the fit), predicts its kinks
    at the traced points, refits the background to the ridges with those
    kinks removed (added to the beam-smearing bias the fit subtracts), and
    rebuilds the deviations and the forward model on the new background.
    It is an alternating (block coordinate) optimisation of the joint
    background + planet model; the posterior that follows is conditional on
    its result, with the background marginalised linearly around it.

    Parameters
    ----------
    cfg : KinkfitConfig
    cube : kinkfit.cube.Cube
    ridges : kinkfit.trace.Ridges
    background : kinkfit.diskfit.BackgroundFit
        The trace stage's fit.
    traced_deviations : kinkfit.deviations.Deviations
        The trace stage's deviations (first-order offsets, beam-smearing
        bias in ``bias_arcsec``, emission profile in ``meta['bias']``).
    response : kinkfit.response.RidgeResponse
    deviations : kinkfit.deviations.Deviations
        The forward model and its deviations at ``background``
        (:func:`config_forward_response`).
    rounds : int
        Planet fit + background refit rounds (>= 1).

    Returns
    -------
    background : BackgroundFit
        The refitted background.
    response : kinkfit.response.RidgeResponse
    deviations : kinkfit.deviations.Deviations
        Forward-model deviations on the refitted background, at the ridge
        points it can place (``deviations.ridges``: a subset of ``ridges``
        when some fall off the refitted surface); ``meta
        ['planet_refit']`` records each round's planet optimum and the
        background before and after.
    """
    from .deviations import keep_measurable, measure_deviations
    from .diskfit import fit_background
    from .likelihood import KinkLikelihood
    from .sampling import find_modes
    from .scenario import wake_disk
    from .trace import _geom_dict
    from .wake.emulator import make_fit_model

    smear = np.nan_to_num(np.asarray(traced_deviations.bias_arcsec, float))
    damping = cfg.wake.damping[0]
    pset = cfg.parameter_set(damping, with_planet=True)
    history = []
    for k in range(max(1, int(rounds))):
        geometry = background.geometry
        model = make_fit_model(wake_disk(cfg, mstar_msun=geometry.mstar_msun),
                               damping)
        like = KinkLikelihood.from_deviations(
            deviations, model, pset, kind=cfg.likelihood.kind,
            dof=cfg.likelihood.dof, response=response,
            nuisance=background_nuisance(cfg, background, deviations))
        rng = np.random.default_rng([cfg.sampler.seed, 7919, k])
        modes = find_modes(like.log_prob, pset, rng, n_tries=4096, n_polish=6)
        lp = like.log_prob(modes)
        best = modes[int(np.nanargmax(lp))]
        kinks = np.nan_to_num(like.predict_offset(best)[0])
        new = fit_background(ridges, geometry, background.names,
                             bias=smear + kinks)
        history.append({
            "planet": {n: float(v) for n, v in zip(pset.free, best)},
            "log_prob": float(np.nanmax(lp)),
            "before": {n: float(v) for n, v in zip(background.names,
                                                   background.values)},
            "after": {n: float(v) for n, v in zip(new.names, new.values)}})
        log.info("background refit with the planet (round %d): planet %s; "
                 "%s", k + 1, ", ".join(f"{n} {v:.4g}" for n, v in
                                         history[-1]["planet"].items()),
                 new.summary().replace("\n", "; "))
        background = new
        redo, kept = keep_measurable(
            measure_deviations(ridges, background, bias=smear))
        ridges, smear = redo.ridges, smear[kept]
        redo.meta.update({k2: v for k2, v in traced_deviations.meta.items()
                          if k2 not in redo.meta})
        redo.meta["geometry"] = _geom_dict(background.geometry)
        response, deviations = config_forward_response(
            cfg, cube, ridges, background.geometry, redo)
    deviations.meta["planet_refit"] = history
    return background, response, deviations


def config_forward_response(cfg: KinkfitConfig, cube, ridges, geometry,
                            deviations, emission=None):
    """:func:`forward_response` with the node options of ``[likelihood]``."""
    return forward_response(cube, ridges, geometry, deviations,
                            node_oversample=cfg.likelihood.node_subpixels,
                            back_stride=cfg.likelihood.back_node_stride,
                            emission=emission)


def forward_response(cube, ridges, geometry, deviations, *,
                     node_oversample: int = 1, back_stride: int = 2,
                     emission=None):
    """Tracer response of the traced points, and the deviations it implies.

    The emission profile is the one the bias model used (stored in
    ``deviations.meta['bias']['emission']``; fitted to the cube when
    missing).  Nodes are every pixel of the front layer and every 2nd of
    the back layer by default; ``node_oversample`` (sub-pixel nodes per
    pixel and axis) and ``back_stride`` are handed to
    :func:`kinkfit.response.build_ridge_response`: 2 and 1 remove the 1-11%
    too-large model kinks of massive inviscid wakes on 0.04" pixels at
    100 pc, at ~4x the cost per evaluation (docs/physics/response.md).  The
    returned deviations carry the response's own debiased offsets
    (``offset_arcsec = kappa (s_data - s_0)``, see :mod:`kinkfit.response`),
    so that plots, tables and the likelihood show the same kinks.

    Returns
    -------
    response : kinkfit.response.RidgeResponse
    deviations : kinkfit.deviations.Deviations
    """
    from dataclasses import replace

    from .response import build_ridge_response

    if emission is None:
        emission = _response_emission(cube, ridges, geometry, deviations)
    # every pixel is a front-layer node and every 2nd a back-layer one: the
    # wake changes on the pixel scale near the planet and across its shocks
    # (front nodes every 2nd pixel made the demo's model kinks 6% too
    # large), and the back layer's own kink moves the front ridge's peak
    # (11% on the demo); with both, the model reproduces the generator's
    # noise-free demo cube traced at the same cuts to a slope of 1.000
    # (docs/physics/response.md)
    response = build_ridge_response(cube, ridges, geometry, emission,
                                    node_stride=1, back_layer=True,
                                    back_stride=back_stride,
                                    node_oversample=node_oversample)
    observed = response.observed
    bias = deviations.offset_raw_arcsec - observed
    dev = replace(
        deviations, offset_arcsec=observed, bias_arcsec=bias,
        distance_arcsec=deviations.distance_arcsec
        + deviations.bias_arcsec - bias,
        meta={**deviations.meta, "kink_model": "forward",
              "response": dict(response.meta)})
    return response, dev


def _response_emission(cube, ridges, geometry, deviations):
    """The emission profile of the bias model (``deviations.meta['bias']
    ['emission']``), or fitted to the cube when missing."""
    from .deviations import estimate_emission, fit_emission
    from .synth import LineEmission

    spec = (deviations.meta.get("bias") or {}).get("emission")
    if spec:
        return LineEmission(**{k: float(v) for k, v in spec.items()})
    return fit_emission(cube, geometry,
                        estimate_emission(ridges, geometry, cube))


#: the node check's test planet is the background refit's best planet
#: with its mass raised by this factor (the upper part of a typical mass
#: posterior, whose 68% interval spans +-10-25%; docs/calibration.md)
NODE_CHECK_MASS_MARGIN = 1.3

#: delta chi2 (median over the test planets of :func:`check_response_nodes`)
#: above which the configured nodes are too coarse: the quadrature error of
#: the model kinks is then as large as the data's noise (common practice, no
#: source)
NODE_CHECK_LIMIT = 1.0


def check_response_nodes(cfg: KinkfitConfig, geometry, deviations,
                         response, reference, *, planet: dict | None = None,
                         n_planets: int = 64) -> dict:
    """How far the response's node quadrature is from a finer one.

    The forward kink model samples the wake at nodes (pixel centres, or
    ``n x n`` sub-pixels); on pixels coarser than about a third of the
    wake's width ``h_p r_p`` a massive planet's model kinks come out too
    large (docs/physics/response.md).  This compares the model kinks of
    ``response`` with those of ``reference`` (finer nodes on the same
    points) at ``planet`` with its mass times
    :data:`NODE_CHECK_MASS_MARGIN`, or, without a planet, at ``n_planets``
    planets drawn from the prior of the first damping assumption with the
    mass set to the prior's 95th percentile (the most demanding wakes the
    fit may visit).

    Parameters
    ----------
    cfg : KinkfitConfig
    geometry : kinkfit.geometry.DiskGeometry
        Background disk (its stellar mass sets the wake).
    deviations : kinkfit.deviations.Deviations
        The traced points (``sigma_arcsec``, arcsec).
    response, reference : kinkfit.response.RidgeResponse
        The configured and the reference forward model of those points.
    planet : dict of str -> float, optional
        A planet of the first damping assumption's parameter set (e.g. the
        background refit's optimum), canonical units (Mjup, au, deg, ...).
    n_planets : int
        Prior test planets when ``planet`` is None (fixed seed from
        ``sampler.seed``).

    Returns
    -------
    dict
        ``delta_chi2`` (per test planet: sum over points of the squared
        model-kink difference over the point error squared), ``max_delta_
        chi2``, ``slope`` (per planet: configured on reference kinks, least
        squares through 0), ``worst`` (the planet of the largest
        ``delta_chi2``, parameter -> value), ``mass`` (the test mass,
        Jupiter masses), ``nodes`` and ``reference_nodes``.
    """
    from .scenario import wake_disk
    from .wake.emulator import make_fit_model

    damping = cfg.wake.damping[0]
    pset = cfg.parameter_set(damping, with_planet=True)
    j_mass = pset.free.index("mass")
    if planet is not None:
        theta = pset.pack({n: planet[n] for n in pset.free})
        mass = float(theta[0, j_mass]) * NODE_CHECK_MASS_MARGIN
    else:
        rng = np.random.default_rng([cfg.sampler.seed, 104729])
        theta = pset.sample_prior(rng, int(n_planets))
        mass = float(np.quantile(pset.sample_prior(rng, 2000)[:, j_mass],
                                 0.95))
    theta[:, j_mass] = mass
    params = pset.unpack(theta)
    model = make_fit_model(wake_disk(cfg, mstar_msun=geometry.mstar_msun),
                           damping)
    kinks = []
    for resp in (response, reference):
        dv_r, dv_phi = model(params, resp.node_r_au, resp.node_phi_rad)
        kinks.append(resp.offsets_from_wake(dv_r, dv_phi))
    coarse, ref = kinks
    sigma = np.asarray(deviations.sigma_arcsec, float)[None, :]
    ok = np.isfinite(coarse) & np.isfinite(ref)
    diff = np.where(ok, coarse - ref, 0.0)
    delta_chi2 = np.sum((diff / sigma) ** 2, axis=1)
    slope = (np.sum(np.where(ok, coarse * ref, 0.0), axis=1)
             / np.maximum(np.sum(np.where(ok, ref * ref, 0.0), axis=1),
                          1e-300))
    k = int(np.argmax(delta_chi2))
    return {"delta_chi2": delta_chi2, "max_delta_chi2": float(delta_chi2[k]),
            "slope": slope,
            "worst": {n: float(v) for n, v in zip(pset.free, theta[k])},
            "mass": mass, "nodes": int(response.n_nodes),
            "reference_nodes": int(reference.n_nodes)}


def adapted_forward_response(cfg: KinkfitConfig, cube, ridges, geometry,
                             deviations, *, planet: dict | None = None,
                             current=None):
    """:func:`config_forward_response`, with finer nodes when they matter.

    With ``likelihood.node_check`` = ``"adapt"`` (default) or ``"warn"``
    the configured nodes (``n x n`` sub-pixels) are compared with
    ``(n+1) x (n+1)`` sub-pixel nodes and back-layer nodes on every pixel
    (:func:`check_response_nodes`, at ``planet`` when given).  When the
    median delta chi2 exceeds :data:`NODE_CHECK_LIMIT`, ``"adapt"`` uses
    the finer nodes and ``"warn"`` logs a warning and keeps the configured
    ones.  One step is enough where it was measured: 2 x 2 nodes are within
    median delta chi2 0.3-0.5 of 3 x 3 ones on the calibration set-up
    (docs/physics/response.md, tests/test_node_check.py).

    Parameters
    ----------
    cfg, cube, ridges, geometry, deviations
        As for :func:`config_forward_response`.
    planet : dict of str -> float, optional
        Test planet (the background refit's optimum); else prior draws.
    current : (RidgeResponse, Deviations), optional
        The response with the configured nodes at ``geometry``, when it is
        already built.

    Returns
    -------
    cfg : KinkfitConfig
        ``cfg`` with the node options actually used (``likelihood.
        node_subpixels``, ``back_node_stride``); the config text is kept.
    response : kinkfit.response.RidgeResponse
    deviations : kinkfit.deviations.Deviations
        ``meta['node_check']`` holds the check's numbers (when run).
    """
    from dataclasses import replace

    lk = cfg.likelihood
    if current is None:
        current = config_forward_response(cfg, cube, ridges, geometry,
                                          deviations)
    response, dev = current
    if lk.node_check == "off":
        return cfg, response, dev
    emission = _response_emission(cube, ridges, geometry, deviations)
    finer = lk.node_subpixels + 1
    fine_response, fine_dev = forward_response(
        cube, ridges, geometry, deviations, node_oversample=finer,
        back_stride=1, emission=emission)
    check = check_response_nodes(cfg, geometry, dev, response, fine_response,
                                 planet=planet)
    median = float(np.median(check["delta_chi2"]))
    too_coarse = median > NODE_CHECK_LIMIT
    record = {"node_subpixels": lk.node_subpixels,
              "back_node_stride": lk.back_node_stride,
              "reference_subpixels": finer, "nodes": check["nodes"],
              "reference_nodes": check["reference_nodes"],
              "test_planets": "best planet" if planet is not None
              else "prior",
              "median_delta_chi2": median,
              "max_delta_chi2": check["max_delta_chi2"],
              "median_slope": float(np.median(check["slope"])),
              "test_mass_mjup": check["mass"],
              "adapted": bool(too_coarse and lk.node_check == "adapt")}
    log.info("response nodes %dx%d (back every %d, %d nodes) against %dx%d "
             "(%d nodes) at %s, %.2f Mjup: delta chi2 median %.2f, max "
             "%.2f; kink slope median %.3f", lk.node_subpixels,
             lk.node_subpixels, lk.back_node_stride, check["nodes"], finer,
             finer, check["reference_nodes"], record["test_planets"],
             check["mass"], median, check["max_delta_chi2"],
             record["median_slope"])
    if too_coarse and lk.node_check == "warn":
        log.warning(
            "the forward model's nodes are too coarse for this cube: its "
            "kinks differ from %dx%d sub-pixel nodes by delta chi2 %.1f "
            "(at %.2f Mjup); set likelihood.node_subpixels = %d and "
            "back_node_stride = 1 (or node_check = \"adapt\")", finer,
            finer, median, check["mass"], finer)
    elif too_coarse:
        log.info("response nodes too coarse (delta chi2 %.2f > %.1f): using "
                 "%dx%d sub-pixel nodes, back layer on every pixel", median,
                 NODE_CHECK_LIMIT, finer, finer)
        cfg = replace(cfg, likelihood=replace(lk, node_subpixels=finer,
                                              back_node_stride=1))
        response, dev = fine_response, fine_dev
    dev.meta["node_check"] = record
    return cfg, response, dev


def run_fit(cfg: KinkfitConfig, *, force: bool = False, resume: bool = True,
            workers: int | None = None, progress: bool | None = None,
            traced=None, cube=None) -> FitRun:
    """Run the whole job for one config (see the module docstring).

    Parameters
    ----------
    cfg : KinkfitConfig
    force : bool
        Refit and replace existing results and checkpoints.
    resume : bool
        Continue unfinished checkpoints (default).
    workers : int, optional
        Processes for the likelihood (overrides ``sampler.workers``).
    progress : bool, optional
        Progress bar (overrides ``sampler.progress``).
    traced : tuple, optional
        ``(ridges, background_fit, deviations)`` as returned by
        :func:`kinkfit.trace.run_trace` for this cube, used instead of
        tracing again (an interactive session that has already traced the
        cube; written to ``trace.h5`` like a fresh trace).  The caller
        vouches that it was traced with this config's ``[data]``, ``[disk]``
        and ``[trace]`` settings.
    cube : kinkfit.cube.Cube, optional
        The already-read cube of ``data.cube`` (default: read it).

    Returns
    -------
    FitRun
    """
    from .cube import read_cube
    from .report import write_report
    from .results import file_sha256
    from .trace import run_trace, write_trace_file

    t0 = time.perf_counter()
    folder = Path(cfg.output.folder)
    folder.mkdir(parents=True, exist_ok=True)
    centre = None
    if cfg.data.centre_ra_deg is not None:
        centre = (cfg.data.centre_ra_deg, cfg.data.centre_dec_deg)
    if cube is None:
        cube = read_cube(cfg.data.cube, centre=centre,
                         line_free=cfg.data.line_free_channels)
    cube_sha = cube.provenance.get("sha256") or file_sha256(cfg.data.cube)
    truths = truths_from_header(cube)

    trace_file = folder / "trace.h5"
    given = traced is not None
    if not given and not force:
        traced = _reuse_trace(trace_file, cfg, cube_sha)
        if traced is not None:
            log.info("%s: traced data of this config and cube reused",
                     trace_file.name)
    reused = traced is not None and not given
    if traced is None:
        traced = run_trace(cfg, cube=cube)
    ridges, fit, deviations = traced
    if not reused:
        write_trace_file(trace_file, ridges, fit, deviations, cfg=cfg,
                         overwrite=True)
    geometry = fit.geometry if fit is not None else cfg.geometry()
    response = None
    if cfg.likelihood.kink_model == "forward":
        response, deviations = config_forward_response(
            cfg, cube, ridges, geometry, deviations)
        rounds = cfg.disk.refit_with_planet
        best = None
        if rounds > 0 and fit is not None and cfg.wake.damping:
            fit, response, deviations = refit_background_with_planet(
                cfg, cube, ridges, fit, traced[2], response, deviations,
                rounds=rounds)
            geometry = fit.geometry
            ridges = deviations.ridges  # points the refitted disk can place
            best = deviations.meta["planet_refit"][-1]["planet"]
        # the nodes are checked at the refit's best planet (prior draws
        # without a refit) and refined when the quadrature error matters
        cfg, response, deviations = adapted_forward_response(
            cfg, cube, ridges, geometry, deviations, planet=best,
            current=(response, deviations))

    run = FitRun(output_folder=folder, trace_file=trace_file)
    names = list(cfg.wake.damping) + ([BASELINE] if cfg.wake.baseline else [])
    results = {}
    for name in names:
        path, res, status = fit_assumption(
            cfg, deviations, geometry, name, folder=folder,
            cube_path=str(cfg.data.cube), cube_sha=cube_sha, background=fit,
            truths=truths, force=force, resume=resume, workers=workers,
            progress=progress, response=response)
        run.results[name] = path
        run.converged[name] = bool(res.converged)
        run.status[name] = status
        results[name] = res
    baseline = results.get(BASELINE)
    for name, res in results.items():
        report_paths = write_report(
            res, folder / name,
            baseline=baseline if name != BASELINE else None,
            source=run.results[name].name)
        run.reports[name] = [p for p in report_paths
                             if Path(p).name == "report.md"][0]
    _overlays(cfg, cube, ridges, geometry, deviations, results, folder)
    if len(results) > 1:
        try:
            from .compare import compare_results
        except ImportError:  # comparison module not installed yet
            compare_results = None
        if compare_results is not None:
            try:
                run.comparison = compare_results(
                    [run.results[n] for n in names], folder / "comparison",
                    overwrite=True)
            except Exception as exc:  # noqa: BLE001 - keep the fits
                # the fits and reports are written; a failed comparison must
                # not hide them (it can be redone with `kinkfit compare`)
                log.error("comparison across assumptions failed (%s: %s); "
                          "the fit results are complete -- rerun it with "
                          "'kinkfit compare'", type(exc).__name__, exc)
    run.seconds = time.perf_counter() - t0
    return run


def _reuse_trace(path: Path, cfg: KinkfitConfig, cube_sha: str):
    """Traced data from an earlier run of the same config and cube, or None."""
    from types import SimpleNamespace

    import h5py

    from .trace import read_trace_file
    if not path.exists():
        return None
    try:
        with h5py.File(path, "r") as f:
            same = (f.attrs.get("config_text") == cfg.text
                    and f.attrs.get("cube_sha256") == cube_sha)
        if not same:
            return None
        ridges, bg, dev = read_trace_file(path)
    except (OSError, KeyError, ResultFileError) as exc:
        log.warning("%s unreadable (%s); tracing again", path.name, exc)
        return None
    fit = None
    if bg is not None:
        fit = SimpleNamespace(geometry=bg["geometry"], names=bg["names"],
                              values=np.asarray(bg["values"], float),
                              errors=np.asarray(bg["errors"], float))
    return ridges, fit, dev


def _overlays(cfg, cube, ridges, geometry, deviations, results, folder):
    """Channel gallery with the posterior-median model and deviation map."""
    planet_fits = {k: v for k, v in results.items() if k != BASELINE}
    model_dv = None
    planet_xy = None
    if planet_fits:
        name, res = next(iter(planet_fits.items()))
        model_dv, planet_xy = _median_model_on_sky(cfg, geometry, res)
    try:
        from .plots.gallery import channel_gallery, deviation_map
    except ImportError:
        return
    import matplotlib
    matplotlib.use("Agg", force=False)
    fig = channel_gallery(cube, ridges, geometry, model_dv_los=model_dv)
    _save(fig, folder / "gallery.png")
    fig = deviation_map(deviations, planet_xy=planet_xy)
    _save(fig, folder / "deviations.png")


def _save(fig, path: Path):
    import matplotlib.pyplot as plt

    from .atomic import atomic_path
    try:
        with atomic_path(path, suffix=".png") as tmp:
            fig.savefig(tmp, dpi=110)
    finally:
        plt.close(fig)


def _median_model_on_sky(cfg, geometry, res):
    """Line-of-sight wake velocity of the posterior-median planet on the sky.

    Returns a callable ``f(x_arcsec, y_arcsec) -> km/s`` (front surface) and
    the planet's sky position (arcsec).
    """
    from .geometry import disk_to_sky, projection_coefficients, sky_to_disk
    from .geometry import surface_point
    from .scenario import damping_of, wake_disk
    from .wake.model import Planet, wake_perturbations

    med = {n: float(np.median(res.samples[:, j]))
           for j, n in enumerate(res.param_names)}
    med.update({k: float(v) for k, v in (res.fixed or {}).items()})
    planet = Planet(mass_mjup=med["mass"], r_au=med["radius"],
                    phi_rad=math.radians(med["azimuth"]))
    disk = wake_disk(cfg, aspect_ratio=med.get("aspect_ratio"),
                     mstar_msun=geometry.mstar_msun)
    damping = damping_of(res.damping, med.get("alpha", 0.0),
                         med.get("efold", math.inf))

    def dv_los(x, y):
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        r, phi, _ = sky_to_disk(geometry, x, y, "front")
        out = np.zeros_like(r)
        ok = np.isfinite(r) & (r > disk.r_in_au) & (r < disk.r_out_au)
        if np.any(ok):
            vr, vphi, _ = wake_perturbations(r[ok], phi[ok], planet, disk,
                                             damping)
            a_r, a_phi, _ = projection_coefficients(geometry, phi[ok])
            out[ok] = a_r * vr + a_phi * vphi
        return out

    z = surface_point(geometry, planet.r_au, planet.phi_rad, "front")
    px, py, _ = disk_to_sky(geometry, planet.r_au, planet.phi_rad, z)
    return dv_los, (float(px), float(py))


def regenerate_report(result_path, *, output=None, cube=None) -> list[Path]:
    """Rebuild tables, figures and ``report.md`` from a result file alone.

    Parameters
    ----------
    result_path : path-like
        A result written by :func:`run_fit`.
    output : path-like, optional
        Folder for the products (default: ``<result folder>/<assumption>``).
    cube : path-like, optional
        The cube the result claims to come from: its SHA-256 must match the
        recorded one, else :class:`~kinkfit.errors.ResultFileError`.

    Returns
    -------
    list of Path
    """
    from .report import write_report
    from .results import file_sha256, read_result

    path = Path(result_path)
    res = read_result(path)
    if cube is not None:
        cube = Path(cube)
        if not cube.exists():
            raise ResultFileError("cube not found", file=cube)
        sha = file_sha256(cube)
        if sha != res.cube_sha256:
            raise ResultFileError(
                f"{path.name} was made from a cube with SHA-256 "
                f"{res.cube_sha256[:12]}..., not from this file "
                f"({sha[:12]}...)", file=cube, key="cube_sha256")
    baseline = None
    base_path = path.parent / f"fit_{BASELINE}.h5"
    if not res.is_baseline and base_path.exists():
        try:
            candidate = read_result(base_path)
        except ResultFileError:
            candidate = None
        if candidate is not None and candidate.cube_sha256 == res.cube_sha256:
            baseline = candidate
    name = BASELINE if res.is_baseline else res.damping
    folder = Path(output) if output is not None else path.parent / name
    return write_report(res, folder, baseline=baseline, source=path.name)
