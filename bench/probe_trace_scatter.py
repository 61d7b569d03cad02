"""Are the traced points' stated errors honest?  Normalised scatter of traced
positions on the calibration set-up (bench/calibration_small.toml; a 2 M_J
planet at 110 au, 30 deg, true geometry): each noisy cube is traced, the
generator's noise-free cube is traced at the same cuts, and the along-cut
difference over the stated 1-sigma error should have unit standard deviation.

    python bench/probe_trace_scatter.py [NSEEDS]     (~10 s per seed)

Measured 2026-12-05 on 6 seeds (466 points): std 0.92 with the per-channel
noise from the negative pixels; 0.75 with the whole-plane mad_std before.
"""
import pathlib
import sys
import tempfile
from dataclasses import replace

import numpy as np
from astropy.stats import mad_std

from kinkfit.config import SynthTruth, load_config
from kinkfit.cube import read_cube
from kinkfit.scenario import synth_from_config
from kinkfit.trace import trace_ridges


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    nseeds = int(argv[0]) if argv else 6
    tmp = pathlib.Path(tempfile.mkdtemp())
    cfg = load_config(str(pathlib.Path(__file__).resolve().parent / "calibration_small.toml"))
    truth = SynthTruth(mass_mjup=2.0, radius_au=110, azimuth_deg=30, damping="none",
                       alpha=0.0, efold=float("inf"))
    geom = cfg.geometry()
    clean = read_cube(synth_from_config(cfg, output=tmp / "clean.fits", truth=truth,
                                        noise=False, overwrite=True))
    quiet = replace(cfg.trace, min_snr=0.0)
    zs = []
    for seed in range(nseeds):
        noisy = read_cube(synth_from_config(cfg, output=tmp / f"n{seed}.fits", truth=truth,
                                            seed=seed, overwrite=True))
        r = trace_ridges(noisy, geom, cfg.trace)
        c = trace_ridges(clean, geom, quiet, cuts=r.cuts(), max_sigma_beams=np.inf)
        idx = np.asarray(c.meta["index"], int)
        d = ((r.x_arcsec[idx] - c.x_arcsec) * r.dir_x[idx]
             + (r.y_arcsec[idx] - c.y_arcsec) * r.dir_y[idx])
        z = d / r.sigma_arcsec[idx]
        zs.append(z)
        print(seed, len(r), len(c), "std z %.3f" % np.std(z),
              "median noise", np.median(noisy.noise_per_channel))
    z = np.concatenate(zs)
    print("all: n", z.size, "std %.3f  mad_std %.3f  mean %.3f"
          % (np.std(z), mad_std(z), np.mean(z)))


if __name__ == "__main__":
    main()
