"""Summary tables, figures and the Markdown report of one fit.

Everything is computed from a :class:`kinkfit.results.FitResult` (so from
the HDF5 result file alone).  The report text comes from
``kinkfit/templates/report.md`` (a :class:`string.Template`).

Summary table columns (one row per free parameter): ``name``, ``label``
(LaTeX), ``unit`` (astropy string), ``median``, ``p16``, ``p84`` (16th /
84th percentiles), ``err_minus`` = median - p16, ``err_plus`` =
p84 - median, ``map`` (highest-posterior sample) and ``prior`` (one-line
description).  Numbers are in the parameter's canonical unit.  The table
``meta`` holds the damping assumption, likelihood, convergence numbers and
fixed parameters.
"""

from __future__ import annotations

import datetime as _dt
import logging
import math
import string
from importlib import resources
from pathlib import Path

import numpy as np
from astropy import units as u
from astropy.table import Table

from .constants import MJUP_PER_MSUN

__all__ = ["summary_table", "write_summary", "write_report",
           "summary_markdown", "baseline_comparison", "DAMPING_TEXT"]

log = logging.getLogger(__name__)

#: one-line description of each damping assumption for the report
DAMPING_TEXT = {
    "none": "no dissipation; the wake is followed through the whole disk "
            "(amplitude set by angular-momentum-flux conservation and shock "
            "dissipation only)",
    "viscous": "viscous damping of the wake driven by a Shakura-Sunyaev "
               "alpha (fit parameter alpha)",
    "efold": "plain exponential decay of the wake amplitude along the wake "
             "(fit parameter: e-folding length / r_p)",
}


def _percentiles(samples):
    return np.percentile(samples, [16.0, 50.0, 84.0], axis=0)


def summary_table(result) -> Table:
    """Per-parameter posterior summary.

    Parameters
    ----------
    result : FitResult

    Returns
    -------
    astropy.table.Table
        One row per free parameter (see the module docstring).
    """
    samples = np.asarray(result.samples, dtype=float)
    p16, p50, p84 = _percentiles(samples)
    t = Table()
    t["name"] = list(result.param_names)
    t["label"] = list(result.param_labels)
    t["unit"] = list(result.param_units)
    t["median"] = p50
    t["p16"] = p16
    t["p84"] = p84
    t["err_minus"] = p50 - p16
    t["err_plus"] = p84 - p50
    t["map"] = np.asarray(result.map_theta, dtype=float)
    t["prior"] = list(result.param_priors)
    for col in ("median", "p16", "p84", "err_minus", "err_plus", "map"):
        t[col].format = ".5g"
    for col, text in (("median", "posterior median"),
                      ("p16", "16th percentile"), ("p84", "84th percentile"),
                      ("err_minus", "median - p16"),
                      ("err_plus", "p84 - median"),
                      ("map", "highest-posterior sample of the chain"),
                      ("unit", "astropy unit string of the row")):
        t[col].description = text
    tau = np.asarray(result.tau, dtype=float)
    t.meta.update({
        "title": result.title, "damping": result.damping,
        "likelihood": result.likelihood_kind,
        "likelihood_dof": float(result.likelihood_dof),
        "is_baseline": bool(result.is_baseline),
        "converged": bool(result.converged), "n_steps": int(result.n_steps),
        "n_walkers": int(np.shape(result.chain)[1]),
        "tau_steps": [float(x) for x in tau],
        "n_samples": int(samples.shape[0]),
        "fixed": {k: float(v) for k, v in result.fixed.items()},
        "thermal_mass_convention": "M_th = (h_p/r_p)^3 M_star",
    })
    return t


def _sig(x: float, err: float) -> str:
    """``x`` rounded to two significant digits of ``err``."""
    if not (np.isfinite(err) and err > 0):
        return f"{x:.4g}"
    digits = max(0, 1 - int(math.floor(math.log10(err))))
    return f"{x:.{digits}f}"


def _latex_unit(unit: str) -> str:
    if not unit:
        return ""
    try:
        return u.Unit(unit).to_string("latex_inline")
    except ValueError:
        return unit


def summary_markdown(table: Table) -> str:
    """Markdown table of a :func:`summary_table`."""
    rows = ["| parameter | unit | median | -1σ / +1σ | MAP | prior |",
            "|---|---|---|---|---|---|"]
    for r in table:
        err = min(r["err_minus"], r["err_plus"])
        rows.append(
            f"| `{r['name']}` | {r['unit'] or '—'} | "
            f"{_sig(r['median'], err)} | -{_sig(r['err_minus'], err)} / "
            f"+{_sig(r['err_plus'], err)} | {_sig(r['map'], err)} | "
            f"{r['prior']} |")
    return "\n".join(rows) + "\n"


def _latex_table(table: Table) -> Table:
    out = Table()
    out["Parameter"] = list(table["label"])
    vals = []
    for r in table:
        err = min(r["err_minus"], r["err_plus"])
        vals.append(f"${_sig(r['median'], err)}"
                    f"^{{+{_sig(r['err_plus'], err)}}}"
                    f"_{{-{_sig(r['err_minus'], err)}}}$")
    out["Posterior"] = vals
    out["MAP"] = [_sig(r["map"], min(r["err_minus"], r["err_plus"]))
                  for r in table]
    out["Unit"] = [_latex_unit(s) for s in table["unit"]]
    out["Prior"] = [s.replace("_", r"\_") for s in table["prior"]]
    return out


def write_summary(result, folder, stem: str = "summary") -> list[Path]:
    """Write the summary table as ECSV, CSV, LaTeX and Markdown.

    Returns
    -------
    list of Path: ``<stem>.ecsv``, ``.csv``, ``.tex``, ``.md`` in ``folder``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    t = summary_table(result)
    paths = [folder / f"{stem}.{ext}" for ext in ("ecsv", "csv", "tex", "md")]
    t.write(paths[0], format="ascii.ecsv", overwrite=True)
    t.write(paths[1], format="ascii.csv", overwrite=True)
    caption = (f"Posterior of the planet parameters (damping assumption: "
               f"{result.damping}; median and 16th--84th percentiles). The mass is "
               f"conditional on the wake model.")
    _latex_table(t).write(paths[2], format="ascii.latex", overwrite=True,
                          latexdict={"caption": caption,
                                     "tabletype": "table"})
    paths[3].write_text(summary_markdown(t), encoding="utf-8")
    return paths


def _loglike_max(result) -> float:
    """Largest log-likelihood known: MAP sample or a stored pointwise row."""
    pw = np.asarray(result.pointwise_loglike)
    vals = [result.map_loglike] + ([float(np.max(pw.sum(axis=1)))]
                                   if pw.size else [])
    vals = [v for v in vals if np.isfinite(v)]
    return max(vals) if vals else float("nan")


def baseline_comparison(result, baseline) -> dict[str, float]:
    """Planet fit vs planet-free baseline of the same traced points.

    Uses the largest total log-likelihood known for each fit (its MAP
    sample or a stored pointwise sample; an approximation of the maximum
    likelihood, typically low by O(1)) and
    the Bayesian information criterion (Schwarz 1978),
    ``BIC = k ln n - 2 ln L_max``.

    Returns
    -------
    dict with ``delta_loglike_max`` (planet - baseline), ``delta_bic``
    (planet - baseline; negative favours the planet), ``n_points``,
    ``k_planet``, ``k_baseline``.
    """
    if result.npts != baseline.npts or not np.array_equal(
            result.data["offset_arcsec"], baseline.data["offset_arcsec"]):
        raise ValueError("the baseline was fitted to different traced points")
    n = result.npts
    dll = _loglike_max(result) - _loglike_max(baseline)
    dk = result.ndim - baseline.ndim
    return {"delta_loglike_max": dll, "delta_bic": dk * np.log(n) - 2 * dll,
            "n_points": float(n), "k_planet": float(result.ndim),
            "k_baseline": float(baseline.ndim)}


def _comparison_text(result, baseline) -> str:
    if result.is_baseline:
        return ("This *is* the planet-free baseline (jitter only); compare "
                "planet fits of the same traced points against it.")
    comp = dict(result.comparison)
    if baseline is not None:
        comp.update(baseline_comparison(result, baseline))
    if not comp:
        return ("**No planet-free baseline is stored with this fit.** Fit "
                "the baseline (`wake.baseline = true`) and compare before "
                "interpreting the planet parameters.")
    lines = ["| quantity | value |", "|---|---|"]
    for k, v in comp.items():
        lines.append(f"| {k} | {v:.4g} |")
    text = "\n".join(lines)
    if "delta_bic" in comp:
        verdict = ("favours the planet model" if comp["delta_bic"] < -10 else
                   "does not clearly favour the planet model")
        text += (f"\n\nΔBIC = {comp['delta_bic']:.1f} (planet − baseline; "
                 f"below −10 is commonly read as strong support, "
                 f"Kass & Raftery 1995): the comparison {verdict}. BIC "
                 f"assumes independent points and a peaked posterior; it is "
                 f"a rough guide, not a detection test.")
    return text


def _convergence_text(result) -> str:
    tau = np.asarray(result.tau, dtype=float)
    nw = int(np.shape(result.chain)[1])
    acc = np.asarray(result.acceptance, dtype=float)
    mult = result.convergence.get("autocorr_multiple", float("nan"))
    tol = result.convergence.get("tau_tolerance", float("nan"))
    tau_max = np.nanmax(tau) if np.any(np.isfinite(tau)) else float("nan")
    lines = [
        f"- Converged: **{'yes' if result.converged else 'NO'}** "
        f"(criterion: steps after the first third > {mult:g} τ_max, τ "
        f"measured on those steps, and τ changed by less than "
        f"{100 * tol:g}% between checks).",
        (f"- {result.n_steps} steps × {nw} walkers; integrated "
         f"autocorrelation time τ = "
         + ", ".join(f"{n}: {t:.1f}" for n, t in zip(result.param_names, tau))
         + f" steps (on the last two thirds of the chain); N/τ_max = "
         f"{(result.n_steps - result.n_steps // 3) / tau_max:.1f}.")
        if np.isfinite(tau_max) else
        (f"- {result.n_steps} steps × {nw} walkers; the autocorrelation time "
         f"could not be estimated (chain too short)."),
        f"- Acceptance fraction: mean {acc.mean():.3f} "
        f"(range {acc.min():.3f}–{acc.max():.3f}).",
        f"- Burn-in {result.burn} steps, thinning {result.thin}: "
        f"{len(result.samples)} posterior samples.",
    ]
    rejected = {k: v for k, v in result.counters.items()
                if k != "evaluated" and v}
    if result.counters:
        lines.append(
            f"- Log-probability evaluations: "
            f"{result.counters.get('evaluated', 0)}; rejected (−inf): "
            + (", ".join(f"{k} {v}" for k, v in rejected.items())
               if rejected else "none") + ".")
    tm = result.timings
    if tm:
        lines.append(f"- Sampling time (last run): {tm.get('wall_s', 0):.1f} s"
                     f" wall, {tm.get('ms_per_evaluation', float('nan')):.3g}"
                     f" ms per log-probability evaluation, "
                     f"{int(tm.get('workers', 1))} process(es).")
    if not result.converged:
        lines.append("- **The chain did not meet the convergence criterion: "
                     "run longer (the checkpoint resumes) before using these "
                     "numbers.**")
    return "\n".join(lines)


def _kink_text(forward: dict) -> str:
    """How the model kink was computed (first-order, or the forward model
    with its nodes and node check, ``FitResult.forward_model``)."""
    if not forward:
        return ("kink = line-of-sight velocity perturbation divided by the "
                "background velocity gradient (first order)")
    n = int(forward.get("node_subpixels", 1))
    text = (f"kink = traced peak of the beam-smeared model channel (forward "
            f"model; wake at {int(forward.get('nodes', 0))} nodes, {n} x {n} "
            f"per pixel, back layer every "
            f"{int(forward.get('back_node_stride', 1))} pixel(s)")
    if "node_check_median_delta_chi2" in forward:
        a = int(forward["node_check_subpixels"])
        b = int(forward["node_check_reference_subpixels"])
        text += (f"; node check {a} x {a} against {b} x {b} sub-pixel nodes "
                 f"at {forward['node_check_mass_mjup']:.2f} M_J: median "
                 f"delta chi2 {forward['node_check_median_delta_chi2']:.2f}")
    return text + ")"


def _thermal(result):
    hr = result.fixed.get("aspect_ratio")
    if hr is None and "aspect_ratio" in result.param_names:
        j = result.param_names.index("aspect_ratio")
        hr = float(np.median(result.samples[:, j]))
    mstar = result.background.get("stellar_mass")
    if hr is None:
        return "M_th = (h_p/r_p)^3 M*", "", "—"
    text = f"M_th = (h_p/r_p)^3 M* with h_p/r_p = {hr:.4g}"
    ratio = ""
    if mstar is not None:
        mth_mjup = hr ** 3 * mstar / MJUP_PER_MSUN
        text += (f" and M* = {mstar:.4g} M_sun: M_th = {mth_mjup:.4g} M_Jup "
                 f"(Goodman & Rafikov 2001 use M1 = (2/3) M_th)")
        if "mass" in result.param_names:
            j = result.param_names.index("mass")
            q16, q50, q84 = np.percentile(result.samples[:, j] / mth_mjup,
                                          [16, 50, 84])
            ratio = (f"\nPlanet mass in thermal masses: M_p/M_th = "
                     f"{q50:.3g} (−{q50 - q16:.2g} / +{q84 - q50:.2g}); linear "
                     f"theory near the planet needs M_p ≪ M_th.\n")
    return text, ratio, f"{hr:.4g}"


def write_report(result, folder, *, baseline=None, truths=None,
                 source: str = "", dpi: int = 120) -> list[Path]:
    """Write tables, figures and ``report.md`` for one fit.

    Parameters
    ----------
    result : FitResult
    folder : path-like
        Output folder (created; files of the same names are replaced).
    baseline : FitResult, optional
        Planet-free baseline fitted to the same traced points; adds the
        comparison (see :func:`baseline_comparison`).
    truths : dict, optional
        Known values for the corner plot (default ``result.truths``).
    source : str
        Name of the result file, quoted in the report.

    Returns
    -------
    list of Path: summary tables, ``corner.png``, ``trace.png``,
    ``displacements.png`` and ``report.md``.
    """
    from .plots.posterior import (corner_figure, displacement_figure,
                                  trace_figure)
    folder = Path(folder)
    paths = write_summary(result, folder)
    figures = {"corner.png": lambda: corner_figure(result, truths=truths),
               "trace.png": lambda: trace_figure(result),
               "displacements.png": lambda: displacement_figure(result)}
    for name, make in figures.items():
        fig = make()
        fig.savefig(folder / name, dpi=dpi)
        paths.append(folder / name)

    table = summary_table(result)
    thermal_text, ratio_text, hr_text = _thermal(result)
    chan = result.data.get("channel")
    nchan = len(np.unique(chan)) if chan is not None else "?"
    if result.likelihood_kind == "student-t":
        lik = (f"Student-t, {result.likelihood_dof:g} degrees of freedom, "
               f"scale sqrt(sigma_i^2 + jitter^2)")
    else:
        lik = "Gaussian, variance sigma_i^2 + jitter^2"
    model = ("planet-free baseline (zero wake), jitter only"
             if result.is_baseline else
             "planet wake: linear response near the planet (GR01), "
             "Burgers-steepened nonlinear wave far from it (R02); "
             + _kink_text(result.forward_model))
    fixed = ", ".join(f"{k} = {v:g}" for k, v in result.fixed.items()) or "none"
    versions = "\n".join(f"| {k} | {v} |" for k, v in result.versions.items())
    values = {
        "title": result.title or "(untitled)",
        "generated": _dt.datetime.now(_dt.timezone.utc).isoformat(
            timespec="seconds"),
        "source": source or "(in memory)", "created": result.created_utc,
        "package_version": result.package_version,
        "cube_path": result.cube_path or "—",
        "cube_sha256": result.cube_sha256 or "—",
        "npts": result.npts, "nchan": nchan, "likelihood": lik,
        "model_text": model, "damping": result.damping,
        "damping_text": DAMPING_TEXT.get(result.damping, "custom"),
        "aspect_ratio": hr_text, "thermal_mass_text": thermal_text,
        "fixed_text": fixed, "seed": result.seed,
        "summary_table": summary_markdown(table),
        "thermal_ratio_text": ratio_text,
        "convergence_text": _convergence_text(result),
        "comparison_text": _comparison_text(result, baseline),
        "corner_png": "corner.png", "trace_png": "trace.png",
        "displacement_png": "displacements.png",
        "versions_table": versions,
        "config_text": result.config_text.rstrip() or "# (no config stored)",
    }
    template = string.Template(
        resources.files("kinkfit").joinpath("templates/report.md")
        .read_text(encoding="utf-8"))
    report = folder / "report.md"
    report.write_text(template.substitute(values), encoding="utf-8")
    paths.append(report)
    log.info("report written to %s", folder)
    return paths
