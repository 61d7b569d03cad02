"""Wall seconds of each stage of ``kinkfit fit configs/demo.toml``.

Runs the real job (:func:`kinkfit.pipeline.run_fit`, ``force=True``) on a
copy of ``configs/`` and ``demo_cubes/`` in a temporary folder, with the
stage functions it calls wrapped by timers, and prints one table: the
inclusive wall time and number of calls of every stage.  Stages nest: a
nested time is included in its parent's, the indentation shows where a
function is mostly called from (``model_cube`` is called by both
``fit_emission`` and ``estimate_smearing_bias``; ``fit_emission`` is called
from inside ``trace_and_fit`` and just before the last
``estimate_smearing_bias``).  Prints numbers, asserts
nothing.

Run (from the repository root)::

    nice -n 10 python bench/profile_demo.py            # the whole demo
    nice -n 10 python bench/profile_demo.py --max-steps 300   # quick look

``--max-steps`` caps the sampler (the posterior then is not converged, and
the report/comparison stages see fewer samples than in the real demo); use
the uncapped run for numbers you quote.  ``--keep DIR`` keeps the products
in ``DIR`` (default: a temporary folder, removed at the end).  Timings
depend on the machine load: compare runs made on the same machine state.
"""

from __future__ import annotations

import argparse
import functools
import importlib
import logging
import os
import shutil
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[1]

#: (module, function, depth in the printed table): the stages of run_fit
STAGES = [
    ("kinkfit.cube", "read_cube", 0),
    ("kinkfit.trace", "run_trace", 0),
    ("kinkfit.diskfit", "trace_and_fit", 1),
    ("kinkfit.trace", "trace_ridges", 2),
    ("kinkfit.diskfit", "fit_background", 2),
    ("kinkfit.deviations", "estimate_smearing_bias", 1),
    ("kinkfit.deviations", "fit_emission", 1),
    ("kinkfit.deviations", "model_cube", 2),
    ("kinkfit.deviations", "measure_deviations", 1),
    ("kinkfit.trace", "write_trace_file", 0),
    ("kinkfit.pipeline", "forward_response", 0),
    ("kinkfit.response", "build_ridge_response", 1),
    ("kinkfit.pipeline", "fit_assumption", 0),
    ("kinkfit.wake.emulator", "make_fit_model", 1),
    ("kinkfit.sampling", "find_modes", 1),
    ("kinkfit.sampling", "run_sampler", 1),
    ("kinkfit.results", "assemble_result", 1),
    ("kinkfit.results", "write_result", 1),
    ("kinkfit.report", "write_report", 0),
    ("kinkfit.report", "write_summary", 1),
    ("kinkfit.plots.posterior", "corner_figure", 1),
    ("kinkfit.plots.posterior", "trace_figure", 1),
    ("kinkfit.plots.posterior", "displacement_figure", 1),
    ("kinkfit.pipeline", "_overlays", 0),
    ("kinkfit.pipeline", "_median_model_on_sky", 1),
    ("kinkfit.plots.gallery", "channel_gallery", 1),
    ("kinkfit.plots.gallery", "deviation_map", 1),
    ("kinkfit.pipeline", "_save", 1),
    ("kinkfit.compare", "compare_results", 0),
    ("kinkfit.compare", "psis_loo", 1),
    ("kinkfit.plots.compare", "overlay_corner_figure", 1),
]


class Timers:
    """Inclusive wall seconds and call counts per wrapped function."""

    def __init__(self):
        self.seconds = {}
        self.calls = {}

    def wrap(self, key, fn):
        @functools.wraps(fn)
        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds[key] = (self.seconds.get(key, 0.0)
                                     + time.perf_counter() - t0)
                self.calls[key] = self.calls.get(key, 0) + 1
        return timed


def install(timers: Timers):
    """Replace every stage function by its timed wrapper, in its own module
    and in every kinkfit module that imported it by name."""
    for modname, fname, _ in STAGES:
        mod = importlib.import_module(modname)
        orig = getattr(mod, fname)
        timed = timers.wrap(f"{modname}.{fname}", orig)
        for other in list(sys.modules.values()):
            name = getattr(other, "__name__", "") or ""
            if name.startswith("kinkfit") and getattr(other, fname, None) is orig:
                setattr(other, fname, timed)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-steps", type=int, default=None,
                    help="cap the sampler (quick look; not the real demo)")
    ap.add_argument("--workers", type=int, default=None,
                    help="sampler worker processes (default: the config's)")
    ap.add_argument("--keep", default=None,
                    help="folder for the copy and its products (kept)")
    args = ap.parse_args(argv)

    from kinkfit.config import load_config
    from kinkfit.pipeline import run_fit

    # import every stage module first, so that `install` finds them all
    for modname, _, _ in STAGES:
        importlib.import_module(modname)
    timers = Timers()
    install(timers)

    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(
        prefix="kinkfit_profile_"))
    try:
        work.mkdir(parents=True, exist_ok=True)
        for sub in ("configs", "demo_cubes"):
            if not (work / sub).exists():
                shutil.copytree(ROOT / sub, work / sub)
        cfg = load_config(work / "configs" / "demo.toml")
        if args.max_steps is not None:
            cfg = replace(cfg, sampler=replace(cfg.sampler,
                                               max_steps=int(args.max_steps)))
        logging.basicConfig(level=logging.WARNING,
                            format="%(levelname)s %(name)s: %(message)s")
        t0 = time.perf_counter()
        run = run_fit(cfg, force=True, workers=args.workers, progress=False)
        total = time.perf_counter() - t0
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)

    print(f"kinkfit fit configs/demo.toml: {total:.1f} s wall "
          f"(max_steps {args.max_steps or 'as configured'}, "
          f"workers {args.workers or 'as configured'})")
    print(f"{'stage':<52} {'calls':>5} {'seconds':>9}")
    for modname, fname, depth in STAGES:
        key = f"{modname}.{fname}"
        if key not in timers.calls:
            continue
        label = "  " * depth + fname
        print(f"{label:<52} {timers.calls[key]:>5} {timers.seconds[key]:>9.2f}")
    top = sum(timers.seconds.get(f"{m}.{f}", 0.0) for m, f, d in STAGES
              if d == 0)
    print(f"{'(not in a listed stage)':<52} {'':>5} {total - top:>9.2f}")
    for name, ok in run.converged.items():
        print(f"  {name}: converged={ok}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
