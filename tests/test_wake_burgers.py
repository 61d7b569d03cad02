"""Tests of the inviscid Burgers solver (W74, Whitham 1974, ch. 2-4)."""

import numpy as np
import pytest
from scipy.optimize import brentq

from kinkfit.wake.burgers import (burgers_at_times, burgers_history,
                                  burgers_nodes, burgers_solution, lower_hull,
                                  shock_formation_time, shock_positions)

ETA = np.linspace(-12.0, 12.0, 6001)


def gauss_deriv(eta, amp=1.0, w=1.0):
    """Antisymmetric profile -eta exp(-eta^2/2w^2): positive lobe left, negative right.

    The lobes run into each other and annihilate in one standing shock.
    """
    return -amp * (eta / w) * np.exp(-0.5 * (eta / w) ** 2)


def n_profile(eta, amp=1.0, w=1.0):
    """+eta exp(-eta^2/2w^2): negative lobe behind, positive ahead -> N wave."""
    return amp * (eta / w) * np.exp(-0.5 * (eta / w) ** 2)


def steepest_slope_gauss_deriv(amp=1.0, w=1.0):
    # d/deta[-a (e/w) exp(-e^2/2w^2)] is most negative at eta = 0: -a/w
    return amp / w


def test_lower_hull_against_brute_force(rng):
    # oracle: a point is on the lower hull iff no chord below it (brute force)
    x = np.sort(rng.uniform(0, 1, 60))
    y = rng.normal(size=60)
    h = lower_hull(x, y)
    for i in range(60):
        below = False
        for a in range(60):
            for b in range(a + 1, 60):
                if x[a] < x[i] < x[b]:
                    yl = y[a] + (y[b] - y[a]) * (x[i] - x[a]) / (x[b] - x[a])
                    below |= yl < y[i] - 1e-12
        assert (i in h) == (not below) or i in (0, 59)


def test_pre_shock_exact_characteristics():
    # W74 §2.1: chi = chi0(eta - chi t) before the first shock; oracle: brentq
    chi0 = gauss_deriv(ETA)
    tstar = 1.0 / steepest_slope_gauss_deriv()
    t = 0.8 * tstar
    eta_out = np.linspace(-4, 4, 41)
    got = burgers_solution(ETA, chi0, t, eta_out)[0]
    for e, g in zip(eta_out, got):
        y0 = brentq(lambda y: y + gauss_deriv(y) * t - e, -20, 20, xtol=1e-14)
        assert g == pytest.approx(gauss_deriv(y0), abs=1e-5)  # interpolation error ~ d^2/8


def test_shock_formation_time():
    # W74 §2.2: first shock at t* = 1/max(-chi0'); for -a(e/w)exp(..) t* = w/a
    for amp, w in [(1.0, 1.0), (0.3, 2.0)]:
        chi0 = gauss_deriv(ETA, amp, w)
        tstar = w / amp
        assert shock_formation_time(ETA, chi0) == pytest.approx(tstar, rel=1e-5)
        assert len(shock_positions(ETA, chi0, 0.97 * tstar)) == 0
        assert len(shock_positions(ETA, chi0, 1.03 * tstar)) == 1
    # N profile: chi0' = a/w (1 - e^2/w^2) exp(-e^2/2w^2) is most negative at
    # e = +-sqrt(3) w, giving t* = w e^{3/2} / (2 a); two shocks form at once
    chi0 = n_profile(ETA)
    tstar = np.exp(1.5) / 2
    assert shock_formation_time(ETA, chi0) == pytest.approx(tstar, rel=1e-5)
    assert len(shock_positions(ETA, chi0, 0.97 * tstar)) == 0
    assert len(shock_positions(ETA, chi0, 1.03 * tstar)) == 2


def test_rankine_hugoniot_speed():
    # W74 §2.4: shock speed = (chi_L + chi_R)/2. Riemann data 1 | 0 (thin ramp):
    # a single shock moving at 1/2; and the N-wave's shocks, measured by finite
    # differences of the fitted position, move at the mean of their states
    eta = np.linspace(-5, 15, 8001)
    chi0 = np.clip(0.5 - eta / 0.02, 0.0, 1.0)
    for t in (2.0, 6.0):
        s = shock_positions(eta, chi0, t)
        assert len(s) == 1
        assert s[0, 0] == pytest.approx(0.5 * t, abs=3e-3)
        assert s[0, 1] == pytest.approx(1.0) and s[0, 2] == pytest.approx(0.0)
    # asymmetric N wave: front and back shocks move at the mean of their
    # (changing) states
    chi0 = n_profile(ETA) + 0.3 * np.exp(-0.5 * ((ETA - 1.0) / 0.7) ** 2)
    dt = 0.05
    for t in (4.0, 12.0):
        s0 = shock_positions(ETA, chi0, t - dt)
        s1 = shock_positions(ETA, chi0, t + dt)
        s = shock_positions(ETA, chi0, t)
        assert len(s) == len(s0) == len(s1) == 2
        for k in range(2):
            speed = (s1[k, 0] - s0[k, 0]) / (2 * dt)
            assert speed == pytest.approx(0.5 * (s[k, 1] + s[k, 2]), abs=5e-3)
        assert s[1, 1] > 0.1 and abs(s[1, 2]) < 0.05 * s[1, 1]   # front: chi_L > 0 -> ~0


def _lobes(eta, chi):
    de = eta[1] - eta[0]
    return np.sum(np.clip(chi, 0, None)) * de, np.sum(np.clip(chi, None, 0)) * de


def test_nwave_lobe_areas_and_decay():
    # W74 §2.6-2.8 (N wave): each lobe's area is conserved; for a lobe of area
    # L the peak decays as sqrt(2 L / t) once the N wave has formed.
    # Asymmetric start (two lobes of different area) to make it non-trivial.
    chi0 = n_profile(ETA) + 0.3 * np.exp(-0.5 * ((ETA - 1.0) / 0.7) ** 2)
    eta_out = np.linspace(-60, 60, 24001)
    pos0, neg0 = _lobes(ETA, chi0)
    ts = np.array([5.0, 50.0, 400.0])
    hist = burgers_history(ETA, chi0, ts, eta_out)[0]
    for k, t in enumerate(ts):
        pos, neg = _lobes(eta_out, hist[k])
        assert pos == pytest.approx(pos0, rel=5e-3)
        assert neg == pytest.approx(neg0, rel=5e-3)
    # the positive lobe (area pos0) peaks at sqrt(2 pos0/t) asymptotically
    peak = hist[-1].max() * np.sqrt(ts[-1])
    assert peak == pytest.approx(np.sqrt(2 * pos0), rel=0.03)
    low = -hist[-1].min() * np.sqrt(ts[-1])
    assert low == pytest.approx(np.sqrt(-2 * neg0), rel=0.03)


def test_scaling_invariance():
    # chi -> A chi, t -> t/A is a symmetry of chi_t + chi chi_eta = 0 (W74)
    chi0 = n_profile(ETA)
    eta_out = np.linspace(-15, 15, 3001) + 1.234e-4   # not exactly on a shock
    for A in (0.1, 3.0):
        for t in (0.5, 4.0, 30.0):
            ref = burgers_solution(ETA, chi0, t, eta_out)[0]
            got = burgers_solution(ETA, A * chi0, t / A, eta_out)[0]
            assert np.allclose(A * ref, got, atol=1e-9 * A)


def test_passive_fields_follow_characteristics():
    # a passive copy of chi itself must reproduce chi (same branch): exactly
    # away from shocks; next to one chi is the Hopf-Lax fan (eta - y*)/t of its
    # vertex while the passive keeps the vertex value, a difference below
    # max|chi0'| d eta (one sample of the initial profile; Lax 1957 formula)
    chi0 = gauss_deriv(ETA)
    eta_out = np.linspace(-15, 15, 3001)
    t = 6.0
    out = burgers_solution(ETA, chi0, t, eta_out, passive=(2.0 * chi0,))
    xs = shock_positions(ETA, chi0, t)[:, 0]
    assert xs.size >= 1
    far = np.min(np.abs(eta_out[:, None] - xs[None, :]), axis=1) > 0.05
    assert np.allclose(out[1][far], 2.0 * out[0][far])
    bound = np.max(np.abs(np.diff(chi0) / np.diff(ETA))) * (ETA[1] - ETA[0])
    assert np.max(np.abs(out[1] - 2.0 * out[0])) <= 2.0 * bound


def test_scattered_times_blend_between_grid_times():
    # at grid times the scattered evaluation equals the history; in between it
    # is the linear blend of the two bracketing times (definition)
    chi0 = gauss_deriv(ETA)
    tg = np.array([0.0, 0.5, 1.0, 2.0, 4.0])
    eta_p = np.array([-1.0, 0.3, 2.0, 0.0, 1.5, 0.2])
    t_p = np.array([0.5, 1.0, 3.0, 4.0, 0.75, 6.0])   # 6 distinct > 5 grid times
    got = burgers_at_times(ETA, chi0, t_p, eta_p, tg)[0]
    h = burgers_history(ETA, chi0, tg, eta_p)[0]
    assert got[0] == pytest.approx(h[1, 0])
    assert got[1] == pytest.approx(h[2, 1])
    assert got[2] == pytest.approx(0.5 * (h[3, 2] + h[4, 2]))
    assert got[3] == pytest.approx(h[4, 3])
    assert got[4] == pytest.approx(0.5 * (h[1, 4] + h[2, 4]))
    assert got[5] == pytest.approx(h[4, 5])           # beyond the grid: nearest end
    # few distinct times: exact evaluation at each point's own time
    t_q = np.array([3.0, 3.0, 0.75])
    got = burgers_at_times(ETA, chi0, t_q, eta_p[:3], tg)[0]
    exact = [burgers_solution(ETA, chi0, t, e)[0] for t, e in zip(t_q, eta_p[:3])]
    assert np.allclose(got, exact)


def test_zero_time_returns_initial_profile():
    chi0 = gauss_deriv(ETA)
    pos, vals, shocks = burgers_nodes(ETA, chi0, 0.0)
    assert np.array_equal(vals[0], chi0) and shocks.shape == (0, 3)
    with pytest.raises(ValueError):
        burgers_nodes(ETA[::-1], chi0, 1.0)


def test_late_nwave_fed_by_less_than_one_sample():
    # Regression: long after the N wave forms, each lobe is fed by the
    # characteristics of a neighbourhood of the minimum of U0 = int chi0
    # narrower than one sample.  The solution there is the Hopf-Lax fan
    # chi = (eta - y*)/t (Lax 1957; W74 §2.8), amplitude sqrt(2 L / t); a
    # constant state chi0(y*) next to the shocks (the previous code) gave
    # ~chi0 at the vertex instead.  Oracle: brute-force minimisation of
    # U0(y) + (eta - y)^2 / (2t) over a 50x finer copy of the same
    # piecewise-linear profile.
    eta0 = np.linspace(-12.0, 12.0, 97)                 # d eta = 0.25
    chi0 = n_profile(eta0) + 0.3 * np.exp(-0.5 * ((eta0 - 1.0) / 0.7) ** 2)
    t = 3000.0                                          # sqrt(2L/t) ~ 0.03 << chi0' d eta
    fine = np.linspace(-400.0, 400.0, 400001)
    cf = np.interp(fine, eta0, chi0, left=0.0, right=0.0)
    u0 = np.concatenate([[0.0], np.cumsum(0.5 * (cf[1:] + cf[:-1]) * np.diff(fine))])
    eta_out = np.linspace(-150.0, 150.0, 61) + 0.0123
    brute = np.array([(e - fine[np.argmin(u0 + (e - fine) ** 2 / (2 * t))]) / t
                      for e in eta_out])
    got = burgers_solution(eta0, chi0, t, eta_out)[0]
    peak = np.max(np.abs(brute))
    assert peak > 0.01
    assert np.max(np.abs(got - brute)) < 0.02 * peak
    # W74: the positive lobe of area L peaks at sqrt(2 L / t)
    lobe = np.trapezoid(np.clip(cf, 0, None), fine) - 0.0
    big = burgers_solution(eta0, chi0, t, np.linspace(-300, 300, 60001))[0]
    pos_area = np.trapezoid(np.clip(big, 0, None), np.linspace(-300, 300, 60001))
    assert big.max() == pytest.approx(np.sqrt(2 * pos_area / t), rel=0.03)
    assert pos_area > 0.1 * lobe
