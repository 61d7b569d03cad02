"""Benchmark: tracing a 512 x 512 x 120 cube (time and memory).

Not a test: prints numbers.  Run with
``python bench/bench_trace.py [--npix 512 --nchan 120 --max-sigma-beams S]``.

The cube is a synthetic disk from :func:`kinkfit.synth.make_cube`
(oversample 1 to keep the set-up short), beam 0.06", pixel 0.02", float32.
Measured, side by side with the cube's own size: wall time of
:func:`kinkfit.trace.trace_ridges` (both surfaces, default settings) in a
plain run, the peak of the memory it allocates in a second run under
``tracemalloc`` (which numpy reports its buffers to), the process's maximum
resident set size before and after tracing, and the fraction of curve
samples that become points.
Bars from the issue: <= 30 s and <= 2x the cube's memory.
"""

import argparse
import dataclasses
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
    ap.add_argument("--max-sigma-beams", type=float, default=None,
                    help="trace.max_sigma_beams (default: the config default)")
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
    if args.max_sigma_beams is not None:
        settings = dataclasses.replace(settings,
                                       max_sigma_beams=args.max_sigma_beams)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    # run 1: wall time, no memory tracing (tracemalloc slows allocation)
    t0 = time.perf_counter()
    ridges = trace_ridges(cube, geom, settings)
    t_trace = time.perf_counter() - t0
    rss_after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    # run 2: peak of the memory allocated while tracing (numpy reports its
    # buffers to tracemalloc)
    tracemalloc.start()
    t0 = time.perf_counter()
    trace_ridges(cube, geom, settings)
    t_traced = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    mb = cube.data.nbytes / 2 ** 20
    rej = ridges.meta["rejected"]
    samples = len(ridges) + sum(rej.values())
    print(f"cube {args.npix}x{args.npix}x{args.nchan} float32: {mb:.0f} MiB "
          f"(set-up {t_setup:.1f} s)")
    print(f"trace_ridges wall time: {t_trace:.2f} s (bar 30 s); "
          f"{t_traced:.2f} s under tracemalloc")
    print(f"peak memory allocated while tracing: {peak / 2 ** 20:.0f} MiB "
          f"= {peak / cube.data.nbytes:.2f} x cube (bar 2 x)")
    print(f"process max RSS: {rss_before:.0f} MiB before tracing (set-up), "
          f"{rss_after:.0f} MiB after")
    print(f"points: {len(ridges)} of {samples} curve samples "
          f"({len(ridges) / max(samples, 1):.0%}; max_sigma_beams "
          f"{settings.max_sigma_beams}), {len(ridges) / args.nchan:.0f} per "
          f"channel")
    print(f"rejections: {rej}")

if __name__ == "__main__":
    main()
