"""The ``trophoscape sweep`` command: a thin shell over :func:`trophoscape.report.sweep.sweep`."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

__all__ = ["add_parser", "handle"]

EPILOG = """examples:
  trophoscape sweep valley.toml --vary prey.growth_rate=0.5:1.5:11 \\
      --vary dispersal.max_distance_km=5,10,20 --out sweeps/valley
  trophoscape sweep valley.toml --table points.csv --replicates 4 --out sweeps/points
  trophoscape sweep valley.toml --vary patches.path=option_a.gpkg,option_b.gpkg --out sweeps/ab
  trophoscape sweep valley.toml --vary prey.growth_rate=0.5:1.5:11 --out sweeps/valley --resume
  trophoscape sweep valley.toml --vary prey.growth_rate=0.5:1.5:11 --out sweeps/valley \\
      --scheduler tcp://scheduler.example.org:8786

VALUES is START:STOP:COUNT (COUNT evenly spaced numbers, both ends included) or a comma
list of numbers or words. Several --vary give every combination of their values.
Exit codes: 0 when at least one run succeeded (failed runs are listed in sweep.csv with
their error), 1 when every run failed, 2 for bad input, 130 after Ctrl-C and 143 after
SIGTERM (finished runs are kept; continue with --resume). OUT is made when the sweep starts
and holds the ledger from then on; sweep.csv and plots/ appear whole when it ends."""


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {value}")
    return value


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Register ``sweep`` with the command line's subparsers."""
    from .program import out_options

    p = subparsers.add_parser(
        "sweep", help="run a scenario over a grid or table of parameter values",
        description="Run a scenario for every combination of the varied values (and every "
                    "replicate), on all cores or a Dask cluster, recording each finished run "
                    "in a ledger; write sweep.csv, per-run summaries and plots.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("scenario", type=Path, help="scenario file (TOML)")
    p.add_argument("--vary", action="append", default=[], metavar="KEY=VALUES",
                   help="a scenario key (section.key) and its values; repeat for more keys")
    p.add_argument("--table", type=Path, metavar="FILE.csv",
                   help="sweep table: one column per scenario key, one row per point")
    p.add_argument("--replicates", type=_positive_int, default=1, metavar="R",
                   help="runs per point (default 1)")
    out_options(p, help="output folder of the sweep")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_positive_int, metavar="N",
                       help="local processes (default: all cores)")
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="address of a running Dask scheduler, e.g. tcp://host:8786")
    where.add_argument("--dask-local", type=_positive_int, metavar="N",
                       help="start a Dask cluster of N workers on this machine (loopback)")
    p.add_argument("--resume", action="store_true",
                   help="continue the sweep in --out: skip finished runs, re-run failed ones")
    p.add_argument("--no-plots", action="store_true", help="skip the PNG plots")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    p.set_defaults(handler=handle)
    return p


def handle(args) -> int:
    """Run the sweep; return the exit code (InputError / RunError go up to ``cli.program.main``)."""
    from ..errors import InputError, Terminated, clear_stop
    from ..io.folder import written_count, written_since
    from ..report.sweep import sweep
    from ..workflows.sweep import LEDGER_NAME, TABLE_NAME

    if not args.vary and args.table is None:
        raise InputError("nothing to vary: give --vary KEY=VALUES or --table FILE.csv",
                         field="--vary")
    mark = written_count()
    try:
        frame = sweep(args.scenario, args.vary, out=args.out, replicates=args.replicates,
                      workers=args.workers, scheduler=args.scheduler,
                      dask_local=args.dask_local, resume=args.resume, table=args.table,
                      plots=not args.no_plots, progress=not args.quiet,
                      force=args.force)
    except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM (errors.Terminated)
        if not (args.out / LEDGER_NAME).exists() or written_since(mark):
            raise  # stopped before the first run began, or after the table was in place
        clear_stop()  # handled here: the command ends with this line and code
        stopped = "terminated" if isinstance(exc, Terminated) else "interrupted"
        print(f"{stopped}; the finished runs are kept in {args.out / LEDGER_NAME}; run the "
              "same command with --resume to finish the sweep", file=sys.stderr)
        return getattr(exc, "exit_code", 130)
    failed = frame[frame["status"] != "ok"]
    if not args.quiet:
        print(f"wrote {args.out / TABLE_NAME}: {len(frame)} run(s), {len(frame) - len(failed)} "
              f"ok, {len(failed)} failed")
    for _, row in failed.head(5).iterrows():
        print(f"warning: run {row['run_id']} failed: {row['error']}", file=sys.stderr)
    if len(failed) > 5:
        print(f"warning: {len(failed) - 5} more failed run(s); see the error column",
              file=sys.stderr)
    return 0
