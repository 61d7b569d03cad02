"""Tests of the nonlinear wake coordinates, damping and the whole-disk model.

Sources: GR01 (Goodman & Rafikov 2001), R02 (Rafikov 2002), W74 (Whitham 1974),
scipy as numerical oracle; derivations in docs/physics/nonlinear.md.
"""

import math

import numpy as np
import pytest
from scipy.integrate import quad

from kinkfit.constants import MJUP_PER_MSUN, keplerian_speed_kms
from kinkfit.errors import PhysicsRangeError
from kinkfit.wake import linear
from kinkfit.wake.damping import (DAMPING_LAWS, Damping, DampingContext,
                                  damping_factor, register_damping)
from kinkfit.wake.locus import wake_arc_length_rp, wake_azimuth
from kinkfit.wake.model import (Planet, WakeDisk, default_match_h, mass_ratio,
                                wake_angular_momentum_flux, wake_perturbations,
                                wake_skeleton)
from kinkfit.wake.nonlinear import (amplitude_factor, cross_coordinate,
                                    front_normal, nonlinear_time,
                                    shock_distance_h)

A_P = 0.05
DISK = WakeDisk(mstar_msun=1.0, aspect_p=A_P, q=0.25, p=1.0, gamma=1.4,
                r_in_au=20.0, r_out_au=300.0)
RP = 100.0
MTH_MJUP = A_P ** 3 / MJUP_PER_MSUN         # thermal mass in Jupiter masses
C_P = A_P * float(keplerian_speed_kms(RP, 1.0))


def planet(mass_ratio_):
    return Planet(mass_mjup=mass_ratio_ * MTH_MJUP, r_au=RP, phi_rad=0.4)


@pytest.fixture(scope="module")
def sheet():
    return linear.get_sheet_solution()


def cut(x, mass, damping=Damping(), half=30.0, n=3001, **kw):
    """Model along a circle x = r/r_p, within `half` h_p of the crest."""
    eta = np.linspace(-half, half, n)
    phi = wake_azimuth(x, A_P, DISK.q, 0.4) + eta * A_P
    ur, up, sg = wake_perturbations(np.full(n, x * RP), phi, planet(mass), DISK, damping, **kw)
    return eta, ur, up, sg


# ---------------------------------------------------------------- coordinates

def test_nonlinear_time_against_quad_and_gr01_limit():
    # dt/d|x| = a^-2 |x^-3/2 - 1| x^q g(x) (derivation in docs); oracle scipy quad
    for p, q in [(1.0, 0.25), (0.5, 0.5), (1.5, 0.0)]:
        xs = np.array([0.4, 0.8, 0.97, 1.03, 1.3, 2.5])
        got = nonlinear_time(xs, A_P, p, q)
        for xi, gi in zip(xs, got):
            f = lambda s: (abs(s ** -1.5 - 1) * s ** q / A_P ** 2
                           * math.sqrt((2 / 3) * abs(s ** -1.5 - 1) * s ** (p + 3 * q - 1) / A_P))
            ref, _ = quad(f, 1.0, xi, limit=200)
            assert gi == pytest.approx(abs(ref), rel=1e-5)
    # GR01: t ∝ |X|^(5/2) near the planet; with our normalisation (3/5)|X/h|^(5/2)
    X_h = np.array([0.5, 1.0, 2.0])
    for s in (1, -1):
        t = nonlinear_time(1 + s * X_h * 1e-3, 1e-3, 1.0, 0.25)
        assert np.allclose(t, 0.6 * X_h ** 2.5, rtol=2e-3)


def test_amplitude_factor_conserves_wkb_flux():
    # R02: F_J ∝ r Sigma c^3 / |Omega - Omega_p| * g^2 must be constant in r
    # (Sigma ∝ x^-p, c ∝ x^-q); and g -> |X/h|^(1/2) near the planet (GR01)
    for p, q in [(1.0, 0.25), (0.0, 0.5)]:
        x = np.array([0.3, 0.7, 0.95, 1.05, 1.5, 3.0])
        g = amplitude_factor(x, A_P, p, q)
        flux = x * x ** -p * x ** (-3 * q) / np.abs(x ** -1.5 - 1) * g ** 2
        assert np.allclose(flux, flux[0], rtol=1e-12)
    x = 1 + np.array([-1e-4, 1e-4])
    assert np.allclose(amplitude_factor(x, A_P, 1.0, 0.25), np.sqrt(1e-4 / A_P), rtol=1e-3)


def test_cross_coordinate_and_front_normal_signs():
    # eta = sgn(X)(y - y_w)/h near the planet; normal points away from the
    # planet and n_phi/n_r = c/(r|Omega - Omega_p|) (PHYSICS.md §5)
    x = np.array([0.95, 1.05])
    phi = wake_azimuth(x, A_P, 0.25) + 0.01
    eta = cross_coordinate(x, phi, A_P, 0.25)
    assert eta == pytest.approx([-0.2, 0.2])
    n_r, n_phi = front_normal(x, A_P, 0.25)
    assert n_r[0] < 0 < n_r[1] and n_phi[0] < 0 < n_phi[1]
    c_over = x ** -0.25 * A_P / (x * np.abs(x ** -1.5 - 1))   # c / (r |dOmega|) in r_p Omega_p
    assert np.allclose(n_phi / n_r, c_over, rtol=1e-12)
    assert np.allclose(n_r ** 2 + n_phi ** 2, 1.0)


def test_velocity_relations_match_linear_sheet(sheet):
    # tightly wound acoustic wave: u_r = sgn(X) c dSigma/Sigma, u_phi smaller by
    # c/(r|Omega-Omega_p|) = 1/(1.5|X|/h) locally (PHYSICS.md §5); compare with
    # the GR01 sheet at the matching distance (signs exact, sizes to 5% / 25%:
    # the sheet also carries a non-wave azimuthal flow)
    for xm in (-4.0, 4.0):
        y, s, u, v = linear.sheet_profile(sheet, xm)
        i = np.argmax(s)
        assert np.sign(u[i]) == np.sign(xm) and np.sign(v[i]) == np.sign(xm)
        assert abs(u[i] / s[i]) == pytest.approx(1.0, rel=0.05)
        assert abs(v[i] / s[i]) == pytest.approx(1 / (1.5 * abs(xm)), rel=0.25)


# ---------------------------------------------------------------- shocks

def test_shock_distance_gr01(sheet):
    # GR01 (from memory): |x_sh| ≈ 0.8 h [((gamma+1)/(12/5)) Mp/M_th]^(-2/5) with
    # M_th = (h/r)^3 M*, clock counted from the planet; within 20 %, slope -0.40 +- 0.03
    masses = np.array([0.03, 0.06, 0.1, 0.2, 0.3])
    xsh = np.array([shock_distance_h(sheet, m, aspect_p=A_P) for m in masses])
    ref = 0.8 * ((1.4 + 1) / 2.4 * masses) ** -0.4
    assert np.all(np.abs(xsh / ref - 1) < 0.2)
    slope = np.polyfit(np.log(masses), np.log(xsh), 1)[0]
    assert slope == pytest.approx(-0.40, abs=0.03)
    # gamma enters as ((gamma+1)/2) Mp: same distance for gamma' with scaled mass
    g2 = 5 / 3
    x2 = shock_distance_h(sheet, 0.1 * 2.4 / (g2 + 1), aspect_p=A_P, gamma=g2)
    assert x2 == pytest.approx(shock_distance_h(sheet, 0.1, aspect_p=A_P), rel=1e-3)
    # the other clock moves shocks outward and flattens the mass dependence
    xm_ = np.array([shock_distance_h(sheet, m, aspect_p=A_P, clock="matching")
                    for m in masses])
    assert np.all(xm_ > xsh)
    assert np.polyfit(np.log(masses), np.log(xm_), 1)[0] > slope + 0.1


# ---------------------------------------------------------------- model

def test_model_peak_follows_locus():
    # linear limit: the density crest stays on the R02 locus on both arms, to
    # within the sheet's Mach-line offset (~1 h_p at 7 h_p, PHYSICS.md §3),
    # the same on both arms (sheet symmetry)
    for x in (0.6, 0.85, 1.15, 1.6, 2.4):
        eta, _, _, sg = cut(x, 1e-5)
        assert abs(eta[np.argmax(sg)]) < 1.5
    e_in, e_out = cut(0.7, 1e-5), cut(1.3, 1e-5)
    assert e_in[0][np.argmax(e_in[3])] == pytest.approx(-e_out[0][np.argmax(e_out[3])], abs=0.05)
    # nonlinear: compressions run ahead (faster than c, (gamma+1)/2 delta), so the
    # crest advances in the propagation sense: +phi outside, -phi inside
    for x in (0.6, 1.6, 2.4):
        lin = cut(x, 1e-5)
        nl = cut(x, 0.003)
        shift = nl[0][np.argmax(nl[3])] - lin[0][np.argmax(lin[3])]
        assert np.sign(shift) == np.sign(x - 1) and abs(shift) > 0.3


def test_join_is_continuous():
    # linear inside / Burgers outside the matching distance join continuously
    # (planet clock, moderately nonlinear A = 0.1; both arms; default and 4 h_p)
    for xm in (None, 4.0):
        xj = default_match_h(A_P) if xm is None else xm
        for s in (1, -1):
            x0 = 1 + s * xj * A_P
            _, ur0, up0, sg0 = cut(x0 - s * 1e-4 * A_P, 0.1, x_match_h=xm)
            _, ur1, up1, sg1 = cut(x0 + s * 1e-4 * A_P, 0.1, x_match_h=xm)
            # L1 norm: a shock may sit one interior grid cell (0.1 h_p) apart
            for a, b in ((sg0, sg1), (ur0, ur1), (up0, up1)):
                assert np.sum(np.abs(a - b)) < 0.03 * np.sum(np.abs(a))


def test_angular_momentum_flux_continuous_constant_then_decaying(sheet):
    # AMF (GR01/R02): continuous within 5 % across the matching distance, equal
    # to the sheet's there, constant before the first shock, decaying after
    A = 0.003          # x_sh ≈ 8 h_p (GR01 law above)
    p = planet(A)
    xm = 4.0
    X = np.array([xm - 0.02, xm + 0.02, 5.0, 6.0, 12.0, 16.0, 20.0, 40.0])
    f = wake_angular_momentum_flux(1 + A_P * X, p, DISK, x_match_h=xm)
    assert f[1] == pytest.approx(f[0], rel=0.05)
    assert f[0] == pytest.approx(linear.angular_momentum_flux(sheet, xm), rel=0.05)
    assert f[2] == pytest.approx(f[1], rel=0.05) and f[3] == pytest.approx(f[1], rel=0.05)
    assert f[6] < 0.85 * f[1] and f[4] > f[5] > f[6] > f[7]
    assert f[7] < 0.6 * f[1]
    # inner arm too
    fi = wake_angular_momentum_flux(1 - A_P * X[:4], p, DISK, x_match_h=xm)
    assert fi[1] == pytest.approx(fi[0], rel=0.05)
    assert fi[3] == pytest.approx(fi[1], rel=0.05)
    # default match (7 h_p): continuous there too
    xd = default_match_h(A_P)
    fd = wake_angular_momentum_flux(1 + A_P * np.array([xd - 0.02, xd + 0.02]), p, DISK)
    assert fd[1] == pytest.approx(fd[0], rel=0.05)


def test_insensitive_to_matching_distance(sheet):
    # (a) planet clock: the shock-formation distance changes < 5 % when the
    # matching distance doubles (3.5 -> 7 h_p)
    for A in (0.03, 0.1, 0.3):
        x1 = shock_distance_h(sheet, A, aspect_p=A_P, x_match_h=3.5)
        x2 = shock_distance_h(sheet, A, aspect_p=A_P, x_match_h=7.0)
        assert x2 == pytest.approx(x1, rel=0.05)
    # (b) far-field N-wave strength (∫|dSigma/Sigma| d eta across the wake)
    # near the default match: < 3 % between 7 and 7.5 h_p.  NOT insensitive over
    # a factor 2 (3.5 -> 7 h_p: +66-75 % at 20 h_p), because dispersion keeps
    # reshaping the linear profile's trough (docs/physics/nonlinear.md §5 and
    # test_far_field_follows_the_lobe_areas_of_the_matching_profile).
    for A, x in ((0.01, 1.5), (0.05, 2.0), (0.05, 0.6)):
        l1 = [np.sum(np.abs(cut(x, A, x_match_h=xm, half=60, n=6001)[3]))
              for xm in (7.0, 7.5)]
        assert l1[1] == pytest.approx(l1[0], rel=0.03)


def test_far_field_follows_the_lobe_areas_of_the_matching_profile():
    # W74 §2.8 (N wave from Hopf-Lax): long after the shocks form, the lobes
    # have areas L+ = U(inf) - min U and L- = -min U of U = ∫chi d eta of the
    # matching profile, and peaks sqrt(2 L / t).  So the far field's change with
    # the matching distance is sqrt(L(x_m2)/L(x_m1)) exactly: the whole
    # sensitivity is the linear profile's lobe areas, which dispersion
    # (phase -(1+k^2)/(3k) ln x per mode, GR01 dispersion relation) keeps
    # changing at the scales k < 0.5/h_p that carry them.
    A, x = 1.0, 2.0                     # A t ≈ 570 >> A t_sh ≈ 0.45: asymptotic
    peaks, lobes = {}, {}
    for xm in (3.5, 7.0):
        _, _, _, sg = cut(x, A, x_match_h=xm, half=60, n=6001)
        m = wake_skeleton(DISK, x_lo=0.2, x_hi=3.0, x_match_h=xm).outer.match
        u = np.concatenate([[0], np.cumsum(0.5 * (m.chi[1:] + m.chi[:-1]) * np.diff(m.eta))])
        peaks[xm] = np.array([sg.max(), -sg.min()])
        lobes[xm] = np.array([u[-1] - u.min(), -u.min()])
    ratio = peaks[7.0] / peaks[3.5]
    assert ratio == pytest.approx(np.sqrt(lobes[7.0] / lobes[3.5]), rel=0.02)
    assert np.all(ratio > 1.2)          # the documented sensitivity (docs §5)


def test_default_evaluation_is_exact_in_time():
    # Hopf-Lax / equal-area solution (W74, Lax 1957) at each point's own time
    # (snapped to 0.1 % in t) against one solution per distinct time; the old
    # blend of 400 grid times is much worse next to moving shocks
    import kinkfit.wake.model as wm
    rng = np.random.default_rng(20261202)
    # many distinct radii (> 400), else the blend path is exact too
    X = 1 + A_P * rng.uniform(8.0, 20.0, 20000)
    E = rng.uniform(-12.0, 12.0, X.size)
    phi = wake_azimuth(X, A_P, DISK.q, 0.4) + E * A_P
    p = planet(0.5)
    dflt = wake_perturbations(X * RP, phi, p, DISK)[2]
    saved = wm._N_TIME
    try:
        wm._N_TIME = 10 ** 7
        exact = wake_perturbations(X * RP, phi, p, DISK)[2]
        wm._N_TIME = 400
        blend = wake_perturbations(X * RP, phi, p, DISK)[2]
    finally:
        wm._N_TIME = saved
    peak = np.max(np.abs(exact))
    # default: bounded everywhere (measured 4.5e-4 of the peak); blend: a
    # staircase next to shocks (measured 0.21 of the peak at one point)
    assert np.max(np.abs(dflt - exact)) < 2e-3 * peak
    assert np.max(np.abs(blend - exact)) > 0.05 * peak


def test_mass_scaling_linear_near_sqrt_far():
    # common practice, no source (and GR01/W74): peak |dv| ∝ Mp near the planet
    # (before shocks), ∝ sqrt(Mp) far along the wake once the N wave has formed
    near = 1 + 2.0 * A_P
    v1 = np.max(np.abs(cut(near, 0.002)[1]))
    v2 = np.max(np.abs(cut(near, 0.004)[1]))
    assert v2 / v1 == pytest.approx(2.0, rel=0.01)
    far = 2.0
    w1 = np.max(np.abs(cut(far, 0.02, half=60)[1]))
    w4 = np.max(np.abs(cut(far, 0.08, half=60)[1]))
    assert w4 / w1 == pytest.approx(2.0, rel=0.1)
    # sanity of units: |dv_r| ≈ c |dSigma/Sigma| far out (WKB)
    eta, ur, up, sg = cut(far, 0.08, half=60)
    i = np.argmax(np.abs(sg))
    assert abs(ur[i]) == pytest.approx(C_P * far ** -0.25 * abs(sg[i]), rel=0.02)


def test_damping_linear_regime_follows_prescriptions(sheet):
    # tiny mass (no shock before x = 1.5): damped / undamped = D(x)
    A = 1e-4
    x = 1.5
    eta, _, _, s0 = cut(x, A)
    L = 0.5
    _, _, _, se = cut(x, A, Damping("efold", efold_rp=L))
    ell = wake_arc_length_rp(np.array([x]), A_P, 0.25)[0]
    assert np.max(np.abs(se)) / np.max(np.abs(s0)) == pytest.approx(math.exp(-ell / L), rel=0.01)
    alpha = 1e-4
    _, _, _, sv = cut(x, A, Damping("viscous", alpha=alpha))
    sk = wake_skeleton(DISK, Damping("viscous", alpha=alpha), x_lo=0.2, x_hi=3.0)
    k = sk.k_eta_h
    # Landau & Lifshitz §79: amplitude rate nu_L k^2/2, nu_L = (4/3) alpha c h;
    # integrated by quad along the radial group path (oracle)
    rate = lambda s: (2 / 3) * alpha * k ** 2 * s ** (1.5 + 0.25) * (s ** -1.5 - 1) ** 2 / A_P ** 3
    ref = math.exp(-quad(rate, 1.0, x)[0])
    assert np.max(np.abs(sv)) / np.max(np.abs(s0)) == pytest.approx(ref, rel=0.01)
    assert 0.01 < ref < 0.99                       # the check is not vacuous


def test_viscous_local_limit():
    # near the planet: -dlnD/d|X_h| = (3/2) alpha k^2 X_h^2  =>  ln D = -(1/2) alpha k^2 |X_h|^3
    a = 1e-3
    ctx = DampingContext(a, 1.0, 0.25, 1.3)
    X_h = np.array([2.0, 5.0])
    lnd = np.log(damping_factor(1 + X_h * a, Damping("viscous", alpha=0.01), ctx))
    assert np.allclose(lnd, -0.5 * 0.01 * 1.3 ** 2 * X_h ** 3, rtol=5e-3)


def test_damping_nonlinear_far_field():
    # N wave with a linear loss: psi obeys Burgers in t' = ∫D dt, so far out the
    # amplitude is D sqrt(2L/t') instead of sqrt(2L/t) (derivation in docs,
    # W74 N-wave law): damped/undamped ratio = D sqrt(t/t').  The law is
    # asymptotic: it needs A t' >> A t_sh ≈ 0.45; efold 5 r_p gives A t' ≈ 14
    # (efold 1 r_p, A t' ≈ 2.4, is still 10 % below it)
    A, x, L = 0.08, 2.0, 5.0
    _, _, _, s0 = cut(x, A, half=60)
    _, _, _, se = cut(x, A, Damping("efold", efold_rp=L), half=60)
    ctx = DampingContext(A_P, 1.0, 0.25, 1.0)
    D = lambda s: damping_factor(s, Damping("efold", efold_rp=L), ctx)
    t = nonlinear_time(np.array([x]), A_P, 1.0, 0.25)[0]
    tp = nonlinear_time(np.array([x]), A_P, 1.0, 0.25, weight=D)[0]
    expect = D(np.array([x]))[0] * math.sqrt(t / tp)
    assert se.max() / s0.max() == pytest.approx(expect, rel=0.05)


def test_damping_limits_reproduce_undamped():
    # alpha -> 0 and efold -> inf reproduce "none" (PHYSICS.md §6)
    x = np.array([0.6, 1.1, 1.8])
    ref = [cut(xi, 0.05)[3] for xi in x]
    for dmp in (Damping("viscous", alpha=0.0), Damping("efold", efold_rp=math.inf),
                Damping("viscous", alpha=1e-12), Damping("efold", efold_rp=1e12)):
        for xi, r in zip(x, ref):
            assert np.allclose(cut(xi, 0.05, dmp)[3], r, atol=1e-8 * np.abs(r).max())


def test_damping_registry_extension():
    # a new prescription is one function + one decorator line
    @register_damping("halve_test")
    def _halve(x, damping, ctx):
        return np.full(np.shape(x), math.log(0.5))
    try:
        ctx = DampingContext(A_P, 1.0, 0.25, 1.0)
        assert np.allclose(damping_factor(np.array([1.2]), Damping("halve_test"), ctx), 0.5)
    finally:
        DAMPING_LAWS.pop("halve_test")


def test_zero_mass_and_outside_disk():
    r = np.array([10.0, 50.0, 100.0, 400.0])
    ur, up, sg = wake_perturbations(r, np.zeros(4), Planet(0.0, RP, 0.0), DISK)
    assert not np.any(ur) and not np.any(up) and not np.any(sg)
    ur, up, sg = wake_perturbations(r, np.zeros(4), planet(0.1), DISK)
    assert ur[0] == 0 and ur[-1] == 0            # outside [r_in, r_out]
    assert mass_ratio(planet(0.1), DISK) == pytest.approx(0.1)


def test_bad_parameters_raise():
    with pytest.raises(PhysicsRangeError):
        Planet(mass_mjup=-1.0, r_au=RP)
    with pytest.raises(PhysicsRangeError):
        WakeDisk(mstar_msun=1.0, aspect_p=0.6)
    with pytest.raises(PhysicsRangeError):
        WakeDisk(mstar_msun=1.0, aspect_p=0.0)
    with pytest.raises(PhysicsRangeError):
        wake_perturbations(50.0, 0.0, Planet(1.0, 500.0), DISK)     # outside the disk
    with pytest.raises(PhysicsRangeError):
        Damping("sticky")
    with pytest.raises(PhysicsRangeError):
        Damping("viscous", alpha=-0.1)
    with pytest.raises(PhysicsRangeError):
        Damping("efold", efold_rp=0.0)
    with pytest.raises(PhysicsRangeError):
        wake_perturbations(50.0, 0.0, planet(0.1), DISK, clock="sundial")
    with pytest.raises(PhysicsRangeError):
        wake_perturbations(50.0, 0.0, planet(0.1), DISK, x_match_h=40.0)
    # messages are one line and name the value
    with pytest.raises(PhysicsRangeError, match="0.6"):
        WakeDisk(mstar_msun=1.0, aspect_p=0.6)


def test_plot_wake_maps_returns_labelled_figure():
    # plot contract (DEVELOPERS.md/common brief): returns a Figure, axes in au,
    # colour bars in km/s, locus overlaid; symmetric diverging scales
    from matplotlib.figure import Figure
    from kinkfit.plots.wake import plot_wake_maps, wake_locus_xy
    fig = plot_wake_maps(planet(0.1), DISK, Damping("efold", efold_rp=1.0), npix=41,
                         extent_au=150.0)
    assert isinstance(fig, Figure)
    images = [ax for ax in fig.axes if ax.get_images()]
    assert len(images) == 3
    assert all(ax.get_xlabel() == "X [au]" for ax in images)
    cbar_labels = [ax.get_ylabel() for ax in fig.axes if not ax.get_images()]
    assert sum("km/s" in lab for lab in cbar_labels) == 2
    for ax in images:
        lo, hi = ax.get_images()[0].get_clim()
        assert lo == pytest.approx(-hi) and hi > 0
        assert len(ax.get_lines()) >= 3           # two locus arms + planet marker
    # the drawn locus is the R02 curve: radius and azimuth of its points
    (xi, yi), (xo, yo) = wake_locus_xy(planet(0.1), DISK)
    r = np.hypot(xo, yo)
    phi = wake_azimuth(r / RP, A_P, DISK.q, 0.4)
    assert np.allclose(np.arctan2(yo, xo), np.angle(np.exp(1j * phi)), atol=1e-9)
    with pytest.raises(PhysicsRangeError):
        plot_wake_maps(planet(0.1), DISK, extent_au=-1.0)


def test_matching_clock_is_continuous_and_shocks_later():
    # clock="matching": plain sheet inside, Burgers from t(x_m) outside; the
    # join is exact (same profile at zero elapsed time) and the wave steepens
    # less than with the planet clock at the same radius (shocks further out)
    xm = 4.0
    x0 = 1 + xm * A_P
    _, _, _, a = cut(x0 - 1e-4 * A_P, 0.1, x_match_h=xm, clock="matching")
    _, _, _, b = cut(x0 + 1e-4 * A_P, 0.1, x_match_h=xm, clock="matching")
    assert np.sum(np.abs(a - b)) < 0.01 * np.sum(np.abs(a))
    x = 1 + 4.1 * A_P       # matching clock: x_sh = 4.36 h_p; planet clock: 2.1 h_p
    eta, _, _, late = cut(x, 0.1, x_match_h=xm, clock="matching")
    _, _, _, early = cut(x, 0.1, x_match_h=xm, clock="planet")
    steep = lambda f: np.max(np.abs(np.diff(f))) / (eta[1] - eta[0])
    assert steep(early) > 2 * steep(late)


def test_rotation_invariance():
    # moving the planet in azimuth rotates the field (axisymmetric disk)
    r = np.array([60.0, 95.0, 104.0, 160.0])
    phi = np.array([0.3, -1.0, 0.45, 2.0])
    p0 = Planet(0.1 * MTH_MJUP, RP, 0.4)
    p1 = Planet(0.1 * MTH_MJUP, RP, 0.4 + 2.5)
    f0 = wake_perturbations(r, phi, p0, DISK)
    f1 = wake_perturbations(r, phi + 2.5, p1, DISK)
    for a, b in zip(f0, f1):
        assert np.allclose(a, b, rtol=1e-9, atol=1e-12)
