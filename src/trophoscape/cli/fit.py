"""The ``trophoscape fit`` command: set a scenario's values from survey counts.

Registered by ``cli.program`` through ``COMMAND_MODULES`` (``add_parser``). The work and the
folder are :func:`trophoscape.report.fitting.fit_to_folder`'s; this module parses and prints.
"""

from __future__ import annotations

import argparse
from pathlib import Path

__all__ = ["add_parser"]

EPILOG = ("examples:\n  trophoscape fit valley.toml --counts surveys.csv --out results/fit\n"
          "  trophoscape run results/fit/fitted.toml --out results/fitted-run")


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Register ``fit`` on the CLI's subparsers."""
    p = subparsers.add_parser(
        "fit", help="estimate the scenario's [fit] values from survey counts",
        description="Estimate the values the scenario's [fit] section names from counts per "
                    "patch and time (columns patch_id,time,species,count), with 95 % "
                    "intervals; write the estimates, the fitted scenario, figures and a "
                    "report.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    from .program import out_options

    p.add_argument("scenario", type=Path, help="scenario file (TOML) with a [fit] section")
    p.add_argument("--counts", type=Path, required=True, metavar="COUNTS.csv",
                   help="survey counts: patch_id,time,species,count")
    out_options(p)
    p.add_argument("--workers", type=int, default=None,
                   help="processes for the model runs (default: all cores)")
    p.add_argument("--no-plots", action="store_true", help="skip the figures and the report")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    p.set_defaults(handler=run_command)
    return p


def run_command(args) -> int:
    """Handler of ``trophoscape fit``; returns the exit code."""
    from ..report.fitting import fit_to_folder

    fit = fit_to_folder(args.scenario, args.counts, args.out, workers=args.workers,
                        plots=not args.no_plots, force=args.force, progress=not args.quiet)
    if not args.quiet:
        print(f"wrote {args.out}")
        for key, value in fit.estimates.items():
            print(f"  {key} = {value:.4g} (95 % interval {fit.low[key]:.4g} to "
                  f"{fit.high[key]:.4g})")
        print(f"  log-likelihood {fit.log_likelihood:.6g}, AIC {fit.aic:.6g}; "
              f"{fit.agreeing} of {fit.starts} starts agree; {fit.evaluations} model runs")
        for text in fit.warnings:
            print(f"  caution: {text}")
    return 0
