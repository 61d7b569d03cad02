"""Figures of the wake model: perturbation maps in the disk plane with the locus.

Disk-plane axes: ``X = r cos(phi)``, ``Y = r sin(phi)`` in au (disk frame of
DEVELOPERS.md, gas rotating in +phi, i.e. counter-clockwise in these axes).
"""

from __future__ import annotations

import numpy as np

from ..errors import PhysicsRangeError

__all__ = ["plot_wake_maps", "wake_locus_xy"]


def wake_locus_xy(planet, disk, *, n=2000):
    """Cartesian disk-plane points (au) of both wake arms between the disk edges.

    Returns
    -------
    list of (ndarray, ndarray)
        ``(X_au, Y_au)`` for the inner and the outer arm.
    """
    from ..wake.locus import wake_azimuth
    arms = []
    for lo, hi in ((disk.r_in_au, planet.r_au), (planet.r_au, disk.r_out_au)):
        r = np.linspace(lo, hi, n)
        phi = wake_azimuth(r / planet.r_au, disk.aspect_p, disk.q, planet.phi_rad)
        arms.append((r * np.cos(phi), r * np.sin(phi)))
    return arms


def plot_wake_maps(planet, disk, damping=None, *, extent_au=None, fig=None, npix=301,
                   show_locus=True, **model_kwargs):
    """Maps of ``dv_r``, ``dv_phi`` (km/s) and ``dSigma/Sigma`` of the wake.

    Parameters
    ----------
    planet : kinkfit.wake.Planet
    disk : kinkfit.wake.WakeDisk
    damping : kinkfit.wake.Damping, optional
        Damping assumption (default none).
    extent_au : float, optional
        Half-width of the square maps, au; default ``min(r_out, 2 r_p)``.
    fig : matplotlib.figure.Figure, optional
        Figure to draw into (cleared first); a new one otherwise.
    npix : int
        Pixels per side.
    show_locus : bool
        Overlay the R02 wake locus (both arms) and mark the planet.
    **model_kwargs
        Passed to :func:`kinkfit.wake.wake_perturbations` (``x_match_h``, ``clock``).

    Returns
    -------
    matplotlib.figure.Figure
        Three image axes (``dv_r``, ``dv_phi``, ``dSigma/Sigma``) each with a
        colour bar, symmetric diverging colour scales.
    """
    from matplotlib.figure import Figure

    from ..wake import Damping, wake_perturbations

    damping = Damping() if damping is None else damping
    if extent_au is None:
        extent_au = min(disk.r_out_au, 2.0 * planet.r_au)
    if not (np.isfinite(extent_au) and extent_au > 0):
        raise PhysicsRangeError(f"plot extent_au = {extent_au!r} must be > 0",
                                key="extent_au", value=extent_au)
    npix = int(npix)
    if npix < 8:
        raise PhysicsRangeError(f"plot npix = {npix!r} must be >= 8", key="npix", value=npix)
    g = np.linspace(-extent_au, extent_au, npix)
    X, Y = np.meshgrid(g, g)
    r = np.hypot(X, Y)
    phi = np.arctan2(Y, X)
    dvr, dvp, dsg = wake_perturbations(r, phi, planet, disk, damping, **model_kwargs)
    off = (r < disk.r_in_au) | (r > disk.r_out_au)
    maps = [np.where(off, np.nan, m) for m in (dvr, dvp, dsg)]
    labels = [r"$\delta v_r$ [km/s]", r"$\delta v_\phi$ [km/s]",
              r"$\delta\Sigma/\Sigma$"]
    titles = ["radial velocity", "azimuthal velocity", "surface density"]

    if fig is None:
        fig = Figure(figsize=(13.0, 4.4), layout="constrained")
    else:
        fig.clear()
    axes = fig.subplots(1, 3, sharex=True, sharey=True)
    locus = wake_locus_xy(planet, disk) if show_locus else []
    ext = (-extent_au, extent_au, -extent_au, extent_au)
    for ax, m, lab, title in zip(axes, maps, labels, titles):
        finite = m[np.isfinite(m)]
        lim = float(np.percentile(np.abs(finite), 99.5)) if finite.size else 1.0
        lim = lim if lim > 0 else 1.0
        im = ax.imshow(m, origin="lower", extent=ext, cmap="RdBu_r", vmin=-lim, vmax=lim,
                       interpolation="nearest", aspect="equal")
        for xa, ya in locus:
            ax.plot(xa, ya, color="k", lw=0.6, ls="--", alpha=0.7)
        if show_locus:
            ax.plot(planet.r_au * np.cos(planet.phi_rad), planet.r_au * np.sin(planet.phi_rad),
                    marker="o", ms=5, mfc="none", mec="k")
        ax.set_xlim(-extent_au, extent_au)
        ax.set_ylim(-extent_au, extent_au)
        ax.set_xlabel("X [au]")
        ax.set_title(title, fontsize=10)
        fig.colorbar(im, ax=ax, label=lab, shrink=0.85)
    axes[0].set_ylabel("Y [au]")
    fig.suptitle(f"planet {planet.mass_mjup:g} M_Jup at {planet.r_au:g} au, "
                 f"h/r = {disk.aspect_p:g}; {damping.describe()}", fontsize=10)
    return fig
