"""Tests of the wake locus (R02, OL02; PHYSICS.md §3)."""

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp

from kinkfit.errors import PhysicsRangeError
from kinkfit.wake.locus import (shear_mach_number, wake_arc_length_rp,
                                wake_azimuth, wake_azimuth_slope, wrap_angle)


def _ode_phase(x_end, aspect, q):
    """Integrate dphi/dr = -|Omega - Omega_p|/c from the planet (scipy oracle)."""
    def rhs(x, phi):
        # Omega/Omega_p = x^-3/2, c/c_p = x^-q, c_p = aspect r_p Omega_p
        return [-abs(x ** -1.5 - 1.0) / (aspect * x ** (-q))]
    sol = solve_ivp(rhs, (1.0, x_end), [0.0], rtol=1e-11, atol=1e-13)
    return sol.y[0, -1]


@pytest.mark.parametrize("q", [0.0, 0.25, 0.5, 0.75])
@pytest.mark.parametrize("x_end", [0.3, 0.8, 1.2, 2.5])
def test_closed_form_matches_ode(q, x_end):
    # R02/OL02 closed form vs scipy.integrate.solve_ivp of the defining ODE
    aspect = 0.07
    phi = wake_azimuth(x_end, aspect, q)
    ref = _ode_phase(x_end, aspect, q)
    assert abs(phi - ref) < 1e-6


def test_q_half_is_the_log_limit():
    # R02: at q = 1/2 the second term is ln x; the closed form must be
    # continuous through q = 1/2 (compare q = 0.5 with q = 0.5 +- 1e-7)
    x = np.array([0.4, 0.9, 1.1, 3.0])
    mid = wake_azimuth(x, 0.05, 0.5)
    near = 0.5 * (wake_azimuth(x, 0.05, 0.5 + 1e-7) + wake_azimuth(x, 0.05, 0.5 - 1e-7))
    assert np.allclose(mid, near, atol=1e-6)
    expect = -np.sign(x - 1) / 0.05 * ((x ** 1.5 - 1) / 1.5 - np.log(x))
    assert np.allclose(mid, expect, rtol=1e-12)


@pytest.mark.parametrize("q", [0.0, 0.25, 0.5, 0.75])
def test_both_arms_trail(q):
    # trailing spiral for +phi rotation: phi_w decreases with r on both arms
    # (R02); the inner arm is ahead of the planet, the outer arm behind it
    x = np.linspace(0.2, 3.0, 2001)
    x = x[np.abs(x - 1) > 1e-9]
    phi = wake_azimuth(x, 0.08, q, phi_p=0.3)
    assert np.all(np.diff(phi) < 0)
    assert np.all(phi[x < 1] > 0.3) and np.all(phi[x > 1] < 0.3)
    assert np.all(wake_azimuth_slope(x, 0.08, q) < 0)
    # slope equals the numerical derivative of the closed form
    xm = 0.5 * (x[1:] + x[:-1])
    fd = np.diff(phi) / np.diff(x)
    same_arm = (x[1:] - 1) * (x[:-1] - 1) > 0     # skip the interval across x = 1
    fd, xm = fd[same_arm], xm[same_arm]
    assert np.allclose(fd, wake_azimuth_slope(xm, 0.08, q), rtol=1e-3, atol=1e-6)


def test_local_parabola_near_planet():
    # R02/GR01 local limit: y = -(3/4) X|X|/h_p with X = r - r_p, y = r_p dphi
    aspect = 0.05
    for x_h in (-0.5, -0.1, 0.1, 0.5):
        X_over_rp = x_h * aspect
        dphi = wake_azimuth(1 + X_over_rp * 1e-2, aspect, 0.25)
        y_h = dphi / aspect
        X_h = x_h * 1e-2
        expect = -0.75 * X_h * abs(X_h)
        assert y_h == pytest.approx(expect, rel=2e-3)


def test_wrapped_phase():
    # wrapped = unwrapped modulo 2 pi, inside [-pi, pi); > 1 winding at x = 3
    x = np.linspace(1.01, 3.0, 50)
    un = wake_azimuth(x, 0.05, 0.25)
    wr = wake_azimuth(x, 0.05, 0.25, wrapped=True)
    assert un.min() < -2 * np.pi       # more than one winding (precondition)
    assert np.all((wr >= -np.pi) & (wr < np.pi))
    k = (un - wr) / (2 * np.pi)
    assert np.allclose(k, np.round(k), atol=1e-9)
    assert wrap_angle(3 * np.pi) == pytest.approx(-np.pi)


def test_mach_number_and_arc_length():
    # M = r|Omega-Omega_p|/c = -x dphi_w/dx (definition); arc length by quad
    x = np.array([0.5, 0.9, 1.2, 2.0])
    assert np.allclose(shear_mach_number(x, 0.06, 0.3),
                       -x * wake_azimuth_slope(x, 0.06, 0.3), rtol=1e-12)
    for xe in (0.5, 2.0):
        ref, _ = quad(lambda s: np.sqrt(1 + (s * wake_azimuth_slope(s, 0.06, 0.3)) ** 2),
                      1.0, xe, limit=200)
        got = wake_arc_length_rp(np.array([xe]), 0.06, 0.3)[0]
        assert got == pytest.approx(abs(ref), rel=1e-4)  # scipy quad oracle


def test_bad_parameters():
    with pytest.raises(PhysicsRangeError):
        wake_azimuth(1.2, 0.6, 0.25)
    with pytest.raises(PhysicsRangeError):
        wake_azimuth(1.2, 0.0, 0.25)
    with pytest.raises(PhysicsRangeError):
        wake_azimuth(-1.0, 0.05, 0.25)
