"""Posterior figures: corner plot, walker traces, data vs model displacement.

All functions take a :class:`kinkfit.results.FitResult` (so they can be
redrawn from a result file alone), return a
:class:`matplotlib.figure.Figure`, accept an optional ``fig`` and never call
``show`` or use pyplot state.
"""

from __future__ import annotations

import numpy as np

__all__ = ["corner_figure", "trace_figure", "displacement_figure"]


def _new_figure(figsize):
    from matplotlib.figure import Figure
    return Figure(figsize=figsize, layout=None)


def _truth_vector(result, truths):
    if truths is None:
        truths = result.truths or None
    if truths is None:
        return None
    if isinstance(truths, dict):
        vec = [truths.get(n) for n in result.param_names]
        return None if all(v is None for v in vec) else vec
    vec = list(np.asarray(truths, dtype=float))
    if len(vec) != result.ndim:
        raise ValueError(f"truths has {len(vec)} values, expected "
                         f"{result.ndim}")
    return vec


def corner_figure(result, truths=None, fig=None, bins: int = 30):
    """Corner plot of the posterior samples.

    Parameters
    ----------
    result : FitResult
    truths : dict or sequence, optional
        Known values (e.g. a synthetic cube's truth), canonical units; by
        default ``result.truths`` when present.  Missing entries are skipped.
    fig : matplotlib.figure.Figure, optional
        Empty figure to draw into (or one with ``ndim**2`` axes).

    Returns
    -------
    Figure with ``ndim**2`` axes; 1-D panels mark the 16th, 50th and 84th
    percentiles and carry ``median +/- error`` titles.
    """
    import corner

    k = result.ndim
    if fig is None:
        fig = _new_figure((2.3 * k + 0.8, 2.3 * k + 0.8))
    samples = np.asarray(result.samples)
    tvec = _truth_vector(result, truths)
    ranges = []
    for j in range(k):  # a degenerate column would break corner's range
        lo, hi = np.min(samples[:, j]), np.max(samples[:, j])
        if tvec is not None and tvec[j] is not None and np.isfinite(tvec[j]):
            # a known truth outside the posterior must stay visible
            span = max(hi - lo, 1e-12)
            lo = min(lo, tvec[j] - 0.05 * span)
            hi = max(hi, tvec[j] + 0.05 * span)
        pad = 1e-9 * max(abs(lo), 1.0)
        ranges.append((lo - pad, hi + pad) if hi - lo < pad else (lo, hi))
    corner.corner(samples, fig=fig, labels=list(result.param_labels),
                  truths=tvec,
                  quantiles=[0.16, 0.5, 0.84], show_titles=True,
                  title_fmt=".3g", range=ranges, bins=bins,
                  plot_datapoints=False, truth_color="C3",
                  title_kwargs={"fontsize": 9}, label_kwargs={"fontsize": 9})
    title = result.title or "posterior"
    fig.suptitle(f"{title} — damping: {result.damping}", fontsize=10)
    return fig


def trace_figure(result, fig=None, max_walkers: int = 64):
    """Walker traces of every parameter and of the log-posterior.

    Parameters
    ----------
    result : FitResult
    max_walkers : int
        At most this many walkers are drawn (evenly chosen).

    Returns
    -------
    Figure with ``ndim + 1`` axes sharing the step axis; the burn-in is
    shaded.
    """
    k = result.ndim
    if fig is None:
        fig = _new_figure((7.5, 1.6 * (k + 1) + 0.6))
    axes = fig.subplots(k + 1, 1, sharex=True, squeeze=False)[:, 0]
    chain = np.asarray(result.chain)
    nw = chain.shape[1]
    pick = np.unique(np.linspace(0, nw - 1, min(nw, max_walkers)).astype(int))
    steps = np.arange(chain.shape[0])
    for j, ax in enumerate(axes[:-1]):
        ax.plot(steps, chain[:, pick, j], color="k", alpha=0.25, lw=0.5)
        ax.set_ylabel(result.param_labels[j], fontsize=8)
    lp = np.asarray(result.log_prob)[:, pick]
    finite = np.isfinite(lp)
    axes[-1].plot(steps, np.where(finite, lp, np.nan), color="C0", alpha=0.25,
                  lw=0.5)
    if finite.any():
        top = np.max(lp[finite])
        low = np.percentile(lp[finite], 5)
        axes[-1].set_ylim(low - 0.1 * (top - low + 1), top + 0.1 * (top - low + 1))
    axes[-1].set_ylabel(r"$\ln p$", fontsize=8)
    axes[-1].set_xlabel("step")
    for ax in axes:
        ax.axvspan(0, result.burn, color="0.85", zorder=0)
    tau = np.nanmax(result.tau) if np.any(np.isfinite(result.tau)) else np.nan
    axes[0].set_title(f"{result.n_steps} steps, {nw} walkers, "
                      f"tau_max = {tau:.1f}, burn-in shaded"
                      f"{'' if result.converged else ' (NOT converged)'}",
                      fontsize=9)
    return fig


def displacement_figure(result, fig=None):
    """Measured displacements with the MAP and median model, per point.

    Points are ordered by channel, then disk azimuth.

    Returns
    -------
    Figure with 2 axes: displacement (arcsec) with error bars and the models,
    and the normalised residual of the MAP model.
    """
    if fig is None:
        fig = _new_figure((8.0, 5.0))
    ax, rax = fig.subplots(2, 1, sharex=True,
                           gridspec_kw={"height_ratios": [3, 1]})
    d = result.data
    chan = np.asarray(d.get("channel", np.zeros(result.npts)))
    order = np.lexsort((d["phi_rad"], chan))
    i = np.arange(result.npts)
    off, sig = d["offset_arcsec"][order], d["sigma_arcsec"][order]
    ax.errorbar(i, off, yerr=sig, fmt=".", ms=3, color="k", lw=0.6,
                label="traced")
    if result.median_offset_arcsec.size:
        ax.plot(i, result.median_offset_arcsec[order], color="C1", lw=1,
                label="posterior median model")
    if result.map_offset_arcsec.size:
        ax.plot(i, result.map_offset_arcsec[order], color="C0", lw=1,
                ls="--", label="MAP model")
        rax.plot(i, (off - result.map_offset_arcsec[order]) / sig, ".",
                 ms=3, color="C0")
    rax.axhline(0, color="0.5", lw=0.6)
    ax.set_ylabel("displacement [arcsec]")
    rax.set_ylabel(r"residual [$\sigma$]")
    rax.set_xlabel("traced point (by channel, then azimuth)")
    ax.legend(fontsize=8, loc="best")
    return fig
