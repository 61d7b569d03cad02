"""Crash safety of `kinkfit fit`: SIGKILL at random moments never leaves a
corrupt product, the next run says what it found, and the final chain is
the one an uninterrupted run gives.

Oracle: an uninterrupted run with the same seed (emcee's random state is
checkpointed with the chain, so resuming must reproduce it exactly).
"""

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from test_pipeline import _config
from kinkfit.pipeline import run_fit
from kinkfit.results import read_result
from kinkfit.sampling import read_checkpoint
from kinkfit.scenario import synth_from_config
from kinkfit.trace import read_trace_file

N_TRIALS = 8   # kill moments uniform in 0.5-6 s: start search, sampling, writes


def _products_valid(folder: Path):
    """Every product under its final name is readable."""
    for p in folder.glob("fit_*.chain.h5"):
        read_checkpoint(p)
    for p in folder.glob("fit_*.h5"):
        if not p.name.endswith(".chain.h5"):
            read_result(p)
    if (folder / "trace.h5").exists():
        read_trace_file(folder / "trace.h5")


STEPS = 150


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """An uninterrupted fit of ``STEPS`` steps: its result and config (the
    oracle of both tests; computed once)."""
    ref_dir = tmp_path_factory.mktemp("ref")
    cfg_ref = _config(ref_dir, steps=STEPS)
    synth_from_config(cfg_ref)
    result = read_result(run_fit(cfg_ref, progress=False).results["none"])
    return result, cfg_ref


def _twin(reference, tmp_path, twin):
    """The config of a fit identical to the reference in the folder ``twin``
    (the same cube copied there, nothing run yet)."""
    _, cfg_ref = reference
    work = tmp_path / twin
    work.mkdir()
    cfg = _config(work, steps=STEPS)
    shutil.copyfile(cfg_ref.data.cube, cfg.data.cube)   # the same cube
    return cfg


def test_sigkill_at_random_points_then_resume(tmp_path, reference):
    cfg = _twin(reference, tmp_path, "killed")
    work = tmp_path / "killed"
    env = dict(os.environ, OMP_NUM_THREADS="1")
    rng = np.random.default_rng(4)
    statuses = []
    for trial in range(N_TRIALS):
        proc = subprocess.Popen(
            [sys.executable, "-m", "kinkfit.cli", "fit", str(cfg.path),
             "--no-progress"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
            env=env, cwd=work)
        time.sleep(float(rng.uniform(0.5, 6.0)))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
        out, _ = proc.communicate()
        statuses.append(out.decode())
        _products_valid(cfg.output.folder)
    final = subprocess.run(
        [sys.executable, "-m", "kinkfit.cli", "fit", str(cfg.path),
         "--no-progress"], capture_output=True, env=env, cwd=work)
    assert final.returncode in (0, 1), final.stderr.decode()
    text = final.stdout.decode()
    # kinkfit says which state it found
    assert any(s in text for s in ("resumed from checkpoint at step",
                                   "finished result kept", "new fit")), text
    result = read_result(cfg.output.folder / "fit_none.h5")
    np.testing.assert_array_equal(result.chain, reference[0].chain)
    np.testing.assert_array_equal(result.log_prob, reference[0].log_prob)


def test_checkpoint_killed_before_first_block_restarts_like_a_new_fit(
        tmp_path, reference):
    """A SIGKILL after the checkpoint file is created but before its first
    block of steps is flushed leaves a valid checkpoint at iteration 0; the
    next run must then start exactly as an uninterrupted run (same start
    point search, same walker ball), not from prior draws.

    Oracle: an uninterrupted run with the same seed.
    """
    from kinkfit.sampling import _open_backend

    cfg = _twin(reference, tmp_path, "empty")
    folder = cfg.output.folder
    folder.mkdir(parents=True, exist_ok=True)
    pset = cfg.parameter_set("none", with_planet=True)
    _open_backend(folder / "fit_none.chain.h5", pset, cfg.sampler.walkers,
                  resume=False)
    assert read_checkpoint(folder / "fit_none.chain.h5")[2] == 0
    run = run_fit(cfg, progress=False)
    assert run.status["none"] == "new fit"
    result = read_result(run.results["none"])
    np.testing.assert_array_equal(result.chain, reference[0].chain)
