"""Tests of kinkfit.synth: synthetic cubes, their FITS files and their truth."""

import math

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from astropy.convolution import Gaussian2DKernel
from astropy.io import fits
from astropy.wcs import WCS
from scipy.integrate import quad
from scipy.optimize import brentq

from kinkfit.errors import (ConfigError, InputFileError, PhysicsRangeError,
                             ResultFileError)
from kinkfit.geometry import DiskGeometry, EmittingSurface, background_velocity
from kinkfit.synth import (
    LineEmission, ObservingSetup, beam_kernel, beam_noise, channel_profile,
    channel_velocities, geometry_from_header, make_cube, sky_grid,
    write_synthetic_cube,
)

# flat, narrow-lined, uniformly bright disk: the peak of each channel's
# emission then sits on the iso-velocity curve up to beam-curvature terms
FLAT = DiskGeometry(1.0, 140.0, 40.0, 90.0, vsys_kms=3.0)
SHARP = LineEmission(t_ref_k=20.0, v_turb_kms=0.0, back_ratio=0.0, gamma=0.0,
                     r_char_au=1e5)
SMALL = ObservingSetup(npix=96, pixel_arcsec=0.04, nchan=5, channel_width_kms=0.08,
                       velocity_centre_kms=3.0 + 1.45, beam_major_arcsec=0.12,
                       beam_minor_arcsec=0.10, beam_pa_deg=20.0, oversample=3)


def _peak(profile, coords, sel):
    """Sub-pixel peak of a 1-D profile (parabola through the maximum)."""
    i = sel[np.argmax(profile[sel])]
    a, b, c = profile[i - 1], profile[i], profile[i + 1]
    off = 0.5 * (a - c) / (a - 2 * b + c)
    step = coords[i + 1] - coords[i]
    return coords[i] + off * step


# --------------------------------------------------------------- pieces ---
def test_channel_profile_matches_quadrature():
    # oracle: scipy.integrate.quad of exp(-(v - v0)^2 / (2 s^2)) over the channel
    for v0, s, lo, hi in [(0.0, 0.1, -0.05, 0.05), (0.3, 0.07, 0.1, 0.35),
                          (-1.0, 0.5, 2.0, 2.2)]:
        ref = quad(lambda v: math.exp(-0.5 * ((v - v0) / s) ** 2), lo, hi)[0] / (hi - lo)
        assert float(channel_profile(v0, s, lo, hi)) == pytest.approx(ref, rel=1e-9,
                                                                      abs=1e-15)


def test_thermal_line_width():
    # sqrt(k T / m) for CO (28 u) at 40 K, astropy.constants as oracle
    e = LineEmission(t_ref_k=40.0, r_t_ref_au=100.0, temperature_index=0.5,
                     v_turb_kms=0.0)
    ref = np.sqrt(const.k_B * 40 * u.K / (28 * const.u)).to_value(u.km / u.s)
    assert float(e.line_sigma_kms(100.0)) == pytest.approx(ref, rel=1e-12)
    assert ref == pytest.approx(0.109, abs=0.001)   # (from memory) ~0.11 km/s
    # T = T_ref (r/r_ref)^-index: at 400 au T = 20 K; turbulence in quadrature
    e2 = LineEmission(t_ref_k=40.0, v_turb_kms=0.1)
    assert float(e2.temperature_k(400.0)) == pytest.approx(20.0)
    assert float(e2.line_sigma_kms(100.0)) == pytest.approx(math.hypot(ref, 0.1))


def test_beam_kernel_matches_astropy():
    # oracle: astropy.convolution.Gaussian2DKernel; array x = column (towards
    # west), y = row (north): a major axis at PA east of north is at
    # theta = 90 deg + PA counter-clockwise from +x
    setup = ObservingSetup(npix=64, pixel_arcsec=0.03, beam_major_arcsec=0.3,
                           beam_minor_arcsec=0.18, beam_pa_deg=30.0)
    k = beam_kernel(setup)
    f = 2 * math.sqrt(2 * math.log(2))
    ref = Gaussian2DKernel(0.3 / f / 0.03, 0.18 / f / 0.03,
                           theta=math.radians(90.0 + 30.0),
                           x_size=k.shape[1], y_size=k.shape[0], mode="center").array
    ref = ref / ref.sum()
    np.testing.assert_allclose(k, ref, atol=1e-12)
    assert k.sum() == pytest.approx(1.0, abs=1e-12)
    # a point source of flux F peaks at F Jy/beam: peak * Omega_b / Omega_pix = 1
    # (PHYSICS.md section 2: Omega_b = pi bmaj bmin / (4 ln 2))
    omega_ratio = math.pi * 0.3 * 0.18 / (4 * math.log(2)) / 0.03 ** 2
    assert k.max() * omega_ratio == pytest.approx(1.0, rel=1e-3)


def test_grid_and_channels():
    s = ObservingSetup(npix=6, pixel_arcsec=0.1, nchan=4, channel_width_kms=0.25)
    x, y = sky_grid(s)
    # reference pixel npix // 2 at the centre, CDELT1 < 0 (cube.write_cube)
    np.testing.assert_allclose(x, [0.3, 0.2, 0.1, 0.0, -0.1, -0.2], atol=1e-15)
    np.testing.assert_allclose(y, [-0.3, -0.2, -0.1, 0.0, 0.1, 0.2], atol=1e-15)
    xo, _ = sky_grid(s, 2)
    np.testing.assert_allclose(xo[:2], [0.325, 0.275], atol=1e-15)
    v = channel_velocities(s, FLAT)
    np.testing.assert_allclose(v, 3.0 + np.array([0.375, 0.125, -0.125, -0.375]))


# ------------------------------------------------------------- physics ---
def test_emission_peaks_on_isovelocity_curve():
    data, v = make_cube(FLAT, SMALL, SHARP, noise=False)
    x, y = sky_grid(SMALL)
    pix = SMALL.pixel_arcsec
    j0 = SMALL.npix // 2
    # along the red major axis (PA = 90: east, row through the centre)
    for k in range(SMALL.nchan):
        xp = _peak(data[k, j0], x, np.flatnonzero(x > 0.5))
        xt = brentq(lambda q: background_velocity(FLAT, q, 0.0) - v[k], 0.3, 2.5)
        assert abs(xp - xt) < 0.25 * pix, (k, xp, xt)
    # across the petal, along columns 0.5" and 0.8" east of the centre
    for xc in (0.5, 0.8):
        i = int(np.argmin(abs(x - xc)))
        for k in range(SMALL.nchan):
            yp = _peak(data[k, :, i], y, np.flatnonzero(y > 0.1))
            yt = brentq(lambda q: background_velocity(FLAT, x[i], q) - v[k], 0.02, 1.8)
            assert abs(yp - yt) < 0.25 * pix, (xc, k, yp, yt)


def test_elevated_layer_emission_on_its_isovelocity_curve():
    # front layer only (back_ratio 0), z/r = 0.2: each column crosses the petal
    # twice, both crossings shifted towards the far side (PA + 90 = south
    # here); the emission peaks within a fraction of a pixel of both roots
    # of background_velocity(x, y, 'front') = v_channel
    g = DiskGeometry(1.0, 140.0, 40.0, 90.0, vsys_kms=3.0,
                     front=EmittingSurface(0.2, 1.25))
    data, v = make_cube(g, SMALL, SHARP, noise=False)
    x, y = sky_grid(SMALL)
    pix = SMALL.pixel_arcsec
    for xc in (0.4, 0.6):     # > 2 beams from the petal tips (curvature bias)
        i = int(np.argmin(abs(x - xc)))
        for k in range(SMALL.nchan):
            def f(q):
                return background_velocity(g, x[i], q) - v[k]
            qs = np.linspace(-1.8, 1.8, 721)
            fv = f(qs)
            roots = [brentq(f, qs[m], qs[m + 1]) for m in range(qs.size - 1)
                     if fv[m] * fv[m + 1] < 0]
            assert len(roots) == 2 and roots[0] + roots[1] < 0   # shifted south
            for yt in roots:
                sel = np.flatnonzero(np.abs(y - yt) < 0.12)
                yp = _peak(data[k, :, i], y, sel)
                assert abs(yp - yt) < 0.25 * pix, (xc, k, yp, yt)


def test_flux_conserved_by_beam():
    # convention: Jy/beam brightness, unit-sum kernel, flux = sum * Omega_pix/Omega_b
    g = DiskGeometry(1.0, 140.0, 50.0, 30.0, front=EmittingSurface(0.2, 1.25),
                     r_max_au=150.0)
    s = ObservingSetup(npix=64, pixel_arcsec=0.05, nchan=6, channel_width_kms=0.5,
                       oversample=2)
    e = LineEmission()
    raw, _ = make_cube(g, s, e, noise=False, convolve=False)
    conv, _ = make_cube(g, s, e, noise=False)
    assert raw.sum(axis=(1, 2)).min() > 0
    np.testing.assert_allclose(conv.sum(axis=(1, 2)), raw.sum(axis=(1, 2)), rtol=1e-9)
    # the beam spreads the emission: the convolved peak is lower
    assert conv.max() < raw.max()


def test_noise_rms_and_determinism():
    s = ObservingSetup(npix=64, pixel_arcsec=0.04, nchan=12, channel_width_kms=0.3,
                       beam_major_arcsec=0.15, beam_minor_arcsec=0.1, beam_pa_deg=-40.0,
                       peak_snr=15.0, oversample=1)
    e = LineEmission(peak_jy_beam=0.03)
    g = DiskGeometry(1.0, 140.0, 40.0, 0.0, r_max_au=100.0)
    clean, _ = make_cube(g, s, e, noise=False)
    noisy, _ = make_cube(g, s, e, rng=np.random.default_rng(7))
    again, _ = make_cube(g, s, e, rng=np.random.default_rng(7))
    other, _ = make_cube(g, s, e, rng=np.random.default_rng(8))
    np.testing.assert_array_equal(noisy, again)           # seeded
    assert not np.allclose(noisy, other)
    resid = noisy - clean
    # peak SNR definition: per-pixel rms = peak_jy_beam / peak_snr (3 %)
    assert resid.std() == pytest.approx(0.03 / 15.0, rel=0.03)
    # no edge roll-off: the border pixels have the same rms (10 %)
    assert resid[:, :, :3].std() == pytest.approx(0.03 / 15.0, rel=0.1)
    # beam-correlated noise: white noise convolved with a Gaussian of
    # dispersion s has autocorrelation exp(-d^2 / (4 s^2)) (convolution of
    # two Gaussians, common practice, no source); s along east (row lag)
    # and north (column lag) from the beam PA; 0.03 covers pixel sampling
    f = 2 * math.sqrt(2 * math.log(2))
    smaj, smin, pa = 0.15 / f, 0.1 / f, math.radians(-40.0)
    s_east2 = smaj ** 2 * math.sin(pa) ** 2 + smin ** 2 * math.cos(pa) ** 2
    s_north2 = smaj ** 2 * math.cos(pa) ** 2 + smin ** 2 * math.sin(pa) ** 2
    rho_e = np.mean(resid[:, :, 1:] * resid[:, :, :-1]) / resid.var()
    rho_n = np.mean(resid[:, 1:, :] * resid[:, :-1, :]) / resid.var()
    assert rho_e == pytest.approx(math.exp(-0.04 ** 2 / (4 * s_east2)), abs=0.03)
    assert rho_n == pytest.approx(math.exp(-0.04 ** 2 / (4 * s_north2)), abs=0.03)
    assert beam_noise(s, 1.0, np.random.default_rng(1)).shape == (12, 64, 64)


@pytest.mark.parametrize("rot", [1, -1])
def test_perturbation_shifts_emission(rot):
    # a uniform dv_z adds a_z dv_z = -rot cos(i) dv_z to every v_los
    # (DEVELOPERS.md projection); choose it = +1 channel width
    cw = SMALL.channel_width_kms
    g = DiskGeometry(1.0, 140.0, 40.0, 90.0, rotation=rot, vsys_kms=3.0)
    dvz = -rot * cw / math.cos(g.inclination_rad)

    def push(r, phi, z):
        return 0.0, 0.0, np.full_like(r, dvz)

    base, v = make_cube(g, SMALL, SHARP, noise=False)
    pert, _ = make_cube(g, SMALL, SHARP, noise=False, perturbation=push)
    # channels descend in velocity: channel k perturbed == channel k+1 plain
    assert v[1] == pytest.approx(v[0] - cw)
    np.testing.assert_allclose(pert[:-1], base[1:], atol=1e-9 * base.max())
    # on the red major axis (V falling outwards) a positive dv_los moves the
    # emission of a channel outwards, to where V_bg = v_ch - dv_los
    x, _ = sky_grid(SMALL)
    j0 = SMALL.npix // 2
    sel = np.flatnonzero(x > 0.5)
    xb = _peak(base[2, j0], x, sel)
    xp = _peak(pert[2, j0], x, sel)
    xt = brentq(lambda q: background_velocity(g, q, 0.0) - (v[2] - cw), 0.3, 2.5)
    assert xp > xb + 2 * SMALL.pixel_arcsec
    assert abs(xp - xt) < 0.25 * SMALL.pixel_arcsec


def test_rotation_senses_mirror_petals():
    # PA = 0: the major axis is the north-south column through the centre;
    # rotation -1 puts the far side (PA + 90 rot) on the other side, so for an
    # elevated layer the cube is mirrored east <-> west (odd npix: exact)
    s = ObservingSetup(npix=65, pixel_arcsec=0.05, nchan=8, channel_width_kms=0.3,
                       beam_major_arcsec=0.12, beam_minor_arcsec=0.08, beam_pa_deg=0.0,
                       oversample=2)
    e = LineEmission()
    cubes = {}
    for rot in (1, -1):
        g = DiskGeometry(1.0, 140.0, 45.0, 0.0, rotation=rot, vsys_kms=4.0,
                         front=EmittingSurface(0.3, 1.25), r_max_au=200.0)
        cubes[rot], _ = make_cube(g, s, e, noise=False)
    peak = cubes[1].max()
    np.testing.assert_allclose(cubes[-1][:, :, ::-1], cubes[1], atol=1e-9 * peak)
    assert np.max(np.abs(cubes[-1] - cubes[1])) > 0.1 * peak


def test_front_layer_shifted_to_far_side():
    # elevated front layer at PA = 0, rotation +1: far side = PA + 90 = east
    # (x > 0); the emission centroid of the systemic channel moves east
    s = ObservingSetup(npix=65, pixel_arcsec=0.05, nchan=1, channel_width_kms=0.2,
                       oversample=2)
    e = LineEmission(back_ratio=0.0)
    g = DiskGeometry(1.0, 140.0, 45.0, 0.0, vsys_kms=4.0,
                     front=EmittingSurface(0.3, 1.25), r_max_au=200.0)
    d, _ = make_cube(g, s, e, noise=False)
    x, _ = sky_grid(s)
    xc = np.sum(d[0].sum(axis=0) * x) / d[0].sum()
    assert xc > 0.1


# --------------------------------------------------------------- files ---
def test_written_cube_reads_back(tmp_path):
    from kinkfit.cube import read_cube

    g = DiskGeometry(1.2, 130.0, 35.0, 120.0, rotation=-1, vsys_kms=5.5,
                     front=EmittingSurface(0.25, 1.2), r_max_au=180.0)
    s = ObservingSetup(npix=48, pixel_arcsec=0.06, nchan=7, channel_width_kms=0.35,
                       beam_major_arcsec=0.2, beam_minor_arcsec=0.15, beam_pa_deg=-25.0,
                       oversample=2)
    e = LineEmission()
    path = write_synthetic_cube(tmp_path / "synth.fits", g, s, e, seed=3,
                                extra_truth=[("SYNMPL", 1.5, "planet mass, Mjup")])
    v_true = channel_velocities(s, g)
    # astropy as oracle for the spectral axis (radio convention, RESTFRQ)
    with fits.open(path) as hdul:
        hdr = hdul[0].header
        w = WCS(hdr)
        sc = w.spectral.pixel_to_world(np.arange(s.nchan))
        v_ast = sc.to(u.km / u.s, doppler_convention="radio",
                      doppler_rest=hdr["RESTFRQ"] * u.Hz).value
        assert hdr["BMAJ"] * 3600 == pytest.approx(0.2, abs=1e-9)
        assert hdr["BMIN"] * 3600 == pytest.approx(0.15, abs=1e-9)
        assert hdr["BPA"] == pytest.approx(-25.0)
        assert hdr["RESTFRQ"] == pytest.approx(230.538e9)
        assert hdr["SYNINC"] == 35.0 and hdr["SYNROT"] == -1 and hdr["SYNMPL"] == 1.5
        assert hdr["SYNNOISE"] == pytest.approx(0.05 / 20.0)
        assert any("emission.peak_jy_beam" in str(c) for c in hdr["HISTORY"])
        assert geometry_from_header(hdr) == g            # truth round trip
    with pytest.raises(InputFileError):
        geometry_from_header({"BUNIT": "Jy/beam"})
    np.testing.assert_allclose(v_ast, v_true, atol=1e-6)
    cube = read_cube(path)
    np.testing.assert_allclose(cube.velocity_kms, v_true, atol=1e-6)
    np.testing.assert_allclose(cube.beam_major_arcsec, 0.2, atol=1e-6)
    np.testing.assert_allclose(cube.beam_minor_arcsec, 0.15, atol=1e-6)
    np.testing.assert_allclose(cube.beam_pa_deg, -25.0, atol=1e-6)
    x, y = sky_grid(s)
    np.testing.assert_allclose(cube.x_arcsec, x, atol=1e-6)
    np.testing.assert_allclose(cube.y_arcsec, y, atol=1e-6)
    ref, _ = make_cube(g, s, e, rng=np.random.default_rng(3))
    np.testing.assert_allclose(cube.data, ref.astype(np.float32), rtol=0, atol=1e-7)
    with pytest.raises(ResultFileError):
        write_synthetic_cube(path, g, s, e)


def test_invalid_setup_and_emission():
    with pytest.raises(ConfigError):
        ObservingSetup(npix=0)
    with pytest.raises(ConfigError):
        ObservingSetup(oversample=1.5)
    with pytest.raises(ConfigError):
        ObservingSetup(beam_major_arcsec=0.1, beam_minor_arcsec=0.2)
    with pytest.raises(PhysicsRangeError):
        LineEmission(back_ratio=1.5)
    with pytest.raises(PhysicsRangeError):
        LineEmission(t_ref_k=-3.0)

    def bad(r, phi, z):
        return np.full_like(r, np.nan), 0.0, 0.0

    s = ObservingSetup(npix=16, nchan=2, oversample=1)
    with pytest.raises(PhysicsRangeError):
        make_cube(FLAT, s, LineEmission(), perturbation=bad, noise=False)
