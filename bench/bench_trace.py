"""Benchmark: tracing a 512 x 512 x 120 cube (time and memory).

Not a test: prints numbers.  Run with
``python bench/bench_trace.py [--npix 512 --nchan 120]``.

The cube is a synthetic disk from :func:`kinkfit.synth.make_cube`
(oversample 1 to keep the set-up short), beam 0.06", pixel 0.02", float32.
Measured: wall time of :func:`kinkfit.trace.trace_ridges` (both surfaces),
peak of the memory it allocates (``tracemalloc``, which numpy reports to)
relative to the cube's size, and the process's maximum resident set size.
Bars from the issue: <= 30 s and <= 2x the cube's memory.
"""

import argparse
import resource
import time
import tracemalloc

import numpy as np

from kinkfit.config import TraceSettings
from kinkfit.cube import Cube
from kinkfit.geometry import DiskGeometry, EmittingSurface
from kinkfit.synth import LineEmission, ObservingSetup, beam_noise, make_cube, sky_grid
from kinkfit.trace import trace_ridges


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--npix", type=int, default=512)
    ap.add_argument("--nchan", type=int, default=120)
    args = ap.parse_args()
    geom = DiskGeometry(1.0, 60.0, 40.0, 130.0, 1, 0.0, 0.0, 5.0,
                        EmittingSurface(0.2, 1.25, 100.0), None, 280.0, 10.0)
    setup = ObservingSetup(npix=args.npix, pixel_arcsec=0.02, nchan=args.nchan,
                           channel_width_kms=0.1, beam_major_arcsec=0.06,
                           beam_minor_arcsec=0.06, peak_snr=20.0, oversample=1)
    em = LineEmission(peak_jy_beam=0.05, r_char_au=200.0, r_out_au=280.0)
    t0 = time.perf_counter()
    clean, vel = make_cube(geom, setup, em, noise=False)
    rms = float(clean.max()) / 20.0
    data = (clean + beam_noise(setup, rms, np.random.default_rng(1))).astype(np.float32)
    del clean
    x, y = sky_grid(setup)
    n = vel.size
    cube = Cube(data=data, velocity_kms=vel, x_arcsec=x, y_arcsec=y,
                pixel_arcsec=0.02, beam_major_arcsec=np.full(n, 0.06),
                beam_minor_arcsec=np.full(n, 0.06), beam_pa_deg=np.zeros(n),
                noise_per_channel=np.full(n, rms), noise=rms, bunit="Jy/beam",
                bunit_raw="Jy/beam", rest_frequency_hz=230.538e9,
                channel_width_kms=0.1, centre_ra_deg=0.0, centre_dec_deg=0.0)
    t_setup = time.perf_counter() - t0
    settings = TraceSettings(("front", "back"), 4.0, 1.0, True)
    tracemalloc.start()
    t0 = time.perf_counter()
    ridges = trace_ridges(cube, geom, settings)
    t_trace = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    mb = cube.data.nbytes / 2 ** 20
    print(f"cube {args.npix}x{args.npix}x{args.nchan} float32: {mb:.0f} MiB "
          f"(set-up {t_setup:.1f} s)")
    print(f"trace_ridges: {t_trace:.2f} s, {len(ridges)} points "
          f"({len(ridges) / args.nchan:.0f} per channel)")
    print(f"peak memory allocated while tracing: {peak / 2 ** 20:.0f} MiB "
          f"= {peak / cube.data.nbytes:.2f} x cube")
    print(f"process max RSS: {maxrss:.0f} MiB")
    print(f"rejections: {ridges.meta['rejected']}")


if __name__ == "__main__":
    main()
