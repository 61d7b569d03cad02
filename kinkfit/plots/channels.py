"""Channel-map figures: the montage of a cube's channels.

Sky offsets are drawn with east to the left and north up (``DEVELOPERS.md``:
``x_arcsec`` positive to the east); the beam is drawn as an ellipse in the
lower-left corner with its position angle measured east of north.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import numpy as np

from ..errors import ConfigError

__all__ = ["plot_channel_montage", "save_channel_montage", "montage_channels"]

log = logging.getLogger(__name__)


def montage_channels(nchan_cube: int, nchan: int) -> np.ndarray:
    """Channel indices (file order) shown by a montage of ``nchan`` panels.

    Evenly spaced over the cube, first and last channel included, no repeats.

    Parameters
    ----------
    nchan_cube : int
        Channels in the cube.
    nchan : int
        Panels wanted (at least 1).

    Returns
    -------
    ndarray of int, shape (min(nchan, nchan_cube),)

    Examples
    --------
    >>> montage_channels(10, 4).tolist()
    [0, 3, 6, 9]
    """
    n = min(int(nchan), int(nchan_cube))
    if n <= 1:
        return np.array([nchan_cube // 2], dtype=int)
    return np.unique(np.round(np.linspace(0, nchan_cube - 1, n)).astype(int))


def _check_layout(ncols, nchan):
    for name, val in (("ncols", ncols), ("nchan", nchan)):
        if isinstance(val, bool) or not isinstance(val, (int, np.integer)) or val < 1:
            raise ConfigError(f"montage {name} = {val!r} must be a positive integer",
                              key=name, value=val)


def plot_channel_montage(cube, *, nchan=24, ncols=6, fig=None, vmin=None, vmax=None,
                         cmap="inferno"):
    """Draw evenly spaced channel maps of a cube on a common colour scale.

    Parameters
    ----------
    cube : kinkfit.cube.Cube
        The cube (channels in file order; panels follow file order).
    nchan : int
        Number of panels (channels evenly spaced, see :func:`montage_channels`).
    ncols : int
        Panels per row.
    fig : matplotlib.figure.Figure, optional
        Figure to draw into (cleared first); a new one otherwise.
    vmin, vmax : float, optional
        Colour limits in the cube's ``bunit``; default the 0.5 and 99.7
        percentiles of the shown channels (vmin at least -3 noise).
    cmap : str
        Matplotlib colour map name.

    Returns
    -------
    matplotlib.figure.Figure
        One image axes per shown channel plus one colour-bar axes.
    """
    from matplotlib.figure import Figure
    from matplotlib.patches import Ellipse

    _check_layout(ncols, nchan)
    chans = montage_channels(cube.nchan, nchan)
    n = chans.size
    ncols_eff = min(int(ncols), n)
    nrows = int(math.ceil(n / ncols_eff))
    if fig is None:
        aspect = min(2.0, max(0.5, cube.ny / max(cube.nx, 1)))
        fig = Figure(figsize=(2.0 * ncols_eff + 1.0, 2.0 * aspect * nrows + 0.6),
                     layout="constrained")
    else:
        fig.clear()

    shown = cube.data[chans]
    finite = shown[np.isfinite(shown)]
    if finite.size == 0:
        lo, hi = -1.0, 1.0
    else:
        lo, hi = np.percentile(finite, [0.5, 99.7])
        if np.isfinite(cube.noise) and cube.noise > 0:
            lo = max(lo, -3.0 * cube.noise)
    lo = lo if vmin is None else vmin
    hi = hi if vmax is None else vmax
    if not hi > lo:
        hi = lo + 1.0

    x, y, pix = cube.x_arcsec, cube.y_arcsec, cube.pixel_arcsec
    sx = 1.0 if x[-1] >= x[0] else -1.0
    sy = 1.0 if y[-1] >= y[0] else -1.0
    extent = (x[0] - sx * pix / 2, x[-1] + sx * pix / 2,
              y[0] - sy * pix / 2, y[-1] + sy * pix / 2)
    xmax, xmin = max(extent[:2]), min(extent[:2])
    ymax, ymin = max(extent[2:]), min(extent[2:])

    axes = fig.subplots(nrows, ncols_eff, squeeze=False, sharex=True, sharey=True)
    image = None
    for k, ax in enumerate(axes.ravel()):
        if k >= n:
            ax.remove()
            continue
        c = int(chans[k])
        image = ax.imshow(cube.data[c], origin="lower", extent=extent, vmin=lo, vmax=hi,
                          cmap=cmap, interpolation="nearest", aspect="equal")
        ax.set_xlim(xmax, xmin)          # east to the left
        ax.set_ylim(ymin, ymax)          # north up
        ax.text(0.04, 0.95, f"{cube.velocity_kms[c]:.2f} km/s", transform=ax.transAxes,
                ha="left", va="top", color="w", fontsize=8)
        bmaj, bmin, bpa = (cube.beam_major_arcsec[c], cube.beam_minor_arcsec[c],
                           cube.beam_pa_deg[c])
        # beam major axis along PA east of north: direction (sin PA, cos PA) in
        # (east, north), i.e. 90 - PA from the +x (east) data axis
        bx = xmax - 0.1 * (xmax - xmin) - 0.5 * bmaj
        by = ymin + 0.1 * (ymax - ymin) + 0.5 * bmaj
        ax.add_patch(Ellipse((bx, by), width=bmaj, height=bmin, angle=90.0 - bpa,
                             facecolor="none", edgecolor="w", lw=0.8))
        ax.tick_params(labelsize=7)
    left_bottom = axes[nrows - 1, 0]
    left_bottom.set_xlabel("offset east (arcsec)", fontsize=8)
    left_bottom.set_ylabel("offset north (arcsec)", fontsize=8)
    if image is not None:
        cb = fig.colorbar(image, ax=[a for a in axes.ravel()[:n]], shrink=0.9,
                          pad=0.01)
        cb.set_label(cube.bunit or "brightness")
    name = Path(cube.provenance.get("path", "")).name
    fig.suptitle(f"{name}  ({n} of {cube.nchan} channels)", fontsize=9)
    return fig


def save_channel_montage(cube_path, output=None, ncols=6, nchan=24) -> Path:
    """Read a cube, draw its channel montage and write a PNG.

    Parameters
    ----------
    cube_path : str or os.PathLike
        FITS cube.
    output : str or os.PathLike, optional
        PNG path; default ``<cube stem>_channels.png`` next to the cube.
    ncols, nchan : int
        Panels per row and number of panels.

    Returns
    -------
    pathlib.Path
        The PNG written (atomically: temporary file, then ``os.replace``).
    """
    from ..cube import read_cube

    _check_layout(ncols, nchan)
    cube_path = Path(cube_path)
    cube = read_cube(cube_path)
    if output is None:
        stem = cube_path.name
        for suffix in (".gz", ".fits", ".fit", ".fts"):
            if stem.lower().endswith(suffix):
                stem = stem[: -len(suffix)]
        output = cube_path.with_name(f"{stem}_channels.png")
    output = Path(output)
    if not output.parent.is_dir():
        raise ConfigError(f"montage output directory {output.parent} does not exist",
                          key="output", value=str(output))
    fig = plot_channel_montage(cube, nchan=nchan, ncols=ncols)
    from ..atomic import atomic_path
    with atomic_path(output, suffix=".png") as tmp:
        fig.savefig(tmp, dpi=120, format="png")
    log.info("wrote %s", output)
    return output
