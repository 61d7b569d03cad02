"""From a config to the objects of a synthetic observation.

This front-end module joins the pieces that the lower layers keep apart:
the ``[synth]`` section becomes a :class:`kinkfit.synth.ObservingSetup` and a
:class:`kinkfit.synth.LineEmission`; ``[synth.truth]`` and ``[wake]`` become
a planet wake, handed to the synthetic-cube generator as a plain velocity
callable (the generator knows nothing of wakes).  The demo cube and every
injection of the calibration use this path, so injection-recovery tests the
same code that fits.
"""

from __future__ import annotations

import logging
import math
from pathlib import Path

import numpy as np

from .config import KinkfitConfig, SynthTruth
from .errors import ConfigError

__all__ = ["observing_setup", "line_emission", "wake_disk", "damping_of",
           "planet_perturbation", "synth_from_config", "truth_values"]

log = logging.getLogger(__name__)


def observing_setup(cfg: KinkfitConfig):
    """:class:`kinkfit.synth.ObservingSetup` of a config's ``[synth]``."""
    from .synth import ObservingSetup
    s = _need_synth(cfg)
    return ObservingSetup(
        npix=s.npix, pixel_arcsec=s.pixel_arcsec, nchan=s.nchan,
        channel_width_kms=s.channel_width_kms,
        velocity_centre_kms=s.velocity_centre_kms,
        beam_major_arcsec=s.beam_major_arcsec,
        beam_minor_arcsec=s.beam_minor_arcsec, beam_pa_deg=s.beam_pa_deg,
        peak_snr=s.peak_snr, rest_frequency_hz=s.rest_frequency_hz,
        ra_deg=s.ra_deg, dec_deg=s.dec_deg)


def line_emission(cfg: KinkfitConfig):
    """:class:`kinkfit.synth.LineEmission` of a config's ``[synth]``."""
    from .synth import LineEmission
    s = _need_synth(cfg)
    return LineEmission(
        peak_jy_beam=s.peak_brightness, r_char_au=s.brightness_radius_au,
        r_out_au=cfg.disk.outer_radius_au, back_ratio=s.back_ratio,
        t_ref_k=s.temperature_k, r_t_ref_au=100.0,
        temperature_index=s.temperature_index, v_turb_kms=s.turbulence_kms)


def wake_disk(cfg: KinkfitConfig, aspect_ratio: float | None = None,
              mstar_msun: float | None = None):
    """:class:`kinkfit.wake.model.WakeDisk` from ``[wake]`` and ``[disk]``."""
    from .wake.model import WakeDisk
    return WakeDisk(
        mstar_msun=cfg.disk.stellar_mass_msun if mstar_msun is None
        else mstar_msun,
        aspect_p=cfg.wake.aspect_ratio if aspect_ratio is None
        else aspect_ratio,
        q=cfg.wake.sound_speed_index, p=cfg.wake.surface_density_index,
        gamma=cfg.wake.adiabatic_index,
        r_in_au=max(cfg.disk.inner_radius_au, 1e-3),
        r_out_au=cfg.disk.outer_radius_au)


def damping_of(kind: str, alpha: float = 0.0, efold: float = math.inf):
    """:class:`kinkfit.wake.model.Damping` of a named assumption."""
    from .wake.model import Damping
    return Damping(kind=kind, alpha=float(alpha), efold_rp=float(efold))


def planet_perturbation(cfg: KinkfitConfig, truth: SynthTruth):
    """Velocity callable ``f(r_au, phi_rad, z_au) -> (dv_r, dv_phi, dv_z)``.

    The wake of the planet ``truth`` in the disk of ``cfg`` (km/s), with
    the vertical perturbation set to zero (2-D wake applied on the
    emitting layer, DEVELOPERS.md).
    """
    from .wake.model import Planet, wake_perturbations
    planet = Planet(mass_mjup=truth.mass_mjup, r_au=truth.radius_au,
                    phi_rad=math.radians(truth.azimuth_deg))
    disk = wake_disk(cfg)
    damping = damping_of(truth.damping, truth.alpha, truth.efold)

    def perturbation(r_au, phi_rad, z_au):
        r = np.asarray(r_au, dtype=float)
        phi = np.asarray(phi_rad, dtype=float)
        dv_r = np.zeros_like(r)
        dv_phi = np.zeros_like(r)
        ok = np.isfinite(r) & (r > disk.r_in_au) & (r < disk.r_out_au)
        if np.any(ok):
            vr, vphi, _ = wake_perturbations(r[ok], phi[ok], planet, disk,
                                             damping)
            dv_r[ok] = vr
            dv_phi[ok] = vphi
        return dv_r, dv_phi, np.zeros_like(r)

    return perturbation


def truth_values(truth: SynthTruth | None, aspect_ratio: float) -> dict:
    """Injected planet as fit-parameter values (canonical units)."""
    if truth is None:
        return {}
    out = {"mass": truth.mass_mjup, "radius": truth.radius_au,
           "azimuth": truth.azimuth_deg, "aspect_ratio": aspect_ratio}
    if truth.damping == "viscous":
        out["alpha"] = truth.alpha
    elif truth.damping == "efold":
        out["efold"] = truth.efold
    return out


def _truth_cards(truth: SynthTruth | None, aspect_ratio: float):
    if truth is None:
        return [("KFPLANET", False, "no planet injected")]
    return [("KFPLANET", True, "planet wake injected"),
            ("KFMASS", truth.mass_mjup, "[Mjup] injected planet mass"),
            ("KFRADIUS", truth.radius_au, "[au] injected orbital radius"),
            ("KFAZIM", truth.azimuth_deg, "[deg] injected azimuth"),
            ("KFDAMP", truth.damping, "injected damping assumption"),
            ("KFALPHA", truth.alpha, "injected viscous alpha"),
            ("KFEFOLD", truth.efold if np.isfinite(truth.efold) else -1.0,
             "[r_p] injected e-folding length (-1: none)"),
            ("KFASPECT", aspect_ratio, "h/r at the planet")]


def synth_from_config(cfg: KinkfitConfig, output=None, overwrite=False,
                      *, truth: SynthTruth | None = None, seed=None,
                      noise: bool = True) -> Path:
    """Write the synthetic cube a config describes.

    Parameters
    ----------
    cfg : KinkfitConfig
        Needs a ``[synth]`` section; the disk is ``[disk]`` (+ ``[data]``
        distance), the planet ``[synth.truth]`` unless ``truth`` is given.
    output : path-like, optional
        Default: the config's ``data.cube``.
    overwrite : bool
        Replace an existing file.
    truth : SynthTruth, optional
        Planet to inject instead of the config's (calibration draws).
    seed : int, optional
        Noise seed instead of ``synth.seed``.

    Returns
    -------
    pathlib.Path
    """
    from .synth import write_synthetic_cube
    s = _need_synth(cfg)
    truth = s.truth if truth is None else truth
    path = Path(output) if output is not None else cfg.data.cube
    path.parent.mkdir(parents=True, exist_ok=True)
    perturbation = None if truth is None else planet_perturbation(cfg, truth)
    return write_synthetic_cube(
        path, cfg.geometry(), observing_setup(cfg), line_emission(cfg),
        perturbation=perturbation, seed=s.seed if seed is None else seed,
        overwrite=overwrite, noise=noise,
        extra_truth=_truth_cards(truth, cfg.wake.aspect_ratio))


def _need_synth(cfg: KinkfitConfig):
    if cfg.synth is None:
        raise ConfigError("this command needs a [synth] section",
                          file=cfg.path, key="synth")
    return cfg.synth
