"""Are the traced kinks' errors honest, and how large are the kinks at the
true planet?  chi2 / N and the best amplitude of the model kinks at the truth.

    python bench/probe_kinks_at_truth.py CONFIG STATE.json RUN_FOLDER
        [--inj 0 4 5 ...]

For each injection of ``RUN_FOLDER`` (the known-background refits of
``bench/probe_calibration_background.py``) the likelihood is built as
``bench/probe_likelihood_sbc.py`` builds it; printed: number of points,
chi2 / N of the traced kinks against the model kinks of the true planet
(jitter 0), the median point sigma, the rms model kink in sigmas, and the
weighted least-squares scale ``a`` of the model kinks (data ~ a * model) with
its formal error.  A diagnostic; results: docs/calibration.md.
"""

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from probe_likelihood_sbc import (campaign_parser,  # noqa: E402
                                  known_background_injections,
                                  known_background_likelihood)


def main(argv=None):
    ap = campaign_parser(__doc__)
    ap.add_argument("--inj", type=int, nargs="*", default=[0, 4, 5, 6, 7, 8, 9, 10, 12, 14])
    args = ap.parse_args(argv)
    scales = []
    for inj in known_background_injections(args, set(args.inj)):
        like, pset, _ = known_background_likelihood(inj, args.run_folder)
        pred = like.predict_offset(pset.pack({n: inj.values[n] for n in pset.free}))[0]
        d, s = like.data["offset_arcsec"], like.data["sigma_arcsec"]
        a = np.sum(d * pred / s ** 2) / np.sum(pred ** 2 / s ** 2)
        ea = 1.0 / np.sqrt(np.sum(pred ** 2 / s ** 2))
        scales.append(a)
        print(f"inj {inj.index}: n {d.size} chi2/N at truth {np.mean(((d - pred) / s) ** 2):.3f}"
              f"  median sigma {np.median(s) * 1e3:.1f} mas  model rms/sigma "
              f"{np.sqrt(np.mean((pred / s) ** 2)):.2f}  amplitude {a:.3f} +- {ea:.3f}",
              flush=True)
    a = np.array(scales)
    if a.size > 1:
        print(f"mean amplitude {a.mean():.3f} +- {a.std(ddof=1) / np.sqrt(a.size):.3f}")


if __name__ == "__main__":
    main()
