"""Synthetic disk cubes for the tracing / background-fit / deviation tests.

Built with the project's generator (:func:`kinkfit.synth.make_cube`) on an
ALMA-like setup: beam 0.1", pixel 0.033" (beam / 3), 0.2 km/s channels.
The generator's geometry is the analytic truth the tests compare with.
Everything here is invented (a fictional disk).
"""

from __future__ import annotations

import numpy as np

from kinkfit.config import parse_config
from kinkfit.cube import Cube
from kinkfit.geometry import DiskGeometry, EmittingSurface
from kinkfit.synth import LineEmission, ObservingSetup, beam_noise, make_cube, sky_grid

BEAM = 0.1          # arcsec FWHM


def truth_geometry(rotation=1, **kw):
    """The fictional disk: 1 Msun at 140 pc, i = 35 deg, elevated layer."""
    base = dict(mstar_msun=1.0, distance_pc=140.0, inclination_deg=35.0,
                position_angle_deg=130.0, rotation=rotation, x0_arcsec=0.02,
                y0_arcsec=-0.01, vsys_kms=5.0,
                front=EmittingSurface(0.2, 1.25, 100.0), back=None,
                r_max_au=260.0, r_min_au=10.0)
    base.update(kw)
    return DiskGeometry(**base)


def emission():
    return LineEmission(peak_jy_beam=0.05, r_char_au=200.0, r_out_au=260.0)


def make_case(geom, *, peak_snr=20.0, seed=1, npix=128, nchan=40, dv=0.2,
              frequency_ascending=True, perturbation=None, beam=(BEAM, BEAM, 0.0),
              velocity_centre=None):
    """Noisy and noise-free :class:`Cube` of ``geom``.

    ``peak_snr`` is the maximum of the noise-free cube over the per-pixel
    noise rms (the peak SNR an observer would quote for the channel maps).
    """
    setup = ObservingSetup(npix=npix, pixel_arcsec=BEAM / 3.0, nchan=nchan,
                           channel_width_kms=dv, beam_major_arcsec=beam[0],
                           beam_minor_arcsec=beam[1], beam_pa_deg=beam[2],
                           peak_snr=peak_snr, frequency_ascending=frequency_ascending,
                           velocity_centre_kms=velocity_centre)
    em = emission()
    clean, vel = make_cube(geom, setup, em, perturbation=perturbation, noise=False)
    rms = float(clean.max()) / peak_snr
    noisy = clean + beam_noise(setup, rms, np.random.default_rng(seed))
    x, y = sky_grid(setup)

    def cube(data):
        n = vel.size
        return Cube(data=data, velocity_kms=vel, x_arcsec=x, y_arcsec=y,
                    pixel_arcsec=setup.pixel_arcsec,
                    beam_major_arcsec=np.full(n, beam[0]),
                    beam_minor_arcsec=np.full(n, beam[1]),
                    beam_pa_deg=np.full(n, beam[2]),
                    noise_per_channel=np.full(n, rms), noise=rms,
                    bunit="Jy/beam", bunit_raw="Jy/beam",
                    rest_frequency_hz=230.538e9, channel_width_kms=dv,
                    centre_ra_deg=165.0, centre_dec_deg=-34.0,
                    provenance={"path": "synthetic", "sha256": "0" * 64})

    return cube(noisy), cube(clean), setup, em


def config_text(cube_path="unused.fits", *, rotation=1, start=None,
                surfaces=("front", "back"), folder="out", debias=True,
                kink_model="forward"):
    """TOML of a config whose [disk] start values are off the truth."""
    s = dict(mass=1.04, inc=37.0, pa=128.5, vsys=5.03, aspect=0.15,
             flaring=1.0)
    s.update(start or {})
    rot = "counterclockwise" if rotation == 1 else "clockwise"
    surf = ", ".join(f'"{x}"' for x in surfaces)
    return f'''
title = "fictional test disk"
[data]
cube = "{cube_path}"
distance = "140 pc"
[disk]
stellar_mass = {s["mass"]}
inclination = {s["inc"]}
position_angle = {s["pa"]}
rotation = "{rot}"
systemic_velocity = {s["vsys"]}
centre_offset = [0.0, 0.0]
inner_radius = 10.0
outer_radius = 260.0
surface_aspect = {s["aspect"]}
surface_flaring = {s["flaring"]}
[trace]
surfaces = [{surf}]
min_snr = 4.0
debias = {"true" if debias else "false"}
[likelihood]
kink_model = "{kink_model}"
[output]
folder = "{folder}"
'''


def config(**kw):
    return parse_config(config_text(**kw))


def gaussian_blob(r0_au=120.0, phi0_rad=0.6, amp_kms=0.3, width_au=20.0):
    """Localised azimuthal-velocity bump (stand-in for a planet's kink)."""
    def pert(r, phi, z):
        dphi = np.angle(np.exp(1j * (phi - phi0_rad)))
        env = amp_kms * np.exp(-0.5 * ((r - r0_au) / width_au) ** 2
                               - 0.5 * (r0_au * dphi / width_au) ** 2)
        return np.zeros_like(r), env, np.zeros_like(r)
    return pert
