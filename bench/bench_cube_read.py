"""Time kinkfit.cube.read_cube on an ALMA-sized synthetic cube, side by side
with its parts (plain astropy data load, SHA-256 of the file, WCS offsets).

Run: ``python bench/bench_cube_read.py [nchan ny nx]``.  Prints seconds; no
assertion (timings never go into tests).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from astropy.io import fits

from kinkfit.cube import _sha256, read_cube, write_cube


def _best(fn, repeat=3):
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main(nchan=60, ny=512, nx=512):
    rng = np.random.default_rng(0)
    data = rng.normal(0.0, 0.003, (nchan, ny, nx)).astype(np.float32)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "bench.fits"
        t_write = _best(lambda: write_cube(
            path, data, velocity_kms=np.linspace(-3, 3, nchan), pixel_arcsec=0.03,
            rest_frequency_hz=230.538e9, beam=(0.12, 0.1, 20.0), ra_deg=150.0,
            dec_deg=-35.0, overwrite=True), repeat=1)
        size_mb = path.stat().st_size / 1e6
        t_astropy = _best(lambda: np.array(fits.getdata(path), dtype=np.float32))
        t_sha = _best(lambda: _sha256(path))
        t_read = _best(lambda: read_cube(path))
    print(f"cube {nchan} x {ny} x {nx} float32, {size_mb:.1f} MB")
    print(f"write_cube                     {t_write:8.3f} s")
    print(f"astropy getdata + float32 copy {t_astropy:8.3f} s")
    print(f"sha256 of the file             {t_sha:8.3f} s")
    print(f"read_cube (all of the above)   {t_read:8.3f} s")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:4]))
