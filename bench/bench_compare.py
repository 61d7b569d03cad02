"""Timings of the model comparison (prints numbers, asserts nothing).

PSIS-LOO (kinkfit.compare.psis_loo: one Pareto fit per traced point) beside
WAIC (one variance per point) on Gaussian log-likelihood arrays of the size
a result stores (up to 400 draws) for several numbers of traced points, and
the whole ``compare_results`` on three stand-in result files (tables,
figures, HDF5).

Run: ``python bench/bench_compare.py [--draws 400]``.
Numbers depend on the machine load; compare them side by side only.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from kinkfit.compare import compare_results, psis_loo, waic  # noqa: E402
from kinkfit.results import write_result  # noqa: E402


def _loglike(rng, draws, npts):
    y = rng.normal(size=npts)
    mu = rng.normal(0.0, 1.0 / np.sqrt(npts), draws)
    return -0.5 * (y[None, :] - mu[:, None]) ** 2 - 0.5 * np.log(2 * np.pi)


def _best(fn, repeat=3):
    t = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        t.append(time.perf_counter() - t0)
    return min(t)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--draws", type=int, default=400)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(1)
    print(f"{'points':>8} {'PSIS-LOO s':>11} {'WAIC s':>9} {'ms/point':>9}")
    for npts in (100, 500, 2000):
        ll = _loglike(rng, args.draws, npts)
        t_loo = _best(lambda: psis_loo(ll))
        t_waic = _best(lambda: waic(ll))
        print(f"{npts:>8} {t_loo:>11.3f} {t_waic:>9.4f} "
              f"{1e3 * t_loo / npts:>9.3f}")

    import sys
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    from standin import standin_data, standin_model
    from test_compare import _fit, wide_model
    data = standin_data(np.random.default_rng(11), npts=200)
    fits = {"none": _fit(data, standin_model, "none", seed=2),
            "efold": _fit(data, wide_model, "efold", seed=3),
            "baseline": _fit(data, None, "none", seed=4, baseline=True)}
    with tempfile.TemporaryDirectory() as tmp:
        paths = [write_result(Path(tmp) / f"fit_{k}.h5", v)
                 for k, v in fits.items()]
        t_all = _best(lambda: compare_results(paths, Path(tmp) / "c",
                                              overwrite=True), repeat=2)
        t_nofig = _best(lambda: compare_results(paths, Path(tmp) / "c",
                                                overwrite=True,
                                                figures=False), repeat=2)
    print(f"compare_results, 3 files x 200 points x "
          f"{fits['none'].pointwise_loglike.shape[0]} draws: "
          f"{t_all:.2f} s with figures, {t_nofig:.2f} s without")


if __name__ == "__main__":
    main()
