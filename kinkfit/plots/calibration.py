"""Calibration figures: rank histograms and coverage of injection-recovery runs.

Each function returns a :class:`matplotlib.figure.Figure`, accepts an
optional ``fig`` and never calls ``show``.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["rank_figure", "coverage_figure"]


def _figure(fig, figsize):
    if fig is not None:
        return fig
    from matplotlib.figure import Figure
    return Figure(figsize=figsize, layout="constrained")


def rank_figure(ranks, n_rank: int, names, *, nbins: int | None = None, fig=None):
    """Histogram of the rank of the truth among ``n_rank`` posterior draws.

    One panel per parameter; the band is the expected count per bin under
    calibration with its binomial 1- and 2-sigma range.

    Parameters
    ----------
    ranks : ndarray, shape (n_injections, n_params)
    n_rank : int
        Posterior draws per injection (ranks run over ``0..n_rank``).
    names : sequence of str
    """
    ranks = np.asarray(ranks, float)
    n = ranks.shape[0]
    if nbins is None:
        nbins = max(2, min(10, n // 5))
        while (n_rank + 1) % nbins:
            nbins -= 1
    k = max(1, len(names))
    fig = _figure(fig, (3.0 * k, 2.8))
    axes = np.atleast_1d(fig.subplots(1, k, squeeze=False)[0])
    edges = np.linspace(-0.5, n_rank + 0.5, nbins + 1)
    p = 1.0 / nbins
    mean = n * p
    sd = math.sqrt(n * p * (1 - p))
    for j, (ax, name) in enumerate(zip(axes, names)):
        col = ranks[:, j]
        ax.hist(col[np.isfinite(col)], bins=edges, color="C0", alpha=0.8)
        for m, a in ((2, 0.15), (1, 0.25)):
            ax.axhspan(max(mean - m * sd, 0), mean + m * sd, color="0.5", alpha=a, lw=0)
        ax.axhline(mean, color="k", lw=0.8)
        ax.set_xlabel(f"rank of true {name} (of {n_rank} draws)")
        ax.set_ylabel("injections")
    fig.suptitle(f"{n} injections: flat = calibrated", fontsize=9)
    return fig


def coverage_figure(quantiles, names, *, fig=None, ax=None):
    """Empirical vs nominal coverage of central intervals, per parameter.

    The grey band is the binomial 2-sigma range of a calibrated posterior.

    Parameters
    ----------
    quantiles : ndarray, shape (n_injections, n_params)
        Quantile of the truth in each posterior.
    """
    u = np.asarray(quantiles, float)
    if ax is None:
        fig = _figure(fig, (4.2, 4.0))
        ax = fig.subplots()
    else:
        fig = ax.figure
    levels = np.linspace(0.0, 1.0, 41)
    n = max(1, int(np.sum(np.all(np.isfinite(u), axis=1))))
    band = 2.0 * np.sqrt(levels * (1 - levels) / n)
    ax.fill_between(levels, levels - band, levels + band, color="0.85", lw=0)
    ax.plot([0, 1], [0, 1], color="k", lw=0.8)
    for j, name in enumerate(names):
        col = u[:, j]
        col = col[np.isfinite(col)]
        emp = [np.mean(np.abs(col - 0.5) < 0.5 * p) if col.size else np.nan
               for p in levels]
        ax.plot(levels, emp, label=name)
    ax.set_xlabel("nominal central-interval probability")
    ax.set_ylabel("fraction of truths inside")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.legend(fontsize=7)
    ax.set_title(f"coverage over {n} injections", fontsize=9)
    return fig
