"""Channel gallery with traced ridges, and the sky map of the deviations.

Both functions return a :class:`matplotlib.figure.Figure`, accept an
optional ``fig`` and never show or save.  Images are drawn with east to the
left (RA increasing leftwards), axes in arcsec offsets.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["channel_gallery", "deviation_map", "save_trace_figures"]

_SURF_COLOURS = {0: "tab:orange", 1: "tab:cyan"}
_SURF_LABELS = {0: "front", 1: "back"}


def _pick_channels(cube, ridges, channels, nmax=12):
    if channels is not None:
        return [int(c) for c in channels]
    if ridges is not None and len(ridges):
        counts = np.bincount(ridges.channel, minlength=cube.nchan)
        have = np.flatnonzero(counts > 0)
    else:
        have = np.arange(cube.nchan)
    if have.size <= nmax:
        return list(have)
    idx = np.linspace(0, have.size - 1, nmax).round().astype(int)
    return list(have[idx])


def channel_gallery(cube, ridges, geom, *, channels=None, model_dv_los=None,
                    ncols: int = 4, fig=None):
    """Channel maps with traced points and iso-velocity contours.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
    ridges : kinkfit.trace.Ridges or None
        Traced points, coloured by surface (front orange, back cyan).
    geom : kinkfit.geometry.DiskGeometry
        Background disk; its iso-velocity curve ``V_bg = v_ch`` of each
        surface is drawn (solid front, dashed back).
    channels : sequence of int, optional
        Channels (file order) to show; default up to 12 channels with
        points, evenly spaced.
    model_dv_los : callable, optional
        ``f(x_arcsec, y_arcsec) -> dv_los`` (km/s) on the sky grid, e.g. a
        planet model; the contour ``V_bg + dv_los = v_ch`` of the front
        surface is overlaid (dotted white).
    ncols : int
        Panels per row.
    fig : matplotlib.figure.Figure, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D

    from ..trace import background_maps
    chans = _pick_channels(cube, ridges, channels)
    n = max(1, len(chans))
    ncols = max(1, min(int(ncols), n))
    nrows = int(math.ceil(n / ncols))
    if fig is None:
        fig = plt.figure(figsize=(3.0 * ncols, 3.0 * nrows + 0.4))
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True)
    x = np.asarray(cube.x_arcsec)
    y = np.asarray(cube.y_arcsec)
    extent = [x[0] - 0.5 * (x[1] - x[0]), x[-1] + 0.5 * (x[1] - x[0]),
              y[0] - 0.5 * (y[1] - y[0]), y[-1] + 0.5 * (y[1] - y[0])]
    maps = background_maps(cube, geom)
    pert = None
    if model_dv_los is not None:
        X, Y = np.meshgrid(x, y)
        pert = maps["front"][0] + np.asarray(model_dv_los(X, Y), float)
    finite = np.asarray(cube.data)[chans]
    vmax = float(np.nanpercentile(finite, 99.5)) if np.any(np.isfinite(finite)) else 1.0
    vmin = -0.1 * vmax
    for ax, k in zip(axes.flat, chans):
        ax.imshow(cube.data[k], origin="lower", extent=extent, cmap="magma",
                  vmin=vmin, vmax=vmax, interpolation="nearest")
        v = float(cube.velocity_kms[k])
        for name, ls in (("front", "-"), ("back", "--")):
            V = maps[name][0]
            if np.nanmin(V) < v < np.nanmax(V):
                ax.contour(x, y, V, levels=[v], colors="w", linewidths=0.7,
                           linestyles=ls)
        if pert is not None and np.nanmin(pert) < v < np.nanmax(pert):
            ax.contour(x, y, pert, levels=[v], colors="lime", linewidths=0.8,
                       linestyles=":")
        if ridges is not None and len(ridges):
            m = ridges.channel == k
            for code, col in _SURF_COLOURS.items():
                mm = m & (ridges.surface == code)
                if np.any(mm):
                    ax.plot(ridges.x_arcsec[mm], ridges.y_arcsec[mm], "o",
                            ms=2.5, color=col, mew=0)
        ax.text(0.03, 0.95, f"{v:.2f} km/s", transform=ax.transAxes,
                color="w", va="top", fontsize=8)
        ax.set_xlim(extent[0], extent[1])     # east to the left
    for ax in axes.flat[len(chans):]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("east offset (arcsec)")
    for ax in axes[:, 0]:
        ax.set_ylabel("north offset (arcsec)")
    handles = [Line2D([], [], marker="o", ls="", color=c, label=f"traced, {_SURF_LABELS[k]}")
               for k, c in _SURF_COLOURS.items()]
    handles += [Line2D([], [], color="k", ls="-", label="background, front"),
                Line2D([], [], color="k", ls="--", label="background, back")]
    if pert is not None:
        handles.append(Line2D([], [], color="lime", ls=":", label="with model"))
    fig.legend(handles=handles, loc="upper center", ncol=len(handles),
               fontsize=8, frameon=False)
    return fig


def deviation_map(deviations, *, planet_xy=None, fig=None, ax=None,
                  limit_beams=None):
    """Sky map of the measured offsets, coloured by signed offset in beams.

    Parameters
    ----------
    deviations : kinkfit.deviations.Deviations
    planet_xy : (float, float), optional
        Sky position (arcsec east, north) of a planet to mark.
    fig : matplotlib.figure.Figure, optional
    ax : matplotlib.axes.Axes, optional
    limit_beams : float, optional
        Colour range +- this (beam FWHM); default the 98th percentile of
        ``|offset|``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt
    if ax is None:
        if fig is None:
            fig = plt.figure(figsize=(6.0, 5.2))
        ax = fig.add_subplot(1, 1, 1)
    else:
        fig = ax.figure
    off = np.asarray(deviations.offset_beams)
    x = deviations.ridges.x_arcsec
    y = deviations.ridges.y_arcsec
    lim = limit_beams
    if lim is None:
        lim = float(np.nanpercentile(np.abs(off), 98)) if off.size else 1.0
        lim = max(lim, 1e-3)
    markers = {0: "o", 1: "s"}
    sc = None
    for code, mk in markers.items():
        m = deviations.ridges.surface == code
        if np.any(m):
            sc = ax.scatter(x[m], y[m], c=off[m], cmap="RdBu_r", vmin=-lim,
                            vmax=lim, s=10, marker=mk, linewidths=0,
                            label=_SURF_LABELS[code])
    if sc is not None:
        cb = fig.colorbar(sc, ax=ax)
        cb.set_label("offset along grad V (beam FWHM)")
    if planet_xy is not None:
        ax.plot([planet_xy[0]], [planet_xy[1]], marker="*", ms=14, mfc="none",
                mec="k", ls="", label="planet")
    ax.set_aspect("equal")
    if x.size:
        lo, hi = float(np.min(x)), float(np.max(x))
        pad = 0.05 * max(hi - lo, 1e-3)
        ax.set_xlim(hi + pad, lo - pad)       # east to the left
    ax.set_xlabel("east offset (arcsec)")
    ax.set_ylabel("north offset (arcsec)")
    ax.legend(loc="lower right", fontsize=8)
    return fig


def save_trace_figures(cube, ridges, geom, deviations, folder, *, dpi=110):
    """Write ``trace_gallery.png`` and ``deviation_map.png`` into ``folder``.

    Returns
    -------
    list of pathlib.Path
    """
    from pathlib import Path

    from matplotlib.figure import Figure
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    fig = channel_gallery(cube, ridges, geom, fig=Figure(figsize=(12, 9.4)))
    path = folder / "trace_gallery.png"
    fig.savefig(path, dpi=dpi)
    out.append(path)
    fig = deviation_map(deviations, fig=Figure(figsize=(6.0, 5.2)))
    path = folder / "deviation_map.png"
    fig.savefig(path, dpi=dpi)
    out.append(path)
    return out
