"""Tests of kinkfit.cube (FITS reader/writer) and the channel montage.

Oracles: astropy.wcs / SpectralCoord / SkyCoord (FITS WCS Papers I-III as
implemented by wcslib), astropy.units Doppler equivalencies, the Gaussian
beam solid angle ``pi bmaj bmin / (4 ln 2)`` (PHYSICS.md §2) checked by direct
numerical integration, and the CASA multi-beam table convention.
Rest frequency of 12CO J=2-1: 230.538 GHz (CDMS, from memory).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS

import fitsfactory as ff
from kinkfit.cube import (Cube, describe_cube, normalise_bunit, radio_velocity_kms,
                          read_cube, write_cube)
from kinkfit.errors import ConfigError, InputFileError, ResultFileError

NU0 = ff.NU_CO21  # 12CO 2-1, CDMS (from memory)

# the astropy oracle itself reports its legacy-CTYPE fixes; they are expected
pytestmark = pytest.mark.filterwarnings("ignore::astropy.wcs.FITSFixedWarning")


def astropy_radio_kms(header, nchan, ispec=2):
    """Channel velocities from astropy: the oracle (ECOSYSTEM.md recipe)."""
    w = WCS(header)
    sc = w.spectral.pixel_to_world(np.arange(nchan))
    return sc.to(u.km / u.s, doppler_convention="radio",
                 doppler_rest=NU0 * u.Hz).value


# ---------------------------------------------------------------------------
# spectral axis
# ---------------------------------------------------------------------------

SPECTRAL_CASES = {
    "freq_ascending": dict(spectral=ff.spectral_cards("FREQ", 12)),
    "freq_descending": dict(spectral=ff.spectral_cards("FREQ", 12, descending=True)),
    "freq_ghz": dict(spectral=ff.spectral_cards("FREQ", 12, unit="GHz")),
    "restfreq_only": dict(spectral=ff.spectral_cards("FREQ", 12),
                          rest=(("RESTFREQ", NU0),)),
    "restwav_only": dict(spectral=ff.spectral_cards("FREQ", 12),
                         rest=(("RESTWAV", ff.C_KMS * 1e3 / NU0),)),
    "vrad_ms": dict(spectral=ff.spectral_cards("VRAD", 12, unit="m/s")),
    "vrad_kms": dict(spectral=ff.spectral_cards("VRAD", 12, unit="km/s", descending=True)),
    "velo_lsr_radio": dict(spectral=ff.spectral_cards("VELO-LSR", 12, velref=257)),
    "velo_lsr_noref": dict(spectral=ff.spectral_cards("VELO-LSR", 12)),
    "vopt_kms": dict(spectral=ff.spectral_cards("VOPT", 12, unit="km/s", v0_kms=5000.0,
                                                dv_kms=30.0)),
    "velo_relativistic": dict(spectral=ff.spectral_cards("VELO", 12, v0_kms=3000.0,
                                                         dv_kms=50.0)),
}


@pytest.mark.parametrize("case", sorted(SPECTRAL_CASES))
def test_channel_velocities_match_astropy(tmp_path, case):
    hdr = ff.cube_header(nx=12, ny=10, nchan=12, **SPECTRAL_CASES[case])
    path = ff.write(tmp_path / f"{case}.fits", hdr)
    cube = read_cube(path)
    # astropy SpectralCoord -> radio velocity (astropy as oracle; ECOSYSTEM.md)
    expected = astropy_radio_kms(fits.getheader(path), 12)
    np.testing.assert_allclose(cube.velocity_kms, expected, rtol=0, atol=1e-9)
    assert cube.velocity_kms.shape == (12,)
    assert cube.channel_width_kms == pytest.approx(
        np.median(np.abs(np.diff(expected))), rel=1e-9)


def test_optical_axis_via_doppler_equivalencies(tmp_path):
    # VOPT -> frequency -> radio with astropy.units.doppler_optical / doppler_radio
    hdr = ff.cube_header(nx=8, ny=8, nchan=6,
                         spectral=ff.spectral_cards("VOPT", 6, unit="km/s", v0_kms=-800.0,
                                                    dv_kms=200.0))
    cube = read_cube(ff.write(tmp_path / "vopt.fits", hdr))
    v_opt = (-800.0 + 200.0 * np.arange(6)) * u.km / u.s
    freq = v_opt.to(u.Hz, equivalencies=u.doppler_optical(NU0 * u.Hz))
    v_rad = freq.to(u.km / u.s, equivalencies=u.doppler_radio(NU0 * u.Hz)).value
    np.testing.assert_allclose(cube.velocity_kms, v_rad, rtol=0, atol=1e-9)
    # the radio and optical velocities really differ here (the test can fail)
    assert np.max(np.abs(v_rad - v_opt.value)) > 1.0


def test_freq_descending_gives_ascending_velocity_file_order(tmp_path):
    # radio convention: v decreases with frequency (PHYSICS.md §2)
    up = read_cube(ff.write(tmp_path / "up.fits", ff.cube_header(
        spectral=ff.spectral_cards("FREQ", 12))))
    down = read_cube(ff.write(tmp_path / "down.fits", ff.cube_header(
        spectral=ff.spectral_cards("FREQ", 12, descending=True))))
    assert not up.velocity_ascending and down.velocity_ascending
    s = up.sorted_by_velocity()
    assert np.all(np.diff(s.velocity_kms) > 0)
    np.testing.assert_array_equal(s.data, up.data[::-1])
    assert s.provenance["channel_order"] == list(range(11, -1, -1))
    assert s.noise_per_channel[0] == up.noise_per_channel[-1]


def test_radio_velocity_formula():
    # v = c (1 - nu/nu0) (astropy.units.doppler_radio as oracle)
    nu = np.array([230.5e9, 230.538e9, 230.6e9]) * u.Hz
    ref = nu.to(u.km / u.s, equivalencies=u.doppler_radio(NU0 * u.Hz)).value
    np.testing.assert_allclose(radio_velocity_kms(nu.value, NU0), ref, rtol=0, atol=1e-9)


# ---------------------------------------------------------------------------
# axis order and data layout
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("axes", [("RA", "DEC", "SPEC", "STOKES"),
                                  ("RA", "DEC", "STOKES", "SPEC"),
                                  ("RA", "DEC", "SPEC"),
                                  ("SPEC", "RA", "DEC"),
                                  ("DEC", "RA", "SPEC")])
def test_axis_order_and_marker_voxel(tmp_path, axes):
    nx, ny, nchan = 14, 10, 6
    hdr = ff.cube_header(nx=nx, ny=ny, nchan=nchan, axes=axes,
                         spectral=ff.spectral_cards("FREQ", nchan))
    shape = ff.data_shape(hdr)
    data = np.zeros(shape, np.float32)
    # marker at FITS pixel (ra=3, dec=7, chan=4): numpy index is reversed FITS order
    where = {"RA": 3, "DEC": 7, "SPEC": 4, "STOKES": 0}
    idx = tuple(where[a] for a in reversed(axes))
    data[idx] = 5.0
    cube = read_cube(ff.write(tmp_path / "order.fits", hdr, data))
    assert cube.data.shape == (nchan, ny, nx)
    assert cube.data[4, 7, 3] == 5.0 and np.count_nonzero(cube.data) == 1
    # velocities and offsets independent of the axis order: same as the standard file
    ref = read_cube(ff.write(tmp_path / "std.fits", ff.cube_header(
        nx=nx, ny=ny, nchan=nchan, spectral=ff.spectral_cards("FREQ", nchan))))
    np.testing.assert_allclose(cube.velocity_kms, ref.velocity_kms, atol=1e-12)
    np.testing.assert_allclose(cube.x_arcsec, ref.x_arcsec, atol=1e-9)
    np.testing.assert_allclose(cube.y_arcsec, ref.y_arcsec, atol=1e-9)


def test_stokes_plane_one_selected(tmp_path):
    hdr = ff.cube_header(nx=8, ny=8, nchan=4, extra={"NAXIS4": 4})
    data = np.zeros(ff.data_shape(hdr), np.float32)
    for s in range(4):
        data[s] = s + 1.0
    cube = read_cube(ff.write(tmp_path / "iquv.fits", hdr, data))
    # STOKES value 1 = I (FITS WCS Paper I, Greisen & Calabretta 2002, from memory)
    assert np.all(cube.data == 1.0)


# ---------------------------------------------------------------------------
# sky offsets
# ---------------------------------------------------------------------------

def _oracle_offsets(header, ix, iy, centre):
    """Gnomonic (east, north) offsets in arcsec from SkyCoord separation and PA."""
    w = WCS(header).celestial
    sky = w.pixel_to_world(ix, iy)
    rho = centre.separation(sky).rad
    pa = centre.position_angle(sky).rad
    r = np.tan(rho) * u.rad.to(u.arcsec)   # tangent-plane radius (FITS Paper II, TAN)
    return r * np.sin(pa), r * np.cos(pa)


@pytest.mark.parametrize("proj,dec", [("SIN", ff.DEC0), ("TAN", ff.DEC0), ("SIN", 78.0)])
def test_offsets_against_skycoord(tmp_path, proj, dec):
    nx, ny = 31, 26
    hdr = ff.cube_header(nx=nx, ny=ny, nchan=4, proj=proj, dec_deg=dec, pix_arcsec=0.2,
                         spectral=ff.spectral_cards("FREQ", 4))
    cube = read_cube(ff.write(tmp_path / f"{proj}.fits", hdr))
    w = WCS(hdr).celestial
    centre = w.pixel_to_world(nx // 2, ny // 2)
    ix = np.array([0, 5, nx // 2, nx - 1])
    x, _ = _oracle_offsets(hdr, ix, np.full(ix.size, ny // 2), centre)
    np.testing.assert_allclose(cube.x_arcsec[ix], x, rtol=0, atol=1e-7)
    iy = np.array([0, 3, ny // 2, ny - 1])
    _, y = _oracle_offsets(hdr, np.full(iy.size, nx // 2), iy, centre)
    np.testing.assert_allclose(cube.y_arcsec[iy], y, rtol=0, atol=1e-7)
    # corners: separable grid within a small fraction of a pixel
    cx, cy = _oracle_offsets(hdr, np.array([0, nx - 1]), np.array([0, ny - 1]), centre)
    np.testing.assert_allclose(cube.x_arcsec[[0, nx - 1]], cx, atol=0.01 * 0.2)
    np.testing.assert_allclose(cube.y_arcsec[[0, ny - 1]], cy, atol=0.01 * 0.2)
    # east = +x decreases with column index when CDELT1 < 0 (DEVELOPERS.md)
    assert np.all(np.diff(cube.x_arcsec) < 0) and np.all(np.diff(cube.y_arcsec) > 0)
    assert cube.pixel_arcsec == pytest.approx(0.2, rel=1e-6)
    assert cube.x_arcsec[nx // 2] == pytest.approx(0.0, abs=1e-9)


def test_offsets_with_explicit_centre(tmp_path):
    nx, ny = 20, 20
    hdr = ff.cube_header(nx=nx, ny=ny, nchan=4, proj="TAN", pix_arcsec=0.1,
                         spectral=ff.spectral_cards("FREQ", 4))
    ra_c = ff.RA0 + 0.35 / 3600.0 / math.cos(math.radians(ff.DEC0))  # ~0.35" east
    dec_c = ff.DEC0 - 0.42 / 3600.0                                   # 0.42" south
    cube = read_cube(ff.write(tmp_path / "c.fits", hdr), centre=(ra_c, dec_c))
    centre = SkyCoord(ra_c * u.deg, dec_c * u.deg, frame="icrs")
    ix = np.array([0, 7, 19])
    iy = np.array([2, 11, 19])
    ox, oy = _oracle_offsets(hdr, ix, iy, centre)
    np.testing.assert_allclose(cube.x_arcsec[ix], ox, atol=0.01 * 0.1)
    np.testing.assert_allclose(cube.y_arcsec[iy], oy, atol=0.01 * 0.1)
    # the reference pixel is ~0.35" west and 0.42" north of this centre
    assert cube.x_arcsec[nx // 2] == pytest.approx(-0.35, abs=1e-4)
    assert cube.y_arcsec[ny // 2] == pytest.approx(0.42, abs=1e-4)
    assert (cube.centre_ra_deg, cube.centre_dec_deg) == (ra_c, dec_c)


def test_rotated_grid_refused_small_rotation_accepted(tmp_path):
    def rotated(angle_rad, name):
        c, s = math.cos(angle_rad), math.sin(angle_rad)
        return ff.write(tmp_path / name, ff.cube_header(
            nx=40, ny=40, nchan=4, spectral=ff.spectral_cards("FREQ", 4),
            extra={"PC1_1": c, "PC1_2": -s, "PC2_1": s, "PC2_2": c}))
    with pytest.raises(InputFileError, match="rotated"):
        read_cube(rotated(math.radians(2.0), "rot2.fits"))   # 2 deg: ~0.7 pixel at edge
    read_cube(rotated(math.radians(0.01), "rot001.fits"))     # 0.01 deg: < 0.005 pixel


def test_bad_centre_argument(tmp_path):
    path = ff.write(tmp_path / "a.fits", ff.cube_header())
    with pytest.raises(ConfigError, match="centre"):
        read_cube(path, centre=(10.0, 95.0))
    with pytest.raises(ConfigError, match="centre"):
        read_cube(path, centre="nowhere")


# ---------------------------------------------------------------------------
# beams
# ---------------------------------------------------------------------------

def test_single_beam_from_header(tmp_path):
    cube = read_cube(ff.write(tmp_path / "b.fits", ff.cube_header(beam=(0.31, 0.24, -12.5))))
    np.testing.assert_allclose(cube.beam_major_arcsec, 0.31, rtol=1e-12)  # BMAJ in deg
    np.testing.assert_allclose(cube.beam_minor_arcsec, 0.24, rtol=1e-12)
    np.testing.assert_allclose(cube.beam_pa_deg, -12.5)
    assert cube.single_beam
    assert cube.beam_fwhm_arcsec(0) == pytest.approx(math.sqrt(0.31 * 0.24))


@pytest.mark.parametrize("tunit", ["arcsec", None, "deg"])
def test_multi_beam_table(tmp_path, tunit):
    nchan = 10
    bmaj = np.linspace(0.30, 0.39, nchan)
    bmin = np.linspace(0.20, 0.245, nchan)
    bpa = np.linspace(-5, 40, nchan)
    # rows shuffled, plus rows for POL=1 that must be ignored (CASA: select POL == 0)
    order = np.random.default_rng(3).permutation(nchan)
    chans = np.r_[order, np.arange(nchan)]
    pols = np.r_[np.zeros(nchan, int), np.ones(nchan, int)]
    tab = ff.beams_table(np.r_[bmaj[order], np.full(nchan, 9.0)],
                         np.r_[bmin[order], np.full(nchan, 8.0)],
                         np.r_[bpa[order], np.zeros(nchan)], chans=chans, pols=pols,
                         tunit=tunit)
    hdr = ff.cube_header(nchan=nchan, beam=None, casambm=True,
                         spectral=ff.spectral_cards("FREQ", nchan))
    cube = read_cube(ff.write(tmp_path / "mb.fits", hdr, table=tab))
    # float32 table columns: 1e-6 relative
    np.testing.assert_allclose(cube.beam_major_arcsec, bmaj, rtol=1e-6)
    np.testing.assert_allclose(cube.beam_minor_arcsec, bmin, rtol=1e-6)
    np.testing.assert_allclose(cube.beam_pa_deg, bpa, rtol=1e-6, atol=1e-5)
    assert not cube.single_beam and cube.provenance["beam_source"] == "BEAMS table"


def test_beam_area_formula_against_numerical_integral(tmp_path):
    pix = 0.05
    cube = read_cube(ff.write(tmp_path / "a.fits", ff.cube_header(
        pix_arcsec=pix, beam=(0.40, 0.25, 30.0))))
    # area of a unit-peak elliptical Gaussian, integrated on a fine grid (numpy),
    # compared with pi bmaj bmin / (4 ln 2) (PHYSICS.md §2)
    s_maj = 0.40 / (2 * math.sqrt(2 * math.log(2)))
    s_min = 0.25 / (2 * math.sqrt(2 * math.log(2)))
    g = np.linspace(-2.0, 2.0, 1601)
    X, Y = np.meshgrid(g, g)
    t = math.radians(30.0)
    a = X * math.sin(t) + Y * math.cos(t)   # along the major axis (PA east of north)
    b = X * math.cos(t) - Y * math.sin(t)
    area = np.exp(-0.5 * (a / s_maj) ** 2 - 0.5 * (b / s_min) ** 2).sum() * (g[1] - g[0]) ** 2
    assert cube.beam_area_arcsec2(0) == pytest.approx(area, rel=1e-6)
    assert cube.beam_area_pixels(0) == pytest.approx(area / pix ** 2, rel=1e-5)
    assert cube.beam_area_pixels().shape == (cube.nchan,)


# ---------------------------------------------------------------------------
# noise, blanks, units
# ---------------------------------------------------------------------------

def test_noise_on_gaussian_noise_with_line_and_blanks(tmp_path):
    sigma = 0.0042
    rng = np.random.default_rng(20261201)
    hdr = ff.cube_header(nx=80, ny=80, nchan=20, spectral=ff.spectral_cards("FREQ", 20))
    data = rng.normal(0.0, sigma, ff.data_shape(hdr))
    data[0, 8:12, 20:60, 20:60] += 1.0         # bright "line" over 1/4 of channels 8-11
    data[0, :, :5, :] = np.nan                 # blanked strip
    cube = read_cube(ff.write(tmp_path / "n.fits", hdr, data))
    # statistical check, seeded: mad_std on 4 x ~6000 points, 3 % (brief requirement)
    assert cube.noise == pytest.approx(sigma, rel=0.03)
    assert cube.line_free_channels == (0, 1, 18, 19)
    line_free = np.array(cube.line_free_channels)
    np.testing.assert_allclose(cube.noise_per_channel[line_free], sigma, rtol=0.08)
    # emission on 25 % of the pixels would inflate a whole-plane MAD (~1.4 sigma for
    # a 75/25 mixture); the negative-half estimate is not fooled by it
    np.testing.assert_allclose(cube.noise_per_channel[8:12], sigma, rtol=0.08)
    assert cube.blanked_fraction == pytest.approx(5 / 80)
    assert np.isnan(cube.data[3, 2, 40])
    # user-given line-free channels
    c2 = read_cube(tmp_path / "n.fits", line_free=range(2, 8))
    assert c2.line_free_channels == tuple(range(2, 8))
    assert c2.noise == pytest.approx(sigma, rel=0.03)
    with pytest.raises(ConfigError, match="line_free"):
        read_cube(tmp_path / "n.fits", line_free=[3, 25])


def test_channel_noise_ignores_bright_positive_emission():
    # half-normal median = sigma * Phi^-1(0.75), Phi^-1 from scipy.stats.norm
    from astropy.stats import mad_std
    from scipy.stats import norm
    from kinkfit.cube import _HALF_NORMAL_MEDIAN, channel_noise
    assert _HALF_NORMAL_MEDIAN == pytest.approx(norm.ppf(0.75), rel=1e-12)
    sigma = 0.0021
    rng = np.random.default_rng(7)
    ny = nx = 128
    yy, xx = np.mgrid[:ny, :nx] - 63.5
    disk = np.hypot(xx, yy / 0.6) < 55.0           # ~30 % of the field
    assert 0.25 < disk.mean() < 0.40
    for k in range(5):
        plane = rng.normal(0.0, sigma, (ny, nx))
        plane[disk] += 40 * sigma * (1 + rng.random())   # bright, positive line
        # whole-plane MAD counts the emission as noise
        assert mad_std(plane) > 1.10 * sigma
        # statistical check, seeded: ~5700 negative pixels -> ~2 % scatter
        assert channel_noise(plane) == pytest.approx(sigma, rel=0.05)
    # too few negative pixels: falls back to the whole-plane mad_std
    few = np.abs(rng.normal(0.0, sigma, (20, 20)))
    few[0, :10] *= -1
    assert channel_noise(few) == pytest.approx(mad_std(few))
    assert np.isnan(channel_noise(np.full((4, 4), np.nan)))


@pytest.mark.parametrize("raw,canon", [("JY/BEAM", "Jy/beam"), ("Jy/beam", "Jy/beam"),
                                       ("jy/beam", "Jy/beam"), ("K", "K"),
                                       ("beam-1 Jy", "Jy/beam")])
def test_bunit_normalised(tmp_path, raw, canon):
    # astropy units parses 'Jy/beam' but not 'JY/BEAM' (ECOSYSTEM.md)
    assert normalise_bunit(raw) == canon
    u.Unit(canon)  # the normalised form is parseable by astropy
    cube = read_cube(ff.write(tmp_path / "u.fits", ff.cube_header(bunit=raw)))
    assert cube.bunit == canon and cube.bunit_raw == raw


def test_provenance_and_readonly(tmp_path):
    import hashlib
    path = ff.write(tmp_path / "p.fits", ff.cube_header())
    cube = read_cube(path)
    # SHA-256 of the bytes (hashlib as oracle)
    assert cube.provenance["sha256"] == hashlib.sha256(open(path, "rb").read()).hexdigest()
    cards = cube.provenance["header_cards"]
    for key in ("CTYPE3", "CRVAL3", "CDELT3", "RESTFRQ", "BMAJ", "SPECSYS", "BUNIT"):
        assert key in cards
    assert cube.specsys == "LSRK" and cube.provenance["specsys"] == "LSRK"
    assert cube.rest_frequency_hz == NU0
    with pytest.raises(ValueError):
        cube.data[0, 0, 0] = 1.0
    with pytest.raises(Exception):
        cube.noise = 0.0  # frozen dataclass
    assert isinstance(cube, Cube)


# ---------------------------------------------------------------------------
# writer round trip
# ---------------------------------------------------------------------------

def _example(rng, nchan=16, ny=18, nx=22):
    return rng.normal(0, 0.01, (nchan, ny, nx)).astype(np.float32)


@pytest.mark.parametrize("ascending", [True, False])
def test_write_read_round_trip(tmp_path, rng, ascending):
    v = np.linspace(-3.2, 4.3, 16)
    v = v if ascending else v[::-1]
    data = _example(rng)
    data[2, 3, 4] = np.nan
    path = write_cube(tmp_path / "rt.fits", data, velocity_kms=v, pixel_arcsec=0.04,
                      rest_frequency_hz=NU0, beam=(0.3, 0.2, 17.0), ra_deg=ff.RA0,
                      dec_deg=ff.DEC0, extra_cards={"OBSERVER": "synthetic"})
    cube = read_cube(path)
    np.testing.assert_allclose(cube.velocity_kms, v, rtol=0, atol=1e-6)   # brief: 1e-6 km/s
    np.testing.assert_array_equal(cube.data, data)                       # NaN kept in place
    np.testing.assert_allclose(cube.beams, np.tile([0.3, 0.2, 17.0], (16, 1)), rtol=1e-12)
    assert cube.pixel_arcsec == pytest.approx(0.04, rel=1e-6)
    assert (cube.centre_ra_deg, cube.centre_dec_deg) == pytest.approx((ff.RA0, ff.DEC0))
    # astropy re-reads the header: WCS spectral axis gives the same velocities
    hdr = fits.getheader(path)
    np.testing.assert_allclose(astropy_radio_kms(hdr, 16), v, rtol=0, atol=1e-6)
    assert hdr["CDELT1"] < 0 and hdr["SPECSYS"] == "LSRK" and hdr["RESTFRQ"] == NU0
    assert [hdr[f"CTYPE{i}"] for i in range(1, 5)] == ["RA---SIN", "DEC--SIN", "FREQ",
                                                       "STOKES"]
    assert hdr["OBSERVER"] == "synthetic"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["rt.fits"]   # no temp left


def test_write_per_channel_beams_and_overwrite(tmp_path, rng):
    v = np.linspace(0.0, 3.0, 16)
    pb = np.column_stack([np.linspace(0.3, 0.36, 16), np.full(16, 0.21), np.full(16, 5.0)])
    kw = dict(velocity_kms=v, pixel_arcsec=0.05, rest_frequency_hz=NU0, beam=None,
              ra_deg=ff.RA0, dec_deg=ff.DEC0, per_channel_beams=pb)
    path = write_cube(tmp_path / "mb.fits", _example(rng), **kw)
    with fits.open(path) as hdul:
        assert hdul[0].header["CASAMBM"] is True and "BMAJ" not in hdul[0].header
        assert hdul["BEAMS"].columns["BMAJ"].unit == "arcsec"
    cube = read_cube(path)
    np.testing.assert_allclose(cube.beams, pb, rtol=1e-6)   # float32 columns
    with pytest.raises(ResultFileError, match="exists"):
        write_cube(path, _example(rng), **kw)
    write_cube(path, 2 * _example(rng), overwrite=True, **kw)
    with pytest.raises(InputFileError, match="evenly spaced"):
        write_cube(tmp_path / "uneven.fits", _example(rng),
                   **{**kw, "velocity_kms": v ** 2})


# ---------------------------------------------------------------------------
# bad input and description
# ---------------------------------------------------------------------------

def test_every_bad_input_raises_input_file_error(tmp_path):
    cases = ff.bad_files(tmp_path)
    assert len(cases) >= 18
    for name, (path, words) in cases.items():
        with pytest.raises(InputFileError) as info:
            read_cube(path)
        text = str(info.value)
        assert "\n" not in text, name
        assert str(path) in text, name
        for w in words:
            assert w in text, (name, w, text)


def test_describe_text_and_json(tmp_path):
    nchan = 8
    tab = ff.beams_table(np.linspace(0.3, 0.37, nchan), np.full(nchan, 0.2), 3.0)
    hdr = ff.cube_header(nchan=nchan, beam=None, casambm=True, bunit="JY/BEAM",
                         spectral=ff.spectral_cards("VRAD", nchan, unit="km/s"))
    cube = read_cube(ff.write(tmp_path / "d.fits", hdr, table=tab))
    text = describe_cube(cube)
    for frag in ("nchan=8", "km/s", "per channel", "LSRK", "Jy/beam", "JY/BEAM",
                 "230.5380000 GHz", "CTYPE3='VRAD'"):
        assert frag in text, frag
    d = json.loads(describe_cube(cube, as_json=True))
    assert d["nchan"] == nchan and len(d["velocity_kms"]) == nchan
    np.testing.assert_allclose(d["beam"]["major_arcsec"], np.linspace(0.3, 0.37, nchan),
                               rtol=1e-6)
    assert d["velocity_order"] == "ascending" and d["rest_frequency_hz"] == NU0


# ---------------------------------------------------------------------------
# montage
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("nchan_cube,nshow,ncols,expected", [(30, 24, 6, 24), (5, 24, 6, 5),
                                                             (12, 7, 3, 7)])
def test_montage_figure_axes(tmp_path, nchan_cube, nshow, ncols, expected):
    from matplotlib.figure import Figure
    from matplotlib.patches import Ellipse
    from kinkfit.plots import plot_channel_montage
    hdr = ff.cube_header(nx=16, ny=12, nchan=nchan_cube,
                         spectral=ff.spectral_cards("FREQ", nchan_cube))
    cube = read_cube(ff.write(tmp_path / "m.fits", hdr))
    fig = plot_channel_montage(cube, nchan=nshow, ncols=ncols)
    assert isinstance(fig, Figure)
    image_axes = [ax for ax in fig.axes if ax.images]
    assert len(image_axes) == expected
    # one common colour scale, east to the left, a beam ellipse in each panel
    assert len({im.get_clim() for ax in image_axes for im in ax.images}) == 1
    for ax in image_axes:
        left, right = ax.get_xlim()
        assert left > right
        assert any(isinstance(p, Ellipse) for p in ax.patches)
        assert "km/s" in ax.texts[0].get_text()
    assert any("arcsec" in ax.get_xlabel() for ax in image_axes)
    # drawing into a given figure reuses it
    fig2 = Figure()
    assert plot_channel_montage(cube, nchan=4, ncols=2, fig=fig2) is fig2
    assert len([ax for ax in fig2.axes if ax.images]) == 4


def test_single_channel_width_and_velocity_axis_without_rest(tmp_path):
    # one FREQ channel: width = c |CDELT3| / nu0 (radio convention, PHYSICS.md §2)
    one = read_cube(ff.write(tmp_path / "one.fits", ff.cube_header(
        nchan=1, spectral=ff.spectral_cards("FREQ", 1, dv_kms=0.25))))
    assert one.channel_width_kms == pytest.approx(0.25, rel=1e-9)
    assert one.line_free_channels == (0,)
    # a VRAD axis needs no rest frequency (FITS WCS Paper III): reported as None
    vrad = read_cube(ff.write(tmp_path / "vrad.fits", ff.cube_header(
        rest=(), spectral=ff.spectral_cards("VRAD", 12, unit="km/s"))))
    assert vrad.rest_frequency_hz is None
    np.testing.assert_allclose(vrad.velocity_kms, -1.5 + 0.25 * np.arange(12), atol=1e-12)
    assert "absent" in describe_cube(vrad)


def test_write_refuses_structural_card_and_bad_beam(tmp_path, rng):
    kw = dict(velocity_kms=np.arange(16.0), pixel_arcsec=0.05, rest_frequency_hz=NU0,
              beam=(0.3, 0.2, 0.0), ra_deg=ff.RA0, dec_deg=ff.DEC0)
    with pytest.raises(InputFileError, match="NAXIS1"):
        write_cube(tmp_path / "x.fits", _example(rng), extra_cards={"NAXIS1": 3}, **kw)
    with pytest.raises(InputFileError, match="beam"):
        write_cube(tmp_path / "y.fits", _example(rng), **{**kw, "beam": (0.3, -1, 0)})
    assert list(tmp_path.iterdir()) == []
