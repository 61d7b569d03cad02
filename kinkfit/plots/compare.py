"""Figures of a comparison across fits (:mod:`kinkfit.compare`).

Both functions return a :class:`matplotlib.figure.Figure`, accept an optional
``fig`` and never call ``show`` or use pyplot state.
"""

from __future__ import annotations

import numpy as np

__all__ = ["overlay_corner_figure", "elpd_figure"]

#: 2-D contour levels: the 1- and 2-sigma mass of a 2-D Gaussian
#: (1 - exp(-0.5 n^2); common practice for corner plots, no source)
_LEVELS = (1.0 - np.exp(-0.5), 1.0 - np.exp(-2.0))


def _new_figure(figsize):
    from matplotlib.figure import Figure
    return Figure(figsize=figsize, layout=None)


def _shared_ranges(columns):
    """(lo, hi) per parameter covering every fit (0.2-99.8 percentiles)."""
    ranges = []
    for cols in columns:
        allv = np.concatenate(cols)
        lo, hi = np.percentile(allv, [0.2, 99.8])
        pad = 0.05 * (hi - lo) if hi > lo else 1e-6 * max(abs(lo), 1.0)
        ranges.append((lo - pad, hi + pad))
    return ranges


def overlay_corner_figure(results, names, params=("mass", "radius", "azimuth"),
                          fig=None, bins: int = 30):
    """Corner plot of several posteriors on shared axes, one colour each.

    Parameters
    ----------
    results : sequence of FitResult
        Planet fits (each with every name in ``params``).
    names : sequence of str
        Legend entry of each result (its assumption).
    params : sequence of str
        Parameters drawn (canonical units, labels from the first result).
    fig : matplotlib.figure.Figure, optional
        Empty figure to draw into.
    bins : int
        Histogram bins, shared by every fit (as are the axis ranges).

    Returns
    -------
    Figure with ``len(params)**2`` axes and a figure legend with one entry
    per result.  1-D histograms are normalised (density) so fits with
    different sample counts compare; 2-D contours at the 1 and 2 sigma
    levels of a 2-D Gaussian.
    """
    import corner
    from matplotlib.lines import Line2D

    if len(results) != len(names):
        raise ValueError("one name per result is needed")
    if not results:
        raise ValueError("no result to draw")
    k = len(params)
    cols = [[np.asarray(r.samples)[:, r.param_names.index(p)]
             for r in results] for p in params]
    ranges = _shared_ranges(cols)
    r0 = results[0]
    labels = [r0.param_labels[r0.param_names.index(p)] for p in params]
    if fig is None:
        fig = _new_figure((2.4 * k + 1.0, 2.4 * k + 1.0))
    handles = []
    for i, (res, name) in enumerate(zip(results, names)):
        colour = f"C{i % 10}"
        data = np.column_stack([cols[j][i] for j in range(k)])
        corner.corner(data, fig=fig, range=ranges, bins=bins, color=colour,
                      labels=labels, hist_kwargs={"density": True},
                      plot_datapoints=False, plot_density=False,
                      fill_contours=False, levels=_LEVELS, smooth=1.0,
                      label_kwargs={"fontsize": 9})
        handles.append(Line2D([], [], color=colour, lw=2, label=str(name)))
    # corner scales each 1-D panel to the first fit drawn: rescale to all
    axes = np.array(fig.axes).reshape(k, k)
    for j in range(k):
        peak = max(np.max(np.histogram(cols[j][i], bins=bins, range=ranges[j],
                                       density=True)[0])
                   for i in range(len(results)))
        axes[j, j].set_ylim(0.0, 1.1 * peak)
    fig.legend(handles=handles, loc="upper right",
               bbox_to_anchor=(0.97, 0.9), frameon=False, fontsize=9,
               title="damping assumption", title_fontsize=9)
    title = r0.title or "posterior"
    fig.suptitle(f"{title}: planet parameters under each assumption\n"
                 f"(conditional on the wake model)", fontsize=10, x=0.97,
                 y=0.99, ha="right")
    return fig


def elpd_figure(table, pareto_k: dict, fig=None):
    """PSIS-LOO elpd differences to the best model and Pareto-k values.

    Parameters
    ----------
    table : astropy.table.Table
        :func:`kinkfit.compare.comparison_table` (``assumption``,
        ``elpd_diff``, ``se_diff``).
    pareto_k : dict of str -> ndarray (n_points,)
        Pareto-k estimates per assumption.
    fig : matplotlib.figure.Figure, optional

    Returns
    -------
    Figure with two axes: left, ``elpd_diff`` +/- ``se_diff`` (nats) per
    assumption; right, k-hat per traced point with the 0.5 and 0.7 lines
    of Vehtari, Gelman & Gabry (2017).
    """
    if fig is None:
        fig = _new_figure((10.0, 3.8))
    ax1, ax2 = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1, 1.6]})
    names = list(table["assumption"])
    y = np.arange(len(names))
    d = np.asarray(table["elpd_diff"], dtype=float)
    se = np.asarray(table["se_diff"], dtype=float)
    for i, name in enumerate(names):
        ax1.errorbar(d[i], y[i], xerr=2 * se[i] if np.isfinite(se[i]) else 0,
                     fmt="o", color=f"C{i % 10}", capsize=3)
    ax1.axvline(0.0, color="0.5", lw=0.8, ls="--")
    ax1.set_yticks(y, names)
    ax1.invert_yaxis()
    ax1.set_xlabel(r"$\Delta\,\mathrm{elpd_{LOO}}$ to best [nats] "
                   r"($\pm 2$ SE)")
    for i, name in enumerate(names):
        k = np.asarray(pareto_k[name], dtype=float)
        ax2.plot(np.arange(k.size), k, ".", ms=3, color=f"C{i % 10}",
                 label=name)
    for level, ls in ((0.5, ":"), (0.7, "--")):
        ax2.axhline(level, color="0.4", lw=0.8, ls=ls)
    ax2.set_xlabel("traced point index")
    ax2.set_ylabel(r"Pareto $\hat k$")
    ax2.legend(fontsize=8, frameon=False, loc="upper right")
    fig.suptitle("PSIS-LOO comparison (Vehtari, Gelman & Gabry 2017)",
                 fontsize=10)
    fig.subplots_adjust(left=0.14, right=0.98, bottom=0.16, top=0.88,
                        wspace=0.3)
    return fig
