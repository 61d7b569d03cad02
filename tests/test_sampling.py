"""Tests of kinkfit.sampling: recovery, determinism, checkpoint/resume."""

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from kinkfit.config import SamplerSettings
from kinkfit.errors import ResultFileError
from kinkfit.likelihood import KinkLikelihood
from kinkfit.sampling import (find_start, initial_ball, read_checkpoint,
                              run_sampler)

from standin import TRUTH, standin_data, standin_model, standin_params

HERE = Path(__file__).resolve().parent


def _settings(**kw):
    base = dict(walkers=12, max_steps=90, check_every=30,
                autocorr_multiple=1000.0, tau_tolerance=0.01, seed=7,
                workers=1, progress=False)
    base.update(kw)
    return SamplerSettings(**base)


def _lik(seed=3, npts=120):
    rng = np.random.default_rng(seed)
    return KinkLikelihood(model=standin_model, param_set=standin_params(),
                          **standin_data(rng, npts=npts))


def _start(lik):
    return lik.param_set.pack(TRUTH)[0]


def test_recovers_injected_parameters(tmp_path):
    # analytic truth: a Gaussian likelihood on data simulated from the same
    # model recovers the injected parameters within the posterior scatter
    lik = _lik(seed=11, npts=200)
    ps = lik.param_set
    start = find_start(lik.log_prob, ps, np.random.default_rng(1),
                       n_tries=400, n_polish=2)
    out = run_sampler(lik.log_prob, ps,
                      _settings(walkers=16, max_steps=2500, check_every=250,
                                autocorr_multiple=25.0, tau_tolerance=0.1),
                      tmp_path / "ck.h5", initial=start, rng_seed=5)
    s = out.flat_samples()
    assert s.shape[0] > 500
    med, sd = np.median(s, axis=0), np.std(s, axis=0)
    for j, name in enumerate(ps.free):
        if name == "jitter":
            continue  # 0.004 under sigma = 0.01: only an upper bound
        # 3 sigma: common practice, no source
        assert abs(med[j] - TRUTH[name]) < 3 * sd[j], (name, med[j], sd[j])
    assert out.converged, out.tau
    assert out.n_steps > 25 * np.max(out.tau)
    assert 0.05 < np.mean(out.acceptance) < 0.9
    assert out.burn >= 3 * np.max(out.tau) - 1 and out.thin >= 1
    assert out.tau_history.shape[1] == 1 + ps.ndim


def test_find_start_near_truth():
    lik = _lik(seed=11, npts=200)
    x = find_start(lik.log_prob, lik.param_set, np.random.default_rng(2),
                   n_tries=400)
    # the optimum must be at least as good as the injected truth, up to the
    # expected chi-square scatter (~ndim/2 in log L; common practice)
    assert lik.log_prob(x[None])[0] > lik.log_prob(_start(lik)[None])[0] - 5


def test_same_seed_same_chain(tmp_path):
    lik = _lik()
    a = run_sampler(lik.log_prob, lik.param_set, _settings(), tmp_path / "a.h5",
                    initial=_start(lik), rng_seed=42)
    b = run_sampler(lik.log_prob, lik.param_set, _settings(), tmp_path / "b.h5",
                    initial=_start(lik), rng_seed=42)
    c = run_sampler(lik.log_prob, lik.param_set, _settings(), tmp_path / "c.h5",
                    initial=_start(lik), rng_seed=43)
    assert a.chain.shape == (90, 12, lik.param_set.ndim)
    np.testing.assert_array_equal(a.chain, b.chain)
    np.testing.assert_array_equal(a.log_prob, b.log_prob)
    assert not np.array_equal(a.chain, c.chain)
    assert not a.converged  # autocorr_multiple=1000 cannot be met in 90 steps


class _Interrupting:
    """log_prob that raises KeyboardInterrupt on its n-th call."""

    def __init__(self, lik, n):
        self.lik, self.n, self.calls = lik, n, 0

    def __call__(self, theta):
        self.calls += 1
        if self.calls == self.n:
            raise KeyboardInterrupt
        return self.lik.log_prob(theta)


@pytest.mark.parametrize("block", [1, 1000])
def test_interrupt_then_resume_equals_uninterrupted(tmp_path, block):
    # block=1000: nothing is written before the interrupt except by the
    # flush on the way out, which must keep every complete step
    lik = _lik()
    ref = run_sampler(lik.log_prob, lik.param_set, _settings(),
                      tmp_path / "ref.h5", initial=_start(lik), rng_seed=9)
    ck = tmp_path / "ck.h5"
    with pytest.raises(KeyboardInterrupt):
        run_sampler(_Interrupting(lik, 101), lik.param_set,
                    _settings(check_every=1000), ck, initial=_start(lik),
                    rng_seed=9, checkpoint_every=block,
                    checkpoint_seconds=1e9)
    chain, _, it = read_checkpoint(ck)
    assert 0 < it < 90 and chain.shape[0] == it   # checkpoint readable
    # 2 (DEMove) or 4 (DESnookerMove) log_prob calls per step (emcee's
    # red-blue splits; 2 calls before the first step): ~40 complete steps
    # precede call 101, and all of them are kept
    assert it >= 35
    out = run_sampler(lik.log_prob, lik.param_set, _settings(), ck,
                      initial=_start(lik), rng_seed=9)
    assert out.resumed_from == it
    assert out.n_steps == 90                      # no step lost or duplicated
    np.testing.assert_array_equal(out.chain, ref.chain)
    np.testing.assert_array_equal(out.log_prob, ref.log_prob)
    np.testing.assert_allclose(out.acceptance, ref.acceptance)
    np.testing.assert_array_equal(out.tau_history, ref.tau_history)
    assert out.tau_history[:, 0].tolist() == [30, 60, 90]


def test_run_then_extend_equals_single_run(tmp_path):
    lik = _lik()
    ref = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=90),
                      tmp_path / "ref.h5", initial=_start(lik), rng_seed=4)
    ck = tmp_path / "ck.h5"
    first = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=40),
                        ck, initial=_start(lik), rng_seed=4)
    assert first.n_steps == 40
    out = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=90),
                      ck, rng_seed=4)
    assert out.resumed_from == 40 and out.n_steps == 90
    np.testing.assert_array_equal(out.chain, ref.chain)


def test_resume_false_starts_afresh(tmp_path):
    lik = _lik()
    ck = tmp_path / "ck.h5"
    run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=40), ck,
                initial=_start(lik), rng_seed=4)
    out = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=30),
                      ck, initial=_start(lik), rng_seed=4, resume=False)
    assert out.resumed_from == 0 and out.n_steps == 30


def test_sigkill_leaves_resumable_checkpoint(tmp_path):
    ck = tmp_path / "ck.h5"
    marker = tmp_path / "marker"
    script = textwrap.dedent(f"""
        import sys, time
        sys.path.insert(0, {str(HERE)!r})
        import numpy as np
        from pathlib import Path
        from test_sampling import _lik, _settings, _start
        from kinkfit.sampling import run_sampler
        lik = _lik()
        calls = [0]
        def lp(theta):
            calls[0] += 1
            if calls[0] == 121:
                Path({str(marker)!r}).write_text("x")
                time.sleep(600)
            return lik.log_prob(theta)
        run_sampler(lp, lik.param_set, _settings(), {str(ck)!r},
                    initial=_start(lik), rng_seed=9)
    """)
    env = dict(os.environ, PYTHONPATH=str(HERE))
    proc = subprocess.Popen([sys.executable, "-c", script], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.time() + 120
        while not marker.exists():
            if proc.poll() is not None:
                pytest.fail("worker exited: " + proc.stderr.read().decode())
            assert time.time() < deadline, "worker never reached the marker"
            time.sleep(0.05)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == -signal.SIGKILL
    chain, _, it = read_checkpoint(ck)
    assert 0 < it < 90
    lik = _lik()
    ref = run_sampler(lik.log_prob, lik.param_set, _settings(),
                      tmp_path / "ref.h5", initial=_start(lik), rng_seed=9)
    out = run_sampler(lik.log_prob, lik.param_set, _settings(), ck,
                      initial=_start(lik), rng_seed=9)
    assert out.resumed_from == it
    np.testing.assert_array_equal(out.chain, ref.chain)


def test_mismatched_or_corrupt_checkpoint(tmp_path):
    lik = _lik()
    ck = tmp_path / "ck.h5"
    run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=20), ck,
                initial=_start(lik))
    with pytest.raises(ResultFileError, match="walkers"):
        run_sampler(lik.log_prob, lik.param_set,
                    _settings(walkers=14, max_steps=30), ck,
                    initial=_start(lik))
    bad = tmp_path / "bad.h5"
    bad.write_bytes(b"not an hdf5 file at all")
    with pytest.raises(ResultFileError, match="unreadable"):
        run_sampler(lik.log_prob, lik.param_set, _settings(), bad)
    foreign = tmp_path / "foreign.h5"
    with h5py.File(foreign, "w") as f:
        f["x"] = 1
    with pytest.raises(ResultFileError, match="not a kinkfit checkpoint"):
        run_sampler(lik.log_prob, lik.param_set, _settings(), foreign)


def test_pool_matches_serial_and_counts(tmp_path):
    lik = _lik()
    ser = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=30),
                      tmp_path / "s.h5", initial=_start(lik), rng_seed=2)
    lik2 = _lik()
    par = run_sampler(lik2, lik2.param_set,
                      _settings(max_steps=30, workers=2),
                      tmp_path / "p.h5", initial=_start(lik2), rng_seed=2)
    # self-consistency: splitting the batch across processes changes nothing
    np.testing.assert_allclose(par.chain, ser.chain, rtol=0, atol=1e-12)
    assert lik2.counters["evaluated"] == par.timings["n_evaluations"]


def test_initial_ball_inside_prior():
    ps = standin_params()
    rng = np.random.default_rng(0)
    centre = ps.pack({"mass": 0.1, "radius": 200.0, "azimuth": 0.0,
                      "jitter": 0.05})[0]  # on prior edges
    p = initial_ball(centre, ps, 50, rng, scale=0.05)
    assert np.all(np.isfinite(ps.log_prior(p)))
    assert np.linalg.matrix_rank(p - p.mean(0)) == ps.ndim  # not degenerate
    # no two walkers share a coordinate, even on an edge: emcee's
    # differential-evolution snooker move divides by the distance between
    # two walkers (identical walkers gave NaN proposals on a baseline fit
    # whose jitter was polished to its lower bound)
    assert all(np.unique(p[:, j]).size == len(p) for j in range(ps.ndim))


def test_sigint_is_deferred_to_a_complete_step(tmp_path):
    # the first SIGINT lets the current step finish, then stops with a
    # complete checkpoint that resumes to the uninterrupted chain
    ck = tmp_path / "ck.h5"
    marker = tmp_path / "marker"
    script = textwrap.dedent(f"""
        import sys, time
        sys.path.insert(0, {str(HERE)!r})
        from pathlib import Path
        from test_sampling import _lik, _settings, _start
        from kinkfit.sampling import run_sampler
        lik = _lik()
        calls = [0]
        def lp(theta):
            calls[0] += 1
            if calls[0] == 121:
                Path({str(marker)!r}).write_text("x")
            if calls[0] >= 121:
                time.sleep(0.2)   # the signal arrives inside log_prob
            return lik.log_prob(theta)
        run_sampler(lp, lik.param_set, _settings(), {str(ck)!r},
                    initial=_start(lik), rng_seed=9)
        print("FINISHED")
    """)
    env = dict(os.environ, PYTHONPATH=str(HERE))
    proc = subprocess.Popen([sys.executable, "-c", script], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.time() + 120
        while not marker.exists():
            if proc.poll() is not None:
                pytest.fail("worker exited: " + proc.stderr.read().decode())
            assert time.time() < deadline, "worker never reached the marker"
            time.sleep(0.05)
        proc.send_signal(signal.SIGINT)
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert b"FINISHED" not in out
    assert b"KeyboardInterrupt" in err and b"stopped at iteration" in err
    chain, _, it = read_checkpoint(ck)
    assert 0 < it < 90
    lik = _lik()
    ref = run_sampler(lik.log_prob, lik.param_set, _settings(),
                      tmp_path / "ref.h5", initial=_start(lik), rng_seed=9)
    out = run_sampler(lik.log_prob, lik.param_set, _settings(), ck,
                      initial=_start(lik), rng_seed=9)
    np.testing.assert_array_equal(out.chain, ref.chain)


def test_prior_start_and_walker_check(tmp_path):
    from kinkfit.errors import ConfigError
    lik = _lik()
    out = run_sampler(lik.log_prob, lik.param_set, _settings(max_steps=20),
                      tmp_path / "p.h5", rng_seed=1)
    first = out.chain[0]
    assert np.all(np.isfinite(lik.param_set.log_prior(first)))
    # prior draws, not a ball: the spread covers a good part of the prior
    j = lik.param_set.free.index("azimuth")
    assert np.ptp(first[:, j]) > 90.0
    assert out.timings["n_evaluations"] >= 12 * 21
    with pytest.raises(ConfigError, match="walkers"):
        run_sampler(lik.log_prob, lik.param_set, _settings(walkers=6),
                    tmp_path / "q.h5")


def test_find_start_without_finite_point_raises():
    from kinkfit.errors import KinkfitError
    ps = standin_params()
    with pytest.raises(KinkfitError, match="finite"):
        find_start(lambda t: np.full(len(t), -np.inf), ps,
                   np.random.default_rng(0), n_tries=20)


def test_find_modes_returns_both_modes_of_a_bimodal_posterior():
    """Two equal, well separated Gaussian modes at analytically known
    positions: both are returned, best first, each to 2% of its width (the
    polish stops at 1e-4 of the prior width and 1e-3 in log-probability,
    i.e. within ~0.05 sigma of a Gaussian peak: a start point, refined by
    the sampler)."""
    from kinkfit.params import ParameterSet
    from kinkfit.priors import Uniform
    from kinkfit.sampling import find_modes
    pset = ParameterSet(names=("azimuth", "radius"),
                        priors=(Uniform(-10.0, 10.0), Uniform(-10.0, 10.0)))
    centres = np.array([[-4.0, 2.0], [5.0, -3.0]])

    def log_prob(t):
        t = np.atleast_2d(t)
        d2 = ((t[:, None, :] - centres[None]) ** 2).sum(-1) / (2 * 0.5 ** 2)
        return np.logaddexp(-d2[:, 0], -d2[:, 1] + 0.5)

    modes = find_modes(log_prob, pset, np.random.default_rng(2), n_tries=400,
                       n_polish=12)
    assert len(modes) == 2
    np.testing.assert_allclose(modes[0], centres[1], atol=0.02 * 0.5)
    np.testing.assert_allclose(modes[1], centres[0], atol=0.02 * 0.5)
