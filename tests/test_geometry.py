"""Tests of kinkfit.geometry: frames, ray-surface intersection, projection."""

import math

import numpy as np
import pytest
from astropy import constants as const
from astropy import units as u
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

from kinkfit.errors import ConfigError, KinkfitError, PhysicsRangeError
from kinkfit.geometry import (
    DiskGeometry, EmittingSurface, background_velocity, disk_to_sky,
    los_velocity, projection_coefficients, rotation_matrix,
    rotation_speed_kms, sky_to_disk, surface_point, velocity_gradient,
)

PIXEL_ARCSEC = 0.02          # a fine ALMA-like pixel for the 1e-6 pixel checks
FLARED = EmittingSurface(0.3, 1.25)


def _geom(inc, rot, surf=FLARED, pa=37.0, **kw):
    kw.setdefault("r_max_au", 400.0)
    return DiskGeometry(1.3, 140.0, inc, pa, rotation=rot, x0_arcsec=0.12,
                        y0_arcsec=-0.07, vsys_kms=5.2, front=surf, **kw)


def _facing(geom, r, phi, surface):
    """True where the layer at (r, phi) is seen from the side the solver returns.

    Independent criterion (vector geometry, common practice, no source): with
    ``F = sgn Z - h(r)`` (> 0 beyond the layer, away from the midplane), the
    normal ``grad F = (-h' cos phi, -h' sin phi, sgn)``; the line of sight
    (along +away) crosses a front layer from outside to inside
    (``n . away < 0``) and a back layer from the midplane side outwards
    (``n . away > 0``).  ``h'`` by a central difference.
    """
    surf = geom.surface(surface)
    sgn = geom.rotation if surface == "front" else -geom.rotation
    dh = (surf.height_au(r * (1 + 1e-6)) - surf.height_au(r * (1 - 1e-6))) / (2e-6 * r)
    n_disk = np.stack([-dh * np.cos(phi), -dh * np.sin(phi), sgn * np.ones_like(r)])
    away = rotation_matrix(geom)[2] @ n_disk.reshape(3, -1)
    away = away.reshape(np.shape(r))
    return away < -1e-3 if surface == "front" else away > 1e-3


# --------------------------------------------------------------- speeds ---
def test_keplerian_speed_earth():
    # Earth's mean orbital speed 29.78 km/s (handbook value); oracle
    # astropy.constants sqrt(GM_sun / au)
    g = DiskGeometry(1.0, 100.0, 30.0, 0.0)
    ref = np.sqrt(const.GM_sun / const.au).to_value(u.km / u.s)
    v = float(rotation_speed_kms(g, 1.0))
    assert v == pytest.approx(ref, rel=1e-12)
    assert v == pytest.approx(29.78, abs=0.005)
    # at 100 au: 2.978 km/s (ECOSYSTEM.md, astropy)
    assert float(rotation_speed_kms(g, 100.0)) == pytest.approx(ref / 10, rel=1e-12)


def test_elevated_rotation_speed():
    # PHYSICS.md section 1: v^2 = G M r^2 / (r^2 + z^2)^(3/2); at z = r this is
    # v_kep^2 * 2^(-3/2)
    g = DiskGeometry(2.0, 100.0, 30.0, 0.0)
    vk = np.sqrt(2.0 * const.GM_sun / (50 * const.au)).to_value(u.km / u.s)
    assert float(rotation_speed_kms(g, 50.0, 50.0)) == pytest.approx(
        vk * 2 ** -0.75, rel=1e-12)
    assert float(rotation_speed_kms(g, 0.0, 0.0)) == 0.0


# --------------------------------------------------------------- frames ---
def _euler_rotation(geom):
    """The disk->sky rotation built from Euler angles (independent path).

    rotation=+1: face-on disk has X=m, Y=p(PA+90), Z=-away: Rz(90-PA) Rx(180);
    tilting the far side away is Rx(-i) first.  rotation=-1: face-on is
    Rz(90-PA), tilt Rx(+i).  Intrinsic 'ZX' gives the product Rz @ Rx.
    """
    i, pa = geom.inclination_deg, geom.position_angle_deg
    if geom.rotation == 1:
        return Rotation.from_euler("ZX", [90.0 - pa, 180.0 - i], degrees=True)
    return Rotation.from_euler("ZX", [90.0 - pa, i], degrees=True)


@pytest.mark.parametrize("rot", [1, -1])
@pytest.mark.parametrize("inc", [0.0, 25.0, 63.0, 85.0])
@pytest.mark.parametrize("pa", [0.0, 37.0, 212.0])
def test_rotation_matches_scipy(rot, inc, pa, rng):
    g = _geom(inc, rot, pa=pa)
    R = _euler_rotation(g)
    # oracle: scipy.spatial.transform.Rotation
    np.testing.assert_allclose(rotation_matrix(g), R.as_matrix(), atol=1e-14)
    assert np.linalg.det(rotation_matrix(g)) == pytest.approx(1.0, abs=1e-14)
    # velocities: project 3-D vectors with scipy and with the closed form
    n = 200
    r = rng.uniform(1, 300, n)
    phi = rng.uniform(-np.pi, np.pi, n)
    z = rng.uniform(-50, 50, n)
    vr, vphi, vz = rng.normal(0, 1, (3, n))
    vec = np.stack([vr * np.cos(phi) - vphi * np.sin(phi),
                    vr * np.sin(phi) + vphi * np.cos(phi), vz], axis=1)
    v_sky = R.apply(vec)
    v_los = los_velocity(g, r, phi, z, v_r=vr, v_phi=vphi, v_z=vz)
    np.testing.assert_allclose(v_los, g.vsys_kms + v_sky[:, 2], atol=1e-12)
    a_r, a_phi, a_z = projection_coefficients(g, phi)
    np.testing.assert_allclose(a_r * vr + a_phi * vphi + a_z * vz, v_sky[:, 2],
                               atol=1e-12)
    # positions: sky offsets (arcsec = au / pc) and depth
    pos = R.apply(np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1))
    x, y, depth = disk_to_sky(g, r, phi, z)
    np.testing.assert_allclose(x, pos[:, 0] / 140.0 + 0.12, atol=1e-12)
    np.testing.assert_allclose(y, pos[:, 1] / 140.0 - 0.07, atol=1e-12)
    np.testing.assert_allclose(depth, pos[:, 2], atol=1e-10)


def test_face_on_pure_rotation_is_systemic():
    # i -> 0: rotation is in the plane of the sky (DEVELOPERS.md frames), so
    # v_los = vsys exactly at i = 0 and v_los - vsys = sin(i) cos(phi) v_phi
    r = np.linspace(5, 300, 50)
    phi = np.linspace(-3, 3, 50)
    g0 = _geom(0.0, 1)
    v0 = los_velocity(g0, r, phi, surface_point(g0, r, phi))
    np.testing.assert_array_equal(v0, g0.vsys_kms)
    for inc in (1e-3, 1e-6):
        g = _geom(inc, 1)
        z = surface_point(g, r, phi)
        dv = los_velocity(g, r, phi, z) - g.vsys_kms
        expect = math.sin(math.radians(inc)) * np.cos(phi) * rotation_speed_kms(g, r, z)
        np.testing.assert_allclose(dv, expect, rtol=1e-6, atol=1e-14)
        assert np.max(np.abs(dv)) < 20.0 * math.radians(inc)


@pytest.mark.parametrize("rot", [1, -1])
def test_red_side_at_pa_and_sense_of_rotation(rot):
    pa = 37.0
    g = _geom(40.0, rot, pa=pa, r_max_au=1e4)
    # red-shifted major axis at PA (DEVELOPERS.md): 1" along PA from the centre
    dx, dy = math.sin(math.radians(pa)), math.cos(math.radians(pa))
    v_red = background_velocity(g, g.x0_arcsec + dx, g.y0_arcsec + dy)
    v_blue = background_velocity(g, g.x0_arcsec - dx, g.y0_arcsec - dy)
    assert v_red > g.vsys_kms + 1.0 and v_blue < g.vsys_kms - 1.0
    # a parcel moving in +phi: sky PA of its position increases for
    # rotation=+1 (counter-clockwise, N -> E) and decreases for -1
    phi = np.array([0.3, 0.3 + 1e-3])
    x, y, _ = disk_to_sky(g, 100.0, phi, 0.0)
    pa_sky = np.degrees(np.arctan2(x - g.x0_arcsec, y - g.y0_arcsec))
    assert np.sign(pa_sky[1] - pa_sky[0]) == rot
    # PA + 90*rotation is the far side (depth > 0), PA - 90*rotation near
    far = math.radians(pa + 90.0 * rot)
    r_f, phi_f, _ = sky_to_disk(
        DiskGeometry(1.3, 140.0, 40.0, pa, rotation=rot), math.sin(far),
        math.cos(far))
    assert phi_f == pytest.approx(math.pi / 2, abs=1e-12)
    _, _, depth = disk_to_sky(g, 140.0 / math.cos(g.inclination_rad),
                              math.pi / 2, 0.0)
    assert depth > 0


@pytest.mark.parametrize("rot", [1, -1])
def test_elevated_surface_far_side_faster(rot):
    # for an elevated front layer, mirror-image sky points about the major
    # axis differ: the far-side one deprojects to a smaller radius, hence a
    # larger |v_los - vsys| (geometric consequence of the layer shift)
    pa = 37.0
    g = _geom(45.0, rot, pa=pa)
    off = 0.8
    ang_far = math.radians(pa + 45.0 * rot)
    ang_near = math.radians(pa - 45.0 * rot)
    pts = [(g.x0_arcsec + off * math.sin(a), g.y0_arcsec + off * math.cos(a))
           for a in (ang_far, ang_near)]
    (rf, phf, _), (rn, phn, _) = [sky_to_disk(g, *p) for p in pts]
    assert phf > 0 > phn
    assert rf < rn
    vf, vn = (background_velocity(g, *p) - g.vsys_kms for p in pts)
    assert vf > vn > 0


@pytest.mark.parametrize("rot", [1, -1])
def test_front_and_back_shift_opposite(rot):
    g = _geom(50.0, rot)
    phi = np.linspace(-np.pi, np.pi, 181)[:-1]
    r = np.full_like(phi, 150.0)
    p_hat = np.array([math.sin(math.radians(37.0 + 90.0 * rot)),
                      math.cos(math.radians(37.0 + 90.0 * rot))])
    x0, y0, d0 = disk_to_sky(g, r, phi, 0.0)
    shifts = {}
    depths = {}
    for s in ("front", "back"):
        x, y, d = disk_to_sky(g, r, phi, surface_point(g, r, phi, s))
        shifts[s] = (np.mean(x - x0), np.mean(y - y0)) @ p_hat
        depths[s] = np.mean(d - d0)
    # the front layer is displaced towards the far side (PA + 90*rotation),
    # the back layer towards the near side; front nearer to the observer
    h = 0.3 * 100 * 1.5 ** 1.25 / 140.0
    assert shifts["front"] == pytest.approx(h * math.sin(g.inclination_rad), rel=1e-9)
    assert shifts["back"] == pytest.approx(-shifts["front"], rel=1e-9)
    assert depths["front"] < 0 < depths["back"]


# ------------------------------------------------------------ round trips ---
@pytest.mark.parametrize("surf", [EmittingSurface(0.0), FLARED],
                         ids=["flat", "flared"])
@pytest.mark.parametrize("which", ["front", "back"])
@pytest.mark.parametrize("rot", [1, -1])
@pytest.mark.parametrize("inc", [0.0, 20.0, 40.0, 60.0, 80.0])
def test_round_trips(surf, which, rot, inc, rng):
    g = _geom(inc, rot, surf)
    tol = 1e-6 * PIXEL_ARCSEC
    # disk -> sky -> disk, for points whose layer faces the observer
    n = 400
    r = rng.uniform(3.0, 380.0, n)
    phi = rng.uniform(-np.pi, np.pi, n)
    z = surface_point(g, r, phi, which)
    x, y, _ = disk_to_sky(g, r, phi, z)
    r2, phi2, z2 = sky_to_disk(g, x, y, which)
    ok = _facing(g, r, phi, which)
    assert ok.mean() > 0.5
    assert np.all(np.isfinite(r2[ok]))
    # compare as sky separations of the recovered disk points (in arcsec)
    xa, ya, _ = disk_to_sky(g, r2[ok], phi2[ok], z2[ok])
    assert np.max(np.hypot(xa - x[ok], ya - y[ok])) < tol
    np.testing.assert_allclose(r2[ok], r[ok], rtol=0, atol=tol * 140.0 * 50)
    dphi = np.angle(np.exp(1j * (phi2[ok] - phi[ok])))
    assert np.max(np.abs(dphi * r[ok])) < tol * 140.0 * 50
    # sky -> disk -> sky on a grid of sky positions
    xs, ys = np.meshgrid(np.linspace(-2.5, 2.5, 41), np.linspace(-2.5, 2.5, 41))
    rr, pp, zz = sky_to_disk(g, xs, ys, which)
    hit = np.isfinite(rr)
    assert hit.mean() > 0.1     # the disk ellipse covers >~ 17 % of the grid at 80 deg
    xb, yb, _ = disk_to_sky(g, rr[hit], pp[hit], zz[hit])
    assert np.max(np.hypot(xb - xs[hit], yb - ys[hit])) < tol
    # the recovered point lies on the requested layer
    np.testing.assert_allclose(zz[hit], surface_point(g, rr[hit], pp[hit], which),
                               atol=1e-9)


def test_outside_radial_range_is_nan():
    g = _geom(30.0, 1, r_max_au=200.0, r_min_au=20.0)
    r, phi, z = sky_to_disk(g, [g.x0_arcsec, g.x0_arcsec + 3.0], [g.y0_arcsec] * 2)
    assert np.all(np.isnan(r)) and np.all(np.isnan(phi)) and np.all(np.isnan(z))
    assert np.isnan(background_velocity(g, g.x0_arcsec + 3.0, g.y0_arcsec))


def test_flared_high_inclination_solver():
    # fixed-point iteration w_{k+1} = h(r(w_k)) has slope h' tan(i) |Y| / r,
    # above 1 on the far side at i = 75 deg for r >~ 30 au
    # (h' = 0.375 (r/100)^0.25): it diverges there, the bracketed solver
    # must still recover the (visible) points.
    g = _geom(75.0, 1)
    surf = g.front
    r = np.array([2.0, 4.0, 60.0, 200.0])
    phi = np.array([-np.pi / 2, -np.pi / 2, np.pi / 2, np.pi / 2])
    z = surface_point(g, r, phi)
    x, y, _ = disk_to_sky(g, r, phi, z)
    r2, phi2, _ = sky_to_disk(g, x, y)
    np.testing.assert_allclose(r2, r, rtol=1e-9)
    # the naive iteration from the flat-disk solution, for comparison
    tan_i = math.tan(g.inclination_rad)
    xs = (x - g.x0_arcsec) * 140.0
    ys = (y - g.y0_arcsec) * 140.0
    pa = math.radians(37.0)
    X = math.sin(pa) * xs + math.cos(pa) * ys
    Yf = (math.cos(pa) * xs - math.sin(pa) * ys) / math.cos(g.inclination_rad)
    w = np.zeros_like(r)
    for _ in range(200):
        with np.errstate(all="ignore"):
            w = surf.height_au(np.hypot(X, Yf - w * tan_i))
    r_fp = np.hypot(X, Yf - w * tan_i)
    assert np.allclose(r_fp[:2], r[:2], rtol=1e-6)      # converges near side
    assert not np.allclose(r_fp[2:], r[2:], rtol=1e-3)  # fails on the far side


@settings(max_examples=40, deadline=None)
@given(inc=st.floats(0.0, 75.0), pa=st.floats(-180.0, 360.0),
       rot=st.sampled_from([1, -1]), aspect=st.floats(0.0, 0.4),
       flaring=st.floats(1.0, 1.6), which=st.sampled_from(["front", "back"]),
       r=st.floats(5.0, 300.0), phi=st.floats(-math.pi, math.pi))
def test_round_trip_property(inc, pa, rot, aspect, flaring, which, r, phi):
    g = DiskGeometry(0.8, 120.0, inc, pa, rotation=rot, x0_arcsec=0.03,
                     front=EmittingSurface(aspect, flaring), r_max_au=500.0)
    r_a, phi_a = np.array([r]), np.array([phi])
    z = surface_point(g, r_a, phi_a, which)
    x, y, _ = disk_to_sky(g, r_a, phi_a, z)
    r2, phi2, z2 = sky_to_disk(g, x, y, which)
    if _facing(g, r_a, phi_a, which)[0]:
        x2, y2, _ = disk_to_sky(g, r2, phi2, z2)
        assert float(np.hypot(x2 - x, y2 - y)[0]) < 1e-6 * PIXEL_ARCSEC
    # any sky position hit maps back onto itself
    if np.isfinite(r2[0]):
        x3, y3, _ = disk_to_sky(g, r2, phi2, z2)
        assert float(np.hypot(x3 - x, y3 - y)[0]) < 1e-6 * PIXEL_ARCSEC


# ------------------------------------------------------------- gradient ---
@pytest.mark.parametrize("rot", [1, -1])
def test_velocity_gradient_flat_analytic(rot):
    # flat disk: V = vsys + sin i sqrt(GM) X r^(-3/2), X = sP e + cP n,
    # Y = s (cP e - sP n) / cos i (DEVELOPERS.md frames); analytic derivative
    g = DiskGeometry(1.3, 140.0, 50.0, 37.0, rotation=rot)
    x = np.array([0.4, -1.0, 1.3])
    y = np.array([0.9, 0.2, -0.6])
    d, i, pa = 140.0, math.radians(50.0), math.radians(37.0)
    sp, cp, ci = math.sin(pa), math.cos(pa), math.cos(i)
    e, n = x * d, y * d
    X = sp * e + cp * n
    Y = rot * (cp * e - sp * n) / ci
    rr = np.hypot(X, Y)
    K = math.sin(i) * np.sqrt(1.3 * const.GM_sun / const.au).to_value(u.km / u.s)
    dVdX = K * (rr ** -1.5 - 1.5 * X ** 2 * rr ** -3.5)
    dVdY = -1.5 * K * X * Y * rr ** -3.5
    gx = d * (dVdX * sp + dVdY * rot * cp / ci)
    gy = d * (dVdX * cp - dVdY * rot * sp / ci)
    gmag = np.hypot(gx, gy)
    vx, vy = velocity_gradient(g, x, y)                 # analytic (implicit)
    np.testing.assert_allclose(vx, gx, rtol=0, atol=1e-10 * gmag.max())
    np.testing.assert_allclose(vy, gy, rtol=0, atol=1e-10 * gmag.max())
    # central differences, step 1 mas: relative error ~ (step / L)^2 of |grad V|
    vx, vy = velocity_gradient(g, x, y, step_arcsec=1e-3)
    np.testing.assert_allclose(vx, gx, rtol=0, atol=1e-5 * gmag.max())
    np.testing.assert_allclose(vy, gy, rtol=0, atol=1e-5 * gmag.max())
    with pytest.raises(PhysicsRangeError):
        velocity_gradient(g, x, y, step_arcsec=0.0)


# ----------------------------------------------------------- validation ---
@pytest.mark.parametrize("kw", [
    dict(mstar_msun=0.0), dict(mstar_msun=-1.0), dict(distance_pc=0.0),
    dict(inclination_deg=90.0), dict(inclination_deg=-1.0),
    dict(rotation=0), dict(rotation=2), dict(r_max_au=5.0, r_min_au=10.0),
    dict(mstar_msun=float("nan")),
])
def test_invalid_geometry(kw):
    base = dict(mstar_msun=1.0, distance_pc=100.0, inclination_deg=30.0,
                position_angle_deg=0.0)
    base.update(kw)
    with pytest.raises(PhysicsRangeError):
        DiskGeometry(**base)


def test_invalid_surface():
    with pytest.raises(PhysicsRangeError):
        EmittingSurface(-0.1)
    with pytest.raises(PhysicsRangeError):
        EmittingSurface(0.1, taper_au=0.0)
    g = _geom(30.0, 1)
    with pytest.raises(ConfigError) as err:
        sky_to_disk(g, 0.0, 0.0, surface="middle")
    assert isinstance(err.value, KinkfitError) and "middle" in str(err.value)


def test_taper_and_back_surface():
    s = EmittingSurface(0.2, 1.0, 100.0, taper_au=200.0)
    # z = aspect r_ref (r/r_ref)^flaring exp(-(r/taper)^2) (brief formula)
    assert float(s.height_au(200.0)) == pytest.approx(0.2 * 200.0 * math.exp(-1.0))
    g = DiskGeometry(1.0, 100.0, 30.0, 0.0, front=FLARED,
                     back=EmittingSurface(0.1, 1.0))
    assert float(surface_point(g, 100.0, 0.0, "back")) == pytest.approx(-10.0)
    g2 = DiskGeometry(1.0, 100.0, 30.0, 0.0, rotation=-1, front=FLARED)
    assert float(surface_point(g2, 100.0, 0.0, "front")) == pytest.approx(-30.0)
    assert float(surface_point(g2, 100.0, 0.0, "back")) == pytest.approx(30.0)


def test_surface_slope():
    # analytic facts of z = a r_ref (r/r_ref)^f exp(-(r/T)^2): a cone (f = 1)
    # has dz/dr = a; a tapered layer peaks at r = T sqrt(f/2)
    assert np.allclose(EmittingSurface(0.2, 1.0).slope([1.0, 50.0, 300.0]), 0.2)
    s = EmittingSurface(0.3, 1.25, 100.0, taper_au=250.0)
    assert abs(float(s.slope(250.0 * math.sqrt(1.25 / 2)))) < 1e-14
    r = np.array([20.0, 120.0, 400.0])
    num = (s.height_au(r + 1e-4) - s.height_au(r - 1e-4)) / 2e-4
    np.testing.assert_allclose(s.slope(r), num, rtol=1e-6)


@pytest.mark.parametrize("which", ["front", "back"])
def test_round_trip_tapered(which, rng):
    g = _geom(55.0, -1, EmittingSurface(0.35, 1.3, 100.0, taper_au=220.0),
              r_max_au=np.inf)
    r = rng.uniform(3.0, 450.0, 500)
    phi = rng.uniform(-np.pi, np.pi, 500)
    z = surface_point(g, r, phi, which)
    x, y, _ = disk_to_sky(g, r, phi, z)
    ok = _facing(g, r, phi, which)
    r2, phi2, z2 = sky_to_disk(g, x[ok], y[ok], which)
    assert np.all(np.isfinite(r2))
    x2, y2, _ = disk_to_sky(g, r2, phi2, z2)
    assert np.max(np.hypot(x2 - x[ok], y2 - y[ok])) < 1e-6 * PIXEL_ARCSEC


@pytest.mark.parametrize("which", ["front", "back"])
@pytest.mark.parametrize("rot", [1, -1])
@pytest.mark.parametrize("inc", [0.0, 35.0, 70.0])
def test_velocity_gradient_elevated(which, rot, inc, rng):
    # implicit-differentiation gradient against central differences of
    # background_velocity (step 0.1 mas; truncation ~ (step/L)^2 < 1e-6)
    g = _geom(inc, rot, EmittingSurface(0.3, 1.25, taper_au=300.0))
    x = rng.uniform(-2.0, 2.0, 400)
    y = rng.uniform(-2.0, 2.0, 400)
    gx, gy = velocity_gradient(g, x, y, which)
    fx, fy = velocity_gradient(g, x, y, which, step_arcsec=1e-4)
    if inc == 0.0:
        # face-on: V = vsys everywhere (DEVELOPERS.md frames)
        assert np.nanmax(np.abs(gx)) == 0.0 and np.nanmax(np.abs(gy)) == 0.0
        return
    ok = np.isfinite(fx) & np.isfinite(fy)
    assert ok.mean() > 0.3
    assert np.all(np.isfinite(gx[ok]))
    err = np.hypot(gx[ok] - fx[ok], gy[ok] - fy[ok]) / np.hypot(fx[ok], fy[ok])
    assert np.max(err) < 1e-4
