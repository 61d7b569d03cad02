"""Command-line interface: ``kinkfit <command> ...``.

A thin layer: parse arguments, call the library function that does the work,
map :class:`kinkfit.errors.KinkfitError` to a one-line message and an exit
status (2 bad input, 1 failed run).  Every command is also a documented Python
function, named in its handler below.
"""

from __future__ import annotations

import argparse
import logging
import sys

from . import __version__
from .errors import KinkfitError

__all__ = ["main", "build_parser"]

log = logging.getLogger("kinkfit")


# --------------------------------------------------------------------------
# handlers: one per command, each a few lines calling library code
# --------------------------------------------------------------------------

def _cmd_inspect(args) -> int:
    from .cube import describe_cube, read_cube
    cube = read_cube(args.cube)
    print(describe_cube(cube, as_json=args.json))
    return 0


def _cmd_synth(args) -> int:
    from .config import load_config
    from .scenario import synth_from_config
    cfg = load_config(args.config)
    path = synth_from_config(cfg, output=args.output, overwrite=args.force)
    print(f"wrote {path}")
    return 0


def _cmd_montage(args) -> int:
    from .plots import save_channel_montage
    path = save_channel_montage(args.cube, output=args.output,
                                ncols=args.columns, nchan=args.channels)
    print(f"wrote {path}")
    return 0


def _cmd_batch(args) -> int:
    from .batch import run_batch
    run = run_batch(args.manifest, scheduler=args.scheduler,
                    workers=args.workers, resume=args.resume,
                    restart=args.restart)
    print(f"{len(run.ran)} task(s) run, {len(run.skipped)} already complete; "
          f"state in {run.state_path}")
    for path in run.products:
        print(f"wrote {path}")
    for name in run.failed:
        s = run.summaries[name]
        print(f"kinkfit: error: task {name} {s.get('status', 'failed')}: "
              f"{s.get('error') or 'no result'}", file=sys.stderr)
    if run.not_converged:
        print(f"kinkfit: warning: not converged: "
              f"{', '.join(run.not_converged)} (see their reports)",
              file=sys.stderr)
    return 1 if (run.failed or run.not_converged) else 0


def _cmd_trace(args) -> int:
    from .config import load_config
    from .trace import TRACE_FILE_NAME, run_trace, write_trace_file
    cfg = load_config(args.config)
    out = args.output or (cfg.output.folder / TRACE_FILE_NAME)
    overwrite = args.force or cfg.output.overwrite
    from pathlib import Path
    if Path(out).exists() and not overwrite:
        from .errors import ResultFileError
        raise ResultFileError(f"{out} exists; set output.overwrite = true or "
                              f"pass --force", file=out, key="output.overwrite")
    from .trace import load_cube
    cube = load_cube(cfg)
    ridges, fit, dev = run_trace(cfg, cube=cube)
    path = write_trace_file(out, ridges, fit, dev, cfg=cfg, overwrite=overwrite)
    print(f"traced {len(ridges)} ridge points; rejected: "
          f"{ridges.meta.get('rejected')}")
    if fit is not None:
        print(fit.summary())
    print(f"wrote {path}")
    if not args.no_figures:
        from .plots.gallery import save_trace_figures
        geom = fit.geometry if fit is not None else cfg.geometry()
        for p in save_trace_figures(cube, ridges, geom, dev, Path(out).parent):
            print(f"wrote {p}")
    return 0


def _cmd_disk(args) -> int:
    from .config import load_config
    from .trace import run_trace
    cfg = load_config(args.config)
    out = args.output or (cfg.output.folder / "background.ecsv")
    overwrite = args.force or cfg.output.overwrite
    from pathlib import Path
    from .errors import ResultFileError
    if Path(out).exists() and not overwrite:
        raise ResultFileError(f"{out} exists; set output.overwrite = true or "
                              f"pass --force", file=out, key="output.overwrite")
    _, fit, _ = run_trace(cfg, fit_background=True)
    print(fit.summary())
    Path(out).parent.mkdir(parents=True, exist_ok=True)
    fit.table().write(out, format="ascii.ecsv", overwrite=True)
    print(f"wrote {out}")
    return 0


def _cmd_fit(args) -> int:
    from .config import load_config
    from .pipeline import run_fit
    cfg = load_config(args.config)
    run = run_fit(cfg, force=args.force, resume=not args.restart,
                  workers=args.workers,
                  progress=False if args.no_progress else None)
    for name, path in run.results.items():
        state = "converged" if run.converged[name] else "NOT converged"
        print(f"{name:>10}: {path}  ({state}; {run.status[name]})")
        print(f"{'':>10}  report: {run.reports[name]}")
    if run.comparison is not None:
        print(f"comparison: {run.comparison}")
    print(f"done in {run.seconds:.1f} s; outputs in {run.output_folder}")
    if not all(run.converged.values()):
        print("kinkfit: warning: some chains did not converge; see the "
              "reports (exit status 1)", file=sys.stderr)
        return 1
    return 0


def _cmd_report(args) -> int:
    from .pipeline import regenerate_report
    paths = regenerate_report(args.result, output=args.output, cube=args.cube)
    for p in paths:
        print(f"wrote {p}")
    return 0


def _cmd_wake(args) -> int:
    import math

    from .config import SynthTruth, load_config
    from .plots.wake import plot_wake_maps
    from .scenario import damping_of, wake_disk
    from .wake.model import Planet
    cfg = load_config(args.config)
    truth = cfg.synth.truth if cfg.synth is not None else None
    if truth is None:
        truth = SynthTruth(1.0, 100.0, 0.0, cfg.wake.damping[0], 1e-3, math.inf)
    mass = truth.mass_mjup if args.mass is None else args.mass
    radius = truth.radius_au if args.radius is None else args.radius
    azimuth = truth.azimuth_deg if args.azimuth is None else args.azimuth
    kind = truth.damping if args.damping is None else args.damping
    planet = Planet(mass_mjup=mass, r_au=radius, phi_rad=math.radians(azimuth))
    fig = plot_wake_maps(planet, wake_disk(cfg),
                         damping_of(kind, truth.alpha if args.alpha is None
                                    else args.alpha,
                                    truth.efold if args.efold is None
                                    else args.efold))
    out = args.output or f"wake_{cfg.path.stem if cfg.path else 'config'}.png"
    fig.savefig(out, dpi=110)
    print(f"wrote {out}")
    return 0


def _cmd_compare(args) -> int:
    from pathlib import Path
    from .compare import compare_results
    folder = (Path(args.output) if args.output
              else Path(args.results[0]).parent / "comparison")
    path = compare_results(args.results, folder, reference=args.reference,
                           overwrite=args.force,
                           allow_mismatch=args.allow_mismatch)
    print(f"wrote {path}")
    for name in sorted(p.name for p in folder.glob("comparison*")
                       if p.name != path.name):
        print(f"wrote {folder / name}")
    return 0


def _cmd_forecast(args) -> int:
    from pathlib import Path
    from .config import load_config
    from .forecast import (DEFAULT_MASSES_MJUP, DEFAULT_OFFSETS_KMS,
                           forecast_from_config, save_forecast_products)
    cfg = load_config(args.config)
    res = forecast_from_config(
        cfg, masses_mjup=args.masses or DEFAULT_MASSES_MJUP,
        offsets_kms=args.offsets or DEFAULT_OFFSETS_KMS,
        beams_arcsec=args.beams, channel_widths_kms=args.channel_widths,
        threshold=args.threshold)
    folder = Path(args.output) if args.output else cfg.output.folder / "forecast"
    best = res.min_mass_any()
    for i, fw in enumerate(res.beam_fwhm_arcsec):
        for j, cw in enumerate(res.channel_widths_kms):
            print(f"beam {fw:.3g}\" channel {cw:.3g} km/s: minimum mass "
                  f"{best[i, j]:.3g} Mjup (kink > {res.threshold:g} x position "
                  f"error; conditional on the wake model)")
    for path in save_forecast_products(res, folder):
        print(f"wrote {path}")
    return 0


def _cmd_calibrate(args) -> int:
    from .calibrate import run_calibration
    from .config import load_config
    cfg = load_config(args.config)
    run = run_calibration(cfg, injections=args.injections,
                          seed=cfg.sampler.seed if args.seed is None else args.seed,
                          damping=args.damping, workers=args.workers,
                          resume=args.resume, folder=args.output)
    print(f"{len(run.ran)} injection(s) run, {len(run.skipped)} already "
          f"complete, {len(run.failed)} failed; state in {run.state_path}")
    for path in run.products:
        print(f"wrote {path}")
    return 1 if run.failed else 0


def _cmd_not_ready(args) -> int:
    raise KinkfitError(f"command '{args.command}' is not available in this "
                       f"version of kinkfit")


# --------------------------------------------------------------------------
# parser
# --------------------------------------------------------------------------

def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser (exposed for documentation and tests)."""
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", action="count", default=0,
                        help="more log output (repeat for debug)")

    parser = argparse.ArgumentParser(
        prog="kinkfit",
        description="Planet posteriors from kinks in protoplanetary-disk "
                    "line cubes.")
    parser.add_argument("--version", action="version",
                        version=f"kinkfit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser("inspect", parents=[common],
                       help="show what the reader understands of a FITS cube")
    p.add_argument("cube", help="FITS spectral cube")
    p.add_argument("--json", action="store_true",
                   help="machine-readable output")
    p.set_defaults(handler=_cmd_inspect)

    p = sub.add_parser("synth", parents=[common],
                       help="write a synthetic cube from a config's [synth] "
                            "section")
    p.add_argument("config", help="TOML config")
    p.add_argument("-o", "--output", default=None,
                   help="output FITS path (default: the config's data.cube)")
    p.add_argument("--force", action="store_true",
                   help="overwrite an existing file")
    p.set_defaults(handler=_cmd_synth)

    p = sub.add_parser("trace", parents=[common],
                       help="trace the ridges, fit the background disk, "
                            "measure the deviations (HDF5)")
    p.add_argument("config", help="TOML config")
    p.add_argument("-o", "--output", default=None,
                   help="output HDF5 (default: <output.folder>/trace.h5)")
    p.add_argument("--force", action="store_true",
                   help="overwrite an existing file")
    p.add_argument("--no-figures", action="store_true",
                   help="skip the channel gallery and deviation map PNGs")
    p.set_defaults(handler=_cmd_trace)

    p = sub.add_parser("disk", parents=[common],
                       help="fit the background disk to the traced ridges "
                            "and print it (ECSV)")
    p.add_argument("config", help="TOML config")
    p.add_argument("-o", "--output", default=None,
                   help="output ECSV (default: <output.folder>/background.ecsv)")
    p.add_argument("--force", action="store_true",
                   help="overwrite an existing file")
    p.set_defaults(handler=_cmd_disk)

    p = sub.add_parser("fit", parents=[common],
                       help="the whole job: background disk, tracing, planet "
                            "posterior(s), reports")
    p.add_argument("config", help="TOML config")
    p.add_argument("--force", action="store_true",
                   help="refit and replace existing results")
    p.add_argument("--restart", action="store_true",
                   help="ignore unfinished checkpoints and start afresh")
    p.add_argument("--workers", type=int, default=None,
                   help="processes for the likelihood (default: "
                        "sampler.workers)")
    p.add_argument("--no-progress", action="store_true",
                   help="no progress bar")
    p.set_defaults(handler=_cmd_fit)

    p = sub.add_parser("report", parents=[common],
                       help="regenerate tables, figures and report.md from a "
                            "result file")
    p.add_argument("result", help="result HDF5 written by 'kinkfit fit'")
    p.add_argument("-o", "--output", default=None,
                   help="output folder (default: next to the result)")
    p.add_argument("--cube", default=None,
                   help="FITS cube to check against the recorded checksum")
    p.set_defaults(handler=_cmd_report)

    p = sub.add_parser("wake", parents=[common],
                       help="draw the planet's wake (dv_r, dv_phi, dSigma/Sigma "
                            "maps and locus) for a config")
    p.add_argument("config", help="TOML config (planet from [synth.truth] "
                                  "unless given below)")
    p.add_argument("-o", "--output", default=None, help="PNG path")
    p.add_argument("--mass", type=float, default=None, help="planet mass, Mjup")
    p.add_argument("--radius", type=float, default=None, help="orbital radius, au")
    p.add_argument("--azimuth", type=float, default=None,
                   help="azimuth from the red-shifted major axis, deg")
    p.add_argument("--damping", choices=("none", "viscous", "efold"),
                   default=None, help="damping assumption")
    p.add_argument("--alpha", type=float, default=None, help="viscous alpha")
    p.add_argument("--efold", type=float, default=None,
                   help="e-folding length / r_p")
    p.set_defaults(handler=_cmd_wake)

    p = sub.add_parser("montage", parents=[common],
                       help="draw a cube's channel maps as one PNG")
    p.add_argument("cube", help="FITS spectral cube")
    p.add_argument("-o", "--output", default=None,
                   help="PNG path (default: next to the cube)")
    p.add_argument("--columns", type=int, default=6,
                   help="panels per row (default 6)")
    p.add_argument("--channels", type=int, default=24,
                   help="number of channels shown, evenly spaced (default 24)")
    p.set_defaults(handler=_cmd_montage)

    p = sub.add_parser("batch", parents=[common],
                       help="run the fits of a survey manifest as Dask tasks")
    p.add_argument("manifest", help="TOML survey manifest")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="address of a running Dask scheduler (default: a "
                        "local cluster)")
    p.add_argument("--workers", type=int, default=2,
                   help="local worker processes (default 2)")
    p.add_argument("--resume", action="store_true",
                   help="continue: skip complete tasks, resume the others")
    p.add_argument("--restart", action="store_true",
                   help="start over: rerun every task, replace results")
    p.set_defaults(handler=_cmd_batch)

    p = sub.add_parser("compare", parents=[common],
                       help="compare fits of the same traced data (damping "
                            "assumptions, planet-free baseline): PSIS-LOO, "
                            "shifts, overlaid corner plot")
    p.add_argument("results", nargs="+", metavar="RESULT",
                   help="result HDF5 files written by 'kinkfit fit'")
    p.add_argument("-o", "--output", default=None, metavar="FOLDER",
                   help="output folder (default: comparison/ next to the "
                        "first result)")
    p.add_argument("--reference", default=None, metavar="NAME",
                   help="assumption the shifts are measured from (default: "
                        "the first planet fit)")
    p.add_argument("--allow-mismatch", action="store_true",
                   help="compare even if cubes, traced data or priors differ")
    p.add_argument("--force", action="store_true",
                   help="replace an existing comparison")
    p.set_defaults(handler=_cmd_compare)

    p = sub.add_parser("forecast", parents=[common],
                       help="kink amplitude vs planet mass and the minimum "
                            "detectable mass for the [synth] observing setup")
    p.add_argument("config", help="TOML config (needs [synth] and [synth.truth] "
                                  "for the planet position)")
    p.add_argument("--masses", type=float, nargs="+", default=None,
                   metavar="MJUP", help="planet masses, Jupiter masses")
    p.add_argument("--offsets", type=float, nargs="+", default=None,
                   metavar="KMS", help="channel velocity minus the planet's "
                                       "line-of-sight velocity, km/s")
    p.add_argument("--beams", type=float, nargs="+", default=None,
                   metavar="ARCSEC", help="circular beam FWHMs, arcsec "
                                          "(default: the config's beam)")
    p.add_argument("--channel-widths", type=float, nargs="+", default=None,
                   metavar="KMS", help="channel widths, km/s (default: the "
                                       "config's)")
    p.add_argument("--threshold", type=float, default=3.0,
                   help="detection multiple of a ridge point's position "
                        "error (default 3)")
    p.add_argument("-o", "--output", default=None, metavar="FOLDER",
                   help="output folder (default: <output.folder>/forecast)")
    p.set_defaults(handler=_cmd_forecast)

    p = sub.add_parser("calibrate", parents=[common],
                       help="injection-recovery campaign: coverage, rank "
                            "histograms and bias of the posteriors")
    p.add_argument("config", help="TOML config (needs [synth])")
    p.add_argument("--injections", type=int, default=100,
                   help="planets drawn from the prior (default 100)")
    p.add_argument("--workers", type=int, default=1,
                   help="parallel injection processes (default 1)")
    p.add_argument("--resume", action="store_true",
                   help="continue a campaign: skip finished injections")
    p.add_argument("--seed", type=int, default=None,
                   help="campaign seed (default: sampler.seed)")
    p.add_argument("--damping", default=None,
                   help="assumption injected and fitted (default: the first "
                        "of wake.damping)")
    p.add_argument("-o", "--output", default=None, metavar="FOLDER",
                   help="campaign folder (default: <output.folder>/calibration)")
    p.set_defaults(handler=_cmd_calibrate)

    return parser


def _configure_logging(verbosity: int) -> None:
    level = logging.WARNING - 10 * min(verbosity, 2)
    logging.basicConfig(level=level, format="kinkfit: %(levelname)s: %(message)s")


def main(argv=None) -> int:
    """Run the CLI; returns the exit status (also used by the entry point)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    _configure_logging(getattr(args, "verbose", 0))
    try:
        return int(args.handler(args) or 0)
    except KinkfitError as exc:
        print(f"kinkfit: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("kinkfit: interrupted; partial results are kept where the "
              "command writes checkpoints", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
