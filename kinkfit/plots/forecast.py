"""Forecast figures: kink amplitude vs planet mass, minimum mass vs beam and
channel width (from a :class:`kinkfit.forecast.ForecastResult`).

Each function returns a :class:`matplotlib.figure.Figure`, accepts an
optional ``fig`` / ``ax`` and never calls ``show``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["amplitude_figure", "minimum_mass_figure"]


def _axes(fig, ax, figsize, ncols=1):
    from matplotlib.figure import Figure
    if ax is not None:
        axes = np.atleast_1d(ax)
        return axes[0].figure, axes
    if fig is None:
        fig = Figure(figsize=figsize, layout="constrained")
    axes = np.atleast_1d(fig.subplots(1, ncols, squeeze=False)[0])
    return fig, axes


def amplitude_figure(res, beam_index: int = 0, cw_index: int = 0, *, fig=None,
                     ax=None, in_beams: bool = False):
    """Kink amplitude vs planet mass, one curve per channel offset (log axes).

    The threshold line is ``threshold`` times the ridge-point position error
    at the kink (dashed, per offset; it depends weakly on the mass through
    the kink's position, so the value at the median mass is drawn).

    Parameters
    ----------
    res : ForecastResult
    beam_index, cw_index : int
        Which beam and channel width of the sweep.
    in_beams : bool
        Amplitude in beam FWHM instead of arcsec.
    """
    fig, axes = _axes(fig, ax, (6.0, 4.5))
    a = axes[0]
    fwhm = float(res.beam_fwhm_arcsec[beam_index])
    scale = 1.0 / fwhm if in_beams else 1.0
    mid = res.masses_mjup.size // 2
    for k, off in enumerate(res.offsets_kms):
        amp = res.amplitude_arcsec[beam_index, cw_index, k] * scale
        line, = a.loglog(res.masses_mjup, amp, marker="o", ms=3,
                         label=f"{off:+.2f} km/s")
        thr = res.threshold * res.sigma_arcsec[beam_index, cw_index, k, mid] * scale
        if np.isfinite(thr):
            a.axhline(thr, color=line.get_color(), ls="--", lw=0.8)
    a.set_xlabel(r"planet mass $M_p$ [$M_{\rm J}$]")
    a.set_ylabel("kink amplitude [beam FWHM]" if in_beams else "kink amplitude [arcsec]")
    b = res.beams[beam_index]
    a.set_title(f"beam {b[0]:.3g}\"x{b[1]:.3g}\", channel "
                f"{res.channel_widths_kms[cw_index]:.3g} km/s, SNR {res.peak_snr:g}; "
                f"dashed: {res.threshold:g}x position error", fontsize=8)
    a.legend(title=r"$v_{\rm ch}-v_p$", fontsize=7, title_fontsize=7)
    a.grid(True, which="both", alpha=0.3)
    return fig


def minimum_mass_figure(res, *, fig=None, ax=None):
    """Minimum detectable mass vs beam FWHM (one curve per channel width)
    and vs channel width (one curve per beam); best channel offset."""
    fig, axes = _axes(fig, ax, (10.0, 4.0), ncols=2)
    best = res.min_mass_any()
    fwhm = res.beam_fwhm_arcsec
    cws = res.channel_widths_kms
    for j, cw in enumerate(cws):
        axes[0].loglog(fwhm, best[:, j], marker="o", label=f"{cw:.3g} km/s")
    axes[0].set_xlabel("beam FWHM [arcsec]")
    axes[0].set_ylabel(r"minimum mass [$M_{\rm J}$]")
    axes[0].legend(title="channel width", fontsize=7, title_fontsize=7)
    if len(axes) > 1:
        for i, fw in enumerate(fwhm):
            axes[1].loglog(cws, best[i, :], marker="s", label=f"{fw:.3g}\"")
        axes[1].set_xlabel("channel width [km/s]")
        axes[1].set_ylabel(r"minimum mass [$M_{\rm J}$]")
        axes[1].legend(title="beam FWHM", fontsize=7, title_fontsize=7)
    for a in axes:
        a.grid(True, which="both", alpha=0.3)
        a.set_title(f"kink > {res.threshold:g}x position error (SNR {res.peak_snr:g}); "
                    "conditional on the wake model", fontsize=8)
    return fig
